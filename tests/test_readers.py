"""Readers on small files written here: every format, orientation, time stamp style and unit path."""

import warnings

import numpy as np
import pandas as pd
import pytest
import shapely
import xarray as xr

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc, write_tif
from wbexplore.errors import InputError
from wbexplore.io.basins import BasinRepairWarning, read_basins
from wbexplore.io.catalog import open_catalog
from wbexplore.io.grids import open_source
from wbexplore.pipeline import extract

LON, LAT = lonlat_grid(-3, 3, 10, 14, 0.5)
NT = 14


def field(nt=NT):
    """Values that differ per cell and month, so any flip or shift is caught."""
    t = np.arange(nt)[:, None, None]
    y = np.arange(LAT.size)[None, :, None]
    x = np.arange(LON.size)[None, None, :]
    return (1.0 + t + 0.1 * y + 0.01 * x).astype(np.float64)


def _open(tmp_path, src):
    box_basins(tmp_path / "basins.geojson", [(-2, 11, 2, 13)])
    cat = open_catalog(write_catalog(tmp_path, [src]))
    return open_source(cat.sources[0]), cat


def _ref_vals(g):
    """Values as (time, lat ascending, lon ascending) from a SourceGrid."""
    d = g.data.sortby("y").sortby("x")
    return d.values * g.factor[:, None, None]


@pytest.mark.parametrize("descending", [False, True])
@pytest.mark.parametrize("lon360", [False, True])
@pytest.mark.parametrize("stamps", ["start", "mid", "end"])
def test_netcdf_orientations_and_stamps(tmp_path, descending, lon360, stamps):
    vals = field()
    write_nc(tmp_path / "p.nc", vals, LON, LAT, monthly("2003-01", NT, stamps), var="rain", units="mm/day",
             descending=descending, lon360=lon360)
    g, _ = _open(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "rain"})
    assert list(g.months) == list(pd.date_range("2003-01-01", periods=NT, freq="MS"))
    expect = vals
    if lon360:  # the file holds the columns sorted by 0..360 longitude
        expect = vals[:, :, np.argsort(np.mod(LON, 360.0))]
    dim = pd.date_range("2003-01-01", periods=NT, freq="MS").days_in_month.values
    expect = expect.astype(np.float32) * dim[:, None, None]  # mm/day -> mm per calendar month
    np.testing.assert_allclose(_ref_vals(g), expect, rtol=1e-6)


def test_netcdf_lazy(tmp_path):
    write_nc(tmp_path / "p.nc", field(), LON, LAT, monthly("2003-01", NT), var="rain")
    g, _ = _open(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "rain"})
    import dask.array as dsa

    assert isinstance(g.data.data, dsa.Array)


def test_time_bounds_decide_the_month(tmp_path):
    # month-end stamps at 00:00 of the next month are ambiguous; CF bounds say which month
    times = pd.date_range("2003-02-01", periods=NT, freq="MS")  # stamp = end of previous month
    ds = xr.Dataset({"rain": (("time", "lat", "lon"), field().astype(np.float32), {"units": "mm"})},
                    coords={"time": times, "lat": LAT, "lon": LON})
    lo = pd.date_range("2003-01-01", periods=NT, freq="MS")
    ds["time_bnds"] = (("time", "nv"), np.stack([lo.values, times.values], axis=1))
    ds["time"].attrs["bounds"] = "time_bnds"
    ds["time"].encoding["units"] = "days since 2000-01-01"
    ds.to_netcdf(tmp_path / "p.nc")
    g, _ = _open(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "rain"})
    assert g.months[0] == pd.Timestamp("2003-01-01")


def test_zarr_twsa_units(tmp_path):
    vals = field()
    ds = xr.Dataset({"tws": (("time", "lat", "lon"), vals, {"units": "cm"})},
                    coords={"time": monthly("2003-01", NT, "mid"), "lat": LAT, "lon": LON})
    ds.to_zarr(tmp_path / "s.zarr", consolidated=False)
    g, _ = _open(tmp_path, {"id": "s", "component": "TWSA", "path": "s.zarr", "variable": "tws"})
    np.testing.assert_allclose(_ref_vals(g), vals * 10.0)
    assert g.canonical_units == "mm"


def test_multiband_geotiff(tmp_path):
    vals = field()
    write_tif(tmp_path / "et.tif", vals, LON, LAT, units="mm")
    g, _ = _open(tmp_path, {"id": "e", "component": "ET", "path": "et.tif", "time_start": "2004-03"})
    assert g.months[0] == pd.Timestamp("2004-03-01") and len(g.months) == NT
    np.testing.assert_allclose(_ref_vals(g), vals, rtol=1e-6)


def test_multiband_geotiff_needs_dates(tmp_path):
    write_tif(tmp_path / "et.tif", field(), LON, LAT)
    with pytest.raises(InputError, match="time_start"):
        _open(tmp_path, {"id": "e", "component": "ET", "path": "et.tif", "units": "mm"})


def test_geotiff_glob_with_dates_in_names(tmp_path):
    vals = field()
    (tmp_path / "tifs").mkdir()
    months = pd.date_range("2002-11-01", periods=NT, freq="MS")
    for i in np.random.default_rng(0).permutation(NT):  # written in shuffled order
        write_tif(tmp_path / "tifs" / f"rain_{months[i]:%Y%m}_v2.tif", vals[i], LON, LAT)
    g, _ = _open(tmp_path, {"id": "r", "component": "P", "path": "tifs/rain_*.tif", "units": "mm",
                            "date_format": "%Y%m"})
    assert list(g.months) == list(months)
    np.testing.assert_allclose(_ref_vals(g), vals, rtol=1e-6)


def test_daily_with_one_missing_day(tmp_path):
    days = pd.date_range("2003-01-01", "2003-04-30", freq="D")
    days = days[days != pd.Timestamp("2003-02-10")]
    vals = np.ones((days.size, LAT.size, LON.size)) * 2.0  # 2 mm/day
    write_nc(tmp_path / "d.nc", vals, LON, LAT, days, var="et", units="mm/day")
    g, _ = _open(tmp_path, {"id": "d", "component": "ET", "path": "d.nc", "variable": "et"})
    assert g.native_step == "day"
    assert g.incomplete_months == 1
    got = _ref_vals(g)[:, 0, 0]
    # January 31 days x 2 mm; February has a missing day -> NaN, never scaled up; March 62, April 60
    np.testing.assert_allclose(got, [62.0, np.nan, 62.0, 60.0])


def test_units_from_file_and_missing_units(tmp_path):
    write_nc(tmp_path / "p.nc", field(), LON, LAT, monthly("2003-01", NT), var="rain", units="kg m-2 s-1")
    g, _ = _open(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "rain"})
    assert g.factor[0] == pytest.approx(86400 * 31)
    ds = xr.open_dataset(tmp_path / "p.nc").load()
    ds["rain"].attrs.pop("units")
    ds.to_netcdf(tmp_path / "q.nc")
    with pytest.raises(InputError, match="source 'q'.*'units'"):
        _open(tmp_path, {"id": "q", "component": "P", "path": "q.nc", "variable": "rain"})


def test_wrong_unit_in_file_refused(tmp_path):
    write_nc(tmp_path / "t.nc", field(), LON, LAT, monthly("2003-01", NT), var="tws", units="mm/day")
    with pytest.raises(InputError, match="source 't'.*mm/day"):
        _open(tmp_path, {"id": "t", "component": "TWSA", "path": "t.nc", "variable": "tws"})


def test_variable_not_in_file(tmp_path):
    write_nc(tmp_path / "p.nc", field(), LON, LAT, monthly("2003-01", NT), var="rain")
    with pytest.raises(InputError, match="'variable'.*'precip'"):
        _open(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "precip"})


def test_projected_grid_without_crs_refused(tmp_path):
    x = np.arange(5) * 1000.0
    y = np.arange(4) * 1000.0
    ds = xr.Dataset({"v": (("time", "y", "x"), np.ones((3, 4, 5)), {"units": "mm"})},
                    coords={"time": monthly("2003-01", 3), "y": y, "x": x})
    ds.to_netcdf(tmp_path / "p.nc")
    with pytest.raises(InputError, match="no CRS"):
        _open(tmp_path, {"id": "p", "component": "P", "path": "p.nc"})


def test_basins_any_crs_and_repair(tmp_path):
    import geopandas as gpd

    bow = shapely.Polygon([(0, 0), (1, 1), (1, 0), (0, 1), (0, 0)])  # self-intersecting
    good = shapely.box(600000, 1200000, 700000, 1300000)
    gdf = gpd.GeoDataFrame({"bid": ["bow", "utm"]}, geometry=[bow, good], crs="EPSG:32630")
    gdf.loc[0, "geometry"] = shapely.affinity.translate(shapely.affinity.scale(bow, 1e5, 1e5, origin=(0, 0)),
                                                        500000, 1100000)
    gdf.to_file(tmp_path / "b.gpkg")
    from wbexplore.io.catalog import BasinSpec

    with pytest.warns(BasinRepairWarning, match="basin 'bow'"):
        b = read_basins(BasinSpec(path=tmp_path / "b.gpkg", id_field="bid"))
    assert b.crs.to_epsg() == 4326
    assert all(b.geometry.is_valid)
    # a 100 km x 100 km square in UTM has about 1e4 km2 (UTM scale factor 0.9996 -> planar area differs < 0.1%)
    assert b.loc["utm", "area_km2"] == pytest.approx(1e4, rel=2e-3)


def test_basin_empty_geometry_refused(tmp_path):
    import geopandas as gpd

    from wbexplore.io.catalog import BasinSpec

    gdf = gpd.GeoDataFrame({"bid": ["a", "b"]}, geometry=[shapely.box(0, 0, 1, 1), shapely.Polygon()], crs=4326)
    gdf.to_file(tmp_path / "b.geojson")
    with pytest.raises(InputError, match="basin 'b'.*empty"):
        read_basins(BasinSpec(path=tmp_path / "b.geojson", id_field="bid"))


def test_basins_without_crs_refused_unless_declared(tmp_path):
    import geopandas as gpd

    from wbexplore.io.catalog import BasinSpec

    # a shapefile without .prj is the usual case of a basin file with no CRS
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="'crs' was not provided")
        gpd.GeoDataFrame({"bid": ["a"]}, geometry=[shapely.box(0, 10, 1, 11)]).to_file(tmp_path / "b.shp")
    with pytest.raises(InputError, match="no CRS"):
        read_basins(BasinSpec(path=tmp_path / "b.shp", id_field="bid"))
    b = read_basins(BasinSpec(path=tmp_path / "b.shp", id_field="bid", crs="EPSG:4326"))
    assert b.index.tolist() == ["a"]


def test_discharge_csv_to_mm(tmp_path):
    write_nc(tmp_path / "p.nc", field(), LON, LAT, monthly("2003-01", NT), var="rain", units="mm")
    box_basins(tmp_path / "basins.geojson", [(-2, 11, 2, 13)], ids=["G1"])
    rows = [{"when": f"2003-{m:02d}-15", "gauge": "G1", "flow": 10.0} for m in range(1, 13)]
    pd.DataFrame(rows).to_csv(tmp_path / "q.csv", index=False)
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "rain"}],
                        discharge={"path": "q.csv", "time_field": "when", "basin_field": "gauge",
                                   "value_field": "flow", "units": "m3/s"})
    ds = extract(cat)
    area = float(ds.basin_area_km2.values[0]) * 1e6
    q = ds["discharge"].sel(basin="G1")
    # 10 m3/s over the basin for 31 days (arithmetic)
    assert float(q.sel(time="2003-01-01")) == pytest.approx(10 * 86400 * 31 / area * 1000)
    assert float(q.sel(time="2003-02-01")) == pytest.approx(10 * 86400 * 28 / area * 1000)
    assert q.attrs["units"] == "mm/month"
