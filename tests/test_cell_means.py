"""Per-cell long-term means (the disagreement map's data), formed in the extraction's single pass.

References: xarray's own ``.mean("time")`` (skipna) of the product's decoded months times the
canonical-unit factor, on the subset of cells each basin touches (CF decoding of packing and fill values
by xarray's ``mask_and_scale``; daily values summed to months by xarray's own ``resample``); shapely's
planar intersection areas in grid coordinates for the coverage fraction (exactextract's definition of a
cell's coverage fraction: the share of the cell's area, in grid coordinates, inside the polygon).
"""

import os
import warnings

import numpy as np
import pandas as pd
import pytest
import shapely
import xarray as xr

from utils import box_basins, lonlat_grid, write_catalog, write_nc
from wbexplore.io.catalog import open_catalog
from wbexplore.io.grids import open_source
from wbexplore.pipeline import extract, load_basins, load_cell_means, load_series, weights_for
from wbexplore.spatial.areas import cell_areas_m2
from wbexplore.spatial.grid import describe_grid

LON, LAT = lonlat_grid(-2, 2, 10, 13, 0.25)
BOXES = [(-1.6, 10.3, -0.2, 11.9), (-0.9, 11.05, 1.7, 12.8)]
NT = 26
MONTHS = pd.date_range("2003-01-01", periods=NT, freq="MS")


def _field(nt, seed=5):
    rng = np.random.default_rng(seed)
    t = np.arange(nt)[:, None, None]
    v = 3 + np.sin(t / 4 + LON[None, None, :]) + 0.2 * LAT[None, :, None] + rng.normal(0, 0.3, (nt, LAT.size, LON.size))
    v[:, rng.random((LAT.size, LON.size)) < 0.1] = np.nan  # cells that never have data
    v[rng.random(v.shape) < 0.03] = np.nan  # scattered missing steps
    return v


def _monthly_nc(folder):
    write_nc(folder / "p.nc", _field(NT), LON, LAT, MONTHS, var="p", units="mm/day")
    return {"id": "p", "component": "P", "path": "p.nc", "variable": "p"}


def _daily_nc(folder):
    days = pd.date_range("2003-01-01", "2004-06-30", freq="D")
    write_nc(folder / "e.nc", _field(days.size, seed=8) / 2, LON, LAT, days, var="e", units="mm/day")
    return {"id": "e", "component": "ET", "path": "e.nc", "variable": "e"}


def _packed_twsa(folder):
    vals = 40 * np.sin(np.arange(NT)[:, None, None] / 3) + 5 * LON[None, None, :] + 0 * LAT[None, :, None]
    vals = vals + np.random.default_rng(2).normal(0, 1, vals.shape)
    vals[:, 3, 4] = np.nan
    vals[5:9, 6, 7] = np.nan
    da = xr.DataArray(vals, dims=("time", "lat", "lon"), coords={"time": MONTHS, "lat": LAT, "lon": LON},
                      attrs={"units": "cm"})
    da["lat"].attrs = {"units": "degrees_north", "standard_name": "latitude"}
    da["lon"].attrs = {"units": "degrees_east", "standard_name": "longitude"}
    xr.Dataset({"s": da}).to_netcdf(folder / "s.nc", encoding={"s": {"dtype": "int16", "scale_factor": 0.01,
                                                                     "add_offset": 3.0, "_FillValue": -32768}})
    return {"id": "s", "component": "TWSA", "path": "s.nc", "variable": "s"}


WRITERS = {"monthly rate (block reader)": _monthly_nc, "daily rate (months kernel)": _daily_nc,
           "packed TWSA in cm (block reader, unpacked means)": _packed_twsa}


def _reference(src):
    """xarray's own long-term mean of the canonical monthly values (decoded x factor), skipping NaN."""
    f = xr.DataArray(src.factor, dims="time", coords={"time": src.data["time"].values})
    return (src.data.astype(np.float64) * f).mean("time").values


@pytest.mark.parametrize("name", list(WRITERS))
def test_cell_means_equal_xarrays_time_mean_on_each_basins_cells(tmp_path, name):
    entry = WRITERS[name](tmp_path)
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [entry]))
    ds, cells = extract(cat, cache_dir=tmp_path / "cache", cell_means=True)
    src = open_source(cat.sources[0])
    if name.startswith("monthly") or name.startswith("packed") or name.startswith("daily"):
        assert src.blocks is not None  # the streamed path is the one under test
    ref = _reference(src)
    assert set(cells) == {"B0", "B1"}
    for b in cells:
        cm = cells[b][entry["id"]]
        assert cm.units == ("mm" if entry["component"] == "TWSA" else "mm/month")
        rows = cm.row0 + np.arange(cm.mean.shape[0])
        cols = cm.col0 + np.arange(cm.mean.shape[1])
        want = ref[np.ix_(rows, cols)]
        t = cm.touched
        assert t.sum() > 4
        np.testing.assert_allclose(cm.mean[t], want[t], rtol=1e-9, atol=1e-9)
        assert np.isnan(cm.mean[~t]).all()
        # months behind each mean: xarray's own count of valid months
        cnt = src.data.notnull().sum("time").values[np.ix_(rows, cols)]
        np.testing.assert_array_equal(cm.months[t], cnt[t])


def test_cell_means_of_the_xarray_path_equal_xarrays_time_mean(tmp_path):
    # numpy data through `zonal_mean` (the path of zarr stores and netCDF globs)
    from wbexplore.spatial.zonal import zonal_mean

    _monthly_nc(tmp_path)
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}]))
    src = open_source(cat.sources[0])
    w = weights_for(src, load_basins(cat), cache_dir=tmp_path / "cache")
    for data in (src.data.load(), src.data.chunk({"time": 7})):
        zm = zonal_mean(data, w, cell_factor=src.factor).compute(scheduler="sync")
        r, c = w.used_rows_cols()
        np.testing.assert_allclose(zm["cell_mean"].values, _reference(src)[r, c], rtol=1e-12, equal_nan=True)
        # the basin means are those without the extra reduction
        plain = zonal_mean(data, w).compute(scheduler="sync")
        np.testing.assert_array_equal(zm["mean"].values, plain["mean"].values)


def test_coverage_is_the_weights_over_cell_area_and_the_shapely_overlap(tmp_path):
    entry = _monthly_nc(tmp_path)
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [entry]))
    _, cells = extract(cat, cache_dir=tmp_path / "cache", cell_means=True)
    src = open_source(cat.sources[0])
    w = weights_for(src, load_basins(cat), cache_dir=tmp_path / "cache")
    grid = describe_grid(src.data["x"].values, src.data["y"].values, src.crs)
    area = np.empty(grid.shape)
    area[np.ix_(grid.row_order, grid.col_order)] = cell_areas_m2(grid)
    W = w.matrix.toarray().reshape(len(w.basin), *grid.shape)
    for i, b in enumerate(w.basin):
        cm = cells[str(b)]["p"]
        rows = cm.row0 + np.arange(cm.coverage.shape[0])
        cols = cm.col0 + np.arange(cm.coverage.shape[1])
        # the existing weights: covered area = coverage x cell area (m2)
        np.testing.assert_allclose(cm.coverage * area[np.ix_(rows, cols)], W[i][np.ix_(rows, cols)],
                                   rtol=1e-12, atol=1e-6)
        assert W[i].sum() == pytest.approx(W[i][np.ix_(rows, cols)].sum(), rel=1e-12)  # no touched cell left out
        # shapely: the share of each cell's (grid-coordinate) area inside the box
        box = shapely.box(*BOXES[i])
        x, y = src.data["x"].values, src.data["y"].values
        for a, r in enumerate(rows):
            for c_, col in enumerate(cols):
                cell = shapely.box(x[col] - 0.125, y[r] - 0.125, x[col] + 0.125, y[r] + 0.125)
                # exactextract returns float32 fractions: agreement to about 1e-8
                assert cm.coverage[a, c_] == pytest.approx(cell.intersection(box).area / cell.area, abs=1e-6)
        # corners: the cell's own edges in degrees
        np.testing.assert_allclose(cm.lon[0, 0], x[cols[0]] + np.array([-0.125, 0.125, 0.125, -0.125]))
        np.testing.assert_allclose(cm.lat[0, 0], y[rows[0]] + np.array([-0.125, -0.125, 0.125, 0.125]))


def test_series_bitwise_unchanged_by_the_extra_reduction(tmp_path):
    entries = [_monthly_nc(tmp_path), _daily_nc(tmp_path), _packed_twsa(tmp_path)]
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, entries))
    plain = extract(cat, cache_dir=tmp_path / "cache")
    both, _ = extract(cat, cache_dir=tmp_path / "cache", cell_means=True)
    plain.attrs.pop("history")
    both.attrs.pop("history")
    xr.testing.assert_identical(plain, both)
    for v in plain.data_vars:
        assert plain[v].values.tobytes() == both[v].values.tobytes()


def test_cell_means_cached_with_the_series_and_invalidated_by_a_changed_product(tmp_path, monkeypatch):
    import wbexplore.pipeline as pipeline

    entry = _monthly_nc(tmp_path)
    box_basins(tmp_path / "basins.geojson", BOXES)
    path = write_catalog(tmp_path, [entry])
    cache = tmp_path / "cache"
    calls = []
    real = pipeline.extract

    def counting(*a, **k):
        calls.append(k.get("cell_means"))
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "extract", counting)
    load_series(path, cache_dir=cache)
    assert calls == [True]  # one extraction, both reductions
    first = load_cell_means(path, cache_dir=cache)
    assert calls == [True]  # read from the cache written beside the series
    assert len([p for p in os.listdir(cache) if p.startswith("cells-")]) == 1
    before = first["B0"]["p"].mean.copy()
    # a changed product file: new values, so new cell means (the key holds each input file's SHA-256)
    write_nc(tmp_path / "p.nc", _field(NT) * 2.0, LON, LAT, MONTHS, var="p", units="mm/day")
    again = load_cell_means(path, cache_dir=cache)
    assert calls == [True, True]
    t = again["B0"]["p"].touched
    np.testing.assert_allclose(again["B0"]["p"].mean[t], 2.0 * before[t], rtol=1e-6)


def test_damaged_cell_cache_is_rebuilt_with_a_warning(tmp_path):
    from wbexplore.cache import CacheRebuiltWarning

    entry = _monthly_nc(tmp_path)
    box_basins(tmp_path / "basins.geojson", BOXES)
    path = write_catalog(tmp_path, [entry])
    cache = tmp_path / "cache"
    good = load_cell_means(path, cache_dir=cache)
    (f,) = [cache / p for p in os.listdir(cache) if p.startswith("cells-")]
    f.write_bytes(f.read_bytes()[:-10] + b"0123456789")
    with pytest.warns(CacheRebuiltWarning, match="checksum"):
        again = load_cell_means(path, cache_dir=cache)
    np.testing.assert_array_equal(again["B1"]["p"].mean, good["B1"]["p"].mean)


def _two_products_same_grid(tmp_path):
    write_nc(tmp_path / "a.nc", _field(NT, seed=1), LON, LAT, MONTHS, var="p", units="mm/day")
    write_nc(tmp_path / "b.nc", _field(NT, seed=2) * 1.3, LON, LAT, MONTHS, var="p", units="mm/day")
    lon2, lat2 = lonlat_grid(-2, 2, 10, 13, 0.5)  # a coarser grid whose cells hold 2 x 2 of the others
    rng = np.random.default_rng(4)
    write_nc(tmp_path / "c.nc", 3 + rng.random((NT, lat2.size, lon2.size)), lon2, lat2, MONTHS, var="p",
             units="mm/day")
    box_basins(tmp_path / "basins.geojson", BOXES)
    entries = [{"id": s, "component": "P", "path": f"{s}.nc", "variable": "p"} for s in "abc"]
    cat = open_catalog(write_catalog(tmp_path, entries))
    return extract(cat, cache_dir=tmp_path / "cache", cell_means=True)[1]


def test_difference_from_the_others_cell_for_cell_and_across_grids(tmp_path):
    from wbexplore.spatial.cells import difference_from_others

    cells = _two_products_same_grid(tmp_path)["B0"]
    d = difference_from_others(cells)
    a, b, c = cells["a"], cells["b"], cells["c"]
    t = a.touched
    # c's value over a fine cell is the coarse cell holding it (each fine cell lies inside one coarse cell)
    rows = a.row0 + np.arange(a.mean.shape[0])
    cols = a.col0 + np.arange(a.mean.shape[1])
    c_full = np.full((LAT.size // 2, LON.size // 2), np.nan)
    c_full[c.row0:c.row0 + c.mean.shape[0], c.col0:c.col0 + c.mean.shape[1]] = np.where(c.touched, c.mean, np.nan)
    c_on_a = c_full[np.ix_(rows // 2, cols // 2)]
    # the mean of the others: numpy's nanmean of the two other products (common practice)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # nanmean of cells with no other product: NaN
        want = a.mean - np.nanmean(np.stack([b.mean, c_on_a]), axis=0)
    np.testing.assert_allclose(d["a"][t], want[t], rtol=1e-9, equal_nan=True)
    assert np.isfinite(d["a"][t]).sum() > 4


def test_disagreement_map_one_panel_per_product_and_a_symmetric_diverging_scale(tmp_path):
    from bokeh.models import ColorBar, GridPlot, Patches

    from wbexplore.names import TERM_NAMES
    from wbexplore.plots import basin_outlines, disagreement_map

    cells = _two_products_same_grid(tmp_path)
    gdf = load_basins(open_catalog(tmp_path / "catalog.yaml"))
    grid = disagreement_map(cells["B1"], basin_outlines(gdf), basin="B1", component="P",
                            labels={"a": "Rain A"})
    assert isinstance(grid, GridPlot)
    figs = [child[0] for child in grid.children]
    assert len(figs) == 2 * 3  # a mean and a difference panel for each of the three P products
    titles = [f.title.text for f in figs]
    assert titles[0].startswith("Rain A: mean 2003-01..2005-02")
    assert sum("minus others' mean" in t for t in titles) == 3
    bars = [r for f in figs for r in f.right if isinstance(r, ColorBar)]
    assert len(bars) == 2
    diff = bars[1].color_mapper
    assert diff.low == -diff.high and diff.high > 0  # centred on zero
    # less than the others is red (the low end), more is blue: bokeh lists RdBu11 from dark blue to dark red
    from bokeh.palettes import RdBu11

    assert diff.palette[0] == RdBu11[-1] and diff.palette[-1] == RdBu11[0]
    assert len(diff.palette) % 2 == 1  # an odd diverging palette: its middle colour sits at zero
    assert bars[0].title == "P mean (mm/month)" and bars[1].title == "difference (mm/month)"
    # a bar's title runs along the bar, over the panel's height (240 px): the longer "Precipitation (P) long-term
    # mean (mm/month)" was cut off there (seen in a screenshot); 24 characters of bokeh's 13 px title fit
    assert all(len(b.title) <= 24 for b in bars)
    # each panel: the touched cells, coloured and with opacity by coverage, plus the basin outline
    cell_src = [r.data_source for r in figs[0].renderers if isinstance(r.glyph, Patches)
                and "alpha" in r.data_source.data][0]
    assert len(cell_src.data["xs"]) == int(cells["B1"]["a"].touched.sum())
    assert min(cell_src.data["alpha"]) < max(cell_src.data["alpha"])  # partial cells at the edge
    assert any(r.glyph.fill_alpha == 0.0 for r in figs[0].renderers if isinstance(r.glyph, Patches))
    # TWSA anomalies, each about its own baseline (a constant offset of one product, here 25 mm, would show as
    # a 25 mm "disagreement" in every cell): one line saying why, no panels (common practice: anomalies compare
    # only after removing each one's mean over a common period)
    import dataclasses

    as_storage = {s: dataclasses.replace(cm, component="TWSA", units="mm") for s, cm in cells["B1"].items()}
    assert "own baseline period" in disagreement_map(as_storage, basin="B1", component="TWSA").text
    # a component with no product: a one-line text, no empty panels
    text = disagreement_map(cells["B1"], basin="B1", component="ET").text
    assert text.startswith(f"No {TERM_NAMES['ET'].name} product")


def test_explorer_map_follows_basin_and_component(demo_dir):
    """The explorer's disagreement pane (no browser): one panel pair per product of the chosen component, for
    the basin on screen; the cell means read back from the cache the extraction wrote beside the series."""
    from wbexplore.explorer.app import explore
    from wbexplore.pipeline import load_cell_means

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        app = explore(demo_dir / "catalog.yaml")
        cells = load_cell_means(demo_dir / "catalog.yaml")
    page = app.panel()
    section = next(iter(page.select(lambda o: "wbx-disagree-show" in getattr(o, "css_classes", []))))
    assert not list(page.select(lambda o: "wbx-disagree" in getattr(o, "css_classes", [])))  # not drawn yet
    section.clicks += 1  # as a click would: the maps are drawn on the first one
    chooser = next(iter(page.select(lambda o: "wbx-disagree-component" in getattr(o, "css_classes", []))))
    pane = next(iter(page.select(lambda o: "wbx-disagree" in getattr(o, "css_classes", []))))

    def products(comp, basin):
        return [s for s, cm in cells[basin].items() if cm.component == comp]

    def titles():  # each panel is its own pane in a panel grid, a row per kind (means, differences)
        return [o.object.title.text for o in pane.objects]

    basin = app.state.basin
    assert len(pane.objects) == 2 * len(products("P", basin)) and pane.ncols == len(products("P", basin))
    chooser.value = "ET"
    assert len(pane.objects) == 2 * len(products("ET", basin))
    assert sum("minus others' mean" in t for t in titles()) == len(products("ET", basin))
    other = [b for b in cells if b != basin][0]
    app.state.basin = other
    assert len(pane.objects) == 2 * len(products("ET", other))
    # the other basin's own cells: each mean panel draws as many cells as that basin's product touches
    drawn = [len(r.data_source.data["xs"]) for o in pane.objects[:pane.ncols] for r in o.object.renderers
             if "alpha" in r.data_source.data]
    assert sorted(drawn) == sorted(int(cells[other][p].touched.sum()) for p in products("ET", other))
    # storage anomalies: one line saying why their means are not compared, no panels
    chooser.value = "TWSA"
    assert len(pane.objects) == 1 and "own baseline period" in pane.objects[0].object.text


@pytest.mark.parametrize("nt", [5, 40, 70])  # one tile, and several (32 steps a tile)
def test_fused_kernel_keeps_basin_sums_bitwise_and_its_cell_sums_equal_numpys(nt):
    """The cell sums ride in the basin kernel's pass: basin sums bit for bit those of `accumulate`; cell sums
    against the numpy form (`cell_sums`: numpy's masked sums, common practice), with stored no-data codes,
    a valid range and a fill value."""
    import scipy.sparse as sp

    from wbexplore.spatial._kernel import accumulate, accumulate_with_cells, cell_sums, kernel_args

    rng = np.random.default_rng(nt)
    X = rng.integers(0, 120, (nt, 50)).astype(np.float32)
    X[rng.random(X.shape) < 0.05] = np.nan
    cells = np.array([1, 4, 5, 9, 20, 33, 49])
    w = sp.random(cells.size, 3, density=0.7, random_state=1, format="csr")
    args = kernel_args(cells, w)
    f = rng.uniform(28, 31, nt)
    mask = {"valid_min": 2.0, "valid_max": 110.0, "codes": (7.0, 65.0)}
    plain = accumulate(X, None, None, 99.0, args=args, **mask)
    out, cs = accumulate_with_cells(X, args, f, 99.0, **mask)
    assert out.tobytes() == plain.tobytes()
    assert cs.shape == (-(-nt // 32), cells.size, 3)  # one slice per tile of 32 steps
    np.testing.assert_allclose(cs.sum(axis=0), cell_sums(X, cells, f, 99.0, **mask), rtol=1e-12)
    # added in place into a task's array: two reads give the sums of both
    again = accumulate_with_cells(X, args, f, 99.0, **mask, cell=cs.copy())[1]
    np.testing.assert_allclose(again.sum(axis=0), 2 * cell_sums(X, cells, f, 99.0, **mask), rtol=1e-12)
