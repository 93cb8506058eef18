"""Atomic writers, the refusals that keep outputs off inputs, and the caution text every export carries.

Every file wbexplore writes goes through `atomic_path` (a temporary file next to the target, renamed onto it
only on success) and therefore through `check_output`, which refuses, even when overwriting was asked for:

- a target that *is* an input of the catalog (the catalog file, the basins file and its sidecars, the
  discharge table, every product file, a zarr store or any file inside one), compared by identity
  (``st_dev``, ``st_ino`` after following symlinks), so that a symlink or a hard link to an input is caught;
- a new file whose name matches a product's glob pattern (it would silently join that product);
- a target that is a folder, a device, a FIFO, a socket or anything else that is not a regular file, or a
  symlink to one of those (replacing them is never what ``--force`` means).

Every netCDF file wbexplore writes goes through `write_netcdf`, which makes the Dataset CF-1.8 ready with
`cf_ready` (the one place that knows what CF asks of our outputs) and writes it atomically; `read_netcdf`
reads such a file back into the in-memory form.
"""

from __future__ import annotations

import fnmatch
import glob as _glob
import os
import signal
import stat
import tempfile
import threading
from contextlib import contextmanager
from pathlib import Path

from ..errors import InputError

__all__ = ["CAUTION", "CF_STANDARD_NAMES", "atomic_path", "cf_ready", "check_output", "read_netcdf", "same_file",
           "terminate_unwinds", "write_netcdf"]

CAUTION = ("Screening-level analysis: results depend on the products and gauges used and carry their errors. "
           "For water-allocation, flood or drought decisions, defer to gauged data, local codes and "
           "licensed professional practice.")

_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISFIFO, "a FIFO"), (stat.S_ISSOCK, "a socket"))


def _inputs(protect) -> tuple[list[Path], list[str], str]:
    """(input paths, absolute glob patterns, a name for messages) of a Catalog or of a list of paths."""
    if protect is None:
        return [], [], ""
    if hasattr(protect, "input_paths"):
        return list(protect.input_paths()), list(protect.input_globs()), f"catalog {Path(protect.path).name}"
    return [Path(p) for p in protect], [], "the inputs"


def _is_within(child: str, folder: str) -> bool:
    return child == folder or child.startswith(folder.rstrip(os.sep) + os.sep)


def _refuse_input(p: Path, protect) -> None:
    paths, globs, name = _inputs(protect)
    if not paths and not globs:
        return
    try:
        st = os.stat(p)
    except OSError:
        st = None
    real = os.path.realpath(p)
    real_parent = os.path.realpath(p.parent if str(p.parent) else ".")
    ids, stores = set(), []
    for q in paths:
        try:
            qs = os.stat(q)
        except OSError:
            continue
        ids.add((qs.st_dev, qs.st_ino))
        if stat.S_ISDIR(qs.st_mode):
            stores.append(os.path.realpath(q))
    for d in stores:
        if _is_within(real_parent, d) or _is_within(real, d):
            raise InputError(f"{p}: output lies inside {os.path.basename(d)!r}, an input store of {name}; "
                             f"refused even with --force")
    if st is not None:
        if (st.st_dev, st.st_ino) in ids:
            raise InputError(f"{p}: output file is an input of {name}; refused even with --force")
        if st.st_nlink > 1 and stores:
            # a hard link into a store from outside: only then is walking the store worth its cost
            for d in stores:
                for root, _dirs, files in os.walk(d):
                    for f in files:
                        try:
                            fs = os.stat(os.path.join(root, f))
                        except OSError:
                            continue
                        if (fs.st_dev, fs.st_ino) == (st.st_dev, st.st_ino):
                            inner = os.path.relpath(os.path.join(root, f), os.path.dirname(d))
                            raise InputError(f"{p}: output file is a link to {inner!r}, an input of {name}; "
                                             f"refused even with --force")
    for pat in globs:
        pdir, pbase = os.path.split(pat)
        cands = [(os.path.abspath(p), pat)]
        if not _glob.has_magic(pdir):
            cands.append((real, os.path.join(os.path.realpath(pdir), pbase)))
        for target, pattern in cands:
            if fnmatch.fnmatchcase(target, pattern):
                raise InputError(f"{p}: output would be read as an input of {name} (it matches "
                                 f"{os.path.basename(pat)!r}); refused even with --force")


def check_output(path: str | os.PathLike, *, overwrite: bool = False, protect=None) -> Path:
    """Refuse an output path that must not be written, before anything is computed or written.

    Parameters
    ----------
    path : the output file
    overwrite : replace an existing regular file (``--force``); never lifts the refusals below
    protect : a `Catalog` (its `input_paths` and `input_globs`) or a list of input paths

    Raises
    ------
    InputError
        One line naming the file and the reason: folder missing or not writable; target is a folder, device,
        FIFO, socket or a symlink to one; target is an input of the catalog (same file by identity, inside a
        zarr store, or matching a product's glob); target exists and ``overwrite`` is false.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{p}: output folder {str(parent)!r} does not exist")
    if not os.access(parent, os.W_OK):
        raise InputError(f"{p}: output folder {str(parent)!r} is not writable")
    try:
        st = os.stat(p)  # follows symlinks: a link to a folder or a device is refused like its target
    except FileNotFoundError:
        st = None  # missing, or a dangling symlink (the rename replaces the link, not what it named)
    except OSError as exc:
        raise InputError(f"{p}: output path cannot be examined ({exc.strerror})") from None
    if st is not None:
        for test, kind in _KINDS:
            if test(st.st_mode):
                raise InputError(f"{p}: output is {kind}, not a file; refused even with --force")
        if not stat.S_ISREG(st.st_mode):
            raise InputError(f"{p}: output is not a regular file; refused even with --force")
    _refuse_input(p, protect)
    if st is not None and not overwrite:
        raise InputError(f"{p}: file exists (use --force to overwrite)")
    return p


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True when two output paths name the same file (same real path, or the same existing file by identity)."""
    if os.path.realpath(a) == os.path.realpath(b):
        return True
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


@contextmanager
def terminate_unwinds():
    """While inside, SIGTERM raises ``SystemExit(143)`` so that ``finally`` blocks remove temporary files.

    Only when SIGTERM has its default action (which ends the process at once, leaving them behind) and in
    the main thread (the only one that may set handlers); a handler someone else installed is kept.
    """
    if threading.current_thread() is not threading.main_thread() or \
            signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL:
        yield
        return

    def _raise(signum, frame):
        raise SystemExit(128 + signum)

    signal.signal(signal.SIGTERM, _raise)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, signal.SIG_DFL)


@contextmanager
def atomic_path(path: str | os.PathLike, *, overwrite: bool = False, protect=None):
    """Yield a temporary path next to ``path``; rename it onto ``path`` only on success.

    The refusals of `check_output` apply (``protect``: the catalog whose inputs must not be written). An
    `OSError` while writing (a full disk, a lost mount) becomes one `InputError` line naming ``path``; the
    temporary file is removed whatever happens (SIGTERM included, see `terminate_unwinds`), and ``path``
    keeps its old content.
    """
    p = check_output(path, overwrite=overwrite, protect=protect)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=p.parent)
        os.close(fd)
        os.unlink(tmp)
    except OSError as exc:
        raise InputError(f"{p}: cannot write the output file ({exc.strerror or exc})") from None
    try:
        with terminate_unwinds():
            try:
                yield Path(tmp)
                # checked again just before the rename: the target may have changed while the output was computed
                check_output(p, overwrite=overwrite, protect=protect)
                os.replace(tmp, p)
            except OSError as exc:
                raise InputError(f"{p}: cannot write the output file ({exc.strerror or exc})") from None
    finally:
        if os.path.lexists(tmp):
            try:
                os.unlink(tmp)
            except OSError:
                pass


# --------------------------------------------------------------------------- CF-1.8 netCDF
#: CF standard names of the balance components, by the units family the values are stored in. Only names that
#: exist in the CF standard-name table and whose canonical units the stored units convert to (checked against
#: the table bundled with ``compliance-checker`` and against UDUNITS by ``cf_units`` in tests/test_cf.py).
#: Deliberately absent: ET as a depth (the table has ``water_evapotranspiration_amount`` in kg m-2 only, no
#: ``lwe_thickness_of_`` form), storage anomaly, storage change, discharge as a depth and the residual (no CF
#: name), and every flux stored as ``mm/month``: a UDUNITS "month" is a fixed 1/12 year, so a rate standard name
#: would invite a conversion that is wrong for every calendar month (the values are calendar-month totals).
CF_STANDARD_NAMES = {("P", "mm"): "lwe_thickness_of_precipitation_amount"}

_TIME_UNITS = "days since 1970-01-01"  # month starts are whole days: exact in float64
_TIME_CALENDAR = "proleptic_gregorian"  # what xarray writes by default; CF-1.8 section 4.4.1
_INSTANCE_ID = "{}_id"  # on file, the time-series instance variable (cf_role timeseries_id) is <dim>_id


def _bounds_names(ds) -> set:
    return {str(v.attrs["bounds"]) for v in ds.variables.values() if "bounds" in v.attrs}


def cf_ready(ds, *, instance: str = "basin", time_step: str | None = None, positions=None):
    """A copy of ``ds`` that `xarray.Dataset.to_netcdf` writes as CF-1.8 (numbers unchanged; idempotent).

    What it does (CF-1.8 section in brackets):

    - ``time`` (datetime64) is written as float64 ``days since 1970-01-01``, calendar ``proleptic_gregorian``,
      with ``standard_name = "time"``, ``axis = "T"`` and a ``long_name`` [2.2, 4.4]; with ``time_step`` (a
      `wbexplore.temporal.STEPS` name, e.g. ``"month"``) and no bounds yet, ``time_bnds`` (period start, exclusive
      end) are added [7.1];
    - no ``_FillValue`` on coordinates or bounds [2.5.1, 7.1];
    - a dimension labelled by text (the basins; the products of a merge) has its labels written as the
      auxiliary coordinate ``<dim>_id``, since a coordinate variable must be numeric and monotonic [2.4, 5];
      for the time-series instance dimension ``instance`` (the basins) that variable has ``cf_role =
      "timeseries_id"``; a scalar ``<instance>`` coordinate (one selected basin) is renamed the same way; then
      ``featureType = "timeSeries"`` [9, appendix H.2]; with ``positions``, each series' ``lat`` and ``lon``
      (a point inside the basin: CF asks a time series for a position [9.5]);
    - a ``long_name`` on every variable that has neither ``long_name`` nor ``standard_name`` (its ``label``, or its
      name) [3.2];
    - ``ancillary_variables`` of ``X`` lists ``sigma_X`` (standard error, same units; its ``standard_name`` is
      ``"<X's standard name> standard_error"`` when X has one) and ``valid_fraction_X`` when they exist [3.4,
      appendix C];
    - a ``standard_name`` from `CF_STANDARD_NAMES` on variables whose ``component`` and ``units`` match and that
      have none [3.3]; ``Conventions = "CF-1.8"``, and a ``title`` and ``history`` where missing [2.6.2].

    Units attributes are left as they are: the canonical series' ``mm/month`` is valid UDUNITS and the schema's
    spelling (`wbexplore.series.FLOW_UNITS`), so the project's reader keeps reading it. No
    ``standard_name_vocabulary`` is written (the checker would try to download that table version).

    Parameters
    ----------
    ds : xarray.Dataset
        Series to write (not modified).
    instance : str, keyword-only
        Name of the time-series instance dimension or scalar coordinate (default ``"basin"``).
    time_step : str or None, keyword-only
        Time step of ``time`` (``"month"`` for the canonical series) to add its bounds; None: no bounds added.
    positions : pandas.DataFrame or None, keyword-only
        Columns ``lat`` and ``lon`` (degrees north, east), indexed by the instance labels (e.g.
        `wbexplore.io.basins.representative_points`); rows for every series. None: no position written.

    Raises
    ------
    InputError
        ``positions`` without a row for one of the series (naming it).

    Returns
    -------
    xarray.Dataset
        The CF-ready copy, with the encodings set on its variables.
    """
    import numpy as np

    out = ds.copy(deep=False)
    for v in out.variables.values():
        v.attrs = dict(v.attrs)
        v.encoding = dict(v.encoding)
    out.attrs = dict(ds.attrs)
    vid = _INSTANCE_ID.format(instance)
    for dim in [d for d in out.dims if d in out.indexes and out[d].dtype.kind in "OUS"]:
        keep = {k: v for k, v in out[dim].attrs.items() if k not in ("cf_role",)}
        keep.setdefault("long_name", f"{dim} identifier")
        labels = np.asarray(out[dim].values).astype(str).astype(object)
        out = out.drop_vars(dim)
        out = out.assign_coords({_INSTANCE_ID.format(dim): (dim, labels, keep)})
    if instance in out.coords and out[instance].ndim == 0 and vid not in out.variables:
        out = out.rename_vars({instance: vid})
    if vid in out.variables and positions is not None and "lat" not in out.variables:
        labels = np.atleast_1d(np.asarray(out[vid].values).astype(str))
        missing = [b for b in labels if b not in positions.index]
        if missing:
            raise InputError(f"{instance} {str(missing[0])!r}: no position (lat, lon) to write for it")
        for axis, std, units in (("lat", "latitude", "degrees_north"), ("lon", "longitude", "degrees_east")):
            vals = positions.loc[list(labels), axis].to_numpy(dtype=np.float64)
            out = out.assign_coords({axis: (out[vid].dims, vals.reshape(out[vid].shape), {
                "standard_name": std, "units": units, "long_name": f"{std} of a point inside the {instance}"})})
    if vid in out.variables:
        out[vid].attrs.setdefault("long_name", f"{instance} identifier")
        out[vid].attrs["cf_role"] = "timeseries_id"
        out[vid].encoding.pop("_FillValue", None)
        if "time" in out.dims:
            out.attrs["featureType"] = "timeSeries"
    if "time" in out.variables and np.issubdtype(out["time"].dtype, np.datetime64):
        t = out["time"]
        for k in ("units", "calendar"):
            t.attrs.pop(k, None)
        t.attrs.setdefault("long_name", "time")
        t.attrs.update(standard_name="time", axis="T")
        if time_step is not None and "bounds" not in t.attrs and "time" in out.dims:
            from ..temporal import period_ends

            starts = out.indexes["time"]
            out["time_bnds"] = (("time", "nv"), np.stack([starts.values, period_ends(starts, time_step).values],
                                                         axis=1))
            out["time"].attrs["bounds"] = "time_bnds"
        tb = out["time"].attrs.get("bounds")
        for n in ["time"] + ([tb] if tb in out.variables else []):
            var = out.variables[n]
            for k in ("units", "calendar"):
                var.attrs.pop(k, None)
            var.encoding.update(units=_TIME_UNITS, calendar=_TIME_CALENDAR, dtype="float64")
    bounds = _bounds_names(out)
    for n, var in out.variables.items():
        if n in out.coords or n in bounds:
            var.encoding["_FillValue"] = None
        if n in bounds:
            var.encoding["coordinates"] = None  # bounds are the coordinate's metadata: no coordinates of their own
            continue
        if "long_name" not in var.attrs and "standard_name" not in var.attrs:
            var.attrs["long_name"] = str(var.attrs.get("label") or str(n).replace("_", " "))
    names = [str(n) for n in out.data_vars]
    vs = out.variables  # Variables, not DataArrays: one attrs dict each, nothing built per access
    for n in names:
        attrs = vs[n].attrs
        std = CF_STANDARD_NAMES.get((attrs.get("component"), attrs.get("units")))
        if std and "standard_name" not in attrs:
            attrs["standard_name"] = std
    for n in names:
        attrs = vs[n].attrs
        linked = [a for a in (f"sigma_{n}", f"valid_fraction_{n}") if a in names]
        if not linked:
            continue
        have = str(attrs.get("ancillary_variables", "")).split()
        attrs["ancillary_variables"] = " ".join(have + [a for a in linked if a not in have])
        sig = f"sigma_{n}"
        if sig in names and "standard_name" in attrs and "standard_name" not in vs[sig].attrs:
            vs[sig].attrs["standard_name"] = f"{attrs['standard_name']} standard_error"
    out.attrs["Conventions"] = "CF-1.8"
    if not out.attrs.get("title"):
        out.attrs["title"] = "wbexplore series"
    if not out.attrs.get("history"):
        import datetime as _dt

        from .. import __version__

        out.attrs["history"] = f"{_dt.datetime.now(_dt.UTC):%Y-%m-%dT%H:%M:%SZ} wbexplore {__version__}"
    return out


def write_netcdf(ds, path: str | os.PathLike, *, overwrite: bool = False, protect=None,
                 instance: str = "basin", time_step: str | None = None, positions=None) -> Path:
    """Write ``ds`` as CF-1.8 netCDF-4 (`cf_ready`) through `atomic_path`: the one netCDF writer of wbexplore.

    Parameters
    ----------
    ds : xarray.Dataset
        Series to write (not modified); values are written as they are (float64 stays float64).
    path : path-like
        Output file.
    overwrite, protect : keyword-only
        As for `atomic_path` (``--force``; the catalog whose inputs must never be replaced).
    instance, time_step, positions : keyword-only
        As for `cf_ready`.

    Returns
    -------
    pathlib.Path
        ``path``.

    Examples
    --------
    >>> write_netcdf(series, "out.nc", protect=catalog, time_step="month")  # doctest: +SKIP
    """
    try:
        ready = cf_ready(ds, instance=instance, time_step=time_step, positions=positions)
    except InputError as exc:
        raise InputError(f"{path}: {exc}") from None
    with atomic_path(path, overwrite=overwrite, protect=protect) as tmp:
        ready.to_netcdf(tmp, format="NETCDF4", engine="netcdf4")
    return Path(path)


def read_netcdf(path: str | os.PathLike, *, instance: str = "basin"):
    """Read a file written by `write_netcdf` back into memory, the instance labels as the ``instance`` index.

    The inverse of `cf_ready` for the values: ``<dim>_id`` along a dimension ``<dim>`` that has no coordinate
    variable (the ``instance`` dimension; the products of a merge) becomes the ``<dim>`` index coordinate again
    (a scalar ``<instance>_id`` stays as it is); times decode to datetime64.

    Parameters
    ----------
    path : path-like
        A netCDF file.
    instance : str, keyword-only
        As for `cf_ready` (kept for symmetry: every dimension written with ``<dim>_id`` labels is restored).

    Returns
    -------
    xarray.Dataset
        Loaded into memory (the file is closed).
    """
    import xarray as xr

    with xr.open_dataset(path, engine="netcdf4") as f:
        ds = f.load()
    for dim in [d for d in ds.dims if d not in ds.variables]:
        vid = _INSTANCE_ID.format(dim)
        if vid in ds.variables and ds[vid].dims == (dim,):
            attrs = {k: v for k, v in ds[vid].attrs.items() if k != "cf_role"}
            labels = ds[vid].values.astype(str)
            ds = ds.drop_vars(vid).assign_coords({dim: (dim, labels, attrs)})
    return ds
