"""Selection files (YAML, schema version 1): export, load and exact replay; series export.

A selection file records everything needed to recompute a combination next year:
the catalog (path relative to the selection file, and its SHA-256), the SHA-256 of
every file of the three sources, of the basin file and of the discharge file, the
basin, period, storage-change method and options, the unit system, the metrics
obtained (full precision), the versions of wbexplore and key libraries, the
creation time and the caution text. `replay` recomputes and compares.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from . import __version__
from .balance import Selection, compute_selection, to_unit_system
from .balance.closure import Q_RELATIVE_ERROR
from .errors import InputError, ReplayMismatch, SelectionError
from .io.catalog import Catalog, file_sha256, open_catalog
from .io.writers import CAUTION, atomic_path, check_output, same_file

__all__ = ["SELECTION_VERSION", "export_selection", "selection_document", "load_selection", "replay",
           "write_series_csv", "write_series_netcdf", "series_dataset"]

SELECTION_VERSION = 1
_REQUIRED = ("wbexplore_selection", "catalog", "basin", "period", "sources", "storage_change", "metrics")


def _versions() -> dict:
    out = {"wbexplore": __version__}
    for mod in ("numpy", "pandas", "xarray", "scipy", "exactextract", "pyproj", "shapely"):
        try:
            out[mod] = __import__(mod).__version__
        except Exception:  # pragma: no cover
            out[mod] = "unknown"
    return out


def _rel(path: Path, base: Path) -> str:
    try:
        return os.path.relpath(path, base)
    except ValueError:  # other drive
        return str(path)


def _file_entries(paths, base: Path) -> list[dict]:
    out = []
    for p in paths:
        out.append({"path": _rel(Path(p), base), "sha256": file_sha256(p)})
    return out


def _clean_metrics(metrics: dict) -> dict:
    out = {}
    for k, v in metrics.items():
        v = float(v) if not isinstance(v, (int, np.integer)) else int(v)
        out[k] = None if isinstance(v, float) and math.isnan(v) else v
    return out


def selection_document(cat: Catalog, sel: Selection, result, *, base: Path, unit_system: str = "mm",
                       q_relative_error: float = Q_RELATIVE_ERROR) -> dict:
    """The selection as a plain dict (what `export_selection` writes)."""
    sources = {}
    for comp in ("P", "ET", "TWSA"):
        spec = cat.source(getattr(sel, comp))
        sources[comp] = {"id": spec.id, "label": spec.display, "files": _file_entries(spec.paths, cat.path.parent)}
    inputs = {"basins": _file_entries([cat.basins.path], cat.path.parent)[0]}
    # the other products of each component set the uncertainty (their spread): record them too
    spread = {}
    for spec in cat.sources:
        if spec.id not in (sel.P, sel.ET, sel.TWSA):
            spread[spec.id] = _file_entries(spec.paths, cat.path.parent)
    if cat.discharge:
        inputs["discharge"] = _file_entries([cat.discharge.path], cat.path.parent)[0]
    return {
        "wbexplore_selection": SELECTION_VERSION,
        "created": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": CAUTION,
        "catalog": {"path": _rel(cat.path, base), "sha256": cat.sha256, "title": cat.title},
        "basin": {"id": sel.basin, "name": result.basin_name, "area_km2": float(result.area_km2)},
        "period": {"start": f"{result.frame.index[0]:%Y-%m}", "end": f"{result.frame.index[-1]:%Y-%m}"},
        "sources": sources,
        "inputs": inputs,
        "uncertainty_sources": spread,
        "storage_change": {"method": sel.storage_change, "window_matched": bool(sel.matched),
                           "fill_gaps": bool(sel.fill_gaps)},
        "discharge_lag_months": int(sel.lag),
        "min_valid_fraction": float(sel.min_valid_fraction),
        "water_year_start_month": int(sel.water_year_start),
        "q_relative_error": float(q_relative_error),
        "unit_system": unit_system,
        "metrics": _clean_metrics(result.metrics),
        "versions": _versions(),
    }


def export_selection(catalog, sel: Selection, out, *, overwrite: bool = False, series: str | None = None,
                     unit_system: str = "mm", cache_dir=None, ds=None) -> dict:
    """Compute ``sel`` from the catalog's files and write the selection file (and optionally the series).

    Parameters
    ----------
    catalog : Catalog or path
    sel : Selection
    out : path of the YAML file to write (refused if it exists unless ``overwrite``)
    series : optional path of a series file (``.csv`` or ``.nc``) written alongside
    unit_system : "mm", "m3" or "m3/s" (CSV series)
    ds : canonical series to use; default: extracted afresh for the three sources

    Returns
    -------
    dict with the written paths and the metrics.
    """
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    out = check_output(out, overwrite=overwrite, protect=cat)
    if series:
        if Path(series).suffix.lower() not in (".csv", ".nc"):
            raise InputError(f"{series}: series file must end in .csv or .nc")
        check_output(series, overwrite=overwrite, protect=cat)
        if same_file(out, series):
            raise InputError(f"{series}: the series file is the selection file {out}; give two different files")
    for comp in ("P", "ET", "TWSA"):
        spec = cat.source(getattr(sel, comp))
        if spec.component != comp:
            raise InputError(f"{cat.path}: source {spec.id!r} is a {spec.component} product, not {comp}")
    if ds is None:
        ds = _extract_for(cat, sel, cache_dir)
    res = compute_selection(ds, sel)
    if res.n_valid == 0:
        raise InputError(res.messages[0])
    doc = selection_document(cat, sel, res, base=out.resolve().parent, unit_system=unit_system)
    written = {}
    if series:
        if Path(series).suffix.lower() == ".csv":
            write_series_csv(res, series, unit_system=unit_system, overwrite=overwrite, protect=cat)
        else:
            write_series_netcdf(res, series, doc=doc, overwrite=overwrite, protect=cat)
        written["series"] = str(series)
    with atomic_path(out, overwrite=overwrite, protect=cat) as tmp:
        tmp.write_text("# wbexplore selection file: replay with `wbexplore replay " + out.name + "`\n"
                       + yaml.safe_dump(doc, sort_keys=False, width=110))
    written["selection"] = str(out)
    written["metrics"] = doc["metrics"]
    return written


def _extract_for(cat: Catalog, sel: Selection, cache_dir):
    import warnings

    from .pipeline import CoverageWarning, extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        # every source: the spread of each component's products is its uncertainty
        return extract(cat, basins=[sel.basin], cache_dir=cache_dir)


def load_selection(path) -> tuple[dict, Selection, Path]:
    """Read and validate a selection file; returns (document, Selection, catalog path)."""
    p = Path(path)
    if not p.is_file():
        raise SelectionError(f"{p}: selection file not found")
    try:
        doc = yaml.safe_load(p.read_text())
    except yaml.YAMLError:
        raise SelectionError(f"{p}: not valid YAML") from None
    if not isinstance(doc, dict):
        raise SelectionError(f"{p}: expected a mapping")
    for key in _REQUIRED:
        if key not in doc or doc[key] in (None, ""):
            raise SelectionError(f"{p}: required field {key!r} is missing")
    if doc["wbexplore_selection"] != SELECTION_VERSION:
        raise SelectionError(f"{p}: field 'wbexplore_selection': version {doc['wbexplore_selection']!r} "
                             f"is not supported (this wbexplore reads {SELECTION_VERSION})")
    try:
        src = {c: str(doc["sources"][c]["id"]) for c in ("P", "ET", "TWSA")}
        sc = doc["storage_change"]
        sel = Selection(basin=str(doc["basin"]["id"]), P=src["P"], ET=src["ET"], TWSA=src["TWSA"],
                        start=str(doc["period"]["start"]), end=str(doc["period"]["end"]),
                        storage_change=str(sc["method"]), matched=bool(sc.get("window_matched", True)),
                        fill_gaps=bool(sc.get("fill_gaps", False)), lag=int(doc.get("discharge_lag_months", 0)),
                        min_valid_fraction=float(doc.get("min_valid_fraction", 0.5)),
                        water_year_start=int(doc.get("water_year_start_month", 1)))
        cat_path = (p.resolve().parent / str(doc["catalog"]["path"])).resolve()
    except (KeyError, TypeError, ValueError) as exc:
        raise SelectionError(f"{p}: malformed field ({exc.__class__.__name__}: {exc})") from None
    return doc, sel, cat_path


def _close(a, b) -> bool:
    if a is None or b is None or (isinstance(b, float) and math.isnan(b)):
        return (a is None or (isinstance(a, float) and math.isnan(a))) and (
            b is None or (isinstance(b, float) and math.isnan(b)))
    return abs(float(a) - float(b)) <= 1e-9 * max(1.0, abs(float(a)))


def replay(path, *, cache_dir=None) -> dict:
    """Recompute a selection file.

    Raises `SelectionError` (exit 2) for a malformed file, a missing file or an unknown id;
    `ReplayMismatch` (exit 1) with a table when a file's hash or any metric differs.
    """
    doc, sel, cat_path = load_selection(path)
    if not cat_path.is_file():
        raise SelectionError(f"{path}: catalog {str(cat_path)!r} not found (moved?)")
    cat = open_catalog(cat_path)
    rows = []
    if cat.sha256 != doc["catalog"].get("sha256"):
        rows.append(("catalog", str(cat_path), "sha256 changed"))
    known = {s.id for s in cat.sources}
    for comp in ("P", "ET", "TWSA"):
        sid = getattr(sel, comp)
        if sid not in known:
            raise SelectionError(f"{path}: source id {sid!r} ({comp}) is not in catalog {cat_path}")
    base = cat.path.parent

    def check(files, label, missing_label):
        for f in files:
            fp = (base / f["path"]).resolve()
            if not fp.exists():
                raise SelectionError(f"{path}: {missing_label} file {str(fp)!r} is missing")
            if file_sha256(fp) != f.get("sha256"):
                rows.append((label, f["path"], "sha256 changed"))

    for comp in ("P", "ET", "TWSA"):
        sid = getattr(sel, comp)
        check(doc["sources"][comp].get("files", []), f"source {sid}", f"source {sid!r}")
    for sid, files in (doc.get("uncertainty_sources") or {}).items():
        if sid not in known:
            rows.append((f"source {sid}", "(uncertainty)", "no longer in the catalog"))
            continue
        check(files, f"source {sid} (uncertainty)", f"source {sid!r}")
    for key, entry in (doc.get("inputs") or {}).items():
        check([entry], key, key)
    ds = _extract_for(cat, sel, cache_dir)
    res = compute_selection(ds, sel, q_relative_error=float(doc.get("q_relative_error", Q_RELATIVE_ERROR)))
    new = _clean_metrics(res.metrics)
    n = 0
    for k, old in doc["metrics"].items():
        n += 1
        if k not in new:
            rows.append((f"metric {k}", repr(old), "not computed"))
        elif not _close(old, new[k]):
            rows.append((f"metric {k}", repr(old), repr(new[k])))
    if rows:
        w = [max(len(str(r[i])) for r in rows + [("what", "recorded", "now")]) for i in range(3)]
        lines = [f"{'what'.ljust(w[0])}  {'recorded'.ljust(w[1])}  now"]
        lines += [f"{str(a).ljust(w[0])}  {str(b).ljust(w[1])}  {c}" for a, b, c in rows]
        first = rows[0]
        raise ReplayMismatch(f"{path}: {len(rows)} difference(s), first: {first[0]} ({first[2]})", "\n".join(lines))
    return {"n_metrics": n, "metrics": new}


# --------------------------------------------------------------------------- series export
_CSV_COLS = ["P", "ET", "Q", "dS", "residual", "TWSA", "sigma_P", "sigma_ET", "sigma_Q", "sigma_dS",
             "sigma_residual", "beyond_2sigma", "valid_fraction_P", "valid_fraction_ET", "valid_fraction_TWSA"]


def _series_frame(result, unit_system):
    f = to_unit_system(result.frame, result.area_km2, unit_system)[_CSV_COLS].copy()
    f.index = pd.Index([f"{m:%Y-%m}" for m in f.index], name="month")
    return f


def write_series_csv(result, path, *, unit_system: str = "mm", overwrite: bool = False, protect=None) -> Path:
    """One row per month: P, ET, Q, dS, residual (+ TWSA), their uncertainties and valid fractions.

    Units: "mm" (mm/month; TWSA mm), "m3" (m3 per month), "m3/s" (mean flow over the month), named in
    the header comment lines. Read back with ``pandas.read_csv(path, comment="#", index_col="month")``.
    ``protect``: the catalog (or list of paths) whose inputs must never be replaced (`io.writers.check_output`).
    """
    f = _series_frame(result, unit_system)
    unit = {"mm": "mm/month (TWSA: mm)", "m3": "m3 per month (TWSA: m3)", "m3/s": "m3/s mean over the month (TWSA: m3)"}
    sel = result.selection
    head = (f"# wbexplore series: basin {sel.basin}, P={sel.P} ET={sel.ET} TWSA={sel.TWSA}, "
            f"storage change {sel.storage_change}{' window-matched' if sel.matched else ''}\n"
            f"# units: {unit[unit_system]}; valid fractions 0..1\n# {CAUTION}\n")
    with atomic_path(path, overwrite=overwrite, protect=protect) as tmp:
        with open(tmp, "w") as fh:
            fh.write(head)
            f.to_csv(fh, float_format="%.17g")
    return Path(path)


def series_dataset(result, *, doc: dict | None = None):
    """The selection's series as a CF-1.8 `xarray.Dataset` (mm per month; TWSA mm)."""
    import xarray as xr

    f = result.frame
    months = pd.DatetimeIndex(f.index)
    ends = months + pd.offsets.MonthBegin(1)
    ds = xr.Dataset(coords={"time": ("time", months.values)})
    ds["time"].attrs = {"standard_name": "time", "long_name": "month (start)", "bounds": "time_bnds", "axis": "T"}
    ds["time_bnds"] = (("time", "nv"), np.stack([months.values, ends.values], axis=1))
    meta = {
        "P": ("precipitation over the basin", "lwe_thickness_of_precipitation_amount", "mm", "time: sum area: mean"),
        "ET": ("evapotranspiration over the basin", None, "mm", "time: sum area: mean"),
        "Q": ("gauged outlet discharge as depth over the basin", None, "mm", "time: sum area: mean"),
        "dS": ("storage change from the storage anomaly", None, "mm", "time: sum area: mean"),
        "residual": ("water-balance residual P - ET - Q - dS", None, "mm", "time: sum area: mean"),
        "TWSA": ("total water storage anomaly (monthly mean)", None, "mm", "time: mean area: mean"),
    }
    for name, (ln, std, units, cm) in meta.items():
        ds[name] = ("time", f[name].to_numpy(dtype=float))
        ds[name].attrs = {"long_name": ln, "units": units, "cell_methods": cm}
        if std:
            ds[name].attrs["standard_name"] = std
    for name in ("sigma_P", "sigma_ET", "sigma_Q", "sigma_dS", "sigma_residual"):
        comp = name.split("_", 1)[1]
        ds[name] = ("time", f[name].to_numpy(dtype=float))
        ds[name].attrs = {"long_name": f"standard error of {comp}", "units": "mm"}
        ds[comp].attrs["ancillary_variables"] = (ds[comp].attrs.get("ancillary_variables", "") + " " + name).strip()
    for comp in ("P", "ET", "TWSA"):
        name = f"valid_fraction_{comp}"
        ds[name] = ("time", f[name].to_numpy(dtype=float))
        ds[name].attrs = {"long_name": f"share of basin area with data in the {comp} product", "units": "1"}
    ds["beyond_2sigma"] = ("time", f["beyond_2sigma"].to_numpy().astype(np.int8))
    ds["beyond_2sigma"].attrs = {"long_name": "residual beyond two standard errors", "flag_values": np.array([0, 1], np.int8),
                                 "flag_meanings": "within beyond"}
    sel = result.selection
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": f"wbexplore water-balance series, basin {sel.basin} ({result.basin_name})",
        "source": f"P={sel.P}, ET={sel.ET}, TWSA={sel.TWSA}; storage change {sel.storage_change}"
                  f"{' (window-matched)' if sel.matched else ''}",
        "history": f"{_dt.datetime.now(_dt.timezone.utc):%Y-%m-%dT%H:%M:%SZ} wbexplore {__version__}",
        "basin_id": str(sel.basin), "basin_area_km2": float(result.area_km2),
        "comment": CAUTION,
    }
    if doc:
        ds.attrs["catalog_sha256"] = doc["catalog"]["sha256"]
    for v in ds.variables:
        if v not in ("time",):
            ds[v].encoding = {}
    return ds


def write_series_netcdf(result, path, *, doc: dict | None = None, overwrite: bool = False, protect=None) -> Path:
    """Write `series_dataset` as CF netCDF-4; ``protect`` as for `write_series_csv`."""
    ds = series_dataset(result, doc=doc)
    with atomic_path(path, overwrite=overwrite, protect=protect) as tmp:
        ds.to_netcdf(tmp, format="NETCDF4", encoding={"time": {"units": "days since 1970-01-01", "dtype": "float64"},
                                                       "time_bnds": {"units": "days since 1970-01-01",
                                                                     "dtype": "float64"}})
    return Path(path)
