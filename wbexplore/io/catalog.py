"""The catalog (YAML, versions 1 and 2): the one module that knows its schema.

A catalog names the basins, the gauged discharge and every gridded product an
analyst wants to compare. It is validated completely, before any data is read:
unknown keys (typos), missing required fields, duplicate ids, unknown
components, paths that match no file, units of the wrong dimension and a
``catalog_version`` other than 1 or 2 are each refused with one line naming the
catalog file, the source id and the field.
"""

from __future__ import annotations

import difflib
import glob as _glob
import hashlib
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import CatalogError, UnitError
from ..units import parse_discharge_unit, parse_flux_unit, parse_level_unit, parse_storage_unit
from .yamlsafe import load_yaml

__all__ = [
    "COMPONENTS",
    "Catalog",
    "SourceSpec",
    "BasinSpec",
    "DischargeSpec",
    "StationTableSpec",
    "FlowSpec",
    "DIRECTIONS",
    "WaterbodySpec",
    "StorageCurveSpec",
    "open_catalog",
    "file_sha256",
]

COMPONENTS = ("P", "ET", "TWSA")
RESERVED_IDS = {"discharge", "Q", "basin", "time"}

_TOP_KEYS = {"catalog_version": True, "title": False, "description": False, "basins": True,
             "discharge": False, "sources": True, "flows": False,
             "waterbodies": False}
_BASIN_KEYS = {"path": True, "id_field": True, "name_field": False, "crs": False, "layer": False,
               "downstream_field": False}
# Station tables (version 2 additions, accepted in both versions; DESIGN.md "Station tables").
# `basin_field` is version 1's spelling of `station_field`; one of the two is required for a long table.
_DISCHARGE_KEYS = {"path": True, "time_field": True, "station_field": False, "basin_field": False,
                   "value_field": False, "units": True, "layout": False, "separator": False,
                   "decimal": False, "missing_values": False, "date_format": False, "sheet": False,
                   "stations": False, "min_coverage": False}
# a flow (DESIGN.md "More balance terms"): the station-table fields (without `stations`: the flow names its
# one station) plus its id, the basin whose balance it enters, its direction, station and label
_FLOW_KEYS = {**{k: v for k, v in _DISCHARGE_KEYS.items() if k != "stations"},
              "id": True, "basin": True, "direction": True, "station": True, "label": False}
DIRECTIONS = ("in", "out")
LAYOUTS = ("long", "wide")
# files GDAL reads beside a GeoTIFF (nodata, scale, masks, overviews): inputs too (writers, caches)
GEOTIFF_SIDECARS = (".aux.xml", ".ovr", ".msk")
EXCEL_SUFFIXES = (".xlsx", ".xlsm")
SUPPORTED_VERSIONS = (1, 2)
# Extensions to version 1 (optional): description, date_format, time_start, time_step,
# relative_error, absolute_error_mm.
_SOURCE_KEYS = {"id": True, "component": True, "path": True, "variable": False, "units": False,
                "crs": False, "label": False, "description": False, "date_format": False,
                "time_start": False, "time_step": False, "relative_error": False,
                "absolute_error_mm": False,
                # version 2 (accepted in version 1 too): time steps, masks, packing, duplicates
                "valid_range": False, "nodata": False, "scale_factor": False, "add_offset": False,
                "duplicates": False}
TIME_STEPS = ("day", "pentad", "dekad", "8-day", "16-day", "month")
DUPLICATES = ("refuse", "mean", "first", "last")


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file, or of every file of a directory store (zarr) in sorted order."""
    h = hashlib.sha256()
    p = Path(path)
    files = [p] if p.is_file() else sorted(q for q in p.rglob("*") if q.is_file())
    for f in files:
        if p.is_dir():
            h.update(str(f.relative_to(p)).encode())
        with open(f, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
    return h.hexdigest()


@dataclass(frozen=True)
class BasinSpec:
    path: Path
    id_field: str
    name_field: str | None = None
    crs: str | None = None
    layer: str | None = None
    downstream_field: str | None = None  # column: id of the basin each basin drains into (nesting)


@dataclass(frozen=True)
class StationTableSpec:
    """A gauge table as the agency exports it (discharge now; flows and levels use the same fields).

    ``stations`` maps station id -> basin id (both text); None: station ids are basin ids.
    ``min_coverage``: share (0..1) of a month's days a daily station needs for the month to count.
    """

    path: Path
    time_field: str
    units: str
    layout: str = "long"
    station_field: str | None = None
    value_field: str | None = None
    separator: str | None = None
    decimal: str = "."
    missing_values: tuple[str, ...] = ()
    date_format: str | None = None
    sheet: str | None = None
    stations: tuple[tuple[str, str], ...] | None = None
    min_coverage: float = 1.0

    @property
    def basin_field(self) -> str | None:
        """Version 1's name of `station_field`."""
        return self.station_field

    @property
    def is_excel(self) -> bool:
        return self.path.suffix.lower() in EXCEL_SUFFIXES

    @property
    def station_map(self) -> dict[str, str] | None:
        return None if self.stations is None else dict(self.stations)


DischargeSpec = StationTableSpec  # the discharge table is a station table


# ---- waterbodies (issue 15: lake and reservoir balances) -------------------------------------------
# DESIGN.md "More balance terms (flows), nested basins, waterbodies". Parsed by `_waterbodies` (below,
# in the same delimited block at the end of this module); read by `wbexplore.io.waterbodies`.

@dataclass(frozen=True)
class StorageCurveSpec:
    """A storage curve table: one row per water body and level, with the area and volume at that level.

    ``level_units`` (optional in the catalog): the unit of ``level_field``; default the level series' units.
    """

    path: Path
    id_field: str
    level_field: str
    area_field: str
    volume_field: str
    area_units: str
    volume_units: str
    level_units: str


@dataclass(frozen=True)
class WaterbodySpec:
    """Lakes and reservoirs: outlines, a level series per water body and their storage curves.

    ``level.stations`` maps station id -> water-body id (None: station ids are water-body ids).
    ``evaporation_source``: an ET product id (None: the ET products, over the water surface).
    ``pan``: an evaporation-pan station table (a depth per period; station ids are water-body ids unless
    ``stations`` maps them), giving the ET source "pan" = pan x ``pan_coefficient`` (catalog field
    ``coefficient``; 0.7 by default, common practice).
    """

    path: Path
    id_field: str
    level: StationTableSpec
    storage_curve: StorageCurveSpec
    name_field: str | None = None
    crs: str | None = None
    layer: str | None = None
    evaporation_source: str | None = None
    pan: StationTableSpec | None = None
    pan_coefficient: float = 0.7

    @property
    def outlines(self) -> BasinSpec:
        """The outline file described as a basin file (read by the same rules)."""
        return BasinSpec(path=self.path, id_field=self.id_field, name_field=self.name_field, crs=self.crs,
                         layer=self.layer)

    def input_paths(self) -> tuple[Path, ...]:
        out = [self.path, self.level.path, self.storage_curve.path]
        if self.pan is not None:
            out.append(self.pan.path)
        if self.path.suffix.lower() == ".shp":
            out += sorted(q for q in self.path.parent.glob(_glob.escape(self.path.stem) + ".*") if q != self.path)
        return tuple(out)
# ---- end waterbodies -------------------------------------------------------------------------------


@dataclass(frozen=True)
class FlowSpec:
    """One more balance term measured at a gauge (an inflow, an abstraction, a transfer).

    ``table`` is read like the discharge table; ``station`` is its column (wide) or station id (long);
    ``basin`` is the basin whose balance the flow enters, ``direction`` "in" or "out".
    """

    id: str
    basin: str
    direction: str
    station: str
    table: StationTableSpec
    label: str | None = None

    @property
    def display(self) -> str:
        return self.label or self.id

    @property
    def var(self) -> str:
        """Its variable in the canonical series."""
        return f"flow_{self.id}"


@dataclass(frozen=True)
class SourceSpec:
    """One gridded product as the catalog describes it."""

    id: str
    component: str
    path_pattern: str
    paths: tuple[Path, ...]
    variable: str | None = None
    units: str | None = None
    crs: str | None = None
    label: str | None = None
    description: str | None = None
    date_format: str | None = None
    time_start: str | None = None
    time_step: str | None = None  # None: inferred from the stamps (day or month where unambiguous)
    relative_error: float | None = None
    absolute_error_mm: float | None = None
    valid_range: tuple[float, float] | None = None  # stored values outside (inclusive) are no data
    nodata: tuple[float, ...] = ()  # further stored values meaning no data
    scale_factor: float | None = None  # packing declared in the catalog wins over the file's own
    add_offset: float | None = None
    duplicates: str = "refuse"  # two time steps in one month: refuse | mean | first | last

    @property
    def declares_packing(self) -> bool:
        """Whether the catalog states a mask or packing the file's own decoding would not apply."""
        return bool(self.valid_range is not None or self.nodata or self.scale_factor is not None
                    or self.add_offset is not None)

    @property
    def display(self) -> str:
        return self.label or self.id

    @property
    def format(self) -> str:
        p = self.paths[0]
        suffix = p.suffix.lower()
        if suffix in (".tif", ".tiff"):
            return "geotiff"
        if suffix == ".zarr" or (p.is_dir() and (p / ".zgroup").exists() or (p / "zarr.json").exists()):
            return "zarr"
        return "netcdf"


@dataclass(frozen=True)
class Catalog:
    path: Path
    title: str
    basins: BasinSpec
    discharge: DischargeSpec | None
    sources: tuple[SourceSpec, ...]
    description: str = ""
    sha256: str = ""
    raw: dict = field(default_factory=dict, repr=False, compare=False)
    flows: tuple[FlowSpec, ...] = ()

    def flow(self, flow_id: str) -> FlowSpec:
        for f in self.flows:
            if f.id == flow_id:
                return f
        known = ", ".join(f.id for f in self.flows) or "none"
        raise CatalogError(f"{self.path}: no flow {flow_id!r} (known: {known})")
    waterbodies: WaterbodySpec | None = None

    def source(self, source_id: str) -> SourceSpec:
        for s in self.sources:
            if s.id == source_id:
                return s
        known = ", ".join(s.id for s in self.sources)
        raise CatalogError(f"{self.path}: no source {source_id!r} (known: {known})")

    def by_component(self, component: str) -> list[SourceSpec]:
        return [s for s in self.sources if s.component == component]

    def input_paths(self) -> tuple[Path, ...]:
        """Every file or store the catalog reads: itself, the basins file (with a shapefile's sidecars,
        which hold its attributes and CRS), the discharge table and every product file or zarr store.

        Writers refuse to replace any of these (`io.writers.check_output`).
        """
        out = [self.path, self.basins.path]
        b = self.basins.path
        if b.suffix.lower() == ".shp":
            out += sorted(q for q in b.parent.glob(_glob.escape(b.stem) + ".*") if q != b)
        if self.discharge is not None:
            out.append(self.discharge.path)
        for f in self.flows:
            out.append(f.table.path)
        if self.waterbodies is not None:
            out.extend(self.waterbodies.input_paths())
        for s in self.sources:
            out.extend(s.paths)
        return tuple(dict.fromkeys(out))

    def input_globs(self) -> tuple[str, ...]:
        """Absolute glob patterns of files that do not exist yet but would change what the catalog reads.

        A new file matching a product's glob joins the product; a new sidecar is read with the file beside
        it: any ``<stem>.*`` of a shapefile (attributes, CRS, encoding) and the ``.aux.xml``, ``.ovr`` and
        ``.msk`` files the GeoTIFF reader picks up (nodata, scale, masks).
        """
        base = self.path.parent
        pats = []
        shapes = [self.basins.path] + ([self.waterbodies.path] if self.waterbodies is not None else [])
        for b in shapes:
            if b.suffix.lower() == ".shp":
                pats.append(_glob.escape(str(b.with_suffix(""))) + ".*")
        for s in self.sources:
            full = s.path_pattern if os.path.isabs(s.path_pattern) else str(base / s.path_pattern)
            magic = _glob.has_magic(s.path_pattern)
            if magic:
                pats.append(full)
            if s.format == "geotiff":
                stem = full if magic else _glob.escape(full)
                pats += [stem + ext for ext in GEOTIFF_SIDECARS]
        return tuple(dict.fromkeys(pats))


def _fail(cat: Path, where: str, msg: str) -> None:
    raise CatalogError(f"{cat}: {where}{msg}")


def _check_keys(cat: Path, where: str, data: Any, schema: dict[str, bool]) -> None:
    if not isinstance(data, dict):
        _fail(cat, where, f"expected a mapping, got {type(data).__name__}")
    for key in data:
        if key not in schema:
            close = difflib.get_close_matches(str(key), list(schema), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            _fail(cat, where, f"field {key!r} is not a known field{hint}")
    for key, required in schema.items():
        if required and (key not in data or data[key] in (None, "")):
            _fail(cat, where, f"required field {key!r} is missing")


def _str(cat: Path, where: str, data: dict, key: str, default=None) -> str | None:
    val = data.get(key, default)
    if val is None:
        return None
    if not isinstance(val, (str, int, float)) or isinstance(val, bool):
        _fail(cat, where, f"field {key!r} must be text, got {val!r}")
    return str(val)


def _resolve(cat: Path, where: str, key: str, pattern: str, *, allow_glob: bool) -> tuple[Path, ...]:
    base = cat.parent
    full = pattern if os.path.isabs(pattern) else str(base / pattern)
    if allow_glob and _glob.has_magic(full):
        found = tuple(sorted(Path(p) for p in _glob.glob(full)))
    else:
        found = (Path(full),) if os.path.exists(full) else ()
    if not found:
        _fail(cat, where, f"field {key!r}: path {pattern!r} matches no file")
    return found


def open_catalog(path: str | os.PathLike) -> Catalog:
    """Read and validate a catalog file (YAML, version 1 or 2).

    Parameters
    ----------
    path : str or path-like
        The catalog file. Paths inside it are relative to its folder.

    Returns
    -------
    Catalog

    Raises
    ------
    CatalogError
        With one line naming the catalog file, the source id and the field at fault.

    Examples
    --------
    >>> cat = open_catalog("demo/catalog.yaml")        # doctest: +SKIP
    >>> [s.id for s in cat.by_component("P")]          # doctest: +SKIP
    """
    cat = Path(path).resolve()
    if not cat.is_file():
        raise CatalogError(f"{path}: catalog file not found")
    try:
        text = cat.read_bytes()
    except OSError as exc:
        raise CatalogError(f"{cat}: cannot be read ({exc.strerror or exc.__class__.__name__})") from None
    data = load_yaml(text, source=cat, error=CatalogError)
    if not isinstance(data, dict):
        raise CatalogError(f"{cat}: expected a mapping at the top level")
    version = data.get("catalog_version")
    if version is None:
        _fail(cat, "", "required field 'catalog_version' is missing")
    if isinstance(version, bool) or version not in SUPPORTED_VERSIONS:
        _fail(cat, "", f"field 'catalog_version': version {version!r} is not supported (this wbexplore reads 1 and 2)")
    _check_keys(cat, "", data, _TOP_KEYS)

    b = data["basins"]
    _check_keys(cat, "basins: ", b, _BASIN_KEYS)
    basins = BasinSpec(
        path=_resolve(cat, "basins: ", "path", _str(cat, "basins: ", b, "path"), allow_glob=False)[0],
        id_field=_str(cat, "basins: ", b, "id_field"),
        name_field=_str(cat, "basins: ", b, "name_field"),
        crs=_str(cat, "basins: ", b, "crs"),
        layer=_str(cat, "basins: ", b, "layer"),
        downstream_field=_str(cat, "basins: ", b, "downstream_field"),
    )
    if basins.crs is not None:
        _check_crs(cat, "basins: ", basins.crs)

    discharge = None
    if data.get("discharge") is not None:
        discharge = _station_table(cat, "discharge: ", data["discharge"], kind="flow")

    raw_sources = data["sources"]
    if not isinstance(raw_sources, list) or not raw_sources:
        _fail(cat, "", "field 'sources' must be a non-empty list")
    sources: list[SourceSpec] = []
    seen: set[str] = set()
    for i, s in enumerate(raw_sources):
        sid = s.get("id") if isinstance(s, dict) else None
        where = f"source {sid!r}: " if sid else f"source #{i + 1}: "
        _check_keys(cat, where, s, _SOURCE_KEYS)
        sid = _str(cat, where, s, "id")
        if sid in seen:
            _fail(cat, where, f"field 'id': duplicate source id {sid!r}")
        if sid in RESERVED_IDS or not sid.replace("_", "a").replace("-", "a").isalnum():
            _fail(cat, where, f"field 'id': {sid!r} is reserved or not a simple name (letters, digits, _ and -)")
        seen.add(sid)
        comp = _str(cat, where, s, "component")
        if comp not in COMPONENTS:
            _fail(cat, where, f"field 'component': unknown component {comp!r} (one of {', '.join(COMPONENTS)})")
        pattern = _str(cat, where, s, "path")
        paths = _resolve(cat, where, "path", pattern, allow_glob=True)
        units = _str(cat, where, s, "units")
        if units is not None:
            try:
                if comp == "TWSA":
                    parse_storage_unit(units, source=sid)
                else:
                    parse_flux_unit(units, source=sid, component=comp)
            except UnitError as exc:
                _fail(cat, where, f"field 'units': {exc}")
        crs = _str(cat, where, s, "crs")
        if crs is not None:
            _check_crs(cat, where, crs)
        step = _str(cat, where, s, "time_step")
        if step is not None and step not in TIME_STEPS:
            _fail(cat, where, f"field 'time_step': {step!r} is not one of {', '.join(TIME_STEPS)}")
        mask = _mask_fields(cat, where, s)
        tstart = _str(cat, where, s, "time_start")
        if tstart is not None:
            import pandas as pd

            try:
                pd.Timestamp(tstart)
            except Exception:
                _fail(cat, where, f"field 'time_start': {tstart!r} is not a date (YYYY-MM or YYYY-MM-DD)")
        errs = {}
        for key in ("relative_error", "absolute_error_mm"):
            if s.get(key) is not None:
                val = s[key]
                if not isinstance(val, (int, float)) or isinstance(val, bool) or not 0 < val < float("inf"):
                    _fail(cat, where, f"field {key!r}: {val!r} must be a positive finite number")
                errs[key] = float(val)
        fmt_paths = paths
        date_format = _str(cat, where, s, "date_format")
        if len(fmt_paths) > 1 and Path(fmt_paths[0]).suffix.lower() in (".tif", ".tiff") and not date_format:
            _fail(cat, where, "field 'date_format' is required for a glob of GeoTIFF files (e.g. '%Y-%m')")
        if date_format is not None:
            _check_date_format(cat, where, date_format)
        sources.append(SourceSpec(
            id=sid, component=comp, path_pattern=pattern, paths=paths,
            variable=_str(cat, where, s, "variable"), units=units, crs=crs,
            label=_str(cat, where, s, "label"), description=_str(cat, where, s, "description"),
            date_format=date_format, time_start=tstart, time_step=step, **errs, **mask,
        ))
    flows = _flows(cat, data.get("flows"), seen)
    waterbodies = None
    if data.get("waterbodies") is not None:
        waterbodies = _waterbodies(cat, data["waterbodies"], sources)
    return Catalog(
        path=cat,
        title=str(data.get("title") or cat.stem),
        basins=basins,
        discharge=discharge,
        sources=tuple(sources),
        description=str(data.get("description") or ""),
        sha256=hashlib.sha256(text).hexdigest(),
        raw=data,
        flows=flows,
        waterbodies=waterbodies,
    )


def _simple_id(cat: Path, where: str, key: str, val: str) -> None:
    if val in RESERVED_IDS or not val.replace("_", "a").replace("-", "a").isalnum():
        _fail(cat, where, f"field {key!r}: {val!r} is reserved or not a simple name (letters, digits, _ and -)")


def _text(cat: Path, where: str, d: dict, key: str) -> str:
    """A required id field that must be text as written (YAML reads 0123 as the number 83)."""
    val = d.get(key)
    if not isinstance(val, str):
        _fail(cat, where, f"field {key!r}: {val!r} is not text (YAML reads 0123 as the number 83); "
                          "put the id in quotes")
    return val


def _flows(cat: Path, raw, source_ids: set[str]) -> tuple[FlowSpec, ...]:
    """The ``flows`` entries: ids unique and distinct from source ids, direction in/out, station tables.

    Whether the basin and the station exist is known only once the basin file and the table are read
    (`wbexplore.io.stations.read_flow_series`).
    """
    if raw is None:
        return ()
    if not isinstance(raw, list):
        _fail(cat, "", f"field 'flows' must be a list, got {type(raw).__name__}")
    out: list[FlowSpec] = []
    seen: set[str] = set()
    for i, f in enumerate(raw):
        fid = f.get("id") if isinstance(f, dict) else None
        where = f"flow {fid!r}: " if isinstance(fid, str) and fid else f"flow #{i + 1}: "
        _check_keys(cat, where, f, _FLOW_KEYS)
        fid = _text(cat, where, f, "id")
        _simple_id(cat, where, "id", fid)
        if fid in seen:
            _fail(cat, where, f"field 'id': duplicate flow id {fid!r}")
        if fid in source_ids:
            _fail(cat, where, f"field 'id': flow id {fid!r} is also a source id")
        seen.add(fid)
        direction = f.get("direction")
        if direction not in DIRECTIONS:
            _fail(cat, where, f"field 'direction': {direction!r} is not one of {', '.join(DIRECTIONS)}")
        basin = _text(cat, where, f, "basin")
        station = _text(cat, where, f, "station")
        table = _station_table(cat, where, {k: v for k, v in f.items() if k in _DISCHARGE_KEYS},
                               kind="flow")
        out.append(FlowSpec(id=fid, basin=basin, direction=direction, station=station, table=table,
                            label=_str(cat, where, f, "label")))
    return tuple(out)


def _station_table(cat: Path, where: str, d: Any, *, kind: str) -> StationTableSpec:
    """Validate one station table's fields (`kind`: "flow" for discharge and flows, "level" for levels)."""
    _check_keys(cat, where, d, _DISCHARGE_KEYS)
    units = _str(cat, where, d, "units")
    try:
        if kind == "level":
            parse_level_unit(units, where=where.rstrip(": "))
        else:
            parse_discharge_unit(units, where=where.rstrip(": "))
    except UnitError as exc:
        _fail(cat, where, f"field 'units': {exc}")
    layout = _str(cat, where, d, "layout", "long")
    if layout not in LAYOUTS:
        _fail(cat, where, f"field 'layout': {layout!r} is not one of {', '.join(LAYOUTS)}")
    station_field = _str(cat, where, d, "station_field")
    basin_field = _str(cat, where, d, "basin_field")
    if station_field is not None and basin_field is not None and station_field != basin_field:
        _fail(cat, where, f"fields 'station_field' and 'basin_field' name different columns "
                          f"({station_field!r}, {basin_field!r}); give one")
    station_field = station_field or basin_field
    value_field = _str(cat, where, d, "value_field")
    if layout == "long":
        for key, val in (("station_field", station_field), ("value_field", value_field)):
            if val is None:
                _fail(cat, where, f"required field {key!r} is missing (layout long)")
    sep = _str(cat, where, d, "separator")
    if sep is not None and (len(sep) != 1 and sep != "\\t"):
        _fail(cat, where, f"field 'separator': {sep!r} is not one character")
    decimal = _str(cat, where, d, "decimal", ".")
    if len(decimal) != 1 or decimal == sep:
        _fail(cat, where, f"field 'decimal': {decimal!r} is not one character other than the separator")
    miss = d.get("missing_values", [])
    if not isinstance(miss, list):
        miss = [miss]
    for m in miss:
        if not isinstance(m, (str, int, float)) or isinstance(m, bool):
            _fail(cat, where, f"field 'missing_values': {m!r} is not a number or text")
    stations = d.get("stations")
    if stations is not None:
        if not isinstance(stations, dict) or not stations:
            _fail(cat, where, "field 'stations': expected a non-empty mapping station id -> basin id")
        pairs = []
        for k, v in stations.items():
            # YAML 1.1 reads 0123 as the number 83: a basin id that is not text has lost how it was written
            if not isinstance(v, str):
                _fail(cat, where, f"field 'stations': station {str(k)!r}: basin {v!r} is not text "
                                  "(YAML reads 0123 as the number 83); put the id in quotes")
            pairs.append((str(k), v))
        seen: dict[str, str] = {}
        for k, v in pairs:
            if v in seen:
                _fail(cat, where, f"field 'stations': stations {seen[v]!r} and {k!r} both feed basin {v!r}")
            seen[v] = k
        stations = tuple(pairs)
    mc = d.get("min_coverage", 1.0)
    if not isinstance(mc, (int, float)) or isinstance(mc, bool) or not 0.0 <= float(mc) <= 1.0:
        _fail(cat, where, f"field 'min_coverage': {mc!r} is not a share between 0 and 1")
    path = _resolve(cat, where, "path", _str(cat, where, d, "path"), allow_glob=False)[0]
    sheet = _str(cat, where, d, "sheet")
    if sheet is not None and path.suffix.lower() not in EXCEL_SUFFIXES:
        _fail(cat, where, f"field 'sheet': {sheet!r} given for {path.name}, which is not an Excel workbook (.xlsx)")
    return StationTableSpec(
        path=path, time_field=_str(cat, where, d, "time_field"), units=units, layout=layout,
        station_field=station_field, value_field=value_field,
        separator="\t" if sep == "\\t" else sep, decimal=decimal,
        missing_values=tuple(str(m) for m in miss), date_format=_str(cat, where, d, "date_format"),
        sheet=sheet, stations=stations, min_coverage=float(mc),
    )


def _number(cat: Path, where: str, key: str, val) -> float:
    if not isinstance(val, (int, float)) or isinstance(val, bool) or val != val:
        _fail(cat, where, f"field {key!r}: {val!r} is not a number")
    return float(val)


def _mask_fields(cat: Path, where: str, s: dict) -> dict:
    """valid_range, nodata, scale_factor, add_offset (stored values, CF meanings) and duplicates."""
    out: dict = {}
    vr = s.get("valid_range")
    if vr is not None:
        if not isinstance(vr, list) or len(vr) != 2:
            _fail(cat, where, f"field 'valid_range': {vr!r} is not a list of two numbers [min, max]")
        lo, hi = (_number(cat, where, "valid_range", v) for v in vr)
        if lo > hi:
            _fail(cat, where, f"field 'valid_range': min {vr[0]!r} is greater than max {vr[1]!r}")
        out["valid_range"] = (lo, hi)
    nd = s.get("nodata")
    if nd is not None:
        if isinstance(nd, (int, float)) and not isinstance(nd, bool):
            nd = [nd]
        if not isinstance(nd, list) or not nd:
            _fail(cat, where, f"field 'nodata': {nd!r} is not a list of numbers")
        for v in nd:
            if not isinstance(v, (int, float)) or isinstance(v, bool):
                _fail(cat, where, f"field 'nodata': {v!r} in {nd!r} is not a number")
        out["nodata"] = tuple(float(v) for v in nd)
    for key in ("scale_factor", "add_offset"):
        if s.get(key) is not None:
            out[key] = _number(cat, where, key, s[key])
    if out.get("scale_factor") == 0:
        _fail(cat, where, "field 'scale_factor': 0 would make every value the offset")
    dup = s.get("duplicates")
    if dup is not None:
        if dup not in DUPLICATES:
            _fail(cat, where, f"field 'duplicates': {dup!r} is not one of {', '.join(DUPLICATES)}")
        out["duplicates"] = dup
    return out


def _check_date_format(cat: Path, where: str, fmt: str) -> None:
    import re

    for tok in re.findall(r"\{([^}]*)\}", fmt):
        if tok not in ("dekad", "pentad"):
            _fail(cat, where, f"field 'date_format': {{{tok}}} in {fmt!r} is not {{dekad}} or {{pentad}}")
    if "{dekad}" in fmt and "{pentad}" in fmt:
        _fail(cat, where, f"field 'date_format': {fmt!r} has both {{dekad}} and {{pentad}}")


def _check_crs(cat: Path, where: str, text: str) -> None:
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    try:
        CRS.from_user_input(text)
    except CRSError:
        _fail(cat, where, f"field 'crs': {text!r} is not a CRS pyproj understands")


# ---- waterbodies (issue 15) ------------------------------------------------------------------------
_WATERBODY_KEYS = {"path": True, "id_field": True, "name_field": False, "crs": False, "layer": False,
                   "level": True, "storage_curve": True, "evaporation_source": False, "pan": False}
# the ids a water body's balance gives its own series (its storage, its pan evaporation): no product may take them
WATERBODY_SOURCE_IDS = ("levels", "pan")
_CURVE_KEYS = {"path": True, "id_field": True, "level_field": True, "area_field": True, "volume_field": True,
               "area_units": True, "volume_units": True, "level_units": False}


def _waterbodies(cat: Path, d: Any, sources: list[SourceSpec]) -> WaterbodySpec:
    """Validate the `waterbodies` block (fields only: ids, levels and curves are checked on reading)."""
    from ..units import parse_area_unit, parse_volume_unit

    where = "waterbodies: "
    _check_keys(cat, where, d, _WATERBODY_KEYS)
    path = _resolve(cat, where, "path", _str(cat, where, d, "path"), allow_glob=False)[0]
    crs = _str(cat, where, d, "crs")
    if crs is not None:
        _check_crs(cat, where, crs)
    level = _station_table(cat, where + "level: ", d["level"], kind="level")
    cw = where + "storage_curve: "
    c = d["storage_curve"]
    _check_keys(cat, cw, c, _CURVE_KEYS)
    units = {}
    for key, parse in (("area_units", parse_area_unit), ("volume_units", parse_volume_unit),
                       ("level_units", parse_level_unit)):
        text = _str(cat, cw, c, key, level.units if key == "level_units" else None)
        try:
            parse(text, where=cw + key)
        except UnitError as exc:
            _fail(cat, cw, f"field {key!r}: {exc}")
        units[key] = text
    curve = StorageCurveSpec(
        path=_resolve(cat, cw, "path", _str(cat, cw, c, "path"), allow_glob=False)[0],
        id_field=_str(cat, cw, c, "id_field"), level_field=_str(cat, cw, c, "level_field"),
        area_field=_str(cat, cw, c, "area_field"), volume_field=_str(cat, cw, c, "volume_field"), **units)
    evap = _str(cat, where, d, "evaporation_source")
    if evap is not None:
        comp = {s.id: s.component for s in sources}
        if evap not in comp:
            close = difflib.get_close_matches(evap, list(comp), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            _fail(cat, where, f"field 'evaporation_source': {evap!r} is not a product id{hint}")
        if comp[evap] != "ET":
            _fail(cat, where, f"field 'evaporation_source': product {evap!r} is {comp[evap]}, not ET")
    taken = [s.id for s in sources if s.id in WATERBODY_SOURCE_IDS]
    if taken:
        _fail(cat, "sources: ", f"product id {taken[0]!r} is the name of a water body's own series "
                                f"({', '.join(WATERBODY_SOURCE_IDS)}); choose another id")
    pan, coefficient = None, 0.7
    if d.get("pan") is not None:
        pw = where + "pan: "
        raw = d["pan"]
        if not isinstance(raw, dict):
            _fail(cat, pw, f"expected a mapping of station-table fields, got {raw!r}")
        coefficient = raw.get("coefficient", 0.7)  # lake / pan evaporation: 0.7 is common practice
        if isinstance(coefficient, bool) or not isinstance(coefficient, (int, float)) or not 0.0 < coefficient <= 1.5:
            _fail(cat, pw, f"field 'coefficient': {coefficient!r} is not a number in (0, 1.5]")
        pan = _station_table(cat, pw, {k: v for k, v in raw.items() if k != "coefficient"}, kind="flow")
        from ..units import parse_discharge_unit

        if parse_discharge_unit(pan.units, where=pw + "units").kind != "depth":
            _fail(cat, pw, f"field 'units': {pan.units!r} is a flow; pan evaporation is a depth per period "
                           "(mm/day, mm/month)")
    return WaterbodySpec(path=path, id_field=_str(cat, where, d, "id_field"), level=level, storage_curve=curve,
                         name_field=_str(cat, where, d, "name_field"), crs=crs,
                         layer=_str(cat, where, d, "layer"), evaporation_source=evap, pan=pan,
                         pan_coefficient=float(coefficient))
# ---- end waterbodies -------------------------------------------------------------------------------
