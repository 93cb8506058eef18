"""Every netCDF file wbexplore writes passes the CF-1.8 checks of ``compliance-checker`` (issue 16, item 6),
and reads back with the same numbers.

Outside reference: the ``cf:1.8`` suite of the ``compliance-checker`` package, run in process on each output,
with its bundled CF standard-name table; ``cf_units`` (UDUNITS-2) for unit conversions.

Offline: the checker downloads a standard-name table only when a file's ``standard_name_vocabulary`` names a
version other than its bundled one (``CF1_8Check._find_cf_standard_name_table``); our files never carry that
attribute (asserted below). Without it, and without the ``CF_STANDARD_NAME_TABLE`` environment variable (removed
in the fixture), ``compliance_checker.cf.util.StandardNameTable()`` reads the bundled
``compliance_checker/data/cf-standard-name-table.xml``. To point the checker at another local copy, set
``CF_STANDARD_NAME_TABLE=/path/to/cf-standard-name-table.xml``. The fixture also refuses every socket
connection while the checker runs, so a download attempt would fail the test.
"""

from __future__ import annotations

import socket
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml
from utils import run_cli, v1_study

FLOWS = [
    {"id": "irr", "basin": "A", "direction": "out", "path": "flows.csv", "layout": "wide", "time_field": "date",
     "station": "IRR-1", "units": "m3/s", "label": "Irrigation canal"},
    {"id": "trf", "basin": "B", "direction": "in", "path": "flows.csv", "layout": "wide", "time_field": "date",
     "station": "TRF-2", "units": "l/s"},
]


@pytest.fixture
def offline(monkeypatch):
    """No network while the checker runs, and the bundled standard-name table."""
    monkeypatch.delenv("CF_STANDARD_NAME_TABLE", raising=False)

    def refuse(self, address):
        raise AssertionError(f"network access to {address!r} during a CF check")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket.socket, "connect_ex", refuse)


def cf_failures(path) -> dict:
    """Failed checks of compliance-checker's cf:1.8 suite: {"errors": [...], "warnings": [...], "info": [...],
    "exceptions": [...]} (high, medium, low priority; checks that raised)."""
    from compliance_checker.cf.cf_1_8 import CF1_8Check
    from compliance_checker.suite import CheckSuite

    CheckSuite.checkers["cf:1.8"] = CF1_8Check  # only this suite (loading all of them warns about old ones)
    cs = CheckSuite()
    ds = cs.load_dataset(str(path))
    try:
        groups, exceptions = cs.run_all(ds, ["cf:1.8"])["cf:1.8"]
    finally:
        ds.close()
    out = {"errors": [], "warnings": [], "info": [], "exceptions": [f"{k}: {e!r}" for k, (e, _tb) in exceptions.items()]}
    level = {3: "errors", 2: "warnings", 1: "info"}

    def walk(results):
        for r in results:
            passed, total = r.value if isinstance(r.value, tuple) else (int(bool(r.value)), 1)
            if r.children:
                walk(r.children)
            elif passed != total:
                out[level[r.weight]].append(f"{r.name}: {'; '.join(map(str, r.msgs))}")

    walk(groups)
    return out


@pytest.fixture
def study(tmp_path):
    """The small version-1 study plus two flows (catalog version 2): every kind of series variable."""
    cat = v1_study(tmp_path)
    t = pd.date_range("2003-01-01", "2004-06-30", freq="D")
    rng = np.random.default_rng(16)
    pd.DataFrame({"date": t.strftime("%Y-%m-%d"), "IRR-1": 1 + rng.random(t.size),
                  "TRF-2": 300 + 50 * rng.random(t.size)}).to_csv(tmp_path / "flows.csv", index=False)
    doc = yaml.safe_load(cat.read_text())
    doc.update(catalog_version=2, flows=FLOWS)
    cat.write_text(yaml.safe_dump(doc, sort_keys=False))
    return cat


@pytest.fixture
def extracted(study, tmp_path, capsys):
    out = tmp_path / "series.nc"
    rc, _out, err = run_cli(["extract", study, "--out", out, "--quiet"], capsys)
    assert rc == 0, err
    return out


def _series(cat):
    from wbexplore.pipeline import extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return extract(cat)


# --------------------------------------------------------------------------- the checker's verdict
def test_extract_output_passes_the_cf_checker(extracted, offline):
    bad = cf_failures(extracted)
    assert bad["errors"] == [] and bad["exceptions"] == [], "\n".join(bad["errors"] + bad["exceptions"])
    assert bad["warnings"] == [], "\n".join(bad["warnings"])


def test_series_export_passes_the_cf_checker(study, tmp_path, capsys, offline):
    out = tmp_path / "sel.nc"
    rc, _o, err = run_cli(["export", study, "--basin", "A", "--P", "rain", "--ET", "evap", "--TWSA", "tws",
                           "--out", tmp_path / "sel.yaml", "--series", out], capsys)
    assert rc == 0, err
    bad = cf_failures(out)
    assert bad["errors"] == [] and bad["exceptions"] == [], "\n".join(bad["errors"] + bad["exceptions"])
    assert bad["warnings"] == [], "\n".join(bad["warnings"])


def test_a_dataset_the_checker_rejects_is_fixed_by_cf_ready(tmp_path, offline):
    """The failures the issue reports (int64 time without standard_name or long_name; _FillValue on a time
    coordinate and its bounds), reproduced with a plain `to_netcdf`, then gone through `write_netcdf`."""
    from wbexplore.io.writers import write_netcdf

    t = pd.date_range("2001-01-01", periods=4, freq="MS")
    ds = xr.Dataset({"v": (("basin", "time"), np.arange(8.0).reshape(2, 4), {"units": "mm/month"})},
                    coords={"basin": ["A", "B"], "time": t})
    ds.to_netcdf(tmp_path / "plain.nc")
    plain = cf_failures(tmp_path / "plain.nc")
    text = "\n".join(plain["errors"])
    assert "int64" in text and "standard_name='time'" in text, text
    bnds = ds.assign(time_bnds=(("time", "nv"), np.stack([t.values, (t + pd.offsets.MonthBegin(1)).values], 1)))
    bnds["time"].attrs["bounds"] = "time_bnds"
    bnds.to_netcdf(tmp_path / "plain_bnds.nc", encoding={"time": {"dtype": "float64", "units": "days since 2001-01-01"}})
    assert any("_FillValue" in e for e in cf_failures(tmp_path / "plain_bnds.nc")["errors"])
    for name, d in (("fixed.nc", ds), ("fixed_bnds.nc", bnds)):
        write_netcdf(d, tmp_path / name, time_step="month")
        bad = cf_failures(tmp_path / name)
        assert bad["errors"] == bad["warnings"] == bad["exceptions"] == [], bad


def test_no_standard_name_vocabulary_so_no_download(extracted):
    import netCDF4

    with netCDF4.Dataset(extracted) as nc:
        assert "standard_name_vocabulary" not in nc.ncattrs()
        assert nc.Conventions == "CF-1.8" and nc.featureType == "timeSeries"


# --------------------------------------------------------------------------- names and units against outside tables
def test_standard_names_exist_and_units_convert():
    """Each standard name we write is in the checker's bundled CF table, and its canonical units convert
    (UDUNITS-2 through cf_units) to the units we store; the names we leave out really have no fitting entry."""
    from cf_units import Unit
    from compliance_checker.cf.util import StandardNameTable

    from wbexplore.io.writers import CF_STANDARD_NAMES

    table = StandardNameTable()
    for (_comp, units), name in CF_STANDARD_NAMES.items():
        assert name in table, name
        assert Unit(units).is_convertible(Unit(table[name].canonical_units)), (name, units)
    # ET as a depth: the table's only evapotranspiration amount is a mass per area, not a length
    assert "lwe_thickness_of_water_evapotranspiration_amount" not in table
    assert not Unit("mm").is_convertible(Unit(table["water_evapotranspiration_amount"].canonical_units))
    # mm/month is a rate to UDUNITS with a fixed 1/12-year month: 31 days of 1 mm/day are not 31 mm/month
    assert Unit("mm/month").convert(31.0, Unit("mm/day")) != pytest.approx(1.0, rel=1e-3)


def test_units_are_udunits_and_schema_spelling_is_kept(extracted):
    import netCDF4
    from cf_units import Unit

    with netCDF4.Dataset(extracted) as nc:
        for name, var in nc.variables.items():
            if "units" in var.ncattrs():
                Unit(var.units)  # raises on a spelling UDUNITS-2 does not parse
        assert nc["rain"].units == "mm/month" and nc["tws"].units == "mm" and nc["flow_irr"].units == "mm/month"
        assert nc["time"].dtype == np.float64 and nc["time"].calendar == "proleptic_gregorian"
        assert "_FillValue" not in nc["time"].ncattrs() and "_FillValue" not in nc["time_bnds"].ncattrs()
        assert nc["basin_id"].cf_role == "timeseries_id"
        assert nc["rain"].ancillary_variables == "valid_fraction_rain"
        for name, var in nc.variables.items():
            assert name == "time_bnds" or "long_name" in var.ncattrs() or "standard_name" in var.ncattrs(), name


# --------------------------------------------------------------------------- round trips
def test_extract_output_reads_back_bitwise(study, extracted):
    from wbexplore.io.writers import read_netcdf
    from wbexplore.series import validate_series

    ref = _series(study)
    back = validate_series(read_netcdf(extracted))
    # time bounds: each month start to the next month start (stdlib calendar for the month lengths)
    import calendar

    ends = back["time_bnds"].values[:, 1] - back["time_bnds"].values[:, 0]
    days = [calendar.monthrange(t.year, t.month)[1] for t in pd.DatetimeIndex(back["time"].values)]
    np.testing.assert_array_equal(ends.astype("timedelta64[D]").astype(int), days)
    back = back.drop_vars(["time_bnds", "lat", "lon"])
    assert list(back.data_vars) == list(ref.data_vars)
    xr.testing.assert_equal(back, ref)  # values, dims and coordinates (labels) exactly; NaN where NaN
    for n in ref.variables:
        # text comes back as Python str objects (netCDF-4 strings) whether it was '<U' or object in memory
        assert back[n].dtype == ref[n].dtype or {ref[n].dtype.kind, back[n].dtype.kind} <= set("OU"), n
        for k, v in ref[n].attrs.items():  # every attribute of the in-memory series survives (more may be added)
            assert np.all(back[n].attrs[k] == v), (n, k)


def test_series_export_reads_back_bitwise(study, tmp_path):
    from wbexplore.balance import Selection, compute_selection
    from wbexplore.io.writers import read_netcdf
    from wbexplore.selection import series_dataset, write_series_netcdf

    res = compute_selection(_series(study), Selection("B", "rain", "evap", "tws"))
    p = write_series_netcdf(res, tmp_path / "s.nc")
    ref, back = series_dataset(res), read_netcdf(p)
    xr.testing.assert_equal(back, ref)
    for n in ref.variables:
        np.testing.assert_array_equal(back[n].values, ref[n].values)
    for c in ("P", "ET", "Q", "dS", "residual"):
        np.testing.assert_array_equal(back[c].values, res.frame[c].to_numpy(dtype=float))
    assert back["P"].attrs["ancillary_variables"] == "sigma_P valid_fraction_P"
    assert back["sigma_P"].attrs["standard_name"] == "lwe_thickness_of_precipitation_amount standard_error"
    assert str(back["basin_id"].values) == "B"


def test_cf_ready_keeps_its_input_and_is_idempotent(study):
    from wbexplore.io.writers import cf_ready

    ds = _series(study)
    before = ds.copy(deep=True)
    once = cf_ready(ds, time_step="month")
    xr.testing.assert_identical(ds, before)
    assert {k: v.encoding for k, v in ds.variables.items()} == {k: v.encoding for k, v in before.variables.items()}
    twice = cf_ready(once, time_step="month")
    xr.testing.assert_identical(once, twice)


def test_cached_series_unchanged_by_the_cf_writer(study, tmp_path, recwarn):
    """The cache keeps its own netCDF payload, the in-memory form (``basin`` labels, no CF rewrite): what it
    stores did not change, so `CACHE_FORMAT` needs no bump; an entry is read back without a rebuild, and writing
    a CF file from the series does not alter them."""
    import netCDF4

    from wbexplore.cache import CacheRebuiltWarning
    from wbexplore.io.writers import write_netcdf
    from wbexplore.pipeline import load_series

    cache = tmp_path / "cache"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first = load_series(study, cache_dir=cache)
    (entry,) = cache.rglob("series-*.wbxc")
    payload = entry.read_bytes().split(b"\n", 1)[1]  # one header line, then the netCDF payload (cache.py)
    with netCDF4.Dataset("payload.nc", mode="r", memory=payload) as nc:
        assert "basin" in nc.variables and "basin_id" not in nc.variables and "time_bnds" not in nc.variables
    kept = first.copy(deep=True)
    write_netcdf(first, tmp_path / "o.nc", time_step="month")
    xr.testing.assert_identical(first, kept)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        warnings.simplefilter("error", CacheRebuiltWarning)
        again = load_series(study, cache_dir=cache)
    xr.testing.assert_identical(again, kept)


# --------------------------------------------------------------------------- the helper other writers call
def test_a_one_basin_result_with_uncertainties_passes_through_write_netcdf(study, tmp_path, offline):
    """What an estimate or merge output looks like (one basin selected, a standard error per term) passes the
    checker through `write_netcdf` alone, and reads back with the same numbers."""
    from wbexplore.cache import load_basins
    from wbexplore.io.basins import representative_points
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.writers import read_netcdf, write_netcdf

    one = _series(study).sel(basin="B")  # a scalar `basin` coordinate is left by .sel
    one["sigma_rain"] = 0.1 * one["rain"]
    one["sigma_rain"].attrs = {"units": "mm/month"}
    cat = open_catalog(study)
    p = write_netcdf(one, tmp_path / "one.nc", positions=representative_points(load_basins(cat)), time_step="month")
    bad = cf_failures(p)
    assert bad["errors"] == bad["warnings"] == bad["exceptions"] == [], bad
    back = read_netcdf(p)
    assert str(back["basin_id"].values) == "B" and back["rain"].attrs["ancillary_variables"] == \
        "sigma_rain valid_fraction_rain"
    for n in one.data_vars:
        np.testing.assert_array_equal(back[n].values, one[n].values)


def test_positions_lie_inside_their_basins(study, extracted):
    """The written lat/lon of each series is inside its basin outline (shapely, on the basin file itself)."""
    import geopandas as gpd
    import shapely

    from wbexplore.io.writers import read_netcdf

    back = read_netcdf(extracted)
    gdf = gpd.read_file(study.parent / "basins.geojson").set_index("basin_id")
    for b in back["basin"].values:
        pt = shapely.Point(float(back["lon"].sel(basin=b)), float(back["lat"].sel(basin=b)))
        assert gdf.geometry[b].contains(pt), b


def test_positions_missing_a_basin_is_refused(study, tmp_path):
    from wbexplore.errors import InputError
    from wbexplore.io.writers import write_netcdf

    ds = _series(study)
    pos = pd.DataFrame({"lat": [1.0], "lon": [0.0]}, index=["A"])
    with pytest.raises(InputError, match=r"x\.nc: basin 'B': no position"):
        write_netcdf(ds, tmp_path / "x.nc", positions=pos)
    assert not (tmp_path / "x.nc").exists() and not list(tmp_path.glob(".x.nc*"))


def test_incremental_series_export_passes_and_its_position_is_in_the_unit(study, tmp_path, capsys, offline):
    """The incremental unit (outer basin minus the inner one: a ring-like outline whose centroid may fall
    outside it) gets a position inside the unit itself (shapely), and its file passes the checker."""
    import geopandas as gpd
    import shapely

    from wbexplore.io.writers import read_netcdf

    boxes = {"A": (-1.7, 0.2, 1.8, 2.8), "B": (-1.0, 0.6, 1.2, 2.4)}
    gpd.GeoDataFrame({"basin_id": list(boxes), "name": ["Outer", "Inner"], "drains_to": [None, "A"]},
                     geometry=[shapely.box(*b) for b in boxes.values()], crs="EPSG:4326").to_file(
        study.parent / "basins.geojson", driver="GeoJSON")
    doc = yaml.safe_load(study.read_text())
    doc["basins"]["downstream_field"] = "drains_to"
    study.write_text(yaml.safe_dump(doc, sort_keys=False))
    out = tmp_path / "inc.nc"
    rc, _o, err = run_cli(["export", study, "--basin", "A", "--incremental", "--P", "rain", "--ET", "evap",
                           "--TWSA", "tws", "--out", tmp_path / "inc.yaml", "--series", out], capsys)
    assert rc == 0, err
    bad = cf_failures(out)
    assert bad["errors"] == bad["warnings"] == bad["exceptions"] == [], bad
    back = read_netcdf(out)
    unit = shapely.box(*boxes["A"]).difference(shapely.box(*boxes["B"]))
    assert not unit.contains(unit.centroid)  # the case where a centroid would be wrong
    assert unit.contains(shapely.Point(float(back["lon"]), float(back["lat"])))


# --------------------------------------------------------------------------- merge and estimate outputs
@pytest.fixture
def stated_study(study):
    """The study with a stated error for each product (one product per component: the merge weighs by them)."""
    doc = yaml.safe_load(study.read_text())
    for s, err in zip(doc["sources"], (5.0, 4.0, 8.0)):
        s["absolute_error_mm"] = err
    study.write_text(yaml.safe_dump(doc, sort_keys=False))
    return study


def _clean(path):
    bad = cf_failures(path)
    assert bad["errors"] == bad["warnings"] == bad["exceptions"] == [], bad


def test_merge_output_passes_the_cf_checker_and_reads_back(stated_study, tmp_path, capsys, offline):
    """`wbexplore merge` writes through `write_netcdf`: no error, warning or exception of the cf:1.8 checks (the
    text labels of the product dimension become an auxiliary ``product_id``: a string coordinate variable made
    the checker raise), the caution text in the global attributes, a position per basin, and the numbers of
    `merge_products` bitwise after `read_netcdf`."""
    from wbexplore.balance.merge import merge_products
    from wbexplore.io.writers import CAUTION, read_netcdf

    out = tmp_path / "merged.nc"
    rc, _o, err = run_cli(["merge", stated_study, "--all", "--method", "ckf", "--out", out], capsys)
    assert rc == 0, err
    _clean(out)
    back = read_netcdf(out)
    ref = merge_products(_series(stated_study), method="ckf")
    assert back.attrs["caution"] == CAUTION and back.attrs["merge_method"] == "ckf"
    assert list(back["basin"].values) == ["A", "B"] and list(back["product"].values) == ["rain", "evap", "tws"]
    assert np.isfinite(back["lat"].values).all() and np.isfinite(back["lon"].values).all()
    assert set(ref.data_vars) == set(back.data_vars) - {"time_bnds"}
    for n in ref.data_vars:
        np.testing.assert_array_equal(back[n].values, ref[n].values)
        assert back[n].attrs["merge_method"] == "ckf"
    assert back["merged_P"].attrs["ancillary_variables"] == "merged_P_standard_error"


def test_estimate_output_passes_the_cf_checker_and_reads_back(stated_study, tmp_path, capsys, offline):
    """`wbexplore estimate ... --out FILE.nc` writes through `write_netcdf`: no error, warning or exception of the
    cf:1.8 checks with a whole water year in the file, the basin's position and identifier, the caution text
    in the global attributes, and the numbers of `estimate_dataset` bitwise after `read_netcdf`."""
    from wbexplore.balance import ClosureOptions, Selection
    from wbexplore.balance.estimate import estimate_by_difference
    from wbexplore.io.estimates import estimate_dataset
    from wbexplore.io.writers import CAUTION, read_netcdf

    out = tmp_path / "et.nc"
    rc, _o, err = run_cli(["estimate", stated_study, "--basin", "A", "--term", "ET", "--P", "rain", "--TWSA", "tws",
                           "--water-year-start", "2", "--out", out], capsys)
    assert rc == 0, err
    _clean(out)
    back = read_netcdf(out)
    sel = Selection.from_options("A", ClosureOptions(water_year_start=2), P="rain", ET=None, TWSA="tws")
    ref = estimate_dataset(estimate_by_difference(_series(stated_study), sel, "ET", strict=True))
    assert back.sizes["water_year"] == 1 and CAUTION in back.attrs["comment"]
    assert str(back["basin_id"].values) == "A" and np.isfinite(float(back["lat"])) and np.isfinite(float(back["lon"]))
    assert set(ref.data_vars) == set(back.data_vars)
    for n in ref.data_vars:
        np.testing.assert_array_equal(back[n].values, ref[n].values)
    assert np.isfinite(back["ET"].values).sum() >= 12
    assert back["ET"].attrs["ancillary_variables"] == "ET_standard_error"
