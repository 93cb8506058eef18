"""Lakes and reservoirs: outlines, level series and storage curves (catalog field `waterbodies`).

- Outlines are read by the basin reader's rules (`read_basins`: any vector format and CRS, ids as text,
  geodesic areas), indexed by water-body id.
- Levels are a station table (`read_station_table`, kind "level": daily or monthly, m or cm, wide or
  long). Station ids are water-body ids unless ``level.stations`` maps them. Daily levels give the
  level at the end of each month (`wbexplore.temporal.station_month_end_states`); monthly levels are
  monthly means.
- A storage curve is a table of (water body, level, area, volume) rows. Per water body the levels must
  increase strictly and the areas and volumes must not decrease; a repeated level or a decreasing area
  or volume is refused naming the file and the row. Between points the curve is interpolated with
  `scipy.interpolate.PchipInterpolator` (see `StorageCurve`); outside its level range it is NaN.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import geopandas as gpd
import numpy as np
import pandas as pd
import xarray as xr
from scipy.interpolate import PchipInterpolator

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from ..temporal import station_month_end_states
from ..units import parse_area_unit, parse_level_unit, parse_volume_unit
from .basins import read_basins
from .catalog import Catalog, StorageCurveSpec, WaterbodySpec
from .stations import _detect_separator, _short, read_station_table

__all__ = ["StorageCurve", "Waterbodies", "read_storage_curves", "read_waterbody_outlines", "read_levels", "read_pan",
           "check_distinct_ids", "read_waterbodies"]


@dataclass(frozen=True, eq=False)
class StorageCurve:
    """A water body's storage curve: level (m) -> surface area (m2) and volume (m3).

    Interpolation is piecewise cubic Hermite with monotone slopes (`scipy.interpolate.PchipInterpolator`,
    Fritsch and Carlson 1980): it passes through every point, is monotone wherever the points are
    (non-decreasing volumes give non-decreasing volumes in between, with no overshoot past a
    neighbouring point), and has a continuous first derivative, so dV/dh (a surface area) does not jump at
    each point as it would with linear interpolation. A plain cubic spline can overshoot and give a
    volume that falls as the level rises. Outside ``[level_m[0], level_m[-1]]`` both give NaN, never an
    extrapolated value.
    """

    waterbody: str
    level_m: np.ndarray
    area_m2: np.ndarray
    volume_m3: np.ndarray
    _v: PchipInterpolator = field(init=False, repr=False)
    _a: PchipInterpolator = field(init=False, repr=False)

    def __post_init__(self):
        object.__setattr__(self, "_v", PchipInterpolator(self.level_m, self.volume_m3, extrapolate=False))
        object.__setattr__(self, "_a", PchipInterpolator(self.level_m, self.area_m2, extrapolate=False))

    @property
    def level_range(self) -> tuple[float, float]:
        """Lowest and highest level of the curve (m)."""
        return float(self.level_m[0]), float(self.level_m[-1])

    def volume(self, level_m) -> np.ndarray:
        """Volume (m3) at each level (m); NaN outside the curve's range or where the level is NaN."""
        return np.asarray(self._v(np.asarray(level_m, dtype=float)), dtype=float)

    def area(self, level_m) -> np.ndarray:
        """Surface area (m2) at each level (m); NaN outside the curve's range or where the level is NaN."""
        return np.asarray(self._a(np.asarray(level_m, dtype=float)), dtype=float)


def _curve_frame(spec: StorageCurveSpec) -> pd.DataFrame:
    path = spec.path
    try:
        df = pd.read_csv(path, sep=_detect_separator(path), encoding="utf-8-sig", dtype=str,
                         keep_default_na=False, skipinitialspace=True)
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the storage curve table is empty") from None
    except Exception as exc:
        raise InputError(f"{path}: cannot be read as CSV ({exc.__class__.__name__})") from None
    df.columns = [str(c).strip() for c in df.columns]
    for key in ("id_field", "level_field", "area_field", "volume_field"):
        col = getattr(spec, key)
        if col not in df.columns:
            raise InputError(f"{path}: field {key!r}: column {col!r} not found")
    if len(df) == 0:
        raise InputError(f"{path}: the storage curve table has a header but no rows")
    return df


def read_storage_curves(spec: StorageCurveSpec) -> dict[str, StorageCurve]:
    """Read and check the storage curves, one per water body (units to m, m2, m3).

    Raises
    ------
    InputError
        Naming the file and row (line of the file, header = line 1) for a value that is not a number,
        a level that does not increase (a repeated level included), an area or volume that decreases,
        a negative area or volume; and a water body with fewer than two points.
    """
    path = spec.path
    df = _curve_frame(spec)
    fl = parse_level_unit(spec.level_units, where=f"{path}: field 'level_units'")
    fa = parse_area_unit(spec.area_units, where=f"{path}: field 'area_units'")
    fv = parse_volume_unit(spec.volume_units, where=f"{path}: field 'volume_units'")
    line = np.arange(len(df)) + 2
    ids = df[spec.id_field].fillna("").astype(str).str.strip().to_numpy()
    cols = {}
    for key, factor in (("level_field", fl), ("area_field", fa), ("volume_field", fv)):
        col = getattr(spec, key)
        v = pd.to_numeric(df[col], errors="coerce")
        bad = v.isna().to_numpy()
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"{path}: line {line[i]}, water body {_short(ids[i])}: column {col!r}: "
                             f"value {_short(df[col].iloc[i])} is not a number")
        cols[key] = v.to_numpy(float) * factor
    out: dict[str, StorageCurve] = {}
    for wb in dict.fromkeys(ids):
        rows = np.flatnonzero(ids == wb)  # file order: the curve must be written from low to high level
        h, a, v = (cols[k][rows] for k in ("level_field", "area_field", "volume_field"))
        for key, arr in (("area_field", a), ("volume_field", v)):
            neg = np.flatnonzero(arr < 0)
            if neg.size:
                raise InputError(f"{path}: line {line[rows[neg[0]]]}, water body {_short(wb)}: "
                                 f"column {getattr(spec, key)!r} is negative")
        dh = np.diff(h)
        if (dh <= 0).any():
            k = int(np.flatnonzero(dh <= 0)[0]) + 1
            what = "repeats the level" if dh[k - 1] == 0 else "is lower than the level"
            raise InputError(f"{path}: line {line[rows[k]]}, water body {_short(wb)}: level "
                             f"{_short(df[spec.level_field].iloc[rows[k]])} {what} of line {line[rows[k - 1]]} "
                             "(levels must increase strictly)")
        for key, arr in (("volume_field", v), ("area_field", a)):
            d = np.diff(arr)
            if (d < 0).any():
                k = int(np.flatnonzero(d < 0)[0]) + 1
                col = getattr(spec, key)
                raise InputError(f"{path}: line {line[rows[k]]}, water body {_short(wb)}: column {col!r} "
                                 f"decreases ({_short(df[col].iloc[rows[k - 1]])} to {_short(df[col].iloc[rows[k]])}) "
                                 "while the level rises")
        if rows.size < 2:
            raise InputError(f"{path}: water body {_short(wb)}: a storage curve needs at least two rows, found one")
        out[wb] = StorageCurve(waterbody=wb, level_m=h, area_m2=a, volume_m3=v)
    return out


def read_waterbody_outlines(spec: WaterbodySpec) -> gpd.GeoDataFrame:
    """Water-body outlines indexed by id (text, index name ``waterbody``), EPSG:4326, with ``name`` and
    ``area_km2`` (geodesic): the basin reader's rules (`wbexplore.io.basins.read_basins`)."""
    gdf = read_basins(spec.outlines)
    gdf.index = gdf.index.rename("waterbody")
    return gdf


def _station_months(spec: WaterbodySpec, table_spec, waterbody_ids, *, kind: str):
    """(station table, station -> water body, every month from the first to the last) of a water-body station
    table (levels, pan): station ids are water-body ids unless the table's ``stations`` maps them; a station or
    target that is not a water body of the outline file is refused naming it."""
    known = [str(w) for w in waterbody_ids]
    mapping = table_spec.station_map
    table = read_station_table(table_spec, kind=kind, use=None if mapping is None else list(mapping))
    if mapping is None:
        mapping = {s: s for s in table.stations}
    for st, wb in mapping.items():
        if wb not in known:
            what = f"station {_short(st)} maps to water body {_short(wb)}" if st != wb else f"station {_short(st)}"
            raise InputError(f"{table_spec.path}: {what}, which is not a water body of {spec.path.name} "
                             f"(field {spec.id_field!r})")
    months = pd.DatetimeIndex(table.monthly.index.get_level_values("month"))
    return table, mapping, pd.DatetimeIndex(pd.date_range(months.min(), months.max(), freq="MS"))


def read_levels(spec: WaterbodySpec, waterbody_ids) -> tuple[xr.DataArray, xr.DataArray | None]:
    """Water levels (m) per water body: (monthly means, end-of-month levels or None).

    Both are DataArrays ``(waterbody, time)``, month-start stamps, ``units`` "m" and ``state``
    ("monthly_mean", "end_of_month"). End-of-month levels exist for daily stations (NaN rows for the
    monthly ones); monthly means exist for every station (NaN where a month lacks coverage).

    Raises
    ------
    InputError
        A level station (or a ``stations`` target) that is not a water body of the outline file.
    """
    lvl = spec.level
    table, mapping, full = _station_months(spec, lvl, waterbody_ids, kind="level")
    m = table.monthly
    wbs = sorted(set(mapping.values()))
    mean = np.full((len(wbs), full.size), np.nan)
    end = np.full((len(wbs), full.size), np.nan)
    states = station_month_end_states(table.days) if table.days is not None else None
    for st, wb in mapping.items():
        i = wbs.index(wb)
        mean[i] = m.loc[st]["value"].reindex(full).to_numpy(float)
        if st in table.daily:
            end[i] = states.loc[st]["state"].reindex(full).to_numpy(float)
    coords = {"waterbody": wbs, "time": full}
    mean_da = xr.DataArray(mean, dims=("waterbody", "time"), coords=coords, name="level",
                           attrs={"units": "m", "state": "monthly_mean", "long_name": "monthly mean water level",
                                  "source_units": lvl.units})
    end_da = None
    if table.daily:
        end_da = xr.DataArray(end, dims=("waterbody", "time"), coords=coords, name="level_end",
                              attrs={"units": "m", "state": "end_of_month",
                                     "long_name": "water level at the end of the month", "source_units": lvl.units})
    return mean_da, end_da


def read_pan(spec: WaterbodySpec, waterbody_ids) -> xr.DataArray:
    """Evaporation-pan readings (mm/month) per water body, ``(waterbody, time)``, month-start stamps.

    The table's units are a depth per period (mm/day, mm/month); a daily station's month is the mean of its
    present days times the days of the month (`read_station_table`). Station ids are water-body ids unless
    ``pan.stations`` maps them.

    Raises
    ------
    InputError
        A pan station (or a ``stations`` target) that is not a water body of the outline file.
    """
    pan = spec.pan
    known = [str(w) for w in waterbody_ids]
    table, mapping, full = _station_months(spec, pan, known, kind="flow")
    m = table.monthly
    out = np.full((len(known), full.size), np.nan)
    for st, wb in mapping.items():
        out[known.index(wb)] = m.loc[st]["value"].reindex(full).to_numpy(float)
    return xr.DataArray(out, dims=("waterbody", "time"), coords={"waterbody": known, "time": full}, name="pan",
                        attrs={"units": "mm/month", "long_name": "evaporation-pan reading", "source_units": pan.units})


def split_flows(catalog: Catalog) -> tuple[tuple, tuple]:
    """(basin flows, water-body flows) of the catalog's ``flows``: a flow whose ``basin`` is a water-body id
    enters that water body's balance and no basin series; every other flow is a basin's (the basin reader
    refuses an id that is neither). Reads the outline file only when the catalog has water bodies."""
    flows = tuple(catalog.flows)
    if catalog.waterbodies is None or not flows:
        return flows, ()
    ids = {str(i) for i in read_waterbody_outlines(catalog.waterbodies).index}
    return tuple(f for f in flows if f.basin not in ids), tuple(f for f in flows if f.basin in ids)


def check_distinct_ids(waterbody_ids, basin_ids, *, path) -> None:
    """Refuse a water-body id that is also a basin id (ids are unique across both; DESIGN.md)."""
    basins = {str(b) for b in basin_ids}
    clash = [str(w) for w in waterbody_ids if str(w) in basins]
    if clash:
        raise InputError(f"{path}: water body {_short(clash[0])} has the id of a basin; "
                         "ids must be unique across basins and water bodies")


@dataclass(frozen=True, eq=False)
class Waterbodies:
    """Everything read for the catalog's water bodies (see `read_waterbodies`)."""

    outlines: gpd.GeoDataFrame
    curves: dict[str, StorageCurve]
    level_mean: xr.DataArray
    level_end: xr.DataArray | None
    evaporation_source: str | None = None
    pan: xr.DataArray | None = None  # pan readings (mm/month, `read_pan`); None without a `pan` block
    pan_coefficient: float = 0.7

    def levels_by_state(self) -> dict[str, xr.DataArray]:
        """The levels that give each water body's storage, by volume state.

        ``{"end_of_month": ..., "monthly_mean": ...}`` (a key only where some water body has it): water
        bodies with daily levels use their end-of-month levels, the others their monthly means. Pass each
        to `wbexplore.balance.storage.level_volumes`, then `volume_storage_change`.
        """
        out = {}
        daily = [] if self.level_end is None else [
            w for w in self.level_end["waterbody"].values if np.isfinite(self.level_end.sel(waterbody=w)).any()]
        if daily:
            out["end_of_month"] = self.level_end.sel(waterbody=daily)
        rest = [w for w in self.level_mean["waterbody"].values if w not in daily]
        if rest:
            out["monthly_mean"] = self.level_mean.sel(waterbody=rest)
        return out

    def summary(self) -> list[str]:
        """One line per water body for ``wbexplore check``: id, name, outline area, level period (and
        whether daily), curve range (levels in m, volumes in hm3)."""
        lines = []
        for wb in self.outlines.index:
            row = self.outlines.loc[wb]
            s = self.level_mean.sel(waterbody=wb)
            t = pd.DatetimeIndex(s["time"].values)[np.isfinite(s.values)]
            daily = self.level_end is not None and wb in self.level_end["waterbody"].values and bool(
                np.isfinite(self.level_end.sel(waterbody=wb)).any())
            period = f"{t.min():%Y-%m} to {t.max():%Y-%m}" if t.size else "no month"
            c = self.curves[wb]
            lo, hi = c.level_range
            lines.append(f"{wb} ({row['name']}): outline {_km2(row['area_km2'])} km2; levels {period} "
                         f"({'daily' if daily else 'monthly'}); curve {lo:g} to {hi:g} m, "
                         f"{c.volume_m3[0] / 1e6:g} to {c.volume_m3[-1] / 1e6:g} hm3")
        return lines

    def curve_callables(self) -> dict:
        """Water-body id -> volume(level_m) for `wbexplore.balance.storage.level_volumes`."""
        return {wb: c.volume for wb, c in self.curves.items()}


def _km2(a: float) -> str:
    """An area for people: whole km2 with thousands separators from 100 km2 up, three digits below."""
    return f"{a:,.0f}" if a >= 100 else f"{a:.3g}"


def read_waterbodies(catalog: Catalog, *, basin_ids=None) -> Waterbodies:
    """Read and cross-check the catalog's water bodies.

    Parameters
    ----------
    catalog : Catalog
        A catalog with a ``waterbodies`` block.
    basin_ids : iterable of str, optional
        The basin ids (default: read from the catalog's basin file).

    Raises
    ------
    InputError
        One line naming file, field and value: an id shared with a basin, a level series of an unknown
        water body, a water body without a level series or without a curve, a curve of an unknown water
        body, a curve that is not monotone (see `read_storage_curves`).
    """
    spec = catalog.waterbodies
    if spec is None:
        raise InputError(f"{catalog.path}: the catalog has no 'waterbodies'")
    outlines = read_waterbody_outlines(spec)
    ids = [str(i) for i in outlines.index]
    if basin_ids is None:
        basin_ids = read_basins(catalog.basins).index
    check_distinct_ids(ids, basin_ids, path=spec.path)
    curves = read_storage_curves(spec.storage_curve)
    unknown = [w for w in curves if w not in ids]
    if unknown:
        raise InputError(f"{spec.storage_curve.path}: field 'id_field': water body {_short(unknown[0])} "
                         f"is not in {spec.path.name}")
    missing = [w for w in ids if w not in curves]
    if missing:
        raise InputError(f"{spec.storage_curve.path}: water body {_short(missing[0])} has no storage curve")
    mean, end = read_levels(spec, ids)
    without = [w for w in ids if w not in set(mean["waterbody"].values)]
    if without:
        raise InputError(f"{spec.level.path}: water body {_short(without[0])} of {spec.path.name} has no level "
                         "series (its storage change needs one)")
    pan = read_pan(spec, ids) if spec.pan is not None else None
    return Waterbodies(outlines=outlines, curves=curves, level_mean=mean, level_end=end,
                       evaporation_source=spec.evaporation_source, pan=pan, pan_coefficient=spec.pan_coefficient)
