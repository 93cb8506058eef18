"""Grid readers: netCDF, zarr, multi-band GeoTIFF and globs of single-band GeoTIFFs.

Every reader returns a `SourceGrid`: a lazy (dask) `xarray.DataArray` with dims
``(time, y, x)`` indexed by calendar month (month-start stamps), its CRS, and the
per-month factor that turns its values into the canonical unit (mm per month for
P and ET, mm for TWSA). Applying the factor after the basin mean is exact because
it does not vary in space, and it keeps extraction a single pass over the data.

Time stamps may be month-start, mid-month or month-end, or CF time bounds; daily
data are summed (fluxes) or averaged (TWSA) to calendar months, and a month with
a missing day is NaN, never scaled up.
"""

from __future__ import annotations

import errno
import re
import warnings
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from pyproj import CRS

from ..errors import InputError, UnitError
from ..units import parse_flux_unit, parse_storage_unit
from .blocks import BlockReader, GeoTIFFBlocks, NetCDFBlocks
from .catalog import SourceSpec

__all__ = ["SourceGrid", "open_source", "month_index", "TARGET_CHUNK_BYTES"]

TARGET_CHUNK_BYTES = 96 * 2**20  # time chunks of about this size stream through memory

_X_NAMES = ("x", "lon", "longitude", "rlon", "easting", "nav_lon")
_Y_NAMES = ("y", "lat", "latitude", "rlat", "northing", "nav_lat")


@dataclass
class SourceGrid:
    """A product opened lazily, in the shape the spatial layer wants."""

    spec: SourceSpec
    data: xr.DataArray  # (time, y, x), native units, one value per calendar month
    crs: CRS
    factor: np.ndarray  # per month: native value -> canonical unit
    native_units: str
    native_step: str  # "month" or "day"
    incomplete_months: int = 0  # months with missing days (daily data)
    blocks: BlockReader | None = None  # direct reader of the stored values, when it decodes exactly like `data`

    @property
    def months(self) -> pd.DatetimeIndex:
        return pd.DatetimeIndex(self.data["time"].values)

    @property
    def canonical_units(self) -> str:
        return "mm" if self.spec.component == "TWSA" else "mm/month"

    def summary(self) -> dict:
        ny, nx = self.data.sizes["y"], self.data.sizes["x"]
        m = self.months
        return {
            "id": self.spec.id,
            "component": self.spec.component,
            "units": self.native_units,
            "step": self.native_step,
            "grid": f"{ny}x{nx}",
            "period": f"{m[0]:%Y-%m}..{m[-1]:%Y-%m}" if len(m) else "-",
            "months": len(m),
            "crs": self.crs.to_string() if self.crs.to_epsg() is None else f"EPSG:{self.crs.to_epsg()}",
            "label": self.spec.display,
        }


def month_index(stamps) -> pd.DatetimeIndex:
    """Month-start stamps of the calendar months containing ``stamps``."""
    idx = pd.DatetimeIndex(pd.to_datetime(np.asarray(stamps)))
    return idx.to_period("M").to_timestamp()


def _fail(spec: SourceSpec, msg: str, path=None) -> None:
    where = path if path is not None else spec.paths[0]
    raise InputError(f"{where}: source {spec.id!r}: {msg}")


def _fail_if_too_many_open(spec: SourceSpec, exc: BaseException) -> None:
    """Running out of file handles is the size of the series, not a fault of the file that hit the limit."""
    if getattr(exc, "errno", None) != errno.EMFILE and "Too many open files" not in str(exc):
        return
    try:
        import resource

        limit = f"the limit is {resource.getrlimit(resource.RLIMIT_NOFILE)[0]}"
    except (ImportError, OSError):  # pragma: no cover - not a Unix
        limit = "the limit is lower"
    _fail(spec, f"field 'path': {len(spec.paths)} files cannot all be open at once ({limit}; "
                "raise it with `ulimit -n`, or merge the files)", spec.path_pattern)


def _to_datetime_index(spec, values) -> pd.DatetimeIndex:
    vals = np.asarray(values)
    if vals.dtype.kind == "M":
        return pd.DatetimeIndex(vals)
    try:  # cftime objects (non-standard calendars)
        return pd.DatetimeIndex([pd.Timestamp(v.isoformat()) for v in vals])
    except Exception:
        _fail(spec, f"time coordinate could not be decoded ({vals[:1]!r})")


def _find_dims(spec, da: xr.DataArray, tdim: str) -> tuple[str, str]:
    others = [d for d in da.dims if d != tdim]
    if len(others) != 2:
        _fail(spec, f"variable {da.name!r} has dims {da.dims}; expected time and two spatial dims")
    xd = yd = None
    for d in others:
        attrs = da[d].attrs if d in da.coords else {}
        axis = str(attrs.get("axis", "")).upper()
        std = str(attrs.get("standard_name", "")).lower()
        name = d.lower()
        if axis == "X" or std in ("longitude", "projection_x_coordinate", "grid_longitude") or name in _X_NAMES:
            xd = d
        elif axis == "Y" or std in ("latitude", "projection_y_coordinate", "grid_latitude") or name in _Y_NAMES:
            yd = d
    if xd is None or yd is None:
        yd, xd = others  # CF order (..., y, x)
    return xd, yd


def _find_time(spec, ds_or_da) -> str:
    for d in ds_or_da.dims:
        if d.lower() in ("time", "t", "date", "month", "band"):
            return d
    for d in ds_or_da.dims:
        if d in ds_or_da.coords and np.asarray(ds_or_da[d]).dtype.kind == "M":
            return d
    _fail(spec, "no time dimension found")


def _crs_from_cf(spec, ds: xr.Dataset, da: xr.DataArray, xd: str, yd: str) -> CRS:
    if spec.crs:
        return CRS.from_user_input(spec.crs)
    gm = da.attrs.get("grid_mapping") or da.encoding.get("grid_mapping")
    if gm and gm in ds.variables:
        attrs = ds[gm].attrs
        for key in ("crs_wkt", "spatial_ref"):
            if attrs.get(key):
                return CRS.from_wkt(attrs[key])
        try:
            return CRS.from_cf(attrs)
        except Exception:
            _fail(spec, f"grid_mapping variable {gm!r} could not be read as a CRS; declare 'crs' in the catalog")
    for key in ("crs_wkt", "spatial_ref", "crs"):
        if da.attrs.get(key) and isinstance(da.attrs[key], str):
            try:
                return CRS.from_user_input(da.attrs[key])
            except Exception:
                pass
    xstd = str(ds[xd].attrs.get("standard_name", "")).lower() if xd in ds.coords else ""
    if xd.lower() in ("lon", "longitude") or xstd == "longitude":
        # CF: latitude/longitude coordinates without a grid_mapping are geographic (common practice: WGS84)
        return CRS.from_epsg(4326)
    _fail(spec, "the grid carries no CRS and the catalog declares none (add 'crs: EPSG:...')")


def _time_chunk(ny: int, nx: int, itemsize: int) -> int:
    return int(max(1, TARGET_CHUNK_BYTES // max(1, ny * nx * itemsize)))


def _open_netcdf_or_zarr(spec: SourceSpec) -> tuple[xr.DataArray, CRS, pd.DatetimeIndex | None]:
    fmt = spec.format
    try:
        if fmt == "zarr":
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=".*consolidated metadata.*")
                ds = xr.open_zarr(spec.paths[0], chunks=None, decode_timedelta=False)
        elif len(spec.paths) > 1:
            ds = xr.open_mfdataset([str(p) for p in spec.paths], combine="by_coords", chunks={},
                                   decode_timedelta=False, data_vars="minimal", coords="minimal",
                                   compat="override", join="override")
        else:
            ds = xr.open_dataset(spec.paths[0], chunks=None, cache=False, decode_timedelta=False)
    except InputError:
        raise
    except Exception as exc:
        _fail_if_too_many_open(spec, exc)
        _fail(spec, f"cannot be opened as {fmt} ({exc.__class__.__name__}: {str(exc)[:120]})")
    if spec.variable:
        if spec.variable not in ds.data_vars:
            _fail(spec, f"field 'variable': {spec.variable!r} is not in the file (has: {', '.join(map(str, ds.data_vars))})")
        da = ds[spec.variable]
    else:
        cands = [v for v in ds.data_vars if ds[v].ndim == 3]
        if len(cands) != 1:
            _fail(spec, f"field 'variable' is required: the file has {len(cands)} three-dimensional variables ({', '.join(map(str, cands))})")
        da = ds[cands[0]]
    tdim = _find_time(spec, da)
    xd, yd = _find_dims(spec, da, tdim)
    crs = _crs_from_cf(spec, ds, da, xd, yd)
    # time bounds give the month unambiguously
    bounds_month = None
    bname = ds[tdim].attrs.get("bounds") if tdim in ds.coords else None
    if bname and bname in ds.variables:
        b = ds[bname].values
        lo = _to_datetime_index(spec, b[:, 0])
        hi = _to_datetime_index(spec, b[:, 1])
        bounds_month = lo + (hi - lo) / 2
    blocks = _netcdf_blocks(spec, da, (tdim, yd, xd)) if fmt != "zarr" and len(spec.paths) == 1 else None
    da = da.transpose(tdim, yd, xd).rename({tdim: "time", yd: "y", xd: "x"})
    da = da.drop_vars([c for c in da.coords if c not in ("time", "y", "x")])
    ny, nx = da.sizes["y"], da.sizes["x"]
    tc = _time_chunk(ny, nx, da.dtype.itemsize)
    da = da.chunk({"time": tc, "y": -1, "x": -1})
    return da, crs, bounds_month, blocks


def _packing(enc: dict) -> tuple[float, float, float] | None:
    """(nodata, scale, offset) of xarray's CF decoding of one variable, or None where the
    block reader would not reproduce it exactly (unsigned flags, several fill values)."""
    if enc.get("_Unsigned") is not None:
        return None
    stored = np.dtype(enc.get("dtype", "float64"))
    if stored.kind not in "fiu":
        return None
    fills = []
    for key in ("_FillValue", "missing_value"):
        v = enc.get(key)
        if v is None:
            continue
        v = np.atleast_1d(np.asarray(v))
        if v.size != 1:
            return None
        fills.append(float(v.astype(stored)[0]))  # the comparison happens in the stored type
    fills = [f for f in dict.fromkeys(fills) if not np.isnan(f)]
    if len(fills) > 1:
        return None
    nodata = fills[0] if fills else None
    return nodata, float(enc.get("scale_factor", 1.0)), float(enc.get("add_offset", 0.0))


def _netcdf_blocks(spec: SourceSpec, da: xr.DataArray, dims: tuple[str, str, str]) -> BlockReader | None:
    if tuple(da.dims) != dims:
        return None
    pk = _packing(da.encoding)
    if pk is None:
        return None
    enc = da.encoding
    chunks = enc.get("chunksizes")
    if not chunks or enc.get("contiguous", False):
        chunks = (1, 0, 0)
    # a compressed chunk is decoded whole for any part of it: read whole chunks only
    filtered = any(enc.get(k) for k in ("zlib", "szip", "zstd", "bzip2", "blosc", "shuffle", "compression"))
    return NetCDFBlocks(shape=tuple(int(n) for n in da.shape), dtype=np.dtype(enc["dtype"]).str,
                        nodata=pk[0], scale=pk[1], offset=pk[2], time_align=int(chunks[0]) if filtered else 1,
                        block_rows=int(chunks[1]), block_cols=int(chunks[2]),
                        path=str(spec.paths[0]), variable=str(da.name))


def _geotiff_blocks(paths, arrays) -> BlockReader | None:
    """Reader for one multi-band file or single-band files in time order; None if their packing differs."""
    import rasterio

    pks = [_packing(a.encoding) for a in arrays]
    kinds = set(pks)
    dtypes = {np.dtype(a.encoding.get("rasterio_dtype", a.encoding.get("dtype", "float32"))).str for a in arrays}
    if len(kinds) != 1 or None in kinds or len(dtypes) != 1:
        return None
    nodata, scale, offset = pks[0]
    interleaved = False
    with rasterio.open(paths[0]) as s:
        if s.count > 1 and s.interleaving is not None and s.interleaving.name.lower() == "pixel":
            interleaved = True  # every block holds all bands: read all steps of a strip at once
        if len(set(s.dtypes)) != 1:
            return None
        brow, bcol = s.block_shapes[0]
    if len(paths) == 1:
        nt = int(arrays[0].sizes["band"])
    else:
        nt = len(paths)
    ny, nx = int(arrays[0].sizes["y"]), int(arrays[0].sizes["x"])
    return GeoTIFFBlocks(shape=(nt, ny, nx), dtype=dtypes.pop(), nodata=nodata, scale=scale, offset=offset,
                         time_align=1, block_rows=int(brow), block_cols=int(bcol), interleaved=interleaved,
                         paths=[str(p) for p in paths])


_DATE_TOKENS = {"%Y": r"\d{4}", "%m": r"\d{2}", "%d": r"\d{2}", "%j": r"\d{3}", "%y": r"\d{2}", "%b": r"[A-Za-z]{3}"}


def _date_regex(fmt: str) -> re.Pattern:
    out, i = "", 0
    while i < len(fmt):
        tok = fmt[i:i + 2]
        if tok in _DATE_TOKENS:
            out += _DATE_TOKENS[tok]
            i += 2
        else:
            out += re.escape(fmt[i])
            i += 1
    return re.compile(out)


def _open_geotiff(spec: SourceSpec) -> tuple[xr.DataArray, CRS, pd.DatetimeIndex | None]:
    import rioxarray  # noqa: F401  (registers .rio)

    def _one(path: Path, *, band_chunks, index: int = 0):
        try:
            with warnings.catch_warnings():
                # rioxarray multiplies affine transforms with `*` (deprecated in affine 3)
                warnings.filterwarnings("ignore", category=PendingDeprecationWarning)
                da = rioxarray.open_rasterio(path, chunks={"band": band_chunks, "y": -1, "x": -1},
                                             mask_and_scale=True, lock=False)
        except Exception as exc:
            if _out_of_descriptors(exc):
                _fail(spec, f"the process ran out of file descriptors while opening file {index + 1} of "
                            f"{len(spec.paths)} (limit {_fd_limit()}; raise it with 'ulimit -n')", path)
            _fail_if_too_many_open(spec, exc)
            _fail(spec, f"cannot be opened as GeoTIFF ({exc.__class__.__name__})", path)
        return da

    if len(spec.paths) == 1 and not spec.date_format:
        da = _one(spec.paths[0], band_chunks="auto")
        nb = da.sizes["band"]
        if spec.time_start:
            start = pd.Timestamp(spec.time_start)
            freq = "D" if spec.time_step == "day" else "MS"
            times = pd.date_range(start, periods=nb, freq=freq)
        else:
            desc = da.attrs.get("long_name")
            desc = (desc,) if isinstance(desc, str) else desc
            try:
                times = pd.DatetimeIndex([pd.Timestamp(d) for d in desc]) if desc and len(desc) == nb else None
            except Exception:
                times = None
            if times is None:
                _fail(spec, "field 'time_start' is required: the GeoTIFF's bands carry no dates")
        da = da.assign_coords(band=times)
        blocks = _geotiff_blocks(spec.paths, [da])
    else:
        rx = _date_regex(spec.date_format or "%Y-%m")
        items = []
        for p in spec.paths:
            m = rx.search(p.name)
            if not m:
                _fail(spec, f"field 'date_format': no date like {spec.date_format!r} in the file name", p)
            try:
                items.append((datetime.strptime(m.group(0), spec.date_format), p))
            except ValueError:
                _fail(spec, f"field 'date_format': {m.group(0)!r} does not parse as {spec.date_format!r}", p)
        items.sort()
        arrays = []
        first = None
        for k, (t, p) in enumerate(items):
            a = _one(p, band_chunks=1, index=k)
            if a.sizes["band"] != 1:
                _fail(spec, f"expected single-band files in a date-named series, found {a.sizes['band']} bands", p)
            if first is None:
                first = a
            elif a.shape != first.shape or not np.allclose(a.x.values, first.x.values) or not np.allclose(a.y.values, first.y.values):
                _fail(spec, "grid differs from the series' first file", p)
            # close the handle now: the lazy array reopens the file through xarray's bounded file
            # cache (`xarray.set_options(file_cache_maxsize=...)`, 128 by default) when it is read,
            # so a glob of thousands of files never holds thousands of descriptors at once
            a.close()
            arrays.append(a.isel(band=0, drop=True))
        blocks = _geotiff_blocks([p for _, p in items], arrays)
        da = xr.concat(arrays, dim=pd.Index([t for t, _ in items], name="band"), coords="minimal",
                       compat="override", join="override")
        da.attrs = first.attrs
        da.rio.write_crs(first.rio.crs, inplace=True)
    crs_r = da.rio.crs
    if spec.crs:
        crs = CRS.from_user_input(spec.crs)
    elif crs_r is not None:
        crs = CRS.from_user_input(crs_r.to_wkt())
    else:
        _fail(spec, "the GeoTIFF carries no CRS and the catalog declares none (add 'crs: EPSG:...')")
    units = da.attrs.get("units")
    da = da.rename({"band": "time"})
    da = da.drop_vars([c for c in da.coords if c not in ("time", "y", "x")])
    if units and "units" not in da.attrs:
        da.attrs["units"] = units
    ny, nx = da.sizes["y"], da.sizes["x"]
    da = da.chunk({"time": _time_chunk(ny, nx, da.dtype.itemsize), "y": -1, "x": -1})
    return da, crs, None, blocks


def _out_of_descriptors(exc: BaseException) -> bool:
    """Whether an opening failed because the process has no file descriptor left (EMFILE/ENFILE):
    GDAL reports it as a generic I/O error, so its message is inspected too."""
    import errno

    if isinstance(exc, OSError) and exc.errno in (errno.EMFILE, errno.ENFILE):
        return True
    return "too many open files" in str(exc).lower()


def _fd_limit() -> str:
    try:
        import resource

        return str(resource.getrlimit(resource.RLIMIT_NOFILE)[0])
    except (ImportError, OSError, ValueError):  # pragma: no cover - not on POSIX
        return "unknown"


def _infer_step(spec: SourceSpec, times: pd.DatetimeIndex) -> str:
    if len(times) < 2:
        return spec.time_step
    d = np.median(np.diff(times.values).astype("timedelta64[s]").astype(float)) / 86400.0
    if 0.5 <= d <= 1.5:
        return "day"
    if 27 <= d <= 32:
        return "month"
    _fail(spec, f"time step of {d:.1f} days is neither daily nor monthly")


def open_source(spec: SourceSpec) -> SourceGrid:
    """Open one catalog source lazily into a `SourceGrid` (no data values are read).

    Raises `InputError` naming the file and source for an unreadable file, a missing
    variable, no CRS, units missing or of the wrong dimension, or duplicate months.
    """
    if spec.format == "geotiff":
        da, crs, bounds_mid, blocks = _open_geotiff(spec)
    else:
        da, crs, bounds_mid, blocks = _open_netcdf_or_zarr(spec)
    units = spec.units or da.attrs.get("units")
    if not units:
        _fail(spec, "field 'units' is required: the file's variable has no units attribute")
    try:
        if spec.component == "TWSA":
            twsa_factor = parse_storage_unit(units, source=spec.id)
            flux = None
        else:
            flux = parse_flux_unit(units, source=spec.id, component=spec.component)
    except UnitError as exc:
        _fail(spec, str(exc))
    times = _to_datetime_index(spec, da["time"].values)
    step = _infer_step(spec, times)
    incomplete = 0
    if step == "month":
        stamp = bounds_mid if bounds_mid is not None else times
        months = month_index(stamp)
        if months.has_duplicates:
            dup = months[months.duplicated()][0]
            _fail(spec, f"two time steps fall in the same month {dup:%Y-%m}")
        da = da.assign_coords(time=months)
        if not months.is_monotonic_increasing:
            da = da.sortby("time")
            months = pd.DatetimeIndex(da["time"].values)
            blocks = None  # stored order is not month order: the xarray path reorders
        if spec.component == "TWSA":
            factor = np.full(len(months), twsa_factor)
        else:
            factor = flux.monthly_factor(months)
    else:
        blocks = None  # daily values are summed to months cell by cell first: the xarray path does that
        days = times.normalize()
        if days.has_duplicates:
            _fail(spec, f"two time steps fall on the same day {days[days.duplicated()][0]:%Y-%m-%d}")
        da = da.assign_coords(time=days).sortby("time")
        full = pd.date_range(days.min().to_period("M").to_timestamp(),
                             days.max().to_period("M").to_timestamp(how="end").normalize(), freq="D")
        present = pd.Series(1, index=days).reindex(full, fill_value=0)
        per_month = present.groupby(full.to_period("M")).agg(["sum", "size"])
        incomplete = int((per_month["sum"] < per_month["size"]).sum())
        if len(full) != len(days):
            da = da.reindex(time=full)  # missing days become NaN -> their months become NaN
        da = da.chunk({"time": _days_chunks(full)})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", category=RuntimeWarning)
            if spec.component == "TWSA":
                da = da.resample(time="MS").mean(skipna=False)
                factor_const = twsa_factor
            else:
                try:
                    factor_const = flux.daily_factor()
                except UnitError as exc:
                    _fail(spec, str(exc))
                da = da.resample(time="MS").sum(skipna=False)
        months = pd.DatetimeIndex(da["time"].values)
        factor = np.full(len(months), factor_const)
    da.name = spec.id
    da.attrs = {"units": units}
    return SourceGrid(spec=spec, data=da, crs=crs, factor=np.asarray(factor, float), native_units=units,
                      native_step=step, incomplete_months=incomplete, blocks=blocks)


def _days_chunks(full: pd.DatetimeIndex) -> tuple[int, ...]:
    """Chunk a complete daily axis on whole years so monthly sums never straddle chunks."""
    s = pd.Series(1, index=full).groupby(full.year).size()
    return tuple(int(v) for v in s.values)
