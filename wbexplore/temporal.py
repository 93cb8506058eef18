"""Time steps onto calendar months: the only code that knows how a record's time maps onto a month.

Pure computation on pandas objects: no file paths, no prints.
"""

from __future__ import annotations

import calendar

import numpy as np
import pandas as pd

__all__ = [
    "station_days_in_month",
    "station_month_range",
    "station_daily_means",
    "station_monthly_means",
]


# ---- station series: days to months
#
# A gauge table holds, per station, records at some time stamps (sub-daily, daily or monthly).
# Sub-daily records are averaged to days (plain mean of the records of a day: a gauge logger's
# readings are samples of the flow, not amounts). A month's value is the mean of the *present*
# days (a day present = a record with a value); its coverage is present days / days in the month
# (calendar rule). A month below `min_coverage` is empty (NaN), never scaled up; months accepted
# with gaps keep their coverage so that a reader can flag them.

def station_days_in_month(months) -> np.ndarray:
    """Days in the calendar month of each stamp (``calendar.monthrange``, proleptic Gregorian)."""
    idx = pd.DatetimeIndex(months)
    return np.array([calendar.monthrange(y, m)[1] for y, m in zip(idx.year, idx.month)], dtype=np.int64)


def station_month_range(first, last) -> pd.DatetimeIndex:
    """Month-start stamps from the month of `first` to that of `last` (numpy month arithmetic:
    ``pd.date_range(freq="MS")`` builds each stamp in Python, which is slow for long records)."""
    a, b = np.datetime64(pd.Timestamp(first), "M"), np.datetime64(pd.Timestamp(last), "M")
    return pd.DatetimeIndex(np.arange(a, b + 1).astype("datetime64[ns]"))


def station_daily_means(frame: pd.DataFrame) -> pd.DataFrame:
    """Sub-daily (or daily) records to one value per station and day.

    Parameters
    ----------
    frame : DataFrame
        Columns ``station`` (text), ``t`` (datetime64) and ``v`` (float, NaN = missing), in any
        unit (the mean does not change it).

    Returns
    -------
    DataFrame
        Columns ``station``, ``t`` (the day, 00:00) and ``v``: the mean of the day's present records
        (NaN when the day has records but none with a value).
    """
    day = frame["t"].dt.floor("D")
    out = (frame.assign(t=day).groupby(["station", "t"], sort=True)["v"].mean().reset_index())
    return out


def station_monthly_means(daily: pd.DataFrame, min_coverage: float = 1.0) -> pd.DataFrame:
    """Daily values to calendar months: mean of the present days, and the share of days present.

    Parameters
    ----------
    daily : DataFrame
        Columns ``station``, ``t`` (one row per station and day at most) and ``v`` (NaN = missing).
    min_coverage : float, 0..1
        Share of a month's days that must be present for the month to have a value.

    Returns
    -------
    DataFrame indexed by (``station``, ``month``: month-start stamps), with ``mean`` (unit of ``v``
    per day, NaN where coverage < min_coverage), ``days`` (present days) and ``coverage`` (0..1).
    Every month from a station's first to its last record is present (coverage 0 where no day is).
    """
    if not 0.0 <= float(min_coverage) <= 1.0:
        raise ValueError(f"min_coverage {min_coverage!r} is outside 0..1")
    month = daily["t"].dt.to_period("M").dt.to_timestamp()
    g = daily.assign(month=month).groupby(["station", "month"], sort=True)["v"]
    out = pd.DataFrame({"mean": g.mean(), "days": g.count()})
    parts = []
    for station, sub in out.groupby(level="station", sort=True):
        months = pd.DatetimeIndex(sub.index.get_level_values("month"))
        full = station_month_range(months.min(), months.max())
        sub = sub.droplevel("station").reindex(full)
        sub.index.name = "month"
        sub["days"] = sub["days"].fillna(0).astype(np.int64)
        sub["station"] = station
        parts.append(sub.reset_index())
    if not parts:
        return pd.DataFrame({"mean": [], "days": [], "coverage": []},
                            index=pd.MultiIndex.from_arrays([[], pd.DatetimeIndex([])], names=["station", "month"]))
    res = pd.concat(parts, ignore_index=True).set_index(["station", "month"])
    ndays = station_days_in_month(res.index.get_level_values("month"))
    res["coverage"] = res["days"].to_numpy() / ndays
    # a small tolerance: 0.9 of a 30-day month is 27 days exactly, not 26.999...
    keep = (res["days"] > 0) & (res["coverage"] >= float(min_coverage) - 1e-12)
    res["mean"] = res["mean"].where(keep)
    return res[["mean", "days", "coverage"]]
