"""Station tables as gauging agencies export them: one reader for discharge and every station series.

A table is long (one row per station and time: `station_field`, `time_field`, `value_field`) or wide
(`time_field` and one column per station). pandas parses it: ``read_csv`` with the declared separator
(or the one found in the header line), ``decimal`` and ``na_values``; ``read_excel`` (openpyxl) with
``sheet`` for .xlsx. Station ids are read as text ("0123" is not "123"). Dates are parsed with the
declared ``date_format`` (default ISO 8601) and a date that does not match is refused, never guessed.

The table is read strictly: a header without rows, a missing column, a value that is not a number
(after decimal and missing-value handling) and two rows for one station and time with different values
are each refused with one line; identical repeated rows collapse to one with a `DuplicateRowsWarning`.
Whether a station's records are sub-daily, daily or monthly is read from the spacing of its own time
stamps, never from how many rows a month has. Days to months follow `wbexplore.temporal`.

`read_station_table` gives per-station monthly series in a base unit (m3/s for flows, mm/month for
depths, m for levels): discharge is `read_discharge_series` on top of it, and a flow or level
series of a later balance term is one more call of `read_station_table`.
"""

from __future__ import annotations

import datetime
import difflib
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError, UnitError
from ..temporal import (station_daily_means, station_days_in_month, station_month_range,
                        station_monthly_means)
from ..units import flow_m3s_to_mm_per_month, parse_discharge_unit, parse_level_unit
from .catalog import FlowSpec, StationTableSpec

__all__ = ["read_station_table", "read_discharge_series", "read_discharge", "read_flow_series", "coverage_var",
           "StationTable", "DuplicateRowsWarning"]

# Median spacing of a station's time stamps: daily records are 1 day apart (a day or two missing
# does not move the median), monthly ones 28 to 31 days; below 20 hours records are sub-daily and
# averaged to days. Anything else (pentads, dekads) is not a step this reader knows, and is refused
# rather than guessed.
_DAILY = (pd.Timedelta(hours=20), pd.Timedelta(hours=28))
_MONTHLY_MIN = pd.Timedelta(days=27)
# separators looked for in the header line when the catalog does not declare one, in this order
# (a semicolon table may carry decimal commas; a comma only separates when nothing else does)
_SEPARATORS = (";", "\t", "|", ",")


class DuplicateRowsWarning(UserWarning):
    """A station table repeats rows (same station, time and value); they were collapsed to one."""


def coverage_var(station: str) -> str:
    """Name of a station's coverage variable in the canonical dataset."""
    return f"coverage_{station}"


@dataclass
class StationTable:
    """A station table read to months.

    ``monthly``: DataFrame indexed by (station, month) with ``value`` (base unit: m3/s mean flow,
    mm/month depth or m level; NaN where the month is empty) and ``coverage`` (0..1 share of the
    month's days present for daily stations; 1 or 0 for monthly ones).
    ``days``: levels only (``kind="level"``), for daily (and sub-daily) stations: DataFrame with columns
    ``station``, ``t`` (the day) and ``v`` (daily mean level, m), for end-of-month states; else None.
    """

    path: object
    layout: str
    unit_kind: str  # "flow" | "depth" | "level"
    stations: list[str]
    daily: set[str]
    monthly: pd.DataFrame
    notes: list[str] = field(default_factory=list)
    days: pd.DataFrame | None = None


def _short(v) -> str:
    r = repr(v)
    return r if len(r) <= 40 else r[:37] + "..."


def _missing_column(path, key: str, col: str, columns) -> InputError:
    # name the missing column and at most one close match: never the header itself
    close = difflib.get_close_matches(col, [str(c) for c in columns if len(str(c)) <= 40], n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return InputError(f"{path}: field {key!r}: column {col!r} not found{hint}")


def _detect_separator(path) -> str:
    with open(path, encoding="utf-8-sig", errors="replace") as fh:
        header = fh.readline()
    for sep in _SEPARATORS:
        if sep in header:
            return sep
    return ","


def _read_frame(spec: StationTableSpec) -> tuple[pd.DataFrame, int]:
    """The table as pandas parses it (ids and dates as text), and the file line of its first data row."""
    path = spec.path
    value_cols = None
    na = ["", *spec.missing_values]
    try:
        if spec.is_excel:
            sheet = spec.sheet if spec.sheet is not None else 0
            try:
                head = pd.read_excel(path, sheet_name=sheet, nrows=0, engine="openpyxl")
            except ValueError as exc:
                if "not found" in str(exc) or "Worksheet" in str(exc):
                    raise InputError(f"{path}: field 'sheet': sheet {spec.sheet!r} does not exist") from None
                raise
            cols = [str(c) for c in head.columns]
            value_cols = _value_columns(spec, cols)
            # date cells stay dates (a declared date_format is for dates written as text)
            text_cols = [c for c in cols if c not in value_cols and c != spec.time_field]
            df = pd.read_excel(path, sheet_name=sheet, engine="openpyxl", dtype={c: str for c in text_cols},
                               na_values={c: na for c in value_cols}, keep_default_na=False)
        else:
            sep = spec.separator or _detect_separator(path)
            head = pd.read_csv(path, sep=sep, nrows=0, encoding="utf-8-sig")
            cols = [str(c) for c in head.columns]
            value_cols = _value_columns(spec, cols)
            text_cols = [c for c in cols if c not in value_cols]
            df = pd.read_csv(path, sep=sep, decimal=spec.decimal, encoding="utf-8-sig",
                             dtype={c: str for c in text_cols}, na_values={c: na for c in value_cols},
                             keep_default_na=False, skipinitialspace=True)
    except InputError:
        raise
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the table is empty (no header, no rows)") from None
    except Exception as exc:
        kind = "an Excel workbook" if spec.is_excel else "CSV"
        raise InputError(f"{path}: cannot be read as {kind} ({exc.__class__.__name__})") from None
    df.columns = [str(c) for c in df.columns]
    # a separator at the end of each line (common in exports) makes an empty, unnamed last column
    empty = [c for c in df.columns if c.startswith("Unnamed:") and df[c].isna().all()]
    df = df.drop(columns=empty)
    if len(df) == 0:
        raise InputError(f"{path}: the table has a header but no rows")
    return df, 2


def _value_columns(spec: StationTableSpec, cols: list[str]) -> list[str]:
    if spec.time_field not in cols:
        raise _missing_column(spec.path, "time_field", spec.time_field, cols)
    if spec.layout == "long":
        for key in ("station_field", "value_field"):
            col = getattr(spec, key)
            if col not in cols:
                raise _missing_column(spec.path, key, col, cols)
        return [spec.value_field]
    value_cols = [c for c in cols if c != spec.time_field]
    if not value_cols:
        raise InputError(f"{spec.path}: layout wide: no station column beside {spec.time_field!r}")
    return value_cols


def _numbers(spec: StationTableSpec, df: pd.DataFrame, col: str, first_line: int) -> pd.Series:
    """A value column as floats: pandas parsed it with `decimal` and `na_values`; anything left is refused."""
    s = df[col]
    if pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s):
        v = s.astype(float)
    else:
        v = pd.to_numeric(s, errors="coerce")
        text = s.astype(str).str.strip()
        bad = v.isna() & s.notna() & (text != "")
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            raise InputError(f"{spec.path}: line {first_line + i}, column {col!r}: value {_short(s.iloc[i])} "
                             f"is not a number (decimal {spec.decimal!r}, missing values "
                             f"{list(spec.missing_values)})")
        v = v.astype(float)
    # missing codes written with decimals ("-999,0" for -999) are missing too
    codes = pd.to_numeric(pd.Series(spec.missing_values, dtype=object).str.replace(spec.decimal, ".", regex=False),
                          errors="coerce").dropna()
    if len(codes):
        v = v.mask(v.isin(codes.to_numpy(float)))
    return v


def _dates(spec: StationTableSpec, df: pd.DataFrame, first_line: int) -> tuple[pd.Series, pd.Series]:
    col = df[spec.time_field]
    cells = col.dropna()
    if len(cells) and cells.map(lambda x: isinstance(x, (pd.Timestamp, datetime.date))).all():
        col = pd.to_datetime(col)  # Excel date cells (openpyxl gives datetime objects)
    if pd.api.types.is_datetime64_any_dtype(col):
        raw = col.dt.strftime("%Y-%m-%d %H:%M:%S").fillna("")
        t = col
    else:
        raw = col.fillna("").astype(str).str.strip()
        fmt = spec.date_format or "ISO8601"
        t = pd.to_datetime(raw, format=fmt, errors="coerce")
    bad = t.isna()
    if bad.any():
        i = int(np.flatnonzero(bad.to_numpy())[0])
        what = f"date_format {spec.date_format!r}" if spec.date_format else "ISO 8601 (set date_format)"
        raise InputError(f"{spec.path}: line {first_line + i}, field 'time_field': {_short(raw.iloc[i])} "
                         f"does not match {what}")
    return t, raw


def _long_frame(spec: StationTableSpec, df: pd.DataFrame, first_line: int) -> tuple[pd.DataFrame, object]:
    """Rows (station, t, v, row, col) from either layout, in file order, and ``raw(row, col)``: the date
    and value as written (only looked up for messages: formatting every cell as text is slow)."""
    t, raw_t = _dates(spec, df, first_line)
    pos = np.arange(len(df))
    cols = [spec.value_field] if spec.layout == "long" else [c for c in df.columns if c != spec.time_field]

    def raw(row: int, col: int) -> tuple[str, str]:
        return str(raw_t.iloc[row]), str(df[cols[col]].iloc[row])

    if spec.layout == "long":
        v = _numbers(spec, df, spec.value_field, first_line)
        st = df[spec.station_field].fillna("").astype(str).str.strip()
        return pd.DataFrame({"station": st, "t": t, "v": v, "row": pos, "col": 0}), raw
    parts = []
    for i, col in enumerate(cols):
        v = _numbers(spec, df, col, first_line)
        parts.append(pd.DataFrame({"station": col.strip(), "t": t, "v": v, "row": pos, "col": i}))
    return pd.concat(parts, ignore_index=True), raw


def _collapse_duplicates(frame: pd.DataFrame, path, raw) -> pd.DataFrame:
    """Rows repeating a station and time: identical ones collapse (with a warning), different ones are refused."""
    key = ["station", "t"]
    dup = frame.duplicated(key, keep=False)
    if not dup.any():
        return frame
    rows = frame[dup]
    distinct = rows.groupby(key, sort=False)["v"].nunique(dropna=False)
    conflict = distinct[distinct > 1]
    if len(conflict):
        b, ts = conflict.index[0]
        same = rows[(rows["station"] == b) & (rows["t"] == ts)]
        first = same.iloc[0]
        other = same[~same["v"].isin([first["v"]]) | (same["v"].isna() != pd.isna(first["v"]))].iloc[0]
        t1, v1 = raw(int(first["row"]), int(first["col"]))
        _t2, v2 = raw(int(other["row"]), int(other["col"]))
        raise InputError(f"{path}: station {_short(b)}, date {t1!r}: two rows with different values "
                         f"({_short(v1)} and {_short(v2)})")
    extra = frame.duplicated(key, keep="first")
    first = frame[extra].iloc[0]
    k = int(extra.sum())
    t1, _v1 = raw(int(first["row"]), int(first["col"]))
    warnings.warn(f"{path}: {k} duplicated row{'s' if k > 1 else ''} collapsed (same station, date and value; "
                  f"first: station {_short(first['station'])}, date {t1!r})", DuplicateRowsWarning,
                  stacklevel=4)
    return frame[~extra]


def _steps(frame: pd.DataFrame, path) -> tuple[set, set]:
    """(sub-daily, daily) stations, from the median spacing of their (sorted, distinct) time stamps."""
    spacing = frame.groupby("station", sort=False)["t"].diff()
    median = spacing.groupby(frame["station"], sort=False).median()
    sub, daily = set(), set()
    for b, step in median.items():
        if pd.isna(step) or step >= _MONTHLY_MIN:  # a single record reads as one month
            continue
        if step < _DAILY[0]:
            sub.add(b)
        elif step <= _DAILY[1]:
            daily.add(b)
        else:
            raise InputError(f"{path}: station {_short(b)}: records about {step / pd.Timedelta(days=1):.2g} days "
                             "apart; only sub-daily, daily or monthly records are read")
    return sub, daily


def read_station_table(spec: StationTableSpec, *, kind: str = "flow",
                       use: list[str] | None = None, use_field: str = "stations") -> StationTable:
    """Read a station table to per-station calendar months in a base unit.

    Parameters
    ----------
    spec : StationTableSpec
        The catalog's description of the table.
    kind : {"flow", "level"}
        "flow": units are a flow (to m3/s, mean over the month) or a depth per period (to mm/month);
        "level": units are a length (to m, mean over the month).
    use : list of str, optional
        Only these station ids (columns of a wide table, ids of a long one); others are ignored.
        Default: every station of the table.
    use_field : str
        The catalog field that named ``use`` (for the message when one is not in the table).

    Monthly value: the mean of the present days (sub-daily records averaged to days first); a month
    with fewer than ``spec.min_coverage`` of its days is NaN. For a depth per day (mm/day) the value
    is that mean times the days of the month.
    """
    path = spec.path
    try:
        if kind == "level":
            factor, unit_kind, flux = parse_level_unit(spec.units, where=f"{path}: field 'units'"), "level", None
        else:
            unit = parse_discharge_unit(spec.units, where=f"{path}: field 'units'")
            factor, unit_kind, flux = unit.factor, unit.kind, unit.flux
    except UnitError as exc:
        raise InputError(str(exc)) from None
    df, first_line = _read_frame(spec)
    frame, raw = _long_frame(spec, df, first_line)
    if use is not None:
        present = set(frame["station"].unique())
        missing = [s for s in use if s not in present]
        if missing:
            what = "column" if spec.layout == "wide" else "station"
            raise InputError(f"{path}: field {use_field!r}: {what} {_short(missing[0])} is not in the table")
        frame = frame[frame["station"].isin(use)]
    frame = _collapse_duplicates(frame, path, raw)
    frame = frame.sort_values(["station", "t"], kind="stable")
    sub, daily = _steps(frame, path)
    is_daily = frame["station"].isin(sub | daily)
    notes = []
    if sub:
        notes.append(f"sub-daily records averaged to days: {', '.join(sorted(sub))}")
    parts = []
    base_days = None
    if is_daily.any():
        days = station_daily_means(frame.loc[is_daily, ["station", "t", "v"]])
        if unit_kind == "level":  # kept for end-of-month states; flows and depths need only months
            base_days = days.assign(v=days["v"] * factor)
        m = station_monthly_means(days, spec.min_coverage)
        m = m.rename(columns={"mean": "value"})
        if unit_kind == "depth":
            try:
                per_day = flux.daily_factor()
            except UnitError as exc:  # mm/month cannot describe daily records
                raise InputError(f"{path}: field 'units': {exc} (stations {', '.join(sorted(sub | daily))})") from None
            # mean depth per present day times the days of the month: the month's total
            m["value"] = m["value"] * per_day * station_days_in_month(m.index.get_level_values("month"))
        else:
            m["value"] = m["value"] * factor
        parts.append(m[["value", "coverage"]])
    monthly_rows = frame.loc[~is_daily].copy()
    if len(monthly_rows):
        monthly_rows["month"] = monthly_rows["t"].dt.to_period("M").dt.to_timestamp()
        n = monthly_rows.groupby(["station", "month"]).size()
        if (n > 1).any():
            (b, mo), k = n[n > 1].index[0], int(n[n > 1].iloc[0])
            raise InputError(f"{path}: station {_short(b)}: {k} records in {mo:%Y-%m} of a monthly series "
                             "(one per month expected)")
        g = monthly_rows.set_index(["station", "month"])["v"]
        if unit_kind == "depth":
            months = pd.DatetimeIndex(g.index.get_level_values("month"))
            val = g * flux.monthly_factor(months)
        else:
            val = g * factor
        full = []
        for st, s in val.groupby(level="station", sort=True):
            s = s.droplevel("station")
            rng = station_month_range(s.index.min(), s.index.max())
            s = s.reindex(rng)
            full.append(pd.DataFrame({"station": st, "month": rng, "value": s.to_numpy(),
                                      "coverage": s.notna().to_numpy(float)}))
        parts.append(pd.concat(full, ignore_index=True).set_index(["station", "month"]))
    monthly = pd.concat(parts).sort_index()
    return StationTable(path=path, layout=spec.layout, unit_kind=unit_kind,
                        stations=sorted(frame["station"].unique()), daily=sub | daily, monthly=monthly, notes=notes,
                        days=base_days)


def _station_basins(spec: StationTableSpec, table_stations: list[str], basin_ids) -> dict[str, str]:
    """station id -> basin id: the catalog's `stations:` mapping, or station ids as basin ids."""
    known = {str(b) for b in basin_ids}
    mapping = spec.station_map
    if mapping is None:
        unknown = [s for s in table_stations if s not in known]
        if unknown:
            raise InputError(f"{spec.path}: station {_short(unknown[0])} is not in the basin file and the catalog "
                             "maps no station to a basin (field 'stations')")
        return {s: s for s in table_stations}
    for st, b in mapping.items():
        if b not in known:
            raise InputError(f"{spec.path}: field 'stations': station {_short(st)} maps to basin {_short(b)}, "
                             "which is not in the basin file")
    return dict(mapping)


def read_discharge_series(spec: StationTableSpec, basin_area_km2: pd.Series) -> tuple[xr.Dataset, StationTable]:
    """Outlet discharge as (basin, time) in mm/month, plus ``coverage_<station>`` (time) per daily station.

    Flows are mean flows over the month (mean of the present days) turned into depth over the basin
    area (km2); depths per period are taken as they are. Without a `stations:` mapping every station
    must be a basin of the basin file; with one, only the mapped stations are read (other columns or
    stations of the table are neither discharge nor an error).
    """
    mapping = spec.station_map
    table = read_station_table(spec, kind="flow", use=None if mapping is None else list(mapping))
    to_basin = _station_basins(spec, table.stations, basin_area_km2.index)
    m = table.monthly
    months = pd.DatetimeIndex(m.index.get_level_values("month"))
    full = station_month_range(months.min(), months.max())
    basins = [str(b) for b in basin_area_km2.index]
    values = np.full((len(basins), len(full)), np.nan)
    ds = xr.Dataset()
    for st in table.stations:
        s = m.loc[st].reindex(full)
        b = to_basin[st]
        i = basins.index(b)
        v = s["value"].to_numpy(float)
        if table.unit_kind == "flow":
            v = flow_m3s_to_mm_per_month(v, full, float(basin_area_km2.iloc[i]) * 1e6)
        values[i] = v
        if st not in table.daily:
            continue  # a monthly record has no gaps within its month: nothing to flag
        cov = s["coverage"].fillna(0.0).to_numpy(float)
        ds[coverage_var(st)] = xr.DataArray(cov, dims="time", coords={"time": full}, attrs={
            "role": "coverage", "station": st, "basin": b, "units": "1",
            "long_name": f"share of the month's days with a record at station {st}",
            "min_coverage": spec.min_coverage, "daily": int(st in table.daily)})
    ds["discharge"] = xr.DataArray(values, dims=("basin", "time"), coords={"basin": basins, "time": full},
                                   attrs={"component": "Q", "units": "mm/month",
                                          "long_name": "gauged outlet discharge", "source_units": spec.units})
    return ds, table


def read_discharge(spec: StationTableSpec, basin_area_km2: pd.Series) -> xr.DataArray:
    """Discharge as a (basin, time) DataArray in mm per month (see `read_discharge_series`)."""
    ds, _ = read_discharge_series(spec, basin_area_km2)
    da = ds["discharge"]
    da.name = "discharge"
    return da


def read_flow_series(flows: tuple[FlowSpec, ...] | list[FlowSpec], basin_area_km2: pd.Series, *,
                     catalog=None) -> xr.Dataset:
    """Each flow as ``flow_<id>`` (basin, time) in mm/month over the basin's area, plus coverage.

    Parameters
    ----------
    flows : sequence of FlowSpec
        The catalog's ``flows`` entries.
    basin_area_km2 : pandas.Series
        Area (km2) of each balance unit, indexed by basin id: the flow is turned into a depth over it.
    catalog : path, optional
        The catalog file, named in the message when a flow names a basin the basin file does not hold.

    Returns
    -------
    xarray.Dataset
        ``flow_<id>``: the flow's monthly mean (m3/s, mean of the present days as for discharge) as a
        depth over the area of its basin (mm/month); 0.0 for every other basin (the flow does not enter
        their balance); NaN where the gauge has no record or too few days. Depths per period (mm/month)
        are taken as depths over the basin's area as they are. Attributes: ``role="flow"``, ``flow_id``,
        ``direction`` ("in" | "out"), ``label``, ``units="mm/month"``, ``component="flow"``, ``station``,
        ``basin`` (the target), ``source_units``. (The pipeline adds the basins the target drains into:
        a flow entering a basin enters their whole areas too.) A daily station also gives ``coverage_flow_<id>``
        (time; share of each month's days with a record).
    """
    ds = xr.Dataset()
    basins = [str(b) for b in basin_area_km2.index]
    for f in flows:
        if f.basin not in basins:
            where = catalog if catalog is not None else f.table.path
            raise InputError(f"{where}: flow {f.id!r}: field 'basin': basin {_short(f.basin)} is not in the basin file")
    for f in flows:
        table = read_station_table(f.table, kind="flow", use=[f.station], use_field="station")
        s = table.monthly.loc[f.station]
        months = pd.DatetimeIndex(s.index)
        full = station_month_range(months.min(), months.max())
        s = s.reindex(full)
        i = basins.index(f.basin)
        v = s["value"].to_numpy(float)
        if table.unit_kind == "flow":
            v = flow_m3s_to_mm_per_month(v, full, float(basin_area_km2.iloc[i]) * 1e6)
        values = np.zeros((len(basins), len(full)))
        values[i] = v
        ds[f.var] = xr.DataArray(values, dims=("basin", "time"), coords={"basin": basins, "time": full}, attrs={
            "role": "flow", "component": "flow", "flow_id": f.id, "direction": f.direction, "label": f.display,
            "long_name": f.display, "units": "mm/month", "station": f.station, "basin": f.basin,
            "source_units": f.table.units})
        if f.station in table.daily:
            cov = s["coverage"].fillna(0.0).to_numpy(float)
            ds[f"coverage_{f.var}"] = xr.DataArray(cov, dims="time", coords={"time": full}, attrs={
                "role": "coverage", "station": f.station, "basin": f.basin, "flow_id": f.id, "units": "1",
                "long_name": f"share of the month's days with a record at station {f.station}",
                "min_coverage": f.table.min_coverage, "daily": 1})
    return ds
