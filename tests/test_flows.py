"""Flows (more balance terms measured at gauges) and nested basins: catalog, readers, canonical series.

Outside references: stdlib ``calendar.monthrange`` for days per month, pint for l/s -> m3/s, pyproj.Geod
for areas; additivity of area integrals (a mean over an outer polygon times its area equals the sum over
its parts) for the incremental basin means.
"""

from __future__ import annotations

import calendar
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
import yaml

from utils import lonlat_grid, monthly, one_line_error, run_cli, write_catalog, write_nc
from wbexplore.errors import CatalogError, InputError
from wbexplore.io.basins import incremental_basins, read_basins
from wbexplore.io.catalog import open_catalog
from wbexplore.io.stations import read_flow_series

N = 24
OUT_BOX = (-1.5, 0.5, 1.5, 3.5)
UP_BOX = (-1.0, 1.0, 0.0, 2.5)


def geod_area_km2(geom) -> float:
    """pyproj.Geod area of a lon/lat polygon whose edges are straight in lon/lat (densified to 0.001 deg)."""
    from pyproj import Geod

    dense = shapely.segmentize(shapely.geometry.polygon.orient(geom, 1.0), 0.001)
    area, _ = Geod(ellps="WGS84").geometry_area_perimeter(dense)
    return abs(area) / 1e6


def write_nested_basins(path, boxes: dict, drains: dict):
    gdf = gpd.GeoDataFrame({"basin_id": list(boxes), "name": [f"Basin {b}" for b in boxes],
                            "drains_to": [drains.get(b) for b in boxes]},
                           geometry=[shapely.box(*b) for b in boxes.values()], crs="EPSG:4326")
    gdf.to_file(path, driver="GeoJSON")
    return path


FLOWS = [
    {"id": "irr", "basin": "OUT", "direction": "out", "path": "flows.csv", "layout": "wide", "time_field": "date",
     "station": "IRR-1", "units": "m3/s", "label": "Irrigation canal"},
    {"id": "trf", "basin": "OUT", "direction": "in", "path": "flows.csv", "layout": "wide", "time_field": "date",
     "station": "TRF-2", "units": "l/s"},
]


@pytest.fixture
def study(tmp_path):
    lon, lat = lonlat_grid(-2, 2, 0, 4, 0.25)
    t = monthly("2001-01", N)
    rng = np.random.default_rng(7)
    write_nc(tmp_path / "p.nc", 2 + rng.random((N, lat.size, lon.size)), lon, lat, t, var="pr", units="mm/day")
    write_nested_basins(tmp_path / "basins.geojson", {"OUT": OUT_BOX, "UP": UP_BOX}, {"UP": "OUT"})
    rows = [(f"{m:%Y-%m-%d}", b, 20 + 10 * rng.random()) for m in t for b in ("OUT", "UP")]
    rows = [r for r in rows if not (r[1] == "UP" and r[0] == "2001-05-01")]  # a missing month upstream
    pd.DataFrame(rows, columns=["date", "basin_id", "q"]).to_csv(tmp_path / "q.csv", index=False)
    fl = pd.DataFrame({"date": [f"{m:%Y-%m-%d}" for m in t], "IRR-1": 1 + rng.random(N), "TRF-2": 300 + 50 * rng.random(N)})
    fl.loc[3, "IRR-1"] = np.nan
    fl.to_csv(tmp_path / "flows.csv", index=False)
    cat = write_catalog(tmp_path, [{"id": "rain", "component": "P", "path": "p.nc", "variable": "pr"}],
                        discharge={"path": "q.csv", "time_field": "date", "basin_field": "basin_id",
                                   "value_field": "q", "units": "m3/s"},
                        extra={"catalog_version": 2, "flows": FLOWS})
    doc = yaml.safe_load(cat.read_text())
    doc["basins"]["downstream_field"] = "drains_to"
    cat.write_text(yaml.safe_dump(doc, sort_keys=False))
    return tmp_path


def _edit(study, mutate, name="edited.yaml"):
    doc = yaml.safe_load((study / "catalog.yaml").read_text())
    mutate(doc)
    p = study / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


# --------------------------------------------------------------------------- catalog
def test_flows_and_downstream_field_parse(study):
    cat = open_catalog(study / "catalog.yaml")
    assert [(f.id, f.basin, f.direction, f.station) for f in cat.flows] == [
        ("irr", "OUT", "out", "IRR-1"), ("trf", "OUT", "in", "TRF-2")]
    assert cat.flows[1].table.units == "l/s" and cat.flows[0].display == "Irrigation canal"
    assert cat.basins.downstream_field == "drains_to"
    assert study / "flows.csv" in cat.input_paths()


@pytest.mark.parametrize("mutate, words", [
    (lambda d: d["flows"][0].update(direction="sideways"), ["flow 'irr'", "'direction'", "sideways"]),
    (lambda d: d["flows"][1].update(id="irr"), ["'id'", "duplicate flow id 'irr'"]),
    (lambda d: d["flows"][0].update(id="rain"), ["'id'", "'rain'", "source id"]),
    (lambda d: d["flows"][0].update(basin=123), ["'basin'", "123", "not text"]),
    (lambda d: d["flows"][0].update(stations={"IRR-1": "OUT"}), ["'stations'", "not a known field"]),
    (lambda d: d["flows"][0].pop("station"), ["'station'", "missing"]),
    (lambda d: d["flows"][0].update(units="kg"), ["'units'", "kg"]),
    (lambda d: d.update(flows={"id": "x"}), ["'flows'", "list"]),
])
def test_bad_flow_entries_refused_with_file_field_and_value(study, mutate, words):
    p = _edit(study, mutate)
    with pytest.raises(CatalogError) as exc:
        open_catalog(p)
    msg = str(exc.value)
    assert "\n" not in msg and str(p) in msg
    for w in words:
        assert w in msg, (w, msg)


def test_version_1_catalog_has_no_flows(study):
    p = _edit(study, lambda d: (d.pop("flows"), d.update(catalog_version=1)))
    cat = open_catalog(p)
    assert cat.flows == () and study / "flows.csv" not in cat.input_paths()


# --------------------------------------------------------------------------- flow reader
def test_flow_series_in_mm_per_month_over_the_basin(study):
    import pint

    cat = open_catalog(study / "catalog.yaml")
    basins = read_basins(cat.basins)
    ds = read_flow_series(cat.flows, basins["area_km2"], catalog=cat.path)
    raw = pd.read_csv(study / "flows.csv")
    area_m2 = float(basins.loc["OUT", "area_km2"]) * 1e6
    ureg = pint.UnitRegistry()
    ls = ureg.Quantity(1.0, "liter / second").to("meter ** 3 / second").magnitude
    for var, col, factor in (("flow_irr", "IRR-1", 1.0), ("flow_trf", "TRF-2", ls)):
        got = ds[var]
        # stdlib calendar for the seconds of each month; mm = m3 / m2 * 1000
        secs = np.array([calendar.monthrange(m.year, m.month)[1] * 86400 for m in pd.DatetimeIndex(got.time.values)])
        expect = raw[col].to_numpy() * factor * secs / area_m2 * 1000.0
        np.testing.assert_allclose(got.sel(basin="OUT").values, expect, rtol=1e-12)
        assert (got.sel(basin="UP").values == 0.0).all()  # the flow does not enter UP's balance
    assert np.isnan(ds["flow_irr"].sel(basin="OUT").values[3])  # a missing record stays missing
    a = ds["flow_irr"].attrs
    assert (a["role"], a["flow_id"], a["direction"], a["units"], a["component"], a["station"], a["basin"]) == (
        "flow", "irr", "out", "mm/month", "flow", "IRR-1", "OUT")
    assert a["label"] == "Irrigation canal" and ds["flow_trf"].attrs["label"] == "trf"


def test_daily_flow_records_coverage(tmp_path, study):
    days = pd.date_range("2001-01-01", "2001-03-31", freq="D")
    days = days[days != pd.Timestamp("2001-02-10")]
    pd.DataFrame({"date": days.strftime("%Y-%m-%d"), "D-1": 2.0}).to_csv(study / "daily.csv", index=False)
    p = _edit(study, lambda d: d.update(flows=[{"id": "d", "basin": "UP", "direction": "in", "path": "daily.csv",
                                                "layout": "wide", "time_field": "date", "station": "D-1",
                                                "units": "m3/s", "min_coverage": 0.9}]))
    cat = open_catalog(p)
    ds = read_flow_series(cat.flows, read_basins(cat.basins)["area_km2"], catalog=cat.path)
    np.testing.assert_allclose(ds["coverage_flow_d"].values, [1.0, 27 / 28, 1.0])  # 27 of February's 28 days
    assert ds["coverage_flow_d"].attrs["flow_id"] == "d"
    assert ds["flow_d"].sel(basin="UP").notnull().all()


@pytest.mark.parametrize("mutate, words", [
    (lambda d: d["flows"][0].update(basin="NOPE"), ["flow 'irr'", "'basin'", "NOPE"]),
    (lambda d: d["flows"][0].update(station="IRR-9"), ["flows.csv", "'station'", "IRR-9"]),
])
def test_flow_naming_unknown_basin_or_station_refused(study, mutate, words):
    cat = open_catalog(_edit(study, mutate))
    with pytest.raises(InputError) as exc:
        read_flow_series(cat.flows, read_basins(cat.basins)["area_km2"], catalog=cat.path)
    for w in words:
        assert w in str(exc.value), (w, str(exc.value))


# --------------------------------------------------------------------------- nesting
def test_nesting_read_and_incremental_area_is_outer_minus_inner(study):
    cat = open_catalog(study / "catalog.yaml")
    b = read_basins(cat.basins)
    assert b.loc["UP", "drains_to"] == "OUT" and b.loc["OUT", "drains_to"] is None
    assert b.loc["UP", "outside_km2"] == 0.0
    inc = incremental_basins(cat.basins)
    assert list(inc.index) == ["OUT"] and inc.loc["OUT", "upstream"] == "UP"
    expect = geod_area_km2(shapely.box(*OUT_BOX)) - geod_area_km2(shapely.box(*UP_BOX))  # pyproj.Geod
    assert inc.loc["OUT", "area_km2"] == pytest.approx(expect, rel=1e-6)
    assert inc.loc["OUT", "whole_area_km2"] == pytest.approx(geod_area_km2(shapely.box(*OUT_BOX)), rel=1e-6)
    assert inc.loc["OUT", "geometry"].equals(shapely.box(*OUT_BOX).difference(shapely.box(*UP_BOX)))


def test_incremental_area_in_a_projected_crs(tmp_path):
    """The difference is taken in the file's CRS (a projected one here), the area geodesic (pyproj.Geod)."""
    from pyproj import Transformer

    outer = shapely.box(400_000, 1_000_000, 600_000, 1_200_000)
    inner = shapely.box(450_000, 1_050_000, 520_000, 1_150_000)
    gdf = gpd.GeoDataFrame({"bid": ["A", "B"], "down": ["", "A"]}, geometry=[outer, inner], crs="EPSG:32631")
    gdf.to_file(tmp_path / "b.gpkg")
    from wbexplore.io.catalog import BasinSpec

    inc = incremental_basins(BasinSpec(path=tmp_path / "b.gpkg", id_field="bid", downstream_field="down"))
    tr = Transformer.from_crs("EPSG:32631", "EPSG:4326", always_xy=True)

    def area(g):  # densified in the projected CRS (edges are straight there), then pyproj.Geod
        from pyproj import Geod

        ll = shapely.transform(shapely.segmentize(g, 100.0), lambda c: np.column_stack(tr.transform(c[:, 0], c[:, 1])))
        return abs(Geod(ellps="WGS84").geometry_area_perimeter(shapely.geometry.polygon.orient(ll, 1.0))[0]) / 1e6

    assert inc.loc["A", "area_km2"] == pytest.approx(area(outer) - area(inner), rel=1e-6)


@pytest.mark.parametrize("boxes, drains, words", [
    ({"OUT": OUT_BOX, "UP": UP_BOX}, {"UP": "ZZ"}, ["'downstream_field'", "'UP'", "'ZZ'", "not in the basin file"]),
    ({"OUT": OUT_BOX, "UP": UP_BOX}, {"UP": "OUT", "OUT": "UP"}, ["'downstream_field'", "cycle", "OUT -> UP -> OUT"]),
    ({"OUT": OUT_BOX, "UP": UP_BOX, "MID": (-1.2, 0.8, 0.5, 3.0)}, {"UP": "MID", "MID": "OUT", "OUT": "UP"},
     ["cycle", "OUT -> UP -> MID -> OUT"]),
    ({"OUT": OUT_BOX}, {"OUT": "OUT"}, ["cycle", "OUT -> OUT"]),
    ({"OUT": OUT_BOX, "UP": (1.0, 1.0, 2.0, 2.0)}, {"UP": "OUT"}, ["'downstream_field'", "'UP'", "sticks out",
                                                                    "km2", "50.0%"]),
    # a basin inside another upstream basin declared as draining to the outlet (skip-level): its outflow is
    # already inside the other's gauged Q and would enter the outlet's incremental unit twice
    ({"OUT": OUT_BOX, "UP": UP_BOX, "IN": (-0.8, 1.2, -0.2, 2.0)}, {"UP": "OUT", "IN": "OUT"},
     ["'downstream_field'", "'UP'", "'IN'", "both drain to 'OUT'", "overlap", "km2", "100.0%"]),
    ({"OUT": OUT_BOX, "UP": UP_BOX, "SIDE": (-0.5, 1.2, 0.5, 2.0)}, {"UP": "OUT", "SIDE": "OUT"},
     ["'UP'", "'SIDE'", "overlap", "50.0%"]),  # same latitudes: half of SIDE's width, geodesically too
])
def test_bad_nesting_refused(tmp_path, boxes, drains, words):
    from wbexplore.io.catalog import BasinSpec

    write_nested_basins(tmp_path / "b.geojson", boxes, drains)
    with pytest.raises(InputError) as exc:
        read_basins(BasinSpec(path=tmp_path / "b.geojson", id_field="basin_id", downstream_field="drains_to"))
    msg = str(exc.value)
    assert "\n" not in msg and "b.geojson" in msg
    for w in words:
        assert w in msg, (w, msg)


def test_upstream_basin_sticking_out_a_little_is_clipped(tmp_path):
    from wbexplore.io.catalog import BasinSpec

    up = (1.0, 1.0, 1.52, 2.0)  # 0.02 of 0.52 degrees of width outside OUT: ~3.8%, accepted
    write_nested_basins(tmp_path / "b.geojson", {"OUT": OUT_BOX, "UP": up}, {"UP": "OUT"})
    spec = BasinSpec(path=tmp_path / "b.geojson", id_field="basin_id", downstream_field="drains_to")
    b = read_basins(spec)
    outside = shapely.box(1.5, 1.0, 1.52, 2.0)
    assert b.loc["UP", "outside_km2"] == pytest.approx(geod_area_km2(outside), rel=1e-6)  # pyproj.Geod
    inc = incremental_basins(spec)
    # the part outside has nothing to subtract: OUT minus the part of UP inside it
    expect = geod_area_km2(shapely.box(*OUT_BOX)) - geod_area_km2(shapely.box(1.0, 1.0, 1.5, 2.0))
    assert inc.loc["OUT", "area_km2"] == pytest.approx(expect, rel=1e-6)


# --------------------------------------------------------------------------- canonical series
def _extract(study, **kw):
    from wbexplore.pipeline import extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return extract(study / "catalog.yaml", use_cache=False, **kw)


def test_whole_series_carry_flows(study):
    ds = _extract(study)
    cat = open_catalog(study / "catalog.yaml")
    fds = read_flow_series(cat.flows, read_basins(cat.basins)["area_km2"])
    for var in ("flow_irr", "flow_trf"):
        assert ds[var].dims == ("basin", "time")
        np.testing.assert_array_equal(ds[var].values, fds[var].reindex(time=ds.time).values)
        assert ds[var].attrs["role"] == "flow"
    assert "unit" not in ds.attrs and "flow_upstream_UP" not in ds


def test_flow_into_an_upstream_basin_enters_the_whole_downstream_basin(study):
    """A transfer released in UP reaches OUT's outlet: OUT's whole balance holds the same volume (over
    OUT's area); OUT's incremental balance does not (it arrives in UP's gauged outflow)."""
    p = _edit(study, lambda d: d["flows"][1].update(basin="UP"), name="catalog.yaml")
    whole = _extract(study)
    v = whole["flow_trf"]
    a = whole["basin_area_km2"]
    np.testing.assert_allclose(v.sel(basin="OUT") * a.sel(basin="OUT"), v.sel(basin="UP") * a.sel(basin="UP"),
                               rtol=1e-12)
    assert v.attrs["basin"] == "UP" and v.attrs["downstream_basins"] == "OUT"
    assert (whole["flow_irr"].sel(basin="UP") == 0).all()  # a flow of OUT does not enter UP
    inc = _extract(study, incremental=True)
    assert (inc["flow_trf"] == 0).all() and p.name == "catalog.yaml"


def test_incremental_series(study):
    whole = _extract(study)
    inc = _extract(study, incremental=True)
    cat = open_catalog(study / "catalog.yaml")
    assert list(inc.basin.values) == ["OUT"] and inc.attrs["unit"] == "incremental"
    assert inc["upstream_basins"].values.tolist() == ["UP"]
    a_in, a_out, a_up = (float(x) for x in (inc.basin_area_km2.sel(basin="OUT"), whole.basin_area_km2.sel(basin="OUT"),
                                            whole.basin_area_km2.sel(basin="UP")))
    assert a_in == pytest.approx(a_out - a_up, rel=1e-9)
    assert float(inc.whole_area_km2.sel(basin="OUT")) == a_out
    # additivity of area integrals: mean(OUT) * A(OUT) = mean(inc) * A(inc) + mean(UP) * A(UP)
    p = whole["rain"]
    np.testing.assert_allclose(inc["rain"].sel(basin="OUT") * a_in,
                               p.sel(basin="OUT") * a_out - p.sel(basin="UP") * a_up, rtol=1e-9)
    # outlet discharge and declared flows: the same volumes over the incremental area
    for var in ("discharge", "flow_irr", "flow_trf"):
        np.testing.assert_allclose(inc[var].sel(basin="OUT"), whole[var].sel(basin="OUT") * a_out / a_in, rtol=1e-12)
    # the upstream gauge's outflow enters as an inflow, NaN where its month is missing
    up = inc["flow_upstream_UP"]
    np.testing.assert_allclose(up.sel(basin="OUT"), whole["discharge"].sel(basin="UP") * a_up / a_in, rtol=1e-12)
    assert np.isnan(float(up.sel(basin="OUT", time="2001-05-01")))
    assert (up.attrs["direction"], up.attrs["role"], up.attrs["basin"], up.attrs["flow_id"]) == (
        "in", "flow", "OUT", "upstream_UP")
    assert set(v for v in inc.data_vars) - set(whole.data_vars) == {"flow_upstream_UP"}
    assert cat.flows  # the declared flows enter the incremental balance too (checked above)


def test_incremental_refusals(study):
    with pytest.raises(InputError, match="'UP' has no upstream basin"):
        _extract(study, incremental=True, basins=["UP"])
    p = _edit(study, lambda d: d["basins"].pop("downstream_field"), name="catalog_flat.yaml")
    from wbexplore.pipeline import extract

    with pytest.raises(InputError, match="downstream_field"):
        extract(p, use_cache=False, incremental=True)


def test_incremental_series_cached_apart_from_whole(study, tmp_path):
    from wbexplore.pipeline import load_series

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        w = load_series(study / "catalog.yaml", cache_dir=tmp_path / "c")
        i = load_series(study / "catalog.yaml", cache_dir=tmp_path / "c", incremental=True)
        i2 = load_series(study / "catalog.yaml", cache_dir=tmp_path / "c", incremental=True)
    assert w.sizes["basin"] == 2 and i.sizes["basin"] == 1
    assert len(list((tmp_path / "c").rglob("series-*"))) == 2
    np.testing.assert_array_equal(i["rain"].values, i2["rain"].values)


# --------------------------------------------------------------------------- command line
def test_check_lists_flows_and_nesting(study, capsys):
    rc, out, _ = run_cli(["check", study / "catalog.yaml"], capsys)
    assert rc == 0
    lines = out.splitlines()
    irr = next(ln for ln in lines if ln.strip().startswith("irr "))
    assert all(w in irr for w in ("OUT", "out", "IRR-1", f"{N - 1} of {N}"))
    assert any("UP -> drains to OUT" in ln for ln in lines)
    inc = incremental_basins(open_catalog(study / "catalog.yaml").basins)
    row = next(ln for ln in lines if ln.strip().startswith("OUT ") and "UP" in ln)
    assert f"{inc.loc['OUT', 'area_km2']:,.1f}" in row


def test_check_refuses_a_flow_of_an_unknown_basin(study, capsys):
    p = _edit(study, lambda d: d["flows"][1].update(basin="ELSEWHERE"))
    rc, _, err = run_cli(["check", p], capsys)
    line = one_line_error(rc, err)
    assert "ELSEWHERE" in line and "'basin'" in line and str(p) in line


# --------------------------------------------------------------------------- version 1 unchanged
def test_version_1_series_bitwise_as_before_flows(tmp_path):
    """A plain version-1 catalog gives the series the code before flows and nesting gave: no new variables,
    no changed attributes, the same bits (``tests/data/v1_series.nc`` was written by that code from
    `utils.v1_study`; only the time stamp in ``history`` differs between runs)."""
    from pathlib import Path

    import xarray as xr

    from utils import v1_study
    from wbexplore.pipeline import extract

    cat = v1_study(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = extract(cat, use_cache=False)
    del ds.attrs["history"]
    with xr.open_dataset(Path(__file__).parent / "data" / "v1_series.nc") as ref:
        ref = ref.load()
    assert list(ds.data_vars) == list(ref.data_vars) and list(ds.coords) == list(ref.coords)
    xr.testing.assert_identical(ds, ref)
    for name in ds.variables:
        a, b = ds[name].values, ref[name].values
        if a.dtype.kind in "fiuM":
            assert a.tobytes() == b.astype(a.dtype).tobytes(), name  # the same bits
        else:
            assert a.tolist() == b.tolist(), name
        assert ds[name].attrs == ref[name].attrs, name


def test_siblings_apart_and_chained_nesting_accepted(tmp_path):
    """Two upstream basins side by side, and a basin inside an upstream basin draining into that one (a
    chain): accepted; each incremental unit subtracts only its direct upstream basins (pyproj.Geod areas)."""
    from wbexplore.io.catalog import BasinSpec

    boxes = {"OUT": OUT_BOX, "UP": UP_BOX, "IN": (-0.8, 1.2, -0.2, 2.0), "SIDE": (0.2, 1.0, 1.2, 2.5)}
    write_nested_basins(tmp_path / "b.geojson", boxes, {"UP": "OUT", "IN": "UP", "SIDE": "OUT"})
    spec = BasinSpec(path=tmp_path / "b.geojson", id_field="basin_id", downstream_field="drains_to")
    read_basins(spec)
    inc = incremental_basins(spec)
    g = {k: geod_area_km2(shapely.box(*v)) for k, v in boxes.items()}
    assert inc.loc["OUT", "area_km2"] == pytest.approx(g["OUT"] - g["UP"] - g["SIDE"], rel=1e-6)
    assert inc.loc["UP", "area_km2"] == pytest.approx(g["UP"] - g["IN"], rel=1e-6)
