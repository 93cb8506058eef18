"""Daily and composite products streamed by the block readers, months formed inside the single pass.

Outside references: xarray's own ``resample(time="MS").sum(skipna=False)`` of the decoded daily grid
(the daily path before streaming), and for composites an independent day expansion of every cell
(each period's rate repeated over its days with ``numpy.repeat``, summed per calendar month with
pandas); both then weighted into basins with plain numpy (NaN cells drop out, as in CF area means).
Calendar facts (days per month, leap years) come from the standard library's ``calendar``.
"""

import calendar

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from utils import box_basins, lonlat_grid, write_catalog, write_nc, write_tif
from wbexplore import temporal as T
from wbexplore.io.catalog import open_catalog
from wbexplore.io.grids import open_source
from wbexplore.pipeline import load_basins, source_means, weights_for
from wbexplore.spatial import zonal
from wbexplore.spatial.zonal import zonal_mean

LON, LAT = lonlat_grid(-1, 1, 0, 1, 0.25)  # 8 x 4 cells
BOXES = [(-1, 0, 1, 1), (-0.9, 0.1, 0.3, 0.8), (0.05, 0.05, 0.95, 0.6)]  # partial cells


def _source(tmp_path, src):
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = open_catalog(write_catalog(tmp_path, [src], extra={"catalog_version": 2}))
    g = open_source(cat.sources[0])
    w = weights_for(g, load_basins(cat), cache_dir=tmp_path / "cache")
    return g, w


def _basin_means(W, monthly):
    """Reference area weighting in plain numpy: (months, ny, nx) grid -> (basins, months) mean, valid share."""
    M = monthly.reshape(monthly.shape[0], -1)
    ok = ~np.isnan(M)
    A = W.matrix.toarray()
    num, den = A @ np.where(ok, M, 0.0).T, A @ ok.T.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(den > 0, num / den, np.nan)
    return mean, den / A.sum(axis=1, keepdims=True) * W.grid_coverage[:, None]


def _streamed(g, w, **kw):
    assert g.blocks is not None and g.step_weights is not None  # the block reader does the months
    if kw:
        zm = zonal.zonal_mean_blocks(g.blocks, w, g.data["time"].values, month_weights=g.step_weights, **kw)
    else:
        zm = source_means(g, w)
    zm = zm.compute(scheduler="threads")
    return zm["mean"].values * g.factor[None, :], zm["valid_fraction"].values


def _daily(tmp_path, rng, *, drop_day="2020-02-10"):
    days = pd.date_range("2019-12-01", "2021-03-31", freq="D")  # a leap February inside
    days = days[days != pd.Timestamp(drop_day)] if drop_day else days
    X = rng.gamma(2.0, 2.0, (len(days), LAT.size, LON.size))
    X[rng.random(X.shape) < 0.002] = np.nan  # single missing cell-days: their months drop that cell
    X[:, 1, 2] = np.nan  # a cell never valid
    write_nc(tmp_path / "d.nc", X, LON, LAT, days, var="pr", units="mm/day")
    return days, X.astype(np.float32)


def test_daily_stream_equals_xarray_resample(tmp_path):
    days, X = _daily(tmp_path, np.random.default_rng(1))
    g, w = _source(tmp_path, {"id": "d", "component": "P", "path": "d.nc", "time_step": "day"})
    ref_grid = xr.DataArray(X.astype(float), dims=("time", "y", "x"), coords={"time": days})
    full = pd.date_range(days[0], days[-1], freq="D")
    ref_grid = ref_grid.reindex(time=full).resample(time="MS").sum(skipna=False)  # xarray's own resample
    ref, ref_vf = _basin_means(w, ref_grid.values)
    mean, vf = _streamed(g, w)
    np.testing.assert_allclose(mean, ref, rtol=1e-9)
    np.testing.assert_allclose(vf, ref_vf, rtol=1e-12, atol=1e-15)
    # the month with a missing day is flagged and empty (never scaled up); the others are complete
    feb = list(pd.DatetimeIndex(g.data["time"].values)).index(pd.Timestamp("2020-02-01"))
    assert g.incomplete_months == 1 and np.isnan(mean[:, feb]).all() and (vf[:, feb] == 0).all()
    assert calendar.monthrange(2020, 2)[1] == 29 and np.isfinite(mean[:, feb + 1]).all()
    # a constant 1 mm/day over a complete month is its number of days (calendar)
    # (checked through the weights: each complete row sums to the month's days)
    rows = g.step_weights[~np.isnan(g.step_weights).any(axis=1)]
    months = pd.DatetimeIndex(g.data["time"].values)[~np.isnan(g.step_weights).any(axis=1)]
    assert rows.sum(axis=1).tolist() == [calendar.monthrange(m.year, m.month)[1] for m in months]
    # the source's monthly grids (`data`, for callers that want grids) agree with the stream
    zx = zonal_mean(g.data, w).compute()["mean"].values * g.factor
    np.testing.assert_allclose(mean, zx, rtol=1e-9)


@pytest.mark.parametrize("task_bytes, read_bytes", [(1, 1), (7 * 32 * 4, 3 * 32 * 4), (2**30, 2**30)])
def test_task_boundaries_never_split_a_month(tmp_path, task_bytes, read_bytes):
    """Tasks of one stored step and reads of one step still hold whole months: sums and valid shares do
    not depend on the cut (reference: one task for everything, and the resample reference above)."""
    days, X = _daily(tmp_path, np.random.default_rng(2), drop_day=None)
    g, w = _source(tmp_path, {"id": "d", "component": "P", "path": "d.nc"})
    one_task = _streamed(g, w, task_bytes=2**31, read_bytes=2**31)
    mean, vf = _streamed(g, w, task_bytes=task_bytes, read_bytes=read_bytes)
    np.testing.assert_allclose(mean, one_task[0], rtol=1e-12)
    np.testing.assert_allclose(vf, one_task[1], rtol=1e-12)
    tasks = zonal._month_tasks(g.step_weights, max(1, task_bytes // (32 * 4)), max(1, read_bytes // (32 * 4)))
    spans = [(p[2], p[3]) for t in tasks for p in t[2]]
    assert spans[0][0] == 0 and spans[-1][1] == len(days)
    assert all(a[1] == b[0] for a, b in zip(spans[:-1], spans[1:]))  # daily: every day read exactly once


def _composites(tmp_path, rng, step="8-day"):
    starts = T.period_starts_between(step, "2019-01-01", "2020-12-31")
    X = rng.gamma(2.0, 1.5, (len(starts), LAT.size, LON.size)).astype(np.float32)
    X[rng.random(X.shape) < 0.01] = np.nan
    (tmp_path / "et").mkdir()
    for s, v in zip(starts, X):
        write_tif(tmp_path / "et" / f"et_{s:%Y%j}.tif", v, LON, LAT, units="mm/day")
    return starts, X


def _day_expansion_grid(starts, step, X):
    """Independent reference: every cell's rate repeated over its period's days, summed per month."""
    lengths = [(T.period_end(s.date(), step) - s.date()).days for s in starts]
    daily = np.repeat(X.astype(float), lengths, axis=0)
    days = pd.date_range(starts[0], periods=daily.shape[0], freq="D")
    flat = pd.DataFrame(daily.reshape(daily.shape[0], -1), index=days)
    monthly = flat.groupby(days.to_period("M")).sum(min_count=1)
    monthly[flat.isna().groupby(days.to_period("M")).any()] = np.nan  # a missing day empties the month
    have = pd.Series(1, index=days).groupby(days.to_period("M")).size()
    monthly[(have.values < have.index.days_in_month.values)] = np.nan  # so does a month not covered
    return monthly.to_numpy().reshape(-1, *X.shape[1:])


@pytest.mark.parametrize("task_bytes", [zonal.TASK_BYTES, 5 * 32 * 4])
def test_8day_geotiff_stream_equals_day_expansion(tmp_path, task_bytes):
    starts, X = _composites(tmp_path, np.random.default_rng(3))
    g, w = _source(tmp_path, {"id": "e8", "component": "ET", "path": "et/et_*.tif", "date_format": "%Y%j"})
    ref, ref_vf = _basin_means(w, _day_expansion_grid(starts, "8-day", X)[:, ::-1, :])  # north first, as in the files
    mean, vf = _streamed(g, w, task_bytes=task_bytes, read_bytes=task_bytes)
    np.testing.assert_allclose(mean, ref, rtol=1e-9)
    np.testing.assert_allclose(vf, ref_vf, rtol=1e-12, atol=1e-15)
    if task_bytes < zonal.TASK_BYTES:  # tasks were cut: composites spanning two months are read twice
        tasks = zonal._month_tasks(g.step_weights, 5, 5)
        assert len(tasks) > 5 and any(a[1] > b[0] for a, b in zip(tasks[:-1], tasks[1:]))


def test_dekad_amounts_stream_equals_xarray_path(tmp_path):
    """Amounts per dekad (units without a time) on the streamed and on the xarray path."""
    rng = np.random.default_rng(4)
    starts = T.period_starts_between("dekad", "2021-01-01", "2021-12-31")
    X = rng.gamma(2.0, 5.0, (len(starts), LAT.size, LON.size))
    X[rng.random(X.shape) < 0.02] = np.nan
    write_nc(tmp_path / "dk.nc", X, LON, LAT, starts, var="et", units="mm")
    g, w = _source(tmp_path, {"id": "dk", "component": "ET", "path": "dk.nc"})
    stored = X.astype(np.float32).astype(float)
    ref = stored.reshape(12, 3, LAT.size, LON.size).sum(axis=1)  # three dekads per month (NaN propagates)
    mean, vf = _streamed(g, w)
    np.testing.assert_allclose(mean, _basin_means(w, ref)[0], rtol=1e-9)
    np.testing.assert_allclose(mean, zonal_mean(g.data, w).compute()["mean"].values * g.factor, rtol=1e-9)


def test_packed_daily_codes_range_and_offset(tmp_path):
    """uint16 daily values with scale and offset declared in the catalog, further no-data codes and a
    valid range: CF meanings on stored values, then ``stored * scale + offset`` per day; a month's
    total carries the offset once per day (reference: decode every day in numpy, then resample)."""
    rng = np.random.default_rng(5)
    days = pd.date_range("2021-01-01", "2021-04-30", freq="D")
    stored = rng.integers(0, 300, (len(days), LAT.size, LON.size)).astype(np.uint16)
    stored[rng.random(stored.shape) < 0.01] = 65533  # a class code
    stored[rng.random(stored.shape) < 0.01] = 400  # outside the valid range
    da = xr.DataArray(stored, dims=("time", "lat", "lon"), coords={"time": days, "lat": LAT, "lon": LON},
                      attrs={"units": "mm/day"})
    da.encoding = {"_FillValue": 65535}
    xr.Dataset({"pr": da}).to_netcdf(tmp_path / "u.nc")
    g, w = _source(tmp_path, {"id": "u", "component": "P", "path": "u.nc", "valid_range": [0, 350],
                              "nodata": [65533, 65534], "scale_factor": 0.1, "add_offset": 0.5})
    dec = np.where((stored > 350) | (stored >= 65533), np.nan, stored * 0.1 + 0.5)
    ref = xr.DataArray(dec, dims=("time", "y", "x"), coords={"time": days}).resample(time="MS").sum(skipna=False)
    mean, vf = _streamed(g, w)
    r_mean, r_vf = _basin_means(w, ref.values)
    np.testing.assert_allclose(mean, r_mean, rtol=1e-9)
    np.testing.assert_allclose(vf, r_vf, rtol=1e-12, atol=1e-15)


@pytest.mark.cluster
def test_streamed_months_on_a_local_cluster_equal_local(tmp_path):
    """The month plan travels to worker processes (pickled with the reader): same numbers as locally."""
    import warnings

    from distributed import Client, LocalCluster

    from wbexplore.pipeline import extract

    _daily(tmp_path, np.random.default_rng(6))
    _composites(tmp_path, np.random.default_rng(7))
    box_basins(tmp_path / "basins.geojson", BOXES)
    cat = write_catalog(tmp_path, [{"id": "d", "component": "P", "path": "d.nc"},
                                   {"id": "e8", "component": "ET", "path": "et/et_*.tif", "date_format": "%Y%j"}],
                        extra={"catalog_version": 2})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        local = extract(cat, cache_dir=tmp_path / "cache")
        with LocalCluster(n_workers=1, threads_per_worker=2, processes=True, dashboard_address=None) as cl, \
                Client(cl) as client:
            dist = extract(cat, client=client, cache_dir=tmp_path / "cache")
    for v in ("d", "e8", "valid_fraction_d", "valid_fraction_e8"):
        assert np.isfinite(local[v].values).any()
        np.testing.assert_allclose(dist[v].values, local[v].values, rtol=1e-12, equal_nan=True)


def _write_band(path, arr, *, dtype, nodata, scale=1.0, offset=0.0):
    import rasterio
    from rasterio.transform import from_origin

    with rasterio.open(path, "w", driver="GTiff", width=LON.size, height=LAT.size, count=1, dtype=dtype,
                       crs="EPSG:4326", transform=from_origin(-1, 1, 0.25, 0.25), nodata=nodata) as dst:
        dst.write(arr[None].astype(dtype))
        dst.scales, dst.offsets = (scale,), (offset,)
        dst.update_tags(units="mm/day")


@pytest.mark.parametrize("dtype, nodata, scale, offset, odd", [
    ("float32", float("nan"), 1.0, 0.0, None),
    ("uint16", 65535, 0.01, 0.5, None),
    ("uint16", 65535, 0.01, 0.5, "nodata"),  # one file with another no-data value: every file through rioxarray
])
def test_series_of_files_decoded_as_rioxarray_decodes_each(tmp_path, dtype, nodata, scale, offset, odd):
    """A glob of single-band files is opened from its first file (the others looked at with plain
    rasterio); its values equal rioxarray's own decoding of every file (``mask_and_scale=True``)."""
    import rioxarray

    rng = np.random.default_rng(8)
    starts = T.period_starts_between("8-day", "2020-01-01", "2020-03-31")
    (tmp_path / "s").mkdir()
    paths = []
    for k, s in enumerate(starts):
        arr = rng.integers(0, 3000, (LAT.size, LON.size)).astype(float)
        fill = 65534 if odd and k == 3 else nodata
        arr[rng.random(arr.shape) < 0.1] = fill
        paths.append(tmp_path / "s" / f"x_{s:%Y%j}.tif")
        _write_band(paths[-1], arr, dtype=dtype, nodata=fill, scale=scale, offset=offset)
    g, w = _source(tmp_path, {"id": "s", "component": "ET", "path": "s/x_*.tif", "date_format": "%Y%j"})
    ref = np.stack([rioxarray.open_rasterio(p, mask_and_scale=True).values[0] for p in paths])
    fast = any(str(k[0]).startswith("wbx-series") for k in dict(g.data.data.dask))
    assert fast is (odd is None)
    # the monthly grids are day-weighted sums of the decoded files (the day expansion, north first)
    np.testing.assert_allclose(g.data.values, _day_expansion_grid(starts, "8-day", ref), rtol=1e-6)
    if odd is None:
        mean = _streamed(g, w)[0]
    else:  # packing differs between files: no block reader, the grids are extracted
        mean = zonal_mean(g.data, w).compute()["mean"].values * g.factor
    r_mean, _ = _basin_means(w, _day_expansion_grid(starts, "8-day", ref.astype(float)))
    np.testing.assert_allclose(mean, r_mean * g.factor, rtol=1e-6)


def test_series_of_files_out_of_descriptors_is_named_as_such(tmp_path, monkeypatch):
    """The one-profile opening looks at files 2..n (their TIFF tags, or plain rasterio where the tags differ):
    running out of descriptors there is named as such (file k of n, ``ulimit -n``), one line, not as a file
    that cannot be opened."""
    import builtins
    import errno

    import rasterio

    from wbexplore.errors import InputError

    starts = T.period_starts_between("8-day", "2020-01-01", "2020-02-28")
    (tmp_path / "s").mkdir()
    for s in starts:
        write_tif(tmp_path / "s" / f"x_{s:%Y%j}.tif", np.ones((LAT.size, LON.size)), LON, LAT, units="mm/day")
    real_gdal, real_open, seen = rasterio.open, builtins.open, []

    def third_file_fails(path):  # the third file of the series, whether GDAL or open() opens it
        if str(path).endswith(".tif") and str(path) not in seen:
            seen.append(str(path))
        if seen[2:3] == [str(path)]:
            raise OSError(errno.EMFILE, "Too many open files")

    def gdal(path, *a, **k):
        third_file_fails(path)
        return real_gdal(path, *a, **k)

    def plain(path, *a, **k):  # files 2..n are compared by their TIFF tags, read with plain open()
        third_file_fails(path)
        return real_open(path, *a, **k)

    monkeypatch.setattr(rasterio, "open", gdal)
    monkeypatch.setattr(builtins, "open", plain)
    with pytest.raises(InputError) as ei:
        _source(tmp_path, {"id": "s", "component": "ET", "path": "s/x_*.tif", "date_format": "%Y%j"})
    msg = str(ei.value)
    assert "file descriptors" in msg and f"of {len(starts)}" in msg and "ulimit -n" in msg and "\n" not in msg


def _variant(path, *, data=1.0, nodata=-9999.0, scale=1.0, crs="EPSG:4326", dtype="float32", west=-1.0,
             compress=None):
    import rasterio
    from rasterio.transform import from_origin

    arr = np.random.default_rng(int(data * 10)).random((LAT.size, LON.size)) * data
    extra = {"compress": compress} if compress else {}
    with rasterio.open(path, "w", driver="GTiff", width=LON.size, height=LAT.size, count=1, dtype=dtype, crs=crs,
                       transform=from_origin(west, 1, 0.25, 0.25), nodata=nodata, **extra) as dst:
        dst.write(arr[None].astype(dtype))
        dst.scales = (scale,)
    return path


@pytest.mark.parametrize("change, same", [
    ({"data": 2.0}, True), ({"data": 3.0, "compress": "deflate"}, True),  # data (and where it lies) only
    ({"nodata": -1.0}, False), ({"scale": 0.1}, False), ({"crs": "EPSG:32631"}, False),
    ({"dtype": "float64"}, False), ({"west": -0.5}, False),
])
def test_tiff_tags_tell_gdal_profiles_apart(tmp_path, change, same):
    """Files 2..n of a GeoTIFF series are compared with the first by their TIFF tags (data locations aside)
    instead of being opened through GDAL: equal tags must mean an equal profile as rasterio (GDAL) reads it."""
    import rasterio

    from wbexplore.io.grids import _tiff_tags

    base = {"compress": change.get("compress")}
    a = _variant(tmp_path / "a.tif", **base)
    b = _variant(tmp_path / "b.tif", **{**base, **change})

    def profile(p):
        with rasterio.open(p) as s:
            return (s.count, s.shape, s.transform, s.dtypes[0], str(s.nodata), s.scales, s.offsets, s.crs)

    assert (profile(a) == profile(b)) is same  # the reference: GDAL's reading of both files
    assert (_tiff_tags(a) == _tiff_tags(b)) is same
    assert _tiff_tags(a) is not None and _tiff_tags(tmp_path / "a.tif") == _tiff_tags(a)
    (tmp_path / "c.tif").write_bytes(b"not a tiff at all, longer than sixteen bytes")
    assert _tiff_tags(tmp_path / "c.tif") is None  # GDAL opens it (and names what is wrong)
