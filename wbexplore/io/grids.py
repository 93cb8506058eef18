"""Grid readers: netCDF, zarr, multi-band GeoTIFF and globs of single-band GeoTIFFs.

Every reader returns a `SourceGrid`: a lazy (dask) `xarray.DataArray` with dims
``(time, y, x)`` indexed by calendar month (month-start stamps), its CRS, and the
per-month factor that turns its values into the canonical unit (mm per month for
P and ET, mm for TWSA). Applying the factor after the basin mean is exact because
it does not vary in space, and it keeps extraction a single pass over the data.

Time stamps may be month-start, mid-month or month-end, or CF time bounds; daily,
pentad, dekad, 8-day and 16-day values are mapped onto calendar months day-weighted
by `wbexplore.temporal` (summed for fluxes, averaged for TWSA), and a month with a
missing day is NaN, never scaled up. Where a block reader streams the file, the same
month weights (`SourceGrid.step_weights`) are applied inside its single pass.
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from pyproj import CRS

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError, UnitError
from ..temporal import _apply_weights_xarray
from ..units import parse_flux_unit, parse_storage_unit
from .blocks import BlockReader, GeoTIFFBlocks, NetCDFBlocks, no_sidecars, only_series_files
from .catalog import SourceSpec

__all__ = ["SourceGrid", "open_source", "month_index", "short_crs", "TARGET_CHUNK_BYTES"]

TARGET_CHUNK_BYTES = 96 * 2**20  # time chunks of about this size stream through memory

_X_NAMES = ("x", "lon", "longitude", "rlon", "easting", "nav_lon")
_Y_NAMES = ("y", "lat", "latitude", "rlat", "northing", "nav_lat")


@dataclass
class SourceGrid:
    """A product opened lazily, in the shape the spatial layer wants.

    ``data`` is built on first use: where a block reader streams the file (``blocks``), an extraction
    never asks for it, and a command does not import dask.array (about 0.7 s of its start-up) to build
    a graph it would not run. ``months``, ``x`` and ``y`` are known without it."""

    spec: SourceSpec
    crs: CRS
    factor: np.ndarray  # per month: native value -> canonical unit
    native_units: str
    native_step: str  # one of wbexplore.temporal.STEPS
    months: pd.DatetimeIndex  # month-start stamps of ``data``'s time axis
    x: np.ndarray  # cell-centre coordinates of ``data`` (its ``x`` and ``y``), in the CRS's units
    y: np.ndarray
    make_data: Callable[[], xr.DataArray] = field(repr=False, compare=False)  # builds ``data``
    incomplete_months: int = 0  # months not covered on every day (sub-monthly steps): empty, never scaled
    blocks: BlockReader | None = None  # direct reader of the stored values, when it decodes exactly like `data`
    # sub-monthly steps read by `blocks`: (months x stored steps) day-weighted map of
    # `wbexplore.temporal.month_weights` (NaN rows: incomplete months), applied inside the single pass
    step_weights: np.ndarray | None = None
    _data: xr.DataArray | None = field(default=None, repr=False, compare=False)

    @property
    def data(self) -> xr.DataArray:
        """(time, y, x) lazy (dask) array in native units, one value per calendar month of ``months``."""
        if self._data is None:
            self._data = self.make_data()
        return self._data

    @property
    def canonical_units(self) -> str:
        return "mm" if self.spec.component == "TWSA" else "mm/month"

    def summary(self) -> dict:
        ny, nx = len(self.y), len(self.x)
        m = self.months
        return {
            "id": self.spec.id,
            "component": self.spec.component,
            "units": self.native_units,
            "step": self.native_step,
            "grid": f"{ny}x{nx}",
            "period": f"{m[0]:%Y-%m}..{m[-1]:%Y-%m}" if len(m) else "-",
            "months": len(m),
            "crs": short_crs(self.crs),
            "incomplete": self.incomplete_months,
            "label": self.spec.display,
        }


def short_crs(crs: CRS) -> str:
    """An EPSG code (``EPSG:4326``) where pyproj finds one, else the CRS's own short name, never
    a WKT or JSON text (at most 40 characters)."""
    code = crs.to_epsg(min_confidence=70)
    if code is not None:
        return f"EPSG:{code}"
    auth = crs.to_authority(min_confidence=70)
    if auth is not None:
        return f"{auth[0]}:{auth[1]}"
    name = (crs.name or "unnamed CRS").strip()
    return name if len(name) <= 40 else name[:39] + "…"


def month_index(stamps) -> pd.DatetimeIndex:
    """Month-start stamps of the calendar months containing ``stamps``."""
    idx = pd.DatetimeIndex(pd.to_datetime(np.asarray(stamps)))
    return idx.to_period("M").to_timestamp()


def _fail(spec: SourceSpec, msg: str, path=None) -> None:
    where = path if path is not None else spec.paths[0]
    raise InputError(f"{where}: source {spec.id!r}: {msg}")


def _fail_if_too_many_open(spec: SourceSpec, exc: BaseException) -> None:
    """Running out of file handles is the size of the series, not a fault of the file that hit the limit."""
    if not _out_of_descriptors(exc):
        return
    _fail(spec, f"field 'path': {len(spec.paths)} files cannot all be open at once (the limit is {_fd_limit()}; "
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


def _netcdf4_first(opener, target, **kwargs):
    """Open netCDF with the netCDF4 engine named: when xarray guesses the engine it imports every
    installed backend first (rioxarray and rasterio among them, about 1 s of a command's start-up).
    A file that engine cannot open is tried again with xarray's guess (the error is then xarray's)."""
    try:
        return opener(target, engine="netcdf4", **kwargs)
    except Exception as exc:
        if _out_of_descriptors(exc):
            raise
        return opener(target, **kwargs)


def _chunk(da: xr.DataArray, chunks: dict) -> xr.DataArray:
    """``da.chunk(chunks)`` with dask's rechunk method named: unnamed, dask imports distributed to look
    for a client (0.6 s of a command's start-up) and, without one, picks "tasks"."""
    import dask

    with dask.config.set({"array.rechunk.method": "tasks"}):
        return da.chunk(chunks)


def _time_chunk(ny: int, nx: int, itemsize: int) -> int:
    return int(max(1, TARGET_CHUNK_BYTES // max(1, ny * nx * itemsize)))


def _open_netcdf_or_zarr(spec: SourceSpec) -> tuple[xr.DataArray, CRS, pd.DatetimeIndex | None]:
    fmt = spec.format
    # a catalog-declared mask or packing applies to stored values: open them undecoded
    raw = not spec.declares_packing
    try:
        if fmt == "zarr":
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=".*consolidated metadata.*")
                ds = xr.open_zarr(spec.paths[0], chunks=None, decode_timedelta=False, mask_and_scale=raw)
        elif len(spec.paths) > 1:
            ds = _netcdf4_first(xr.open_mfdataset, [str(p) for p in spec.paths], combine="by_coords", chunks={},
                                decode_timedelta=False, mask_and_scale=raw, data_vars="minimal", coords="minimal",
                                compat="override", join="override")
        else:
            ds = _netcdf4_first(xr.open_dataset, spec.paths[0], chunks=None, cache=False, decode_timedelta=False,
                                mask_and_scale=raw)
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
    return da, crs, bounds_month, blocks  # chunked in time by `open_source`, when the data are asked for


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


_PACKING_KEYS = ("_FillValue", "missing_value", "scale_factor", "add_offset", "_Unsigned")


def _stored_encoding(da: xr.DataArray) -> dict:
    """The CF decoding of a variable: in ``encoding`` when xarray decoded it, in ``attrs`` when it
    was opened undecoded (a catalog-declared mask or packing)."""
    enc = dict(da.encoding)
    enc.update({k: da.attrs[k] for k in _PACKING_KEYS if k in da.attrs})
    if "dtype" not in enc:
        enc["dtype"] = enc.get("rasterio_dtype", da.dtype)
    return enc


def _decode_declared(spec: SourceSpec, da: xr.DataArray) -> xr.DataArray:
    """Mask and unpack undecoded stored values as the catalog (first) and the file (then) say.

    CF meaning: the file's fill values, the catalog's ``nodata`` codes and values outside the
    inclusive ``valid_range`` are compared with *stored* values, before unpacking; then
    ``decoded = stored * scale_factor + add_offset``. A declared packing wins over the file's."""
    enc = _stored_encoding(da)
    stored = da.dtype
    bad = da.isnull() if stored.kind == "f" else xr.zeros_like(da, dtype=bool)
    for key in ("_FillValue", "missing_value"):
        for v in np.atleast_1d(np.asarray(enc.get(key, []), dtype=float)):
            if not np.isnan(v):
                bad = bad | (da == np.asarray(v).astype(stored))
    for v in spec.nodata:
        bad = bad | (da == v)
    if spec.valid_range is not None:
        bad = bad | (da < spec.valid_range[0]) | (da > spec.valid_range[1])
    scale = spec.scale_factor if spec.scale_factor is not None else float(enc.get("scale_factor", 1.0))
    offset = spec.add_offset if spec.add_offset is not None else float(enc.get("add_offset", 0.0))
    out = da.astype("float64" if stored.itemsize > 4 or scale != 1 else "float32")
    out = out.where(~bad) * scale + offset
    out.attrs = {k: v for k, v in da.attrs.items() if k not in _PACKING_KEYS}
    return out


def _declare_blocks(spec: SourceSpec, blocks: BlockReader | None) -> BlockReader | None:
    """Give a block reader the catalog's mask and packing (same meanings as `_decode_declared`)."""
    if blocks is None or not spec.declares_packing:
        return blocks
    if spec.scale_factor is not None:
        blocks.scale = spec.scale_factor
    if spec.add_offset is not None:
        blocks.offset = spec.add_offset
    stored = np.dtype(blocks.dtype)

    def as_stored(v):  # CF: the range and the codes are in the variable's own type, as `_decode_declared` compares
        if stored.kind == "f" and np.isfinite(v):  # (0.3 as float32 is 0.30000001: its stored value is in range)
            return float(np.asarray(v, np.float64).astype(stored))
        return float(v)

    if spec.valid_range is not None:
        blocks.valid_min, blocks.valid_max = (as_stored(v) for v in spec.valid_range)
    blocks.nodata_codes = tuple(as_stored(v) for v in spec.nodata)
    return blocks


def _netcdf_blocks(spec: SourceSpec, da: xr.DataArray, dims: tuple[str, str, str]) -> BlockReader | None:
    if tuple(da.dims) != dims:
        return None
    pk = _packing(_stored_encoding(da))
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

    pks = [_packing(_stored_encoding(a)) for a in arrays]
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
_PERIOD_TOKENS = {"{dekad}": "dekad", "{pentad}": "pentad"}


def _date_regex(fmt: str) -> re.Pattern:
    """A regex finding ``fmt`` in a file name; ``{dekad}`` / ``{pentad}`` capture one digit (checked later)."""
    out, i = "", 0
    while i < len(fmt):
        tok = fmt[i:i + 2]
        period = next((t for t in _PERIOD_TOKENS if fmt.startswith(t, i)), None)
        if period:
            out += f"(?P<{_PERIOD_TOKENS[period]}>\\d)"
            i += len(period)
        elif tok in _DATE_TOKENS:
            out += _DATE_TOKENS[tok]
            i += 2
        else:
            out += re.escape(fmt[i])
            i += 1
    return re.compile(out)


def _date_from_name(spec: SourceSpec, path: Path) -> datetime:
    """The first day of the period a file name names, through ``date_format`` (with {dekad}/{pentad})."""
    from .. import temporal

    fmt = spec.date_format
    m = _date_regex(fmt).search(path.name)
    if not m:
        _fail(spec, f"field 'date_format': no date like {fmt!r} in the file name", path)
    text, rest_fmt, period = m.group(0), fmt, None
    for tok, name in _PERIOD_TOKENS.items():
        if tok in fmt:
            period = (name, int(m.group(name)))
            # drop the period digit from the text and its token from the format, keep the rest
            a, b = m.span(name)
            text = text[:a - m.start()] + text[b - m.start():]
            rest_fmt = fmt.replace(tok, "")
    try:
        t = datetime.strptime(text, rest_fmt) if rest_fmt else datetime(1970, 1, 1)
    except ValueError:
        _fail(spec, f"field 'date_format': {m.group(0)!r} does not parse as {fmt!r}", path)
    if period is not None:
        name, k = period
        try:
            d = (temporal.dekad_start if name == "dekad" else temporal.pentad_start)(t.year, t.month, k)
        except temporal.TemporalError as exc:
            _fail(spec, f"field 'date_format': {{{name}}} of {m.group(0)!r}: {exc}", path)
        t = datetime(d.year, d.month, d.day)
    return t


def _open_geotiff(spec: SourceSpec) -> tuple[xr.DataArray, CRS, pd.DatetimeIndex | None]:
    import rioxarray  # noqa: F401  (registers .rio)

    def _one(path: Path, *, band_chunks, index: int = 0):
        try:
            with warnings.catch_warnings():
                # rioxarray multiplies affine transforms with `*` (deprecated in affine 3)
                warnings.filterwarnings("ignore", category=PendingDeprecationWarning)
                da = rioxarray.open_rasterio(path, chunks={"band": band_chunks, "y": -1, "x": -1},
                                             mask_and_scale=not spec.declares_packing, lock=False)
        except Exception as exc:
            if _out_of_descriptors(exc):
                _fail(spec, f"the process ran out of file descriptors while opening file {index + 1} of "
                            f"{len(spec.paths)} (limit {_fd_limit()}; raise it with 'ulimit -n')", path)
            _fail(spec, f"cannot be opened as GeoTIFF ({exc.__class__.__name__})", path)
        return da

    if len(spec.paths) == 1 and not spec.date_format:
        da = _one(spec.paths[0], band_chunks="auto")
        nb = da.sizes["band"]
        if spec.time_start:
            from .. import temporal

            start = pd.Timestamp(spec.time_start)
            step = spec.time_step or "month"
            if step == "day":
                times = pd.date_range(start, periods=nb, freq="D")
            elif step == "month":
                times = pd.date_range(start, periods=nb, freq="MS")
            else:  # consecutive periods of the step from time_start
                times = temporal.period_starts_between(step, start, start + pd.Timedelta(days=17 * nb))[:nb]
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
        if not spec.date_format:
            _fail(spec, "field 'date_format' is required for a glob of GeoTIFF files (e.g. '%Y-%m')")
        items = []
        for p in spec.paths:
            items.append((_date_from_name(spec, p), p))
        items.sort()
        fast = _uniform_series(spec, items, _one)
        if fast is not None:
            da, blocks, first = fast
        arrays = []
        first = None if fast is None else first
        for k, (t, p) in enumerate(items if fast is None else ()):
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
        if fast is None:
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
    return da, crs, None, blocks  # chunked in time by `open_source`, when the data are asked for


def _read_band(path: str, decoded_dtype: str | None, sidecar_free: bool = False) -> np.ndarray:
    """Band 1 of one file of a series as a (1, y, x) block (a dask task): stored values, or (with
    ``decoded_dtype``) decoded step by step as rioxarray's ``mask_and_scale=True`` decodes a band
    (masked read, filled with NaN in the decoded type, then ``* scale + offset`` in that type)."""
    import rasterio

    with no_sidecars(sidecar_free), rasterio.open(path) as src:
        if decoded_dtype is None:
            return src.read(1)[None]
        out = np.ma.filled(src.read(1, masked=True).astype(decoded_dtype), np.nan)
        return (out * src.scales[0] + src.offsets[0])[None]


def _uniform_series(spec: SourceSpec, items, open_one):
    """A glob of single-band files that all share the first file's grid, CRS, data type, no-data value
    and packing, opened from the first file alone: the others are looked at with plain rasterio
    (about 1 ms a file, against 10 to 14 ms through rioxarray: 6 s for 460 composites).

    Returns ``(data, blocks, first)`` (``data`` decoded by xarray's own CF decoding, as rioxarray
    decodes each file), or None where some file differs in anything but its grid (the per-file path
    then opens every file). A file with several bands or another grid is refused as on that path."""
    import dask.array as dsa
    import rasterio

    paths = [p for _, p in items]
    first = open_one(paths[0], band_chunks=1, index=0)
    if first.sizes["band"] != 1:
        _fail(spec, f"expected single-band files in a date-named series, found {first.sizes['band']} bands", paths[0])
    first.close()

    def profile(path, k):
        try:
            with rasterio.open(path) as src:
                return (src.count, src.shape, src.transform, src.dtypes[0], src.nodata, src.scales[0], src.offsets[0],
                        src.crs)
        except Exception as exc:
            if _out_of_descriptors(exc):
                _fail(spec, f"the process ran out of file descriptors while opening file {k + 1} of "
                            f"{len(paths)} (limit {_fd_limit()}; raise it with 'ulimit -n')", path)
            _fail(spec, f"cannot be opened as GeoTIFF ({exc.__class__.__name__})", path)

    ref = profile(paths[0], 0)
    same_nodata = (lambda a, b: a == b or (a is not None and b is not None and np.isnan(a) and np.isnan(b)))
    sidecar_free = only_series_files(paths)
    # without sidecars, GDAL's profile of a file is a function of its TIFF tags: a file whose tags equal the
    # first file's (data locations aside) has its profile, and is not opened through GDAL here
    ref_tags = _tiff_tags(paths[0]) if sidecar_free else None
    with no_sidecars(sidecar_free):
        for k, p in enumerate(paths[1:], start=1):
            if ref_tags is not None and _tiff_tags(p, index=k, count=len(paths), spec=spec) == ref_tags:
                continue
            pr = profile(p, k)
            if pr[0] != 1:
                _fail(spec, f"expected single-band files in a date-named series, found {pr[0]} bands", p)
            if pr[1] != ref[1] or not pr[2].almost_equals(ref[2]):
                _fail(spec, "grid differs from the series' first file", p)
            if pr[3] != ref[3] or not same_nodata(pr[4], ref[4]) or pr[5:] != ref[5:]:
                return None
    if "_Unsigned" in first.attrs or "_Unsigned" in first.encoding:
        return None  # rioxarray reinterprets the stored type: the per-file path
    blocks = _geotiff_blocks(paths, [first.isel(band=0, drop=True)])
    if blocks is not None:
        blocks.sidecar_free = sidecar_free
    ny, nx = first.sizes["y"], first.sizes["x"]
    decoded = None if spec.declares_packing else first.dtype.str
    name = "wbx-series-" + __import__("uuid").uuid4().hex
    dsk = {(name, i, 0, 0): (_read_band, str(p), decoded, sidecar_free) for i, p in enumerate(paths)}
    data = dsa.Array(dsk, name, chunks=((1,) * len(paths), (ny,), (nx,)), dtype=first.dtype)
    da = xr.DataArray(data, dims=("band", "y", "x"),
                      coords={"band": pd.Index([t for t, _ in items], name="band"), "y": first["y"].values,
                              "x": first["x"].values})
    da.attrs = dict(first.attrs)
    da.encoding = dict(first.encoding)
    da.rio.write_crs(first.rio.crs, inplace=True)
    return da, blocks, first


# TIFF field types -> bytes per value (TIFF 6.0, BigTIFF 8-byte types 16 to 18)
_TIFF_TYPE_BYTES = {1: 1, 2: 1, 3: 2, 4: 4, 5: 8, 6: 1, 7: 1, 8: 2, 9: 4, 10: 8, 11: 4, 12: 8, 13: 4, 16: 8, 17: 8, 18: 8}
_TIFF_DATA_TAGS = frozenset((273, 279, 324, 325))  # strip/tile offsets and byte counts: where the data lie


def _tiff_tags(path, *, index: int = 0, count: int = 1, spec: SourceSpec | None = None) -> bytes | None:
    """The first image's TIFF tags (byte order, entries and the values they point to), leaving out where
    the data lie, as bytes; None where the file is no TIFF this reads (GDAL then opens it).

    Why: the one-profile opening of a glob of GeoTIFFs looked at every file with rasterio (GDAL opens it,
    about 1 ms of CPU); comparing tags costs 0.03 to 0.07 ms. 460 composites of 240 x 300 (2 cores,
    process time, medians of 3): 0.43 to 0.45 s -> 0.016 to 0.03 s, the read then opens each file once.
    Running out of file descriptors is named as the GDAL opening names it (file k of n, ``ulimit -n``).
    """
    import struct

    try:
        with open(path, "rb") as fh:
            head = fh.read(4096)

            def at(off: int, n: int) -> bytes:
                if off + n <= len(head):
                    return head[off:off + n]
                fh.seek(off)
                b = fh.read(n)
                if len(b) != n:
                    raise ValueError("truncated")
                return b

            e = {b"II": "<", b"MM": ">"}.get(head[:2])
            if e is None or len(head) < 16:
                return None
            version = struct.unpack(e + "H", head[2:4])[0]
            if version == 42:  # classic TIFF: 2-byte entry count, 12-byte entries, 4 bytes inline
                first, cfmt, efmt, esize, inline = struct.unpack(e + "I", head[4:8])[0], "H", "HHI", 12, 4
            elif version == 43:  # BigTIFF: 8-byte count, 20-byte entries, 8 bytes inline
                first, cfmt, efmt, esize, inline = struct.unpack(e + "Q", head[8:16])[0], "Q", "HHQ", 20, 8
            else:
                return None
            csize = struct.calcsize(cfmt)
            n = struct.unpack(e + cfmt, at(first, csize))[0]
            if n > 4096:
                return None
            raw = at(first + csize, n * esize)
            parts = [head[:4]]
            for i in range(n):
                entry = raw[i * esize:(i + 1) * esize]
                tag, typ, cnt = struct.unpack(e + efmt, entry[:esize - inline])
                if tag in _TIFF_DATA_TAGS:
                    continue
                size = _TIFF_TYPE_BYTES[typ] * cnt
                if size <= inline:
                    parts.append(entry)
                elif size > 1 << 20:
                    return None
                else:
                    parts.append(entry[:esize - inline])
                    parts.append(at(struct.unpack(e + ("I" if inline == 4 else "Q"), entry[esize - inline:])[0], size))
            return b"".join(parts)
    except OSError as exc:
        if spec is not None and _out_of_descriptors(exc):
            _fail(spec, f"the process ran out of file descriptors while opening file {index + 1} of "
                        f"{count} (limit {_fd_limit()}; raise it with 'ulimit -n')", path)
        return None
    except (ValueError, KeyError, struct.error):
        return None


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


def _source_step(spec: SourceSpec, times: pd.DatetimeIndex) -> str:
    """The declared step, checked against the stamps, or the step the stamps show unambiguously."""
    from .. import temporal

    if spec.time_step is not None:
        bad = temporal.step_fits_stamps(times, spec.time_step)
        if bad is not None:
            _fail(spec, f"field 'time_step': {spec.time_step!r} does not fit the time stamps "
                        f"{bad[0]:%Y-%m-%d} and {bad[1]:%Y-%m-%d}")
        return spec.time_step
    if len(times) < 2:
        return "month"
    step = temporal.infer_step(times)
    if step is None:
        srt = times.sort_values()
        d = np.median(np.diff(srt.values).astype("timedelta64[s]").astype(float)) / 86400.0
        _fail(spec, f"field 'time_step' is required: stamps {srt[0]:%Y-%m-%d} and {srt[1]:%Y-%m-%d} "
                    f"(median step {d:.1f} days) fit no one time step unambiguously "
                    f"(one of {', '.join(temporal.STEPS)})")
    return step


def _combine_duplicates(spec: SourceSpec, da: xr.DataArray, months: pd.DatetimeIndex) -> xr.DataArray:
    """Several time steps in one calendar month: refuse (default, naming the months and the field),
    or keep their plain mean, the first or the last (in time order)."""
    if spec.duplicates == "refuse":
        dups = sorted(set(months[months.duplicated()]))
        listed = ", ".join(f"{m:%Y-%m}" for m in dups[:5]) + (" ..." if len(dups) > 5 else "")
        _fail(spec, f"field 'duplicates': two time steps fall in the same month ({listed}); "
                    "declare duplicates: mean, first or last")
    order = np.argsort(np.asarray(da["time"].values), kind="stable")
    da = da.isel(time=order)
    months = months[order]
    if spec.duplicates in ("first", "last"):
        keep = ~months.duplicated(keep="first" if spec.duplicates == "first" else "last")
        return da.isel(time=np.flatnonzero(keep)).assign_coords(time=months[keep])
    uniq = pd.DatetimeIndex(months.unique())
    w = (np.asarray(months)[None, :] == np.asarray(uniq)[:, None]).astype(float)
    w /= w.sum(axis=1, keepdims=True)  # the plain mean of the steps in a month
    return _apply_weights_xarray(da, w, uniq)


def open_source(spec: SourceSpec) -> SourceGrid:
    """Open one catalog source lazily into a `SourceGrid` (no data values are read).

    Any time step of `wbexplore.temporal.STEPS` is mapped onto calendar months day-weighted there;
    catalog-declared masks and packing (``valid_range``, ``nodata``, ``scale_factor``,
    ``add_offset``) apply to stored values on both the xarray and the block path.

    Raises `InputError` naming the file and source for an unreadable file, a missing
    variable, no CRS, units missing or of the wrong dimension, a step that does not fit the
    stamps, overlapping periods, or (unless ``duplicates`` says otherwise) two steps in one month.
    """
    from .. import temporal

    if spec.format == "geotiff":
        raw, crs, bounds_mid, blocks = _open_geotiff(spec)
    else:
        raw, crs, bounds_mid, blocks = _open_netcdf_or_zarr(spec)
    # Where a block reader streams the file, the (dask) array is built only when `SourceGrid.data` is
    # asked for: the steps below that change values are kept in `pending` and replayed then, in this
    # order, on the time-chunked array, so that `data` is what it would have been built here.
    da, pending = raw, []
    if blocks is None:
        da = _time_chunked(raw)

    def then(fn):
        nonlocal da
        if blocks is None:
            da = fn(da)
        else:
            pending.append(fn)

    def now():  # the array is needed here (the xarray path takes over from the block reader)
        nonlocal da, pending
        if pending or da is raw:
            da = _replay(raw, pending)
            pending = []

    if spec.declares_packing:
        then(lambda a: _decode_declared(spec, a))
        blocks = _declare_blocks(spec, blocks)
    units = spec.units or raw.attrs.get("units")
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
    times = _to_datetime_index(spec, raw["time"].values)
    step = _source_step(spec, times if bounds_mid is None or spec.time_step else bounds_mid)
    incomplete = 0
    step_weights = None
    if step == "month":
        stamp = bounds_mid if bounds_mid is not None else times
        months = month_index(stamp)
        if months.has_duplicates:
            blocks = None  # steps are combined: the xarray path does that
            now()
            da = _combine_duplicates(spec, da, months)
            months = pd.DatetimeIndex(da["time"].values)
        else:
            then(lambda a, m=months: a.assign_coords(time=m))
        if not months.is_monotonic_increasing:
            blocks = None  # stored order is not month order: the xarray path reorders
            now()
            da = da.sortby("time")
            months = pd.DatetimeIndex(da["time"].values)
        if spec.component == "TWSA":
            factor = np.full(len(months), twsa_factor)
        else:
            factor = flux.monthly_factor(months)
    else:
        if spec.component == "TWSA":
            kind, factor_const = "state", twsa_factor
        else:
            try:
                # a rate is summed per day (x 1 day); an amount is spread over its own period's days
                factor_const = flux.daily_factor()
            except UnitError as exc:
                _fail(spec, str(exc))
            kind = "rate" if flux.kind == "rate" else "amount"
        starts = times.normalize()
        if blocks is not None and not starts.is_monotonic_increasing:
            blocks = None  # stored order is not time order: the xarray path reorders
            now()
        try:
            if blocks is not None:
                # the block reader maps stored steps onto months inside its single pass; `data` (read only
                # where a caller asks for grids) applies the same weights, without building xarray's
                # resample graph (0.2 s for two years of days) that the extraction would never run
                months, step_weights, inc = temporal.month_weights(starts, step, kind)
                then(lambda a, w=step_weights, m=months: _apply_weights_xarray(a.assign_coords(time=starts), w, m))
            else:
                da, months, inc = temporal.periods_to_months(starts, step, da.assign_coords(time=starts), kind)
        except temporal.TemporalError as exc:
            _fail(spec, f"field 'time_step' {step!r}: {exc}")
        incomplete = len(inc)
        factor = np.full(len(months), factor_const)

    def named(a):
        a.name = spec.id
        a.attrs = {"units": units}
        return a

    then(named)
    if blocks is None:
        made, make = da, None
    else:
        made, make = None, (lambda: _replay(raw, pending))
    return SourceGrid(spec=spec, crs=crs, factor=np.asarray(factor, float), native_units=units, native_step=step,
                      months=pd.DatetimeIndex(months), x=np.asarray(raw["x"].values), y=np.asarray(raw["y"].values),
                      make_data=make, incomplete_months=incomplete, blocks=blocks, step_weights=step_weights,
                      _data=made)


def _time_chunked(da: xr.DataArray) -> xr.DataArray:
    """``da`` (time, y, x) in time chunks of about `TARGET_CHUNK_BYTES`, whole grids."""
    return _chunk(da, {"time": _time_chunk(da.sizes["y"], da.sizes["x"], da.dtype.itemsize), "y": -1, "x": -1})


def _replay(raw: xr.DataArray, steps) -> xr.DataArray:
    da = _time_chunked(raw)
    for fn in steps:
        da = fn(da)
    return da
