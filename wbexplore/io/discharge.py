"""Gauged outlet discharge: long-format CSV, one row per basin and time."""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError, UnitError
from ..units import flow_m3s_to_mm_per_month, parse_discharge_unit
from .catalog import DischargeSpec

__all__ = ["read_discharge"]


def read_discharge(spec: DischargeSpec, basin_area_km2: pd.Series) -> xr.DataArray:
    """Read discharge into a (basin, time) DataArray in mm per month.

    Flows (m3/s, l/s ...) are mean flows: several records in a month (daily data)
    are averaged, and a month without a record for each of its days is NaN when the
    records are daily. Per-period depths (mm/month, mm/day) are converted like P.
    Basins in the file that are not in the basin file are refused by name.
    """
    path = spec.path
    try:
        df = pd.read_csv(path)
    except Exception as exc:
        raise InputError(f"{path}: cannot be read as CSV ({exc.__class__.__name__})") from None
    for key in ("time_field", "basin_field", "value_field"):
        col = getattr(spec, key)
        if col not in df.columns:
            raise InputError(f"{path}: field {key!r}: column {col!r} not found (has: {', '.join(df.columns)})")
    try:
        t = pd.to_datetime(df[spec.time_field].astype(str), format="mixed")
    except Exception:
        raise InputError(f"{path}: field 'time_field': column {spec.time_field!r} holds values that are not dates") from None
    vals = pd.to_numeric(df[spec.value_field], errors="coerce")
    bad = vals.isna() & df[spec.value_field].notna() & (df[spec.value_field].astype(str).str.strip() != "")
    if bad.any():
        raise InputError(f"{path}: field 'value_field': value {df[spec.value_field][bad].iloc[0]!r} is not a number")
    basin = df[spec.basin_field].astype(str).str.strip()
    unknown = sorted(set(basin) - set(basin_area_km2.index))
    if unknown:
        raise InputError(f"{path}: basin {unknown[0]!r} is not in the basin file")
    try:
        unit = parse_discharge_unit(spec.units, where=f"{path}: field 'units'")
    except UnitError as exc:
        raise InputError(str(exc)) from None
    frame = pd.DataFrame({"basin": basin, "day": t.dt.normalize(), "month": t.dt.to_period("M").dt.to_timestamp(),
                          "v": vals.astype(float)})
    per_month = frame.groupby(["basin", "month"])
    n = per_month["v"].size()
    daily = bool((n > 1).any())
    if unit.kind == "flow":
        mean = per_month["v"].mean() * unit.factor
        if daily:
            ndays = per_month["v"].count()
            dim = pd.DatetimeIndex(ndays.index.get_level_values("month")).days_in_month
            mean = mean.where(ndays.values == np.asarray(dim))
        s = mean.unstack("month")
    else:
        flux = unit.flux
        if daily:
            tot = per_month["v"].sum(min_count=1) * flux.daily_factor()
            ndays = per_month["v"].count()
            dim = pd.DatetimeIndex(ndays.index.get_level_values("month")).days_in_month
            s = tot.where(ndays.values == np.asarray(dim)).unstack("month")
        else:
            s = per_month["v"].mean().unstack("month")
            months = pd.DatetimeIndex(s.columns)
            s = s * flux.monthly_factor(months)[None, :]
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
