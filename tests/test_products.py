"""Products as their producers lay them out: one test per layout, tiny synthetic files written here.

Outside references: the day-expansion of each period (repeat its rate over its days, sum per
month, plain pandas) for sub-monthly steps; CF conventions for valid_range / no-data codes /
packing (compared with stored values, then ``stored * scale_factor + add_offset``); numpy means
of the valid stored values for the masked GeoTIFF.
"""

from datetime import timedelta

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from utils import box_basins, lonlat_grid, write_catalog, write_nc, write_tif
from wbexplore.cli import main
from wbexplore.errors import InputError
from wbexplore.io.catalog import open_catalog
from wbexplore.io.grids import open_source
from wbexplore.pipeline import extract
from wbexplore import temporal as T

LON, LAT = lonlat_grid(-1, 1, 0, 1, 0.25)  # 8 x 4 cells near the equator


def _open(tmp_path, src, version=2):
    box_basins(tmp_path / "basins.geojson", [(-1, 0, 1, 1)])
    p = write_catalog(tmp_path, [src], extra={"catalog_version": version})
    return open_source(open_catalog(p).sources[0]), p


def _uniform(vals):
    return np.asarray(vals, float)[:, None, None] * np.ones((1, LAT.size, LON.size))


def _day_expansion(starts, step, vals):
    """Reference: each period's rate repeated over its days, summed per calendar month."""
    rows = []
    for s, v in zip(pd.DatetimeIndex(starts), vals):
        n = (T.period_end(s.date(), step) - s.date()).days
        rows += [(s + timedelta(days=k), v) for k in range(n)]
    df = pd.DataFrame(rows, columns=["d", "v"]).set_index("d")
    return df["v"].groupby(df.index.to_period("M")).sum()


def _cell(g):
    return g.data.values[:, 0, 0] * g.factor


def test_8day_geotiffs_named_by_year_and_day_of_year(tmp_path):
    starts = T.period_starts_between("8-day", "2019-01-01", "2020-12-31")  # last of each year shorter
    vals = 1.0 + np.arange(len(starts)) % 7
    (tmp_path / "et").mkdir()
    for s, v in zip(starts, vals):
        write_tif(tmp_path / "et" / f"et8_{s:%Y%j}_x.tif", _uniform([v])[0], LON, LAT, units="mm/day")
    g, _ = _open(tmp_path, {"id": "e8", "component": "ET", "path": "et/et8_*.tif", "date_format": "%Y%j"})
    assert g.native_step == "8-day" and g.incomplete_months == 0
    ref = _day_expansion(starts, "8-day", vals)
    np.testing.assert_allclose(_cell(g), ref.values, rtol=1e-6)
    assert len(g.months) == 24


def test_dekadal_netcdf_with_period_start_stamps(tmp_path):
    starts = T.period_starts_between("dekad", "2021-01-01", "2021-06-30")
    vals = np.linspace(1, 3, len(starts))
    write_nc(tmp_path / "dk.nc", _uniform(vals), LON, LAT, starts, var="et", units="mm")  # amounts per dekad
    g, _ = _open(tmp_path, {"id": "dk", "component": "ET", "path": "dk.nc", "time_step": "dekad"})
    assert g.native_step == "dekad"
    # an amount per period: a month receives the sum of its three dekads
    np.testing.assert_allclose(_cell(g), vals.reshape(6, 3).sum(axis=1), rtol=1e-6)


def test_dekadal_geotiffs_with_dekad_in_the_name(tmp_path):
    starts = T.period_starts_between("dekad", "2020-02-01", "2020-03-31")
    vals = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    (tmp_path / "p").mkdir()
    for s, v in zip(starts, vals):
        write_tif(tmp_path / "p" / f"rain_{s:%Y_%m}_{(s.day - 1) // 10 + 1}.tif", _uniform([v])[0], LON, LAT,
                  units="mm/day")
    g, _ = _open(tmp_path, {"id": "dk", "component": "P", "path": "p/rain_*.tif", "date_format": "%Y_%m_{dekad}"})
    assert g.native_step == "dekad"
    # February 2020 (leap): 10 + 20 + 9 x 3 mm; March: 40 + 50 + 11 x 6
    np.testing.assert_allclose(_cell(g), [10 + 20 + 27, 40 + 50 + 66], rtol=1e-6)


def test_pentads_inferred_from_the_stamps(tmp_path):
    starts = T.period_starts_between("pentad", "2022-01-01", "2022-03-31")
    vals = 1.0 + (np.arange(len(starts)) % 4)
    write_nc(tmp_path / "pt.nc", _uniform(vals), LON, LAT, starts, var="pr", units="mm/day")
    g, _ = _open(tmp_path, {"id": "pt", "component": "P", "path": "pt.nc"})
    assert g.native_step == "pentad"
    np.testing.assert_allclose(_cell(g), _day_expansion(starts, "pentad", vals).values, rtol=1e-6)


def _write_uint16(path, stored, *, nodata=65535):
    import rasterio
    from rasterio.transform import from_origin

    res = 0.25
    with rasterio.open(path, "w", driver="GTiff", width=stored.shape[2], height=stored.shape[1],
                       count=stored.shape[0], dtype="uint16", crs="EPSG:4326", nodata=nodata,
                       transform=from_origin(LON[0] - res / 2, LAT[-1] + res / 2, res, res)) as dst:
        dst.write(stored.astype(np.uint16))


@pytest.mark.parametrize("mask", [{"nodata": [65530, 65531, 65532, 65533, 65534]}, {"valid_range": [0, 32700]}])
def test_uint16_geotiff_class_codes_below_the_fill_are_masked(tmp_path, mask):
    stored = np.full((3, LAT.size, LON.size), 250, np.uint16)  # 25.0 mm at scale 0.1
    stored[:, 0, :3] = 65533  # non-land class codes just below the fill value
    stored[:, 2, 5] = 65531
    stored[1, 3, 7] = 65535  # the file's own fill value
    _write_uint16(tmp_path / "et.tif", stored)
    src = {"id": "u", "component": "ET", "path": "et.tif", "units": "mm", "time_start": "2020-01",
           "scale_factor": 0.1, **mask}
    g, cat = _open(tmp_path, src)
    vals = g.data.values
    assert np.isnan(vals[:, 0, :3]).all() and np.isnan(vals[1, 3, 7])
    np.testing.assert_allclose(np.nanmean(vals, axis=(1, 2)), 25.0, rtol=1e-6)
    # the block reader masks in the same pass (stored values, before unpacking)
    assert g.blocks is not None
    ds = extract(cat, use_cache=False)
    np.testing.assert_allclose(ds["u"].values.ravel(), 25.0, rtol=1e-6)


def test_uint16_without_the_mask_is_read_as_data(tmp_path):
    # the failure the fields fix: class codes counted as values, a mean off by orders of magnitude
    stored = np.full((1, LAT.size, LON.size), 250, np.uint16)
    stored[0, 0, :3] = 65533
    _write_uint16(tmp_path / "et.tif", stored)
    g, _ = _open(tmp_path, {"id": "u", "component": "ET", "path": "et.tif", "units": "mm", "time_start": "2020-01",
                            "scale_factor": 0.1})
    assert np.nanmean(g.data.values) > 100


def _twsa_two_in_one_month(tmp_path, duplicates=None):
    # two solutions whose mid-points fall in March 2020
    times = pd.DatetimeIndex(["2020-01-16", "2020-02-15", "2020-03-03", "2020-03-25", "2020-04-16"])
    vals = np.array([1.0, 2.0, 3.0, 5.0, 6.0])
    write_nc(tmp_path / "tw.nc", _uniform(vals), LON, LAT, times, var="lwe", units="cm")
    src = {"id": "tw", "component": "TWSA", "path": "tw.nc"}
    if duplicates:
        src["duplicates"] = duplicates
    return src


@pytest.mark.parametrize("how, march", [("mean", 40.0), ("first", 30.0), ("last", 50.0)])
def test_two_storage_solutions_in_one_month(tmp_path, how, march):
    g, _ = _open(tmp_path, _twsa_two_in_one_month(tmp_path, how))
    assert [f"{m:%Y-%m}" for m in g.months] == ["2020-01", "2020-02", "2020-03", "2020-04"]
    np.testing.assert_allclose(_cell(g), [10.0, 20.0, march, 60.0], rtol=1e-6)  # cm -> mm


def test_two_storage_solutions_refused_by_default(tmp_path):
    with pytest.raises(InputError, match=r"'tw'.*'duplicates'.*2020-03"):
        _open(tmp_path, _twsa_two_in_one_month(tmp_path))


def test_check_shows_step_short_crs_and_incomplete_months(tmp_path, capsys):
    starts = T.period_starts_between("dekad", "2021-01-11", "2021-03-31")  # January incomplete
    write_nc(tmp_path / "dk.nc", _uniform(np.ones(len(starts))), LON, LAT, starts, var="et", units="mm/day")
    _, cat = _open(tmp_path, {"id": "dk", "component": "ET", "path": "dk.nc"})
    assert main(["check", str(cat)]) == 0
    out = capsys.readouterr().out
    header = next(line for line in out.splitlines() if line.startswith("id "))
    row = next(line for line in out.splitlines() if line.startswith("dk "))
    assert "incomplete" in header
    assert row.split()[3] == "dekad" and "EPSG:4326" in row.split() and row.split()[7] == "1"
    assert "{" not in row


# ---- bad input: exit 2, one line naming source, file and value; nothing written

def _bad_step(tmp):
    starts = T.period_starts_between("8-day", "2020-01-01", "2020-03-31")
    write_nc(tmp / "e.nc", _uniform(np.ones(len(starts))), LON, LAT, starts, var="et")
    return {"id": "e", "component": "ET", "path": "e.nc", "time_step": "dekad"}, ["'e'", "e.nc", "2020-01-09"]


def _dekad_4(tmp):
    (tmp / "p").mkdir()
    for name in ("r_2020_01_1.tif", "r_2020_01_4.tif"):
        write_tif(tmp / "p" / name, np.ones((LAT.size, LON.size)), LON, LAT, units="mm/day")
    return ({"id": "r", "component": "P", "path": "p/r_*.tif", "date_format": "%Y_%m_{dekad}"},
            ["'r'", "r_2020_01_4.tif", "dekad 4"])


def _range_reversed(tmp):
    write_nc(tmp / "e.nc", _uniform(np.ones(3)), LON, LAT, pd.date_range("2020-01-01", periods=3, freq="MS"))
    return {"id": "e", "component": "ET", "path": "e.nc", "valid_range": [10, 0]}, ["'e'", "'valid_range'", "10"]


def _nodata_text(tmp):
    write_nc(tmp / "e.nc", _uniform(np.ones(3)), LON, LAT, pd.date_range("2020-01-01", periods=3, freq="MS"))
    return {"id": "e", "component": "ET", "path": "e.nc", "nodata": ["none"]}, ["'e'", "'nodata'", "'none'"]


def _overlapping(tmp):
    starts = pd.DatetimeIndex(["2020-01-01", "2020-01-05", "2020-01-09"])  # 8-day composites every 4 days
    write_nc(tmp / "e.nc", _uniform(np.ones(3)), LON, LAT, starts, var="et")
    return {"id": "e", "component": "ET", "path": "e.nc", "time_step": "8-day"}, ["'e'", "e.nc", "2020-01-05"]


def _month_twice(tmp):
    times = pd.DatetimeIndex(["2020-01-01", "2020-02-01", "2020-02-15"])
    write_nc(tmp / "e.nc", _uniform(np.ones(3)), LON, LAT, times, var="et", units="mm/month")
    return {"id": "e", "component": "ET", "path": "e.nc", "time_step": "month"}, ["'e'", "e.nc", "'duplicates'", "2020-02"]


@pytest.mark.parametrize("make", [_bad_step, _dekad_4, _range_reversed, _nodata_text, _overlapping, _month_twice])
def test_bad_input_exit_2_one_line_nothing_written(tmp_path, capsys, make):
    src, expect = make(tmp_path)
    box_basins(tmp_path / "basins.geojson", [(-1, 0, 1, 1)])
    cat = write_catalog(tmp_path, [src], extra={"catalog_version": 2})
    out = tmp_path / "series.nc"
    rc = main(["extract", str(cat), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    for e in expect:
        assert e in err, (e, err)
    assert not out.exists()
    assert not any(p.name.startswith("series") for p in tmp_path.iterdir())


@pytest.mark.parametrize("declared_scale, expect", [(None, 2.5), (0.1, 25.0)])
def test_packed_netcdf_codes_masked_and_declared_packing_wins(tmp_path, declared_scale, expect):
    # CF: _FillValue and scale_factor in the file; catalog nodata codes compared with stored values
    stored = np.full((2, LAT.size, LON.size), 250, np.int16)
    stored[:, 1, :4] = -9998  # producer's class codes beside the fill value
    stored[0, 2, 2] = -9999
    t = pd.date_range("2020-01-01", periods=2, freq="MS")
    da = xr.DataArray(stored, dims=("time", "lat", "lon"), coords={"time": t, "lat": LAT, "lon": LON},
                      attrs={"units": "mm", "scale_factor": 0.01, "_FillValue": np.int16(-9999)})
    da["lat"].attrs = {"units": "degrees_north", "standard_name": "latitude"}
    da["lon"].attrs = {"units": "degrees_east", "standard_name": "longitude"}
    xr.Dataset({"et": da}).to_netcdf(tmp_path / "pk.nc", encoding={"et": {"dtype": "int16"}})
    src = {"id": "pk", "component": "ET", "path": "pk.nc", "nodata": [-9998, -9997]}
    if declared_scale is not None:
        src["scale_factor"] = declared_scale
    g, cat = _open(tmp_path, src)
    vals = g.data.values
    assert np.isnan(vals[:, 1, :4]).all() and np.isnan(vals[0, 2, 2])
    np.testing.assert_allclose(np.nanmean(vals, axis=(1, 2)), expect, rtol=1e-6)
    assert g.blocks is not None  # and the block path masks and unpacks alike
    ds = extract(cat, use_cache=False)
    np.testing.assert_allclose(ds["pk"].values.ravel(), expect, rtol=1e-6)
