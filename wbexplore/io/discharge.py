"""Gauged outlet discharge: long-format CSV, one row per basin and time.

The table is read strictly: a header without rows, a missing column, a value that is not a
number and two rows for one station and time with different values are each refused with one
line; identical repeated rows collapse to one with a `DuplicateRowsWarning`. Whether a station's
records are daily or monthly is read from the spacing of its own time stamps, never from how many
rows a month has (a repeated row must not turn a monthly table into a daily one).
"""

from __future__ import annotations

import difflib
import warnings

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError, UnitError
from ..units import flow_m3s_to_mm_per_month, parse_discharge_unit
from .catalog import DischargeSpec

__all__ = ["read_discharge", "DuplicateRowsWarning"]

# Median spacing of a station's time stamps: daily records are 1 day apart (a day or two missing
# does not move the median), monthly ones 28 to 31 days. Anything else (hourly, pentads, dekads)
# is not a step this reader knows, and is refused rather than guessed.
_DAILY = (pd.Timedelta(hours=20), pd.Timedelta(hours=28))
_MONTHLY_MIN = pd.Timedelta(days=27)


class DuplicateRowsWarning(UserWarning):
    """A station table repeats rows (same station, time and value); they were collapsed to one."""


def _short(v) -> str:
    r = repr(v)
    return r if len(r) <= 40 else r[:37] + "..."


def read_discharge(spec: DischargeSpec, basin_area_km2: pd.Series) -> xr.DataArray:
    """Read discharge into a (basin, time) DataArray in mm per month.

    Flows (m3/s, l/s ...) are mean flows: a daily station's records in a month are averaged, and
    a month without a record for each of its days is NaN. Per-period depths (mm/month, mm/day) are
    converted like P. Basins in the file that are not in the basin file are refused by name.
    Daily or monthly is decided per station from the median spacing of its time stamps.
    """
    path = spec.path
    try:
        # as text: station ids stay as written ("0123"), values are parsed below with a message
        df = pd.read_csv(path, dtype=str)
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the table is empty (no header, no rows)") from None
    except Exception as exc:
        raise InputError(f"{path}: cannot be read as CSV ({exc.__class__.__name__})") from None
    for key in ("time_field", "basin_field", "value_field"):
        col = getattr(spec, key)
        if col not in df.columns:
            # name the missing column and at most one close match: never the header itself
            close = difflib.get_close_matches(col, [str(c) for c in df.columns if len(str(c)) <= 40], n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InputError(f"{path}: field {key!r}: column {col!r} not found{hint}")
    if len(df) == 0:
        raise InputError(f"{path}: the table has a header but no rows")
    raw_t = df[spec.time_field].astype(str).str.strip()
    try:
        t = pd.to_datetime(raw_t, format="mixed")
    except Exception:
        raise InputError(f"{path}: field 'time_field': column {spec.time_field!r} holds values that are not dates") from None
    if t.isna().any():
        raise InputError(f"{path}: field 'time_field': column {spec.time_field!r} has rows without a date")
    raw_v = df[spec.value_field]
    vals = pd.to_numeric(raw_v, errors="coerce")
    bad = vals.isna() & raw_v.notna() & (raw_v.astype(str).str.strip() != "")
    if bad.any():
        raise InputError(f"{path}: field 'value_field': value {_short(raw_v[bad].iloc[0])} is not a number")
    basin = df[spec.basin_field].astype(str).str.strip()
    unknown = sorted(set(basin) - set(basin_area_km2.index))
    if unknown:
        raise InputError(f"{path}: basin {_short(unknown[0])} is not in the basin file")
    try:
        unit = parse_discharge_unit(spec.units, where=f"{path}: field 'units'")
    except UnitError as exc:
        raise InputError(str(exc)) from None
    frame = pd.DataFrame({"basin": basin, "t": t, "v": vals.astype(float), "raw_t": raw_t, "raw_v": raw_v})
    frame = _collapse_duplicates(frame, path)
    frame = frame.sort_values(["basin", "t"], kind="stable")
    daily_basins = _daily_stations(frame, path)
    frame["month"] = frame["t"].dt.to_period("M").dt.to_timestamp()
    per_month = frame.groupby(["basin", "month"])["v"]
    n = per_month.size()
    row_basin = n.index.get_level_values("basin")
    row_month = pd.DatetimeIndex(n.index.get_level_values("month"))
    daily = np.asarray(row_basin.isin(daily_basins))
    twice = np.flatnonzero((n.values > 1) & ~daily)
    if twice.size:
        b, m = row_basin[twice[0]], row_month[twice[0]]
        raise InputError(f"{path}: station {_short(b)}: {int(n.values[twice[0]])} records in {m:%Y-%m} "
                         "of a monthly series (one per month expected)")
    complete = per_month.count().values == np.asarray(row_month.days_in_month)
    if unit.kind == "flow":
        v = per_month.mean() * unit.factor
        v = v.where(~daily | complete)
    else:
        flux = unit.flux
        v = per_month.mean() * flux.monthly_factor(row_month)
        if daily.any():
            tot = per_month.sum(min_count=1) * flux.daily_factor()
            v = v.where(~daily, tot.where(complete))
    s = v.unstack("month")
    months = pd.DatetimeIndex(s.columns)
    full = pd.date_range(months.min(), months.max(), freq="MS")
    s = s.reindex(columns=full).reindex(index=basin_area_km2.index)
    if unit.kind == "flow":
        area_m2 = basin_area_km2.reindex(s.index).values[:, None] * 1e6
        values = flow_m3s_to_mm_per_month(s.values, full, 1.0)[...] / area_m2
    else:
        values = s.values
    da = xr.DataArray(values, dims=("basin", "time"), coords={"basin": s.index.values, "time": full},
                      name="discharge",
                      attrs={"component": "Q", "units": "mm/month", "long_name": "gauged outlet discharge",
                             "source_units": spec.units})
    return da


def _collapse_duplicates(frame: pd.DataFrame, path) -> pd.DataFrame:
    """Rows repeating a station and time: identical ones collapse (with a warning), different ones are refused."""
    key = ["basin", "t"]
    dup = frame.duplicated(key, keep=False)
    if not dup.any():
        return frame
    rows = frame[dup]
    distinct = rows.groupby(key, sort=False)["v"].nunique(dropna=False)
    conflict = distinct[distinct > 1]
    if len(conflict):
        b, ts = conflict.index[0]
        same = rows[(rows["basin"] == b) & (rows["t"] == ts)]
        first = same.iloc[0]
        other = same[~same["v"].isin([first["v"]]) | (same["v"].isna() != pd.isna(first["v"]))].iloc[0]
        raise InputError(f"{path}: station {_short(b)}, date {first['raw_t']!r}: two rows with different values "
                         f"({_short(first['raw_v'])} and {_short(other['raw_v'])})")
    extra = frame.duplicated(key, keep="first")
    first = frame[extra].iloc[0]
    k = int(extra.sum())
    warnings.warn(f"{path}: {k} duplicated row{'s' if k > 1 else ''} collapsed (same station, date and value; "
                  f"first: station {_short(first['basin'])}, date {first['raw_t']!r})", DuplicateRowsWarning,
                  stacklevel=3)
    return frame[~extra]


def _daily_stations(frame: pd.DataFrame, path) -> set:
    """Stations whose records are daily, from the median spacing of their (sorted, distinct) time stamps."""
    spacing = frame.groupby("basin", sort=False)["t"].diff()
    median = spacing.groupby(frame["basin"], sort=False).median()
    daily = set()
    for b, step in median.items():
        if pd.isna(step) or step >= _MONTHLY_MIN:  # a single record reads as one month
            continue
        if _DAILY[0] <= step <= _DAILY[1]:
            daily.add(b)
            continue
        raise InputError(f"{path}: station {_short(b)}: records about {step / pd.Timedelta(days=1):.2g} days apart; "
                         "only daily or monthly records are read")
    return daily
