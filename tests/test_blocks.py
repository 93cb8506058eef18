"""Streaming extraction from raw file blocks against the decoded (xarray / rioxarray) path.

The reference is the libraries' own decoding of each file: xarray's CF ``mask_and_scale``
(CF conventions 1.8, section 8.1 "Packed data": unpacked = packed * scale_factor + add_offset;
section 2.5.1: ``_FillValue`` and ``missing_value`` mark missing data) and rioxarray's decoding
of GeoTIFF nodata, scales and offsets. The block reader never decodes a value; it skips fill
values in the accumulation and unpacks the means, so agreement checks both shortcuts.
"""

import pickle

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from utils import box_basins, lonlat_grid, write_catalog, write_nc
from wbexplore.io.catalog import open_catalog
from wbexplore.io.grids import open_source
from wbexplore.pipeline import extract, load_basins, source_means, weights_for
from wbexplore.spatial.zonal import zonal_mean, zonal_mean_blocks

LON, LAT = lonlat_grid(-4, 4, 8, 15, 0.25)
NT = 30
MONTHS = pd.date_range("2004-01-01", periods=NT, freq="MS")
# partial cells, a nested pair and a basin that straddles the prime meridian
BOXES = [(-3.1, 9.1, -0.4, 12.3), (-2.0, 10.0, -1.1, 11.05), (0.13, 8.6, 3.3, 14.4), (-0.9, 12.9, 0.8, 14.9)]


def _values(seed=3):
    rng = np.random.default_rng(seed)
    t = np.arange(NT)[:, None, None]
    v = 40 + 25 * np.sin(t / 3 + LON[None, None, :] / 2) + 3 * LAT[None, :, None] + rng.normal(0, 2, (NT, LAT.size, LON.size))
    v[:, rng.random((LAT.size, LON.size)) < 0.08] = np.nan  # coast-like cells with no data
    v[rng.random(v.shape) < 0.02] = np.nan  # scattered missing months
    return v


def _both(tmp_path, src_entry, *, task_bytes=None, read_bytes=None):
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [src_entry]))
    src = open_source(cat.sources[0])
    w = weights_for(src, load_basins(cat), cache_dir=tmp_path / "cache")
    ref = zonal_mean(src.data, w).compute(scheduler="sync")
    assert src.blocks is not None, "this file should be streamed"
    kw = {k: v for k, v in {"task_bytes": task_bytes, "read_bytes": read_bytes}.items() if v}
    got = zonal_mean_blocks(src.blocks, w, src.data["time"].values, **kw).compute(scheduler="threads")
    return src, ref, got


def _assert_same(ref, got, rtol):
    np.testing.assert_allclose(got["mean"].values, ref["mean"].values, rtol=rtol, atol=0)
    np.testing.assert_allclose(got["valid_fraction"].values, ref["valid_fraction"].values, rtol=1e-12, atol=1e-15)
    assert np.isnan(ref["mean"].values).sum() == np.isnan(got["mean"].values).sum()


def _write_packed_nc(path, vals, *, fill=-32768, scale=0.01, offset=30.0, encoding_extra=None, missing_value=None):
    da = xr.DataArray(vals, dims=("time", "lat", "lon"), coords={"time": MONTHS, "lat": LAT, "lon": LON},
                      attrs={"units": "mm"})
    da["lat"].attrs = {"units": "degrees_north", "standard_name": "latitude"}
    da["lon"].attrs = {"units": "degrees_east", "standard_name": "longitude"}
    enc = {"dtype": "int16", "scale_factor": scale, "add_offset": offset, "_FillValue": fill}
    if missing_value is not None:
        enc["missing_value"] = missing_value
    enc.update(encoding_extra or {})
    xr.Dataset({"p": da}).to_netcdf(path, encoding={"p": enc})


def test_packed_int16_netcdf_equals_cf_decoding(tmp_path):
    # CF 1.8 section 8.1: the means of the packed integers, unpacked, equal the means of the unpacked values
    _write_packed_nc(tmp_path / "p.nc", _values())
    src, ref, got = _both(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "p"})
    assert src.blocks.dtype == "<i2" and src.blocks.nodata == -32768 and src.blocks.scale == pytest.approx(0.01)
    # xarray decodes int16 to float32 (about 7 digits); the block path unpacks float64 means
    _assert_same(ref, got, rtol=2e-6)


def test_missing_value_only_and_float_fill(tmp_path):
    vals = np.nan_to_num(_values(), nan=-9999.0).astype(np.float32)
    da = xr.DataArray(vals, dims=("time", "lat", "lon"), coords={"time": MONTHS, "lat": LAT, "lon": LON},
                      attrs={"units": "mm"})
    xr.Dataset({"p": da}).to_netcdf(tmp_path / "p.nc", encoding={"p": {"_FillValue": None, "missing_value": -9999.0}})
    src, ref, got = _both(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "p"})
    assert src.blocks.nodata == -9999.0
    assert np.isfinite(ref["mean"].values).all()  # every basin has valid cells every month
    _assert_same(ref, got, rtol=1e-12)


def test_compressed_chunks_are_read_whole_and_tasks_split(tmp_path):
    _write_packed_nc(tmp_path / "p.nc", _values(), encoding_extra={"zlib": True, "complevel": 4,
                                                                   "chunksizes": (7, 9, 11)})
    entry = {"id": "p", "component": "P", "path": "p.nc", "variable": "p"}
    src, ref, got = _both(tmp_path, entry)
    assert src.blocks.time_align == 7 and (src.blocks.block_rows, src.blocks.block_cols) == (9, 11)
    _assert_same(ref, got, rtol=2e-6)
    # tiny tasks: several time runs and strips of rows; sums of partial blocks equal the whole
    _, _, small = _both(tmp_path, entry, task_bytes=4000, read_bytes=1000)
    np.testing.assert_allclose(small["mean"].values, got["mean"].values, rtol=1e-12)
    np.testing.assert_allclose(small["valid_fraction"].values, got["valid_fraction"].values, rtol=1e-12)


def test_basin_means_do_not_depend_on_the_other_basins(tmp_path):
    # common practice for reproducible selections: one basin extracted alone gives bitwise the
    # numbers of the full run, here with tasks small enough to cut rows into several strips
    _write_packed_nc(tmp_path / "p.nc", _values(), encoding_extra={"zlib": True, "complevel": 1,
                                                                   "chunksizes": (5, 4, 32)})
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}]))
    src = open_source(cat.sources[0])
    gdf = load_basins(cat)
    t = src.data["time"].values
    w_all = weights_for(src, gdf, cache_dir=tmp_path / "cache")
    lazy = zonal_mean_blocks(src.blocks, w_all, t, task_bytes=3000)
    graph = dict(lazy["mean"].data.__dask_graph__())
    assert any(isinstance(k, tuple) and k[0].endswith("-sum") for k in graph)  # rows cut into strips
    full = lazy.compute(scheduler="threads")
    for i in range(len(gdf)):
        w_one = weights_for(src, gdf.iloc[[i]], cache_dir=tmp_path / "cache")
        one = zonal_mean_blocks(src.blocks, w_one, t, task_bytes=3000).compute(scheduler="threads")
        b = one["basin"].values[0]
        np.testing.assert_array_equal(one["mean"].values[0], full["mean"].sel(basin=b).values)
        np.testing.assert_array_equal(one["valid_fraction"].values[0], full["valid_fraction"].sel(basin=b).values)


@pytest.mark.parametrize("descending,lon360", [(True, False), (False, True), (True, True)])
def test_orientations_stream_in_file_order(tmp_path, descending, lon360):
    write_nc(tmp_path / "p.nc", _values(), LON, LAT, MONTHS, var="rain", units="mm/day",
             descending=descending, lon360=lon360)
    _, ref, got = _both(tmp_path, {"id": "p", "component": "P", "path": "p.nc", "variable": "rain"},
                        task_bytes=20000)
    _assert_same(ref, got, rtol=1e-12)


def _write_int_tif(path, vals, *, interleave="band", scale=0.1, offset=2.0, nodata=-9999):
    import rasterio
    from rasterio.transform import from_origin

    packed = np.where(np.isnan(vals), nodata, np.round((vals - offset) / scale)).astype(np.int16)[:, ::-1, :]
    res = 0.25
    with rasterio.open(path, "w", driver="GTiff", width=LON.size, height=LAT.size, count=NT, dtype="int16",
                       crs="EPSG:4326", transform=from_origin(LON[0] - res / 2, LAT[-1] + res / 2, res, res),
                       nodata=nodata, tiled=True, blockxsize=16, blockysize=16, interleave=interleave) as dst:
        dst.write(packed)
        dst.scales = (scale,) * NT
        dst.offsets = (offset,) * NT


@pytest.mark.parametrize("interleave", ["band", "pixel"])
def test_packed_geotiff_equals_rioxarray_decoding(tmp_path, interleave):
    _write_int_tif(tmp_path / "p.tif", _values(), interleave=interleave)
    src, ref, got = _both(tmp_path, {"id": "p", "component": "P", "path": "p.tif", "units": "mm",
                                     "time_start": "2004-01"}, task_bytes=30000)
    assert src.blocks.interleaved is (interleave == "pixel")
    assert (src.blocks.nodata, src.blocks.scale, src.blocks.offset) == (-9999.0, pytest.approx(0.1), 2.0)
    _assert_same(ref, got, rtol=2e-6)


def test_geotiff_series_streams_one_file_per_month(tmp_path):
    from utils import write_tif

    vals = _values()
    (tmp_path / "g").mkdir()
    for i, m in enumerate(MONTHS):
        write_tif(tmp_path / "g" / f"p_{m:%Y-%m}.tif", vals[i], LON, LAT)
    src, ref, got = _both(tmp_path, {"id": "p", "component": "P", "path": "g/p_*.tif", "units": "mm",
                                     "date_format": "%Y-%m"})
    assert len(src.blocks.paths) == NT
    assert src.blocks.sidecar_free  # the folder holds the series alone: GDAL does not list it at every opening
    _assert_same(ref, got, rtol=1e-12)


def test_series_folder_with_anything_else_is_listed_by_gdal(tmp_path):
    # a GDAL side-car (PAM .aux.xml, GDAL's documented format) giving one month a scale and offset must
    # still be found: only a folder holding nothing but the series is opened without listing it
    import rasterio
    from utils import write_tif

    from wbexplore.io.blocks import only_series_files

    vals = _values()
    (tmp_path / "g").mkdir()
    for i, m in enumerate(MONTHS):
        write_tif(tmp_path / "g" / f"p_{m:%Y-%m}.tif", vals[i], LON, LAT)
    paths = sorted((tmp_path / "g").glob("p_*.tif"))
    assert only_series_files(paths) and not only_series_files(paths[1:])
    third = paths[2]
    (tmp_path / "g" / (third.name + ".aux.xml")).write_text(
        '<PAMDataset><PAMRasterBand band="1"><Offset>5</Offset><Scale>2</Scale></PAMRasterBand></PAMDataset>')
    assert not only_series_files(paths)
    with rasterio.open(third) as s:  # reference: GDAL itself reads the side-car
        assert (s.scales[0], s.offsets[0]) == (2.0, 5.0)
        stored = s.read(1, masked=True).filled(np.nan)[::-1]
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "g/p_*.tif", "units": "mm",
                                                 "date_format": "%Y-%m"}]))
    src = open_source(cat.sources[0])
    assert src.blocks is None or not src.blocks.sidecar_free
    np.testing.assert_allclose(src.data.isel(time=2).sortby("y").values, stored * 2 + 5, rtol=1e-6)


@pytest.mark.filterwarnings("ignore:variable 'p' has multiple fill values")  # xarray says so, rightly
def test_unsupported_packing_falls_back_to_the_decoded_path(tmp_path):
    # two different fill values: the reader would need two comparisons, so the xarray path decodes
    import netCDF4

    packed = np.where(np.isnan(_values()), -32768, np.round((_values() - 30.0) / 0.01)).astype(np.int16)
    packed[0, 0, :3] = -1
    with netCDF4.Dataset(tmp_path / "p.nc", "w") as nc:
        nc.createDimension("time", NT)
        nc.createDimension("lat", LAT.size)
        nc.createDimension("lon", LON.size)
        t = nc.createVariable("time", "f8", ("time",))
        t.units, t[:] = "days since 2004-01-01", (MONTHS - MONTHS[0]).days.values
        for name, vals, std in (("lat", LAT, "latitude"), ("lon", LON, "longitude")):
            c = nc.createVariable(name, "f8", (name,))
            c.standard_name, c[:] = std, vals
        v = nc.createVariable("p", "i2", ("time", "lat", "lon"), fill_value=np.int16(-32768))
        v.set_auto_maskandscale(False)
        v.missing_value, v.scale_factor, v.add_offset, v.units = np.int16(-1), 0.01, 30.0, "mm"
        v[:] = packed
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}]))
    src = open_source(cat.sources[0])
    assert src.blocks is None
    ds = extract(cat, cache_dir=tmp_path / "cache")
    w = weights_for(src, load_basins(cat), cache_dir=tmp_path / "cache")
    np.testing.assert_allclose(ds["p"].values, zonal_mean(src.data, w)["mean"].values * src.factor, rtol=1e-12)


def test_months_out_of_order_are_not_streamed(tmp_path):
    order = np.r_[5:NT, 0:5]
    vals = _values()
    write_nc(tmp_path / "p.nc", vals[order], LON, LAT, MONTHS[order], var="rain", units="mm")
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "rain"}]))
    src = open_source(cat.sources[0])
    assert src.blocks is None and list(src.months) == list(MONTHS)


def test_file_rewritten_in_place_is_read_again(tmp_path):
    entry = {"id": "p", "component": "P", "path": "p.nc", "variable": "rain"}
    vals = _values()
    write_nc(tmp_path / "p.nc", vals, LON, LAT, MONTHS, var="rain", units="mm")
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [entry]))
    first = extract(cat, cache_dir=tmp_path / "cache")["p"].values
    write_nc(tmp_path / "p.nc", vals + 10.0, LON, LAT, MONTHS, var="rain", units="mm")
    second = extract(open_catalog(tmp_path / "catalog.yaml"), cache_dir=tmp_path / "cache")["p"].values
    np.testing.assert_allclose(second - first, 10.0, rtol=1e-6)


def test_readers_pickle_and_extract_uses_them(tmp_path):
    write_nc(tmp_path / "p.nc", _values(), LON, LAT, MONTHS, var="rain", units="mm")
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "rain"}]))
    src = open_source(cat.sources[0])
    again = pickle.loads(pickle.dumps(src.blocks))  # what a distributed worker receives
    assert again == src.blocks and again.nodata is None  # a float file with NaN as its only fill
    np.testing.assert_array_equal(again.read(3, 5, 2, 9, 0, LON.size), src.data.values[3:5, 2:9, :])
    w = weights_for(src, load_basins(cat), cache_dir=tmp_path / "cache")
    ds = extract(cat, cache_dir=tmp_path / "cache")
    np.testing.assert_allclose(ds["p"].values, source_means(src, w)["mean"].values, rtol=1e-12)
