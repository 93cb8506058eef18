"""Selection files (YAML, schema version 1): export, load and exact replay; series export.

A selection file reads as configuration, in the order of `KEY_ORDER`: first the choice (basin, unit,
the P, ET and TWSA products, period, storage-change method, window matching, fill, lag, thresholds,
Q error, area, unit system, the balance's flows), then what it gave (the metrics, full precision; where
each uncertainty came from; the caution text), then provenance: the catalog (path relative to the
selection file, and its SHA-256) and one block, ``provenance``, holding one `files_digest` entry
(``{files: N, sha256: H}``: the SHA-256 of the lines ``sha256sum`` prints for the files, sorted by path)
per chosen product, per other product the uncertainty was computed from (collocation and the spread use
the other products of a component; a stated error none: `balance.uncertainty.error_inputs`), per input
(basins, discharge) and per flow; last the creation time and the versions of wbexplore and key libraries.
A merged source (``merged_P``, ``merged_ET``, ``merged_TWSA``: `balance.merge`) is recorded by the block
``merge`` (variant, the closure form it was built in, the products merged per component and where their error
variances came from) and, under ``provenance.merged_from``, one digest per product merged; replay builds the
merge again from the catalog's products (`balance.merge.merged_basin`) and reports a product added, removed
or changed as a difference. `replay` recomputes and compares. Files of the earlier spelling (one ``{path, sha256}`` per file, every
product of the catalog under ``uncertainty_sources``) are still read and replayed.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from . import __version__
from .balance import ClosureOptions, Selection, compute_selection, to_unit_system
from .balance.closure import MAX_LAG_MONTHS, Q_RELATIVE_ERROR, UNIT_SYSTEMS, flow_terms_of
from .balance.engine import is_merged
from .balance.merge import (DEFAULT_METHOD, MERGE_METHODS, merge_form, merged_basin, merged_components, merged_label,
                            merged_name)
from .balance.storage import METHODS
from .balance.options import AREAS
from .balance.terms import BASE_TERMS, DS, DS_LEVELS, SOURCE_COMPONENTS, balance_text
from .series import LEVELS
from .errors import InputError, ReplayMismatch, SelectionError
from .io.catalog import Catalog, file_sha256, open_catalog
from .io.writers import CAUTION, atomic_path, cf_ready, check_output, same_file, write_netcdf
from .io.yamlsafe import load_yaml

__all__ = ["SELECTION_VERSION", "KEY_ORDER", "export_selection", "selection_document", "selection_text", "files_digest",
           "load_selection", "replay",
           "write_series_csv", "write_series_netcdf", "series_dataset", "series_positions"]

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
    """One {path, sha256} entry per file: the spelling of files written before `files_digest` (still read)."""
    out = []
    for p in paths:
        out.append({"path": _rel(Path(p), base), "sha256": file_sha256(p)})
    return out


def _manifest_path(path, base: Path) -> str:
    return Path(_rel(Path(path), base)).as_posix()


def files_digest(paths, base: Path) -> dict:
    """One compact provenance entry for a product's (or an input's) files: ``{files: N, sha256: H}``.

    ``H`` is the SHA-256 of the text GNU coreutils' ``sha256sum`` prints for the files, sorted by path:
    one line ``<sha256 of the file>  <path>`` each, paths relative to the catalog's folder with ``/``
    (so ``sha256sum $(sorted files) | sha256sum`` run in that folder gives it, for plain files). A zarr
    store's line carries `io.catalog.file_sha256` of the store. ``N`` is the number of files.
    """
    lines = sorted((_manifest_path(p, base), file_sha256(p)) for p in paths)
    text = "".join(f"{h}  {rel}\n" for rel, h in lines)
    return {"files": len(lines), "sha256": hashlib.sha256(text.encode("utf-8")).hexdigest()}


def _clean_metrics(metrics: dict) -> dict:
    out = {}
    for k, v in metrics.items():
        v = float(v) if not isinstance(v, (int, np.integer)) else int(v)
        out[k] = None if isinstance(v, float) and math.isnan(v) else v
    return out


# Top-level keys in the order they are written: the choice and its options, what it gave, then where it came
# from. Optional keys (unit, area, flows) are left out where they do not apply.
KEY_ORDER = ("wbexplore_selection", "basin", "unit", "sources", "merge", "period", "storage_change", "discharge_lag_months",
             "min_valid_fraction", "water_year_start_month", "q_relative_error", "area", "unit_system", "flows",
             "metrics", "uncertainty_source", "uncertainty_notes", "caution",
             "catalog", "provenance", "created", "versions")
# a comment line written before the key that opens each part of the file
_PART_COMMENTS = {
    "basin": "# the choice: unit, products, period and options",
    "metrics": "# what it gave",
    "catalog": ("# provenance: SHA-256 of the files replay reads; each `sha256` below is the SHA-256 of what\n"
                "# `sha256sum` prints for its files, sorted by path (paths relative to the catalog's folder)"),
}


def _product_paths(cat: Catalog, sid: str, unit: str) -> tuple:
    """The files of product ``sid`` (a water body's own series: its outlines, levels, curve or pan table)."""
    own = _own_paths(cat, sid) if unit == "waterbody" else None
    return tuple(own) if own is not None else tuple(cat.source(sid).paths)


def _uncertainty_products(cat: Catalog, sel: Selection, result, ds, unit: str) -> list[str]:
    """The products other than the chosen ones that the uncertainty was computed from (sorted)."""
    from .balance.uncertainty import error_inputs

    chosen = {sel.P, sel.ET, sel.TWSA}
    out = set()
    for err in result.uncertainty.values():
        if ds is not None:
            out.update(error_inputs(ds, err))
        elif err.method in ("collocation", "spread"):  # without the series: the catalog's products
            out.update(s.id for s in cat.sources if s.component == err.component)
    return sorted(out - chosen)


def _check_merged_ids(sel: Selection, where: str) -> None:
    for c in merged_components(sel):
        if getattr(sel, c) != merged_name(c):
            raise InputError(f"{where}: source {getattr(sel, c)!r} for {c}: the merged {c} source is "
                             f"{merged_name(c)!r}")


def with_merge(ds, sel: Selection, *, method: str, options: ClosureOptions | None = None,
               q_relative_error: float = Q_RELATIVE_ERROR) -> tuple:
    """(the basin's series with its merged sources, the ``merge`` block of its selection file); ``options``
    default: `balance.merge.merge_form` of the selection (the form the explorer builds merged sources in)."""
    from .balance.uncertainty import component_products

    opts = options if options is not None else merge_form(sel.storage_change, sel.matched)
    one = merged_basin(ds, sel.basin, method=method, options=opts, q_relative_error=q_relative_error)
    block = {"method": method, "variant": MERGE_METHODS[method],
             "storage_change": opts.storage_change, "window_matched": bool(opts.matched),
             "min_valid_fraction": float(opts.min_valid_fraction), "q_relative_error": float(q_relative_error),
             "products": {c: list(component_products(one, c)) for c in SOURCE_COMPONENTS},
             "error_variance_source": {c: str(one[merged_name(c)].attrs.get("error_variance_source", ""))
                                       for c in SOURCE_COMPONENTS}}
    return one, block


def selection_document(cat: Catalog, sel: Selection, result, *, base: Path, unit_system: str = "mm",
                       q_relative_error: float = Q_RELATIVE_ERROR, unit: str = "whole", ds=None,
                       merge: dict | None = None) -> dict:
    """The selection as a plain dict (what `export_selection` writes), keys in `KEY_ORDER`.

    ``unit`` is "whole", "incremental" (the basin minus its upstream basins) or "waterbody" (a lake or
    reservoir: its TWSA source is the storage from levels, whose files are the water bodies' outlines, levels
    and curves), written only when it is not "whole"; ``area`` (where P and E fall) is written for water bodies.
    ``ds``: the series the result was computed from; the products its uncertainty used are read from them
    (`balance.uncertainty.error_inputs`; without them, every product of a component whose uncertainty is
    collocation or spread). Provenance is one `files_digest` entry per product and per input.
    ``merge``: the ``merge`` block of `with_merge` where a chosen source is a merged one (its products are
    recorded under ``provenance.merged_from``).
    """
    folder = cat.path.parent
    sources = {}
    used = {}
    for comp in SOURCE_COMPONENTS:
        sid = getattr(sel, comp)
        if is_merged(sid):
            if merge is None:
                raise InputError(f"source {sid!r}: a merged source needs its merge (`with_merge`) to be recorded")
            sources[comp] = {"id": sid, "label": f"{merged_label(merge['method'])} {comp}"}
            continue
        own = _own_paths(cat, sid) if unit == "waterbody" else None
        label = _OWN_LABELS[sid] if own is not None else cat.source(sid).display
        sources[comp] = {"id": sid, "label": label}
        used[sid] = files_digest(_product_paths(cat, sid, unit), folder)
    inputs = {"basins": files_digest([cat.basins.path], folder)}
    if cat.discharge:
        inputs["discharge"] = files_digest([cat.discharge.path], folder)
    provenance = {"sources": used,
                  "uncertainty_sources": {sid: files_digest(_product_paths(cat, sid, unit), folder)
                                          for sid in _uncertainty_products(cat, sel, result, ds, unit)},
                  "inputs": inputs}
    flows = _flow_entries(cat, result)
    flow_files = {f["id"]: files_digest([_flow_path(cat, f["id"])], folder)
                  for f in flows if _flow_path(cat, f["id"]) is not None}
    if flow_files:
        provenance["flows"] = flow_files
    if merge is not None:
        merged_from = sorted({sid for ids in merge["products"].values() for sid in ids} - set(used))
        provenance["merged_from"] = {sid: files_digest(_product_paths(cat, sid, unit), folder) for sid in merged_from}
    doc = {
        "wbexplore_selection": SELECTION_VERSION,
        "basin": {"id": sel.basin, "name": result.basin_name, "area_km2": float(result.area_km2)},
        "unit": unit,
        "sources": sources,
        "merge": merge,
        "period": {"start": f"{result.frame.index[0]:%Y-%m}", "end": f"{result.frame.index[-1]:%Y-%m}"},
        # options as given (replayed as they are); where they do not apply, the note says how storage was taken
        "storage_change": {"method": sel.storage_change, "window_matched": bool(sel.matched),
                           "fill_gaps": bool(sel.fill_gaps),
                           **({"note": result.storage_note} if result.storage_note else {})},
        "discharge_lag_months": int(sel.lag),
        "min_valid_fraction": float(sel.min_valid_fraction),
        "water_year_start_month": int(sel.water_year_start),
        "q_relative_error": float(q_relative_error),
        "area": sel.area,
        "unit_system": unit_system,
        "flows": flows,
        "metrics": _clean_metrics(result.metrics),
        # where each product's error came from (issue 16); a file without it was made with the product spread
        "uncertainty_source": {**result.uncertainty_source, "Q": "gauge"},
        "uncertainty_notes": result.uncertainty_line,
        "caution": CAUTION,
        "catalog": {"path": _rel(cat.path, base), "sha256": cat.sha256, "title": cat.title},
        "provenance": provenance,
        "created": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "versions": _versions(),
    }
    if not flows:  # only where the balance has flows: a plain catalog's selection file has no `flows`
        del doc["flows"]
    if merge is None:  # only where a chosen source is merged
        del doc["merge"]
    if unit == "whole":  # a whole basin's file names no unit
        del doc["unit"]
    if not (sel.area != "outline" or unit == "waterbody"):  # where P and E fall (water bodies)
        del doc["area"]
    return doc


class _OneLineDumper(yaml.SafeDumper):
    """yaml's safe dumper writing each provenance entry ({files, sha256}) on one line."""


class _OneLine(dict):
    """A mapping `_OneLineDumper` writes in flow style."""


_OneLineDumper.add_representer(_OneLine, lambda d, m: d.represent_mapping("tag:yaml.org,2002:map", m.items(),
                                                                           flow_style=True))


def selection_text(doc: dict, *, name: str) -> str:
    """The YAML text of a selection document: a header naming the replay command, a comment before each part."""
    doc = dict(doc)
    if "provenance" in doc:
        doc["provenance"] = {k: {n: _OneLine(e) for n, e in v.items()} for k, v in doc["provenance"].items()}
    if doc.get("merge"):  # one line per component: the products merged, where their errors came from
        doc["merge"] = {**doc["merge"], "products": _OneLine(doc["merge"]["products"]),
                        "error_variance_source": _OneLine(doc["merge"]["error_variance_source"])}
    parts = [f"# wbexplore selection file: replay with `wbexplore replay {name}`\n"]
    for key, value in doc.items():
        if key in _PART_COMMENTS:
            parts.append(_PART_COMMENTS[key] + "\n")
        parts.append(yaml.dump({key: value}, Dumper=_OneLineDumper, sort_keys=False, width=110))
    return "".join(parts)


_OWN_LABELS = {LEVELS: DS_LEVELS.label, "pan": "Lake evaporation from pan"}


def _own_paths(cat: Catalog, sid: str) -> tuple | None:
    """The files of a water body's own series ("levels": outlines, levels, curve; "pan": the pan table), else None."""
    if sid == LEVELS:
        return _levels_paths(cat)
    if sid == "pan" and cat.waterbodies is not None and cat.waterbodies.pan is not None:
        return (cat.waterbodies.pan.path,)
    return None


def _levels_paths(cat: Catalog) -> tuple:
    """The files a water body's storage from levels is read from: outlines, level table, storage curve."""
    if cat.waterbodies is None:
        raise InputError(f"{cat.path}: the catalog has no 'waterbodies'")
    return cat.waterbodies.input_paths()


def _catalog_flows(cat: Catalog) -> dict:
    """flow id -> its catalog entry (``flows`` of a version-2 catalog; none before)."""
    return {str(f.id): f for f in (getattr(cat, "flows", None) or ())}


def _flow_path(cat: Catalog, fid: str):
    """The station table of flow ``fid`` as the catalog names it, or None."""
    spec = _catalog_flows(cat).get(fid)
    return None if spec is None else spec.table.path


def _flow_entries(cat: Catalog, result) -> list[dict]:
    """Each flow of the balance: id, direction and label (its station table: `_flow_path`)."""
    out = []
    for t in flow_terms_of(result.terms):
        fid = t.variable[len("flow_"):] if t.variable.startswith("flow_") else t.variable
        out.append({"id": fid, "direction": "in" if t.sign > 0 else "out", "label": t.label})
    return out


def export_selection(catalog, sel: Selection, out, *, overwrite: bool = False, series: str | None = None,
                     unit_system: str = "mm", cache_dir=None, ds=None, incremental: bool = False,
                     waterbody: bool = False, merge_method: str | None = None) -> dict:
    """Compute ``sel`` from the catalog's files and write the selection file (and optionally the series).

    Parameters
    ----------
    catalog : Catalog or path
    sel : Selection
    out : path of the YAML file to write (refused if it exists unless ``overwrite``)
    series : optional path of a series file (``.csv`` or ``.nc``) written alongside
    unit_system : "mm", "m3", "m3/s" or "hm3" (CSV series)
    ds : canonical series to use; default: extracted afresh for the three sources
    incremental : the basin's incremental unit (its area minus its upstream basins); recorded as
        ``unit: incremental`` in the file, and replayed over that unit
    waterbody : ``sel.basin`` is a water body (its TWSA source is "levels"); recorded as ``unit: waterbody``
    merge_method : variant of a chosen merged source (``merged_P`` ...; `balance.merge.MERGE_METHODS`, default
        `balance.merge.DEFAULT_METHOD`), built in `balance.merge.merge_form` and recorded in the ``merge`` block

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
    unit = "waterbody" if waterbody else "incremental" if incremental else "whole"
    merged = merged_components(sel)
    _check_merged_ids(sel, str(cat.path))
    if merged and waterbody:
        raise InputError(f"{cat.path}: water body {sel.basin!r} has no merged sources (its storage is its own)")
    method = DEFAULT_METHOD if merge_method is None else merge_method
    if method not in MERGE_METHODS:
        raise InputError(f"merge method {method!r} is not one of {', '.join(MERGE_METHODS)}")
    for comp in SOURCE_COMPONENTS:
        if comp in merged:
            continue
        if waterbody and comp == DS.component:
            if sel.TWSA != LEVELS:
                raise InputError(f"{cat.path}: water body {sel.basin!r}: its storage comes from levels "
                                 f"(TWSA source {LEVELS!r}), not {sel.TWSA!r}")
            continue
        if waterbody and _own_paths(cat, getattr(sel, comp)) is not None:
            continue
        spec = cat.source(getattr(sel, comp))
        if spec.component != comp:
            raise InputError(f"{cat.path}: source {spec.id!r} is a {spec.component} product, not {comp}")
    if ds is None:
        ds = _extract_for(cat, sel, cache_dir, incremental=incremental, waterbody=waterbody)
    elif ds.attrs.get("unit", "whole") != unit:
        raise InputError(f"{cat.path}: the series given are {ds.attrs.get('unit', 'whole')} units, "
                         f"not {unit} ones")
    merge = None
    if merged:
        ds, merge = with_merge(ds, sel, method=method)
    res = compute_selection(ds, sel)
    if res.n_valid == 0:
        raise InputError(res.messages[0])
    doc = selection_document(cat, sel, res, base=out.resolve().parent, unit_system=unit_system, unit=unit, ds=ds,
                             merge=merge)
    if incremental:
        doc["basin"]["whole_area_km2"] = float(ds["whole_area_km2"].sel(basin=sel.basin))
    written = {}
    if series:
        if Path(series).suffix.lower() == ".csv":
            write_series_csv(res, series, unit_system=unit_system, overwrite=overwrite, protect=cat)
        else:
            write_series_netcdf(res, series, doc=doc, overwrite=overwrite, protect=cat,
                                positions=series_positions(cat, sel.basin, incremental=incremental))
        written["series"] = str(series)
    with atomic_path(out, overwrite=overwrite, protect=cat) as tmp:
        tmp.write_text(selection_text(doc, name=out.name))
    written["selection"] = str(out)
    written["metrics"] = doc["metrics"]
    return written


def _extract_for(cat: Catalog, sel: Selection, cache_dir, *, incremental: bool = False, waterbody: bool = False):
    import warnings

    from .pipeline import CoverageWarning, extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        # every source: the spread of each component's products is its uncertainty
        if waterbody:
            return extract(cat, basins=[sel.basin], cache_dir=cache_dir, waterbodies=True)
        return extract(cat, basins=[sel.basin], cache_dir=cache_dir, incremental=incremental)


# `selection_document`'s provenance
_PROVENANCE_PARTS = ("sources", "uncertainty_sources", "inputs", "flows", "merged_from")
_UNCERTAINTY_SOURCES = ("stated", "collocation", "spread", "none", "posterior")  # `balance.uncertainty` methods
UNITS = ("whole", "incremental", "waterbody")  # the balance units a selection file may name (field ``unit``)
_HEX64 = re.compile(r"[0-9a-f]{64}\Z")
_MONTH = re.compile(r"[0-9]{4}-(0[1-9]|1[0-2])\Z")


def _show(v) -> str:
    r = repr(v)
    return r if len(r) <= 60 else r[:57] + "..."


class _Fields:
    """Type and range checks of a selection file's fields; each failure is one line naming file and field."""

    def __init__(self, path: Path):
        self.path = path

    def fail(self, field: str, msg: str):
        raise SelectionError(f"{self.path}: field {field!r}: {msg}")

    def get(self, mapping: dict, field: str, key: str, *, required: bool = True):
        if key not in mapping or mapping[key] is None:
            if required:
                self.fail(field, "is missing")
            return None
        return mapping[key]

    def mapping(self, v, field: str) -> dict:
        if not isinstance(v, dict):
            self.fail(field, f"{_show(v)} must be a mapping")
        return v

    def text(self, v, field: str) -> str:
        if not isinstance(v, str) or not v.strip():
            self.fail(field, f"{_show(v)} must be text")
        return v

    def boolean(self, v, field: str) -> bool:
        if not isinstance(v, bool):
            self.fail(field, f"{_show(v)} must be true or false")
        return v

    def integer(self, v, field: str, lo: int, hi: int) -> int:
        if isinstance(v, bool) or not isinstance(v, int):
            self.fail(field, f"{_show(v)} must be a whole number")
        if not lo <= v <= hi:
            self.fail(field, f"{v} must be between {lo} and {hi}")
        return v

    def number(self, v, field: str, lo: float, hi: float = math.inf) -> float:
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            self.fail(field, f"{_show(v)} must be a number")
        if not (math.isfinite(v) and lo <= v <= hi):
            self.fail(field, f"{v} must be finite and between {lo} and {hi}" if math.isfinite(hi)
                      else f"{v} must be finite and at least {lo}")
        return float(v)

    def sha256(self, v, field: str) -> str:
        if not isinstance(v, str) or not _HEX64.match(v):
            self.fail(field, f"{_show(v)} must be a SHA-256 (64 lowercase hex digits)")
        return v

    def files(self, v, field: str) -> list[dict]:
        if not isinstance(v, list):
            self.fail(field, f"{_show(v)} must be a list of {{path, sha256}} entries")
        return [self.file_entry(e, f"{field}.{i}") for i, e in enumerate(v)]

    def digest_entry(self, v, field: str) -> dict:
        self.mapping(v, field)
        self.integer(self.get(v, f"{field}.files", "files"), f"{field}.files", 1, 10**9)
        self.sha256(self.get(v, f"{field}.sha256", "sha256"), f"{field}.sha256")
        return v

    def file_entry(self, v, field: str) -> dict:
        self.mapping(v, field)
        self.text(self.get(v, f"{field}.path", "path"), f"{field}.path")
        self.sha256(self.get(v, f"{field}.sha256", "sha256"), f"{field}.sha256")
        return v


def _validate_merge(c, merge) -> None:
    m = c.mapping(merge, "merge")
    method = c.get(m, "merge.method", "method")
    if method not in MERGE_METHODS:
        c.fail("merge.method", f"{_show(method)} is not one of {', '.join(MERGE_METHODS)}")
    sc = c.get(m, "merge.storage_change", "storage_change")
    if sc not in METHODS:
        c.fail("merge.storage_change", f"{_show(sc)} is not one of {', '.join(METHODS)}")
    c.boolean(c.get(m, "merge.window_matched", "window_matched"), "merge.window_matched")
    c.number(c.get(m, "merge.min_valid_fraction", "min_valid_fraction"), "merge.min_valid_fraction", 0.0, 1.0)
    c.number(c.get(m, "merge.q_relative_error", "q_relative_error"), "merge.q_relative_error", 0.0)
    products = c.mapping(c.get(m, "merge.products", "products"), "merge.products")
    for comp in SOURCE_COMPONENTS:
        ids = c.get(products, f"merge.products.{comp}", comp)
        if not isinstance(ids, list) or not ids:
            c.fail(f"merge.products.{comp}", f"{_show(ids)} must be a list of product ids")
        for i, sid in enumerate(ids):
            c.text(sid, f"merge.products.{comp}.{i}")


def _validate(doc: dict, p: Path) -> Selection:
    """Every field of a selection document checked for type and range; returns its `Selection`."""
    c = _Fields(p)
    for key in _REQUIRED:
        if key not in doc or doc[key] in (None, ""):
            raise SelectionError(f"{p}: required field {key!r} is missing")
    version = doc["wbexplore_selection"]
    if isinstance(version, bool) or version != SELECTION_VERSION:
        c.fail("wbexplore_selection", f"version {_show(version)} is not supported "
                                      f"(this wbexplore reads {SELECTION_VERSION})")
    cat = c.mapping(doc["catalog"], "catalog")
    c.text(c.get(cat, "catalog.path", "path"), "catalog.path")
    c.sha256(c.get(cat, "catalog.sha256", "sha256"), "catalog.sha256")
    basin = c.mapping(doc["basin"], "basin")
    basin_id = c.text(c.get(basin, "basin.id", "id"), "basin.id")
    period = c.mapping(doc["period"], "period")
    months = {}
    for key in ("start", "end"):
        v = c.get(period, f"period.{key}", key)
        if not isinstance(v, str) or not _MONTH.match(v):
            c.fail(f"period.{key}", f"{_show(v)} is not a month written YYYY-MM")
        months[key] = v
    if months["start"] > months["end"]:
        c.fail("period", f"start {months['start']} is after end {months['end']}")
    sources = c.mapping(doc["sources"], "sources")
    ids = {}
    for comp in SOURCE_COMPONENTS:
        entry = c.mapping(c.get(sources, f"sources.{comp}", comp), f"sources.{comp}")
        ids[comp] = c.text(c.get(entry, f"sources.{comp}.id", "id"), f"sources.{comp}.id")
        c.files(entry.get("files", []), f"sources.{comp}.files")
    merge = doc.get("merge")
    if merge is not None:
        _validate_merge(c, merge)
    for comp, sid in ids.items():
        if is_merged(sid):
            if sid != merged_name(comp):
                c.fail(f"sources.{comp}.id", f"{_show(sid)}: the merged {comp} source is {merged_name(comp)!r}")
            if merge is None:
                c.fail(f"sources.{comp}.id", f"{_show(sid)} is a merged source, but the file has no 'merge' block")
    inputs = c.mapping({} if doc.get("inputs") is None else doc["inputs"], "inputs")
    for key, entry in inputs.items():
        c.file_entry(entry, f"inputs.{key}")
    spread = c.mapping({} if doc.get("uncertainty_sources") is None else doc["uncertainty_sources"],
                       "uncertainty_sources")
    for sid, files in spread.items():
        c.files(files, f"uncertainty_sources.{sid}")
    prov = doc.get("provenance")
    if prov is not None:
        c.mapping(prov, "provenance")
        for part, entries in prov.items():
            if part not in _PROVENANCE_PARTS:
                c.fail(f"provenance.{part}", f"is not one of {', '.join(_PROVENANCE_PARTS)}")
            for name, entry in c.mapping(entries, f"provenance.{part}").items():
                c.digest_entry(entry, f"provenance.{part}.{name}")
    sc = c.mapping(doc["storage_change"], "storage_change")
    method = c.get(sc, "storage_change.method", "method")
    if method not in METHODS:
        c.fail("storage_change.method", f"{_show(method)} is not one of {', '.join(METHODS)}")
    matched = c.boolean(sc.get("window_matched", True), "storage_change.window_matched")
    fill = c.boolean(sc.get("fill_gaps", False), "storage_change.fill_gaps")
    lag = c.integer(doc.get("discharge_lag_months", 0), "discharge_lag_months", 0, MAX_LAG_MONTHS)
    mvf = c.number(doc.get("min_valid_fraction", 0.5), "min_valid_fraction", 0.0, 1.0)
    wy = c.integer(doc.get("water_year_start_month", 1), "water_year_start_month", 1, 12)
    c.number(doc.get("q_relative_error", Q_RELATIVE_ERROR), "q_relative_error", 0.0)
    if doc.get("uncertainty_source") is not None:
        for comp, how in c.mapping(doc["uncertainty_source"], "uncertainty_source").items():
            if how not in (*_UNCERTAINTY_SOURCES, "gauge"):
                c.fail(f"uncertainty_source.{comp}", f"{_show(how)} is not one of "
                                                     f"{', '.join((*_UNCERTAINTY_SOURCES, 'gauge'))}")
    if doc.get("unit", "whole") not in UNITS:
        c.fail("unit", f"{_show(doc.get('unit'))} is not one of {', '.join(UNITS)}")
    unit_system = doc.get("unit_system", "mm")
    if unit_system not in UNIT_SYSTEMS:
        c.fail("unit_system", f"{_show(unit_system)} is not one of {', '.join(UNIT_SYSTEMS)}")
    flows = doc.get("flows")
    if flows is not None:
        if not isinstance(flows, list):
            c.fail("flows", f"{_show(flows)} must be a list of {{id, direction, label, file}} entries")
        for i, f in enumerate(flows):
            c.mapping(f, f"flows.{i}")
            c.text(c.get(f, f"flows.{i}.id", "id"), f"flows.{i}.id")
            if f.get("direction") not in ("in", "out"):
                c.fail(f"flows.{i}.direction", f"{_show(f.get('direction'))} is not 'in' or 'out'")
            if f.get("file") is not None:
                c.file_entry(f["file"], f"flows.{i}.file")
    metrics = c.mapping(doc["metrics"], "metrics")
    for name, v in metrics.items():
        # null is how a metric that could not be computed (NaN) is written; .inf and -.inf stay numbers
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
            c.fail(f"metrics.{name}", f"{_show(v)} must be a number or null")
    # the same ClosureOptions the library and the command line use (fields already checked one by one above)
    area = doc.get("area", "outline")
    if area not in AREAS:
        c.fail("area", f"{_show(area)} is not one of {', '.join(AREAS)}")
    if doc.get("unit", "whole") == "waterbody" and ids[DS.component] != LEVELS:
        c.fail(f"sources.{DS.component}.id", f"{_show(ids[DS.component])}: a water body's storage is {LEVELS!r}")
    opts = ClosureOptions(start=months["start"], end=months["end"], storage_change=method, matched=matched,
                          fill_gaps=fill, lag=lag, min_valid_fraction=mvf, water_year_start=wy, area=area)
    return Selection.from_options(basin_id, opts, **ids)


def load_selection(path) -> tuple[dict, Selection, Path]:
    """Read and validate a selection file; returns (document, Selection, catalog path).

    The YAML is read strictly (`io.yamlsafe.load_yaml`) and every field is type- and range-checked;
    a bad one raises `SelectionError` naming the file and the field (dotted, e.g. ``period.start``).
    """
    p = Path(path)
    if not p.is_file():
        raise SelectionError(f"{p}: selection file not found")
    try:
        text = p.read_bytes()
    except OSError as exc:
        raise SelectionError(f"{p}: cannot be read ({exc.strerror or exc.__class__.__name__})") from None
    doc = load_yaml(text, source=p, error=SelectionError)
    if not isinstance(doc, dict):
        raise SelectionError(f"{p}: expected a mapping")
    sel = _validate(doc, p)
    cat_path = (p.resolve().parent / doc["catalog"]["path"]).resolve()
    return doc, sel, cat_path


def _nonfinite(v) -> bool:
    return v is None or not math.isfinite(float(v))


def _close(a, b) -> bool:
    """Recorded and recomputed metric agree: to 1e-9 relative, or both the same non-finite value.

    NaN is written as null; +inf and -inf are kept apart (a metric that went from +inf to -inf changed).
    """
    if _nonfinite(a) or _nonfinite(b):
        a = None if a is None or math.isnan(float(a)) else float(a)
        b = None if b is None or math.isnan(float(b)) else float(b)
        return a == b
    return abs(float(a) - float(b)) <= 1e-9 * max(1.0, abs(float(a)))


def replay(path, *, cache_dir=None) -> dict:
    """Recompute a selection file.

    Only files the catalog itself names are opened and hashed: the expected files come from the
    catalog. A file in the spelling before compact provenance (one ``{path, sha256}`` per file) is
    checked file by file, and a recorded path that is not one of the catalog's files is reported as a
    difference, never read; a compact entry (`files_digest`) is compared with the digest of the
    catalog's files of that product now. A directory is hashed only when the catalog names it as a
    zarr store. Of the other products, only those the uncertainty uses
    (`balance.uncertainty.error_inputs`) are checked: a changed product that nothing used is no difference.

    Raises `SelectionError` (exit 2) for a malformed file, a missing file or an unknown id;
    `ReplayMismatch` (exit 1) with a table when a file's hash or any metric differs.
    """
    doc, sel, cat_path = load_selection(path)
    if not cat_path.is_file():
        raise SelectionError(f"{path}: field 'catalog.path': catalog {doc['catalog']['path']!r} not found (moved?)")
    cat = open_catalog(cat_path)
    rows = []
    if cat.sha256 != doc["catalog"]["sha256"]:
        rows.append(("catalog", doc["catalog"]["path"], "sha256 changed"))
    known = {s.id: s for s in cat.sources}
    unit = doc.get("unit", "whole")
    waterbody = unit == "waterbody"
    merge = doc.get("merge")
    for comp in SOURCE_COMPONENTS:
        sid = getattr(sel, comp)
        if is_merged(sid):
            continue  # built again from the products recorded in `merge` (checked below)
        if waterbody and _own_paths(cat, sid) is not None:
            continue  # the storage from levels, the pan: checked below against the catalog's water-body files
        if sid not in known:
            raise SelectionError(f"{path}: field 'sources.{comp}.id': source {sid!r} is not in the catalog "
                                 f"{doc['catalog']['path']!r}")
    base = cat.path.parent
    prov = doc.get("provenance")

    def opened(fp: Path, label: str, key: str, *, store_ok: bool, shown: str) -> bool:
        if fp.is_file() or (store_ok and fp.is_dir()):
            return True
        if not fp.exists():
            raise SelectionError(f"{path}: {label} file {key!r} is missing")
        rows.append((label, shown, "not a regular file (not opened)"))
        return False

    def check(entries, expected_paths, label, *, store_ok=False):
        # recorded paths are compared as text with the catalog's own files: nothing else is touched
        expected = {os.path.normpath(_rel(Path(q), base)): Path(q) for q in expected_paths}
        recorded = set()
        for f in entries:
            key = os.path.normpath(f["path"])
            if key not in expected:
                rows.append((label, f["path"], "not a file of the catalog (not opened)"))
                continue
            recorded.add(key)
            if not opened(expected[key], label, key, store_ok=store_ok, shown=f["path"]):
                continue
            if file_sha256(expected[key]) != f["sha256"]:
                rows.append((label, f["path"], "sha256 changed"))
        for key in sorted(expected.keys() - recorded):
            rows.append((label, key, "a file of the catalog that was not recorded"))

    def check_digest(entry, paths, label, *, store_ok=False):
        # the catalog's files of the product now, against the recorded digest over its files
        shown = f"{entry['files']} file(s)"
        ok = True
        for q in paths:  # every file that cannot be opened is a row (or, missing, refused)
            ok = opened(Path(q), label, _rel(Path(q), base), store_ok=store_ok, shown=shown) and ok
        if not ok:
            return
        now = files_digest(paths, base)
        if now["sha256"] != entry["sha256"]:  # which file is not known: name the files where they are few
            names = sorted(_manifest_path(q, base) for q in paths)
            rows.append((label, shown, "sha256 changed (" + (", ".join(names) if len(names) <= 3
                                                             else f"{len(names)} files now") + ")"))

    def is_store(sid):
        return sid in known and known[sid].format == "zarr"

    def product_paths(sid):
        return _product_paths(cat, sid, unit)

    # the chosen products
    for comp in SOURCE_COMPONENTS:
        sid = getattr(sel, comp)
        label = f"source {sid}"
        if is_merged(sid):
            continue
        if prov is None:
            check(doc["sources"][comp].get("files") or [], product_paths(sid), label, store_ok=is_store(sid))
        elif sid not in prov.get("sources", {}):
            rows.append((label, "(not recorded)", "its files were not recorded"))
        else:
            check_digest(prov["sources"][sid], product_paths(sid), label, store_ok=is_store(sid))
    # the basins and discharge files
    catalog_inputs = {"basins": cat.basins.path}
    if cat.discharge:
        catalog_inputs["discharge"] = cat.discharge.path
    recorded_inputs = (doc.get("inputs") or {}) if prov is None else prov.get("inputs", {})
    for key, entry in recorded_inputs.items():
        if key not in catalog_inputs:
            rows.append((key, entry.get("path", f"{entry.get('files')} file(s)"),
                         "not an input of the catalog (not opened)"))
        elif prov is None:
            check([entry], [catalog_inputs[key]], key)
        else:
            check_digest(entry, [catalog_inputs[key]], key)
    ds = _extract_for(cat, sel, cache_dir, incremental=unit == "incremental", waterbody=waterbody)
    if merge is not None:  # the merged sources, built again from the catalog's products now
        from .balance.uncertainty import component_products

        merged_from = {} if prov is None else prov.get("merged_from", {})
        chosen = {getattr(sel, c) for c in SOURCE_COMPONENTS}
        now_all = set()
        for comp in SOURCE_COMPONENTS:
            rec, now = list(merge["products"][comp]), list(component_products(ds, comp))
            now_all.update(now)
            if rec != now:
                rows.append((f"merge {comp} products", ", ".join(rec), ", ".join(now)))
        for sid in sorted(now_all - chosen):
            label = f"source {sid} (merged)"
            if sid not in merged_from:
                rows.append((label, "(not recorded)", "the merge uses it now"))
            else:
                check_digest(merged_from[sid], product_paths(sid), label, store_ok=is_store(sid))
        opts = ClosureOptions(storage_change=merge["storage_change"], matched=bool(merge["window_matched"]),
                              min_valid_fraction=float(merge["min_valid_fraction"]))
        try:
            ds, _ = with_merge(ds, sel, method=merge["method"], options=opts,
                               q_relative_error=float(merge["q_relative_error"]))
        except InputError as exc:
            rows.append((f"merge ({merge['method']})", "built", f"cannot be built now: {exc}"))
            _raise_mismatch(path, rows)
    # a file written before issue 16 has no uncertainty_source: its n_beyond_2sigma came from the product spread
    res = compute_selection(ds, sel, q_relative_error=float(doc.get("q_relative_error", Q_RELATIVE_ERROR)),
                            uncertainty="auto" if doc.get("uncertainty_source") is not None else "spread")
    # the other products: those the uncertainty uses now, each as recorded (a file before compact provenance
    # recorded every product of the catalog; the ones nothing uses are not compared)
    recorded_unc = (doc.get("uncertainty_sources") or {}) if prov is None else prov.get("uncertainty_sources", {})
    for sid in sorted(recorded_unc):
        if sid not in known and not (waterbody and _own_paths(cat, sid) is not None):
            rows.append((f"source {sid}", "(uncertainty)", "no longer in the catalog"))
    for sid in _uncertainty_products(cat, sel, res, ds, unit):
        label = f"source {sid} (uncertainty)"
        if sid not in recorded_unc:
            rows.append((label, "(not recorded)", "the uncertainty uses it now"))
        elif prov is None:
            check(recorded_unc[sid], product_paths(sid), label, store_ok=is_store(sid))
        else:
            check_digest(recorded_unc[sid], product_paths(sid), label, store_ok=is_store(sid))
    # the balance's flows: the same ones, each from the same file
    recorded_flows = {str(f["id"]): f for f in doc.get("flows") or []}
    flow_digests = {} if prov is None else prov.get("flows", {})
    now_flows = {f["id"]: f for f in _flow_entries(cat, res)}
    for fid in sorted(recorded_flows.keys() | now_flows.keys()):
        old, cur = recorded_flows.get(fid), now_flows.get(fid)
        if cur is None:
            rows.append((f"flow {fid}", old["direction"], "no longer in the balance"))
        elif old is None:
            rows.append((f"flow {fid}", "(not recorded)", f"now in the balance ({cur['direction']})"))
        elif old["direction"] != cur["direction"]:
            rows.append((f"flow {fid}", old["direction"], cur["direction"]))
        elif _flow_path(cat, fid) is None:
            continue
        elif old.get("file"):
            check([old["file"]], [_flow_path(cat, fid)], f"flow {fid}")
        elif prov is not None and fid not in flow_digests:
            rows.append((f"flow {fid}", "(not recorded)", "its station table was not recorded"))
        elif fid in flow_digests:
            check_digest(flow_digests[fid], [_flow_path(cat, fid)], f"flow {fid}")
    new = _clean_metrics(res.metrics)
    n = 0
    for k, old in doc["metrics"].items():
        n += 1
        if k not in new:
            rows.append((f"metric {k}", repr(old), "not computed"))
        elif not _close(old, new[k]):
            rows.append((f"metric {k}", repr(old), repr(new[k])))
    if rows:
        _raise_mismatch(path, rows)
    return {"n_metrics": n, "metrics": new}


def _raise_mismatch(path, rows) -> None:
    """`ReplayMismatch` with the table of differences (what, recorded, now)."""
    w = [max(len(str(r[i])) for r in rows + [("what", "recorded", "now")]) for i in range(3)]
    lines = [f"{'what'.ljust(w[0])}  {'recorded'.ljust(w[1])}  now"]
    lines += [f"{str(a).ljust(w[0])}  {str(b).ljust(w[1])}  {c}" for a, b, c in rows]
    first = rows[0]
    raise ReplayMismatch(f"{path}: {len(rows)} difference(s), first: {first[0]} ({first[2]})", "\n".join(lines))


# --------------------------------------------------------------------------- series export
_CSV_COLS = [*(t.name for t in BASE_TERMS), "residual", "TWSA", *(f"sigma_{t.name}" for t in BASE_TERMS),
             "sigma_residual", "beyond_2sigma", *(f"valid_fraction_{c}" for c in SOURCE_COMPONENTS)]


def _flow_cols(result) -> list[str]:
    """Columns of the balance's flows: each flow (window-matched as the residual uses it), its sigma, the net."""
    names = [t.name for t in flow_terms_of(result.terms)]
    return [c for n in names for c in (n, f"sigma_{n}")] + (["net_flow"] if names else [])


def _series_frame(result, unit_system):
    f = to_unit_system(result.frame, result.area_km2, unit_system)[_CSV_COLS + _flow_cols(result)].copy()
    f.index = pd.Index([f"{m:%Y-%m}" for m in f.index], name="month")
    return f


def write_series_csv(result, path, *, unit_system: str = "mm", overwrite: bool = False, protect=None) -> Path:
    """One row per month: P, ET, Q, dS, residual (+ TWSA), their uncertainties and valid fractions.

    Units: "mm" (mm/month; TWSA mm), "m3" (m3 per month), "m3/s" (mean flow over the month), "hm3" (hm3 per
    month), named in
    the header comment lines. Read back with ``pandas.read_csv(path, comment="#", index_col="month")``.
    ``protect``: the catalog (or list of paths) whose inputs must never be replaced (`io.writers.check_output`).
    """
    f = _series_frame(result, unit_system)
    unit = {"mm": "mm/month (TWSA: mm)", "m3": "m3 per month (TWSA: m3)", "m3/s": "m3/s mean over the month (TWSA: m3)",
            "hm3": "hm3 per month (TWSA: hm3)"}
    sel = result.selection
    head = (f"# wbexplore series: basin {sel.basin}, P={sel.P} ET={sel.ET} TWSA={sel.TWSA}, "
            + (result.storage_note or f"storage change {sel.storage_change}{' window-matched' if sel.matched else ''}")
            + "\n"
            f"# uncertainty_source: {result.uncertainty_line}\n"
            f"# units: {unit[unit_system]}; valid fractions 0..1\n# {CAUTION}\n")
    with atomic_path(path, overwrite=overwrite, protect=protect) as tmp:
        with open(tmp, "w") as fh:
            fh.write(head)
            f.to_csv(fh, float_format="%.17g")
    return Path(path)


_SIGMA_COMPONENT = {"P": "P", "ET": "ET", "dS": "TWSA", "Q": None, "residual": None}


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
        how = result.uncertainty[_SIGMA_COMPONENT[comp]].method if _SIGMA_COMPONENT.get(comp) in result.uncertainty \
            else "gauge" if comp == "Q" else "propagated from the terms"
        ds[name].attrs = {"long_name": f"standard error of {comp}", "units": "mm", "uncertainty_source": how}
        ds[comp].attrs["ancillary_variables"] = (ds[comp].attrs.get("ancillary_variables", "") + " " + name).strip()
    for t in flow_terms_of(result.terms):
        ds[t.name] = ("time", f[t.name].to_numpy(dtype=float))
        ds[t.name].attrs = {"long_name": f"{t.label} ({'inflow' if t.sign > 0 else 'outflow'}) as depth over the basin",
                            "units": "mm", "cell_methods": "time: sum area: mean",
                            "ancillary_variables": f"sigma_{t.name}"}
        ds[f"sigma_{t.name}"] = ("time", f[f"sigma_{t.name}"].to_numpy(dtype=float))
        ds[f"sigma_{t.name}"].attrs = {"long_name": f"standard error of {t.name}", "units": "mm"}
    if "net_flow" in f:
        ds["net_flow"] = ("time", f["net_flow"].to_numpy(dtype=float))
        ds["net_flow"].attrs = {"long_name": "inflows minus outflows as depth over the basin", "units": "mm",
                                "cell_methods": "time: sum area: mean"}
        ds["residual"].attrs["long_name"] = f"water-balance residual {balance_text(result.terms)}"
    for comp in SOURCE_COMPONENTS:
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
        "source": f"P={sel.P}, ET={sel.ET}, TWSA={sel.TWSA}; "
                  + (result.storage_note or f"storage change {sel.storage_change}"
                     f"{' (window-matched)' if sel.matched else ''}"),
        "history": f"{_dt.datetime.now(_dt.timezone.utc):%Y-%m-%dT%H:%M:%SZ} wbexplore {__version__}",
        "basin_id": str(sel.basin), "basin_area_km2": float(result.area_km2),
        "uncertainty_source": json.dumps({**result.uncertainty_source, "Q": "gauge"}, sort_keys=True),
        "uncertainty_notes": result.uncertainty_line,
        "comment": CAUTION,
    }
    if doc:
        ds.attrs["catalog_sha256"] = doc["catalog"]["sha256"]
        if doc.get("merge"):  # a merged source: its variant and products, as the selection file records them
            ds.attrs["merge_method"] = doc["merge"]["method"]
            ds.attrs["merge"] = json.dumps(doc["merge"], sort_keys=True)
    ds = ds.assign_coords(basin=((), str(sel.basin), {"long_name": "basin identifier"}))
    for v in ds.variables:
        ds[v].encoding = {}
    return cf_ready(ds, time_step=None)  # the bounds are the month's, built above


def series_positions(cat, basin: str, *, incremental: bool = False):
    """A point inside ``basin`` (or its incremental unit): the position of its series in CF files (lat, lon
    in degrees, by basin id; `wbexplore.io.basins.representative_points`); None for a unit that is not among
    the catalog's basin outlines (a water body: its file is written without one). Used by every one-basin
    netCDF output (the series export, the estimate by difference)."""
    from .cache import load_basins, load_incremental_basins
    from .io.basins import representative_points

    units = load_incremental_basins(cat) if incremental else load_basins(cat)
    return representative_points(units.loc[[basin]]) if basin in units.index else None


def write_series_netcdf(result, path, *, doc: dict | None = None, overwrite: bool = False, protect=None,
                        positions=None) -> Path:
    """Write `series_dataset` as CF netCDF-4 (`wbexplore.io.writers.write_netcdf`); ``protect`` as for
    `write_series_csv`; ``positions`` (a point inside the basin: lat, lon by basin id) as for `cf_ready`."""
    return write_netcdf(series_dataset(result, doc=doc), path, overwrite=overwrite, protect=protect,
                        positions=positions)
