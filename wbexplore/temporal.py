"""Time steps onto calendar months: the only code that knows how a period maps onto a month.

Pure computation on pandas / numpy / xarray objects: no file paths, no prints.

Products (this section)
-----------------------
A product's time step is one of `STEPS`:

- ``day``;
- ``pentad``: six per calendar month, days 1-5, 6-10, 11-15, 16-20, 21-25 and 26 to the month's end;
- ``dekad``: three per month, days 1-10, 11-20 and 21 to the end;
- ``8-day`` and ``16-day``: composites that start on 1 January and every 8 (16) days after it,
  the last one of a year ending on 31 December (so it is shorter);
- ``month``: calendar months.

A period is named by its first day. `periods_to_months` maps any sequence of periods onto calendar
months day-weighted: the part of a period that falls in a month counts in that month, at a constant
rate within the period. A value is a *rate* (per day) where its units say per time, an *amount* over
its own period where they do not, or a *state* (storage) whose monthly value is the day-weighted mean.
A month not covered on every one of its days is empty (NaN) and reported as incomplete, never scaled up.

Station series (the last section)
---------------------------------
Gauge records (sub-daily, daily or monthly) are averaged to days, days to months as the mean of the
present days with their coverage share; a month below ``min_coverage`` is empty, never scaled up.
"""

from __future__ import annotations

import calendar
from datetime import date, timedelta

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = [
    "STEPS",
    "TemporalError",
    "dekad_start",
    "pentad_start",
    "period_end",
    "period_ends",
    "period_starts_between",
    "step_fits_stamps",
    "infer_step",
    "month_overlap_days",
    "month_weights",
    "periods_to_months",
    "station_days_in_month",
    "station_month_range",
    "station_daily_means",
    "station_monthly_means",
    "station_month_end_states",
]

STEPS = ("day", "pentad", "dekad", "8-day", "16-day", "month")
KINDS = ("rate", "amount", "state")


class TemporalError(InputError):
    """Periods that cannot be mapped onto months (overlap, a step that does not fit the stamps).

    The message names the stamps; the reader that catches it adds the file and the source."""


def dekad_start(year: int, month: int, dekad: int) -> date:
    """First day of dekad ``dekad`` (1-3) of a month: the 1st, 11th or 21st."""
    if dekad not in (1, 2, 3):
        raise TemporalError(f"dekad {dekad!r} is not 1, 2 or 3")
    return date(year, month, 1 + 10 * (dekad - 1))


def pentad_start(year: int, month: int, pentad: int) -> date:
    """First day of pentad ``pentad`` (1-6) of a month: the 1st, 6th, 11th, 16th, 21st or 26th."""
    if pentad not in range(1, 7):
        raise TemporalError(f"pentad {pentad!r} is not one of 1 to 6")
    return date(year, month, 1 + 5 * (pentad - 1))


def _month_end(d: date) -> date:
    """The day after the last day of ``d``'s month."""
    return date(d.year + (d.month == 12), d.month % 12 + 1, 1)


def _is_start(d: date, step: str) -> bool:
    if step == "day":
        return True
    if step == "pentad":
        return d.day in (1, 6, 11, 16, 21, 26)
    if step == "dekad":
        return d.day in (1, 11, 21)
    if step == "month":
        return d.day == 1
    n = 8 if step == "8-day" else 16
    return (d.timetuple().tm_yday - 1) % n == 0


def period_end(start: date, step: str) -> date:
    """The day after the last day of the period of ``step`` that starts on ``start`` (exclusive end).

    Raises `TemporalError` when ``start`` is not a first day of that step."""
    if step not in STEPS:
        raise TemporalError(f"time step {step!r} is not one of {', '.join(STEPS)}")
    if not _is_start(start, step):
        raise TemporalError(f"{start:%Y-%m-%d} is not the first day of a {step} period")
    if step == "day":
        return start + timedelta(days=1)
    if step == "month":
        return _month_end(start)
    if step in ("pentad", "dekad"):
        last_start = 26 if step == "pentad" else 21
        if start.day == last_start:
            return _month_end(start)  # the last pentad / dekad runs to the month's end
        return start + timedelta(days=5 if step == "pentad" else 10)
    n = 8 if step == "8-day" else 16
    return min(start + timedelta(days=n), date(start.year + 1, 1, 1))  # the year's last one is shorter


def _as_dates(stamps) -> list[date]:
    idx = pd.DatetimeIndex(pd.to_datetime(np.asarray(stamps)))
    return [d.date() for d in idx]


def period_ends(starts, step: str) -> pd.DatetimeIndex:
    """Exclusive ends of the periods of ``step`` starting on ``starts`` (see `period_end`)."""
    return pd.DatetimeIndex([pd.Timestamp(period_end(d, step)) for d in _as_dates(starts)])


def period_starts_between(step: str, first, last) -> pd.DatetimeIndex:
    """Every first day of a ``step`` period from ``first`` to ``last`` (inclusive), in order."""
    d, end = pd.Timestamp(first).date(), pd.Timestamp(last).date()
    while not _is_start(d, step):
        d += timedelta(days=1)
    out = []
    while d <= end:
        out.append(pd.Timestamp(d))
        d = period_end(d, step)
    return pd.DatetimeIndex(out)


def step_fits_stamps(stamps, step: str) -> tuple[pd.Timestamp, pd.Timestamp] | None:
    """Whether sorted ``stamps`` are first days of consecutive-or-gapped periods of ``step``.

    Returns None when they fit, else the first two stamps that show it does not: a stamp that is
    not a first day of the step (with the stamp before it), or two stamps closer than one period.
    ``month`` accepts any stamp inside its month (mid-month and month-end stamps are common) and
    up to two stamps in one month (a duplicate solution, for the ``duplicates`` rule)."""
    ds = sorted(_as_dates(stamps))
    for i, d in enumerate(ds):
        prev = ds[i - 1] if i else None
        if step != "month" and not _is_start(d, step):
            return (pd.Timestamp(prev if prev else d), pd.Timestamp(d))
        if prev is not None:
            if step == "month":
                if (d.year, d.month) == (prev.year, prev.month):
                    continue  # two steps in one month: the duplicates rule decides
            elif d < period_end(prev, step):
                return (pd.Timestamp(prev), pd.Timestamp(d))
    if step == "month":
        # two stamps in a month are a duplicate solution (the duplicates rule decides); three or
        # more mean the stamps are of a finer step
        per_month: dict = {}
        for d in ds:
            per_month.setdefault((d.year, d.month), []).append(d)
        crowded = [v for v in per_month.values() if len(v) > 2]
        if crowded:
            return (pd.Timestamp(crowded[0][0]), pd.Timestamp(crowded[0][1]))
    return None


def infer_step(stamps) -> str | None:
    """The time step of ``stamps`` where it is unambiguous, else None.

    Daily and monthly stamps are recognised by their spacing (median 1 day; 27 to 32 days), and
    stamps that fit no finer step but fall in consecutive months (fewer than two per month on
    average) as monthly with some months given twice. Other
    steps must fit every stamp and show, in most places, one period between neighbours; the
    coarsest such step wins only when no finer step also fits (dekad stamps are also pentad starts
    two pentads apart, so pentad is never chosen for them)."""
    ds = sorted(_as_dates(stamps))
    if len(ds) < 2:
        return None
    gaps = np.diff(np.array(ds, dtype="datetime64[D]")).astype(float)
    med = float(np.median(gaps))
    if med == 1:
        return "day"
    if 27 <= med <= 32:
        return "month"
    fits = []
    for step in ("pentad", "dekad", "8-day", "16-day"):
        if step_fits_stamps(ds, step) is not None:
            continue
        adjacent = sum(period_end(a, step) == b for a, b in zip(ds[:-1], ds[1:]))
        if adjacent >= 0.5 * (len(ds) - 1):
            fits.append(step)
    if not fits:
        # monthly products with an extra solution in some month (the duplicates rule decides):
        # no finer step fits and the distinct months follow one another
        ords = sorted({d.year * 12 + d.month - 1 for d in ds})
        if len(ords) >= 2 and np.median(np.diff(ords)) == 1 and len(ds) < 2 * len(ords):
            return "month"
    return fits[0] if len(fits) == 1 else None


def month_overlap_days(starts, ends) -> tuple[pd.DatetimeIndex, np.ndarray, np.ndarray]:
    """Days of each period (``starts`` inclusive, ``ends`` exclusive) in each calendar month.

    Returns
    -------
    months : DatetimeIndex
        Month starts from the month of the first start to the month of the last day.
    overlap : ndarray (n_months, n_periods), days
    covered : ndarray (n_months,), bool: every day of the month lies in some period

    Raises `TemporalError` naming two stamps when two periods overlap (a day counted twice)."""
    s = pd.DatetimeIndex(pd.to_datetime(np.asarray(starts))).normalize()
    e = pd.DatetimeIndex(pd.to_datetime(np.asarray(ends))).normalize()
    order = np.argsort(s.values, kind="stable")
    so, eo = s[order], e[order]
    clash = np.flatnonzero(so.values[1:] < eo.values[:-1])  # one comparison for all: 70 ms less for 10 years of days
    if clash.size:
        k = int(clash[0]) + 1
        raise TemporalError(f"periods starting {so[k - 1]:%Y-%m-%d} and {so[k]:%Y-%m-%d} overlap "
                            f"(the first ends {eo[k - 1] - pd.Timedelta(days=1):%Y-%m-%d})")
    if (e <= s).any():
        bad = int(np.argmax(np.asarray(e <= s)))
        raise TemporalError(f"period starting {s[bad]:%Y-%m-%d} ends before it starts")
    if len(s) == 0:
        return pd.DatetimeIndex([]), np.zeros((0, 0)), np.zeros(0, bool)
    months = pd.date_range(s.min().to_period("M").to_timestamp(),
                           (e.max() - pd.Timedelta(days=1)).to_period("M").to_timestamp(), freq="MS")
    m0 = months.values.astype("datetime64[D]")[:, None]
    m1 = (months + pd.offsets.MonthBegin(1)).values.astype("datetime64[D]")[:, None]
    p0 = s.values.astype("datetime64[D]")[None, :]
    p1 = e.values.astype("datetime64[D]")[None, :]
    lo = np.maximum(m0, p0)
    hi = np.minimum(m1, p1)
    overlap = np.clip((hi - lo).astype(float), 0, None)
    dim = (m1 - m0).astype(float)[:, 0]
    covered = overlap.sum(axis=1) == dim  # periods never overlap, so the sum counts each day once
    return months, overlap, covered


def _period_weights(starts, ends, kind: str):
    months, overlap, covered = month_overlap_days(starts, ends)
    if kind == "rate":
        w = overlap  # value per day x days in the month
    elif kind == "amount":
        length = (pd.DatetimeIndex(ends) - pd.DatetimeIndex(starts)).days.values.astype(float)
        w = overlap / length[None, :]  # the share of the period's amount that falls in the month
    elif kind == "state":
        dim = np.asarray(months.days_in_month, float)
        w = overlap / dim[:, None]  # day-weighted mean over the month
    else:
        raise TemporalError(f"kind {kind!r} is not one of {', '.join(KINDS)}")
    return months, w, covered


def month_weights(starts, ends_or_step, kind: str = "rate") -> tuple[pd.DatetimeIndex, np.ndarray, pd.DatetimeIndex]:
    """The day-weighted map of periods onto calendar months, as a matrix.

    ``monthly = weights @ values`` (periods along the first axis of ``values``), where a month whose
    row is NaN is incomplete (empty, never scaled up) and a month is empty wherever a period with a
    non-zero weight in its row is NaN. `periods_to_months` applies it; the block readers apply it
    cell by cell inside their single pass (`wbexplore.spatial.zonal.zonal_mean_blocks`).

    Parameters
    ----------
    starts : sequence of dates
        First day of each period, in the order of ``values`` (need not be sorted).
    ends_or_step : sequence of dates (exclusive ends) or a step name of `STEPS`
    kind : "rate" | "amount" | "state"
        See `periods_to_months`: weights in days (rate), in shares of a period (amount) or in shares
        of a month (state).

    Returns
    -------
    months : DatetimeIndex of month starts, from the first period's month to the last day's month
    weights : ndarray (n_months, n_periods), float64; NaN rows for incomplete months
    incomplete : DatetimeIndex of the months not covered on every day

    Raises `TemporalError` when periods overlap or a start is not the first day of the named step.
    """
    starts = pd.DatetimeIndex(pd.to_datetime(np.asarray(starts))).normalize()
    if isinstance(ends_or_step, str):
        ends = period_ends(starts, ends_or_step)
    else:
        ends = pd.DatetimeIndex(pd.to_datetime(np.asarray(ends_or_step))).normalize()
    months, w, covered = _period_weights(starts, ends, kind)
    w = np.where(covered[:, None], w, np.nan)  # incomplete months are empty, never scaled up
    return months, w, months[~covered]


def periods_to_months(starts, ends_or_step, values, kind: str = "rate", *, axis: int = 0):
    """Map values of periods onto calendar months, day-weighted.

    Parameters
    ----------
    starts : sequence of dates
        First day of each period.
    ends_or_step : sequence of dates (exclusive ends) or a step name of `STEPS`
    values : numpy array (periods along ``axis``) or xarray.DataArray with a ``time`` dimension
        (possibly dask-backed; the result stays lazy). NaN is missing.
    kind : "rate" | "amount" | "state"
        ``rate``: values per day (e.g. mm/day); a month's total is rate x days of each period in it,
        in value-units x day. ``amount``: totals over each period (e.g. mm); each month receives the
        share of a period's days that fall in it. ``state``: a month's day-weighted mean (storage).

    Returns
    -------
    monthly : same type as ``values``, months along ``axis`` (``time`` with month-start stamps)
    months : DatetimeIndex of month starts
    incomplete : DatetimeIndex of the months not covered on every day (their values are NaN)

    A value that is NaN empties every month its period touches. Raises `TemporalError` when
    periods overlap or a start is not the first day of the named step.
    """
    if isinstance(ends_or_step, str) and ends_or_step == "day" and hasattr(values, "dims"):
        starts = pd.DatetimeIndex(pd.to_datetime(np.asarray(starts))).normalize()
        return _days_to_months_xarray(starts, values, kind)
    months, w, incomplete = month_weights(starts, ends_or_step, kind)
    if hasattr(values, "dims"):
        return _apply_weights_xarray(values, w, months), months, incomplete
    x = np.moveaxis(np.asarray(values, dtype=float), axis, 0)
    flat = x.reshape(x.shape[0], -1)
    out = _apply_weights(flat, w).reshape((len(months),) + x.shape[1:])
    return np.moveaxis(out, 0, axis), months, incomplete


def _apply_weights(flat: np.ndarray, w: np.ndarray) -> np.ndarray:
    """(months, periods) weights x (periods, cells) values; NaN where a touching value is NaN."""
    touch = (w != 0) & ~np.isnan(w) if np.isnan(w).any() else (w != 0)
    wf = np.nan_to_num(w)
    nan = np.isnan(flat)
    out = wf @ np.where(nan, 0.0, flat)
    bad = (touch.astype(float) @ nan.astype(float)) > 0
    out[bad] = np.nan
    out[np.isnan(w).any(axis=1)] = np.nan
    return out


def _apply_weights_xarray(da, w: np.ndarray, months: pd.DatetimeIndex):
    import xarray as xr

    tdim = "time"
    other = [d for d in da.dims if d != tdim]
    da = da.transpose(tdim, *other)

    def block(x):
        flat = np.asarray(x, float).reshape(x.shape[0], -1)
        return _apply_weights(flat, w).reshape((w.shape[0],) + x.shape[1:])

    data = da.data
    if hasattr(data, "dask"):
        import dask

        # a month draws on periods of any chunk; the method is named because dask otherwise imports
        # distributed to look for a client (0.6 s of a command's start-up) and, without one, picks "tasks"
        with dask.config.set({"array.rechunk.method": "tasks"}):
            data = data.rechunk({0: -1})
        out = data.map_blocks(block, chunks=((w.shape[0],),) + data.chunks[1:], dtype=float)
    else:
        out = block(data)
    return xr.DataArray(out, dims=(tdim, *other), coords={tdim: months, **{d: da[d] for d in other if d in da.coords}},
                        attrs=da.attrs, name=da.name)


def _days_to_months_xarray(days: pd.DatetimeIndex, da, kind: str):
    """Daily values to months through xarray's resample (sum for rates and amounts, mean for states):
    missing days become NaN and empty their month."""
    import warnings

    if days.has_duplicates:
        raise TemporalError(f"two time steps fall on the same day {days[days.duplicated()][0]:%Y-%m-%d}")
    da = da.assign_coords(time=days).sortby("time")
    full = pd.date_range(days.min().to_period("M").to_timestamp(),
                         days.max().to_period("M").to_timestamp(how="end").normalize(), freq="D")
    present = pd.Series(1, index=days).reindex(full, fill_value=0)
    per_month = present.groupby(full.to_period("M")).agg(["sum", "size"])
    incomplete = per_month.index[(per_month["sum"] < per_month["size"]).values].to_timestamp()
    if len(full) != len(days):
        da = da.reindex(time=full)  # missing days become NaN -> their months become NaN
    if hasattr(da.data, "dask"):
        # whole years per chunk, so a monthly sum never straddles chunks
        da = da.chunk({"time": tuple(int(v) for v in pd.Series(1, index=full).groupby(full.year).size().values)})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        r = da.resample(time="MS")
        out = r.mean(skipna=False) if kind == "state" else r.sum(skipna=False)
    return out, pd.DatetimeIndex(out["time"].values), pd.DatetimeIndex(incomplete)


def calendar_days_in_month(year: int, month: int) -> int:
    """Days in a month (standard library ``calendar``)."""
    return calendar.monthrange(year, month)[1]


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


def station_month_end_states(daily: pd.DataFrame) -> pd.DataFrame:
    """Daily means of a state (a water level) to its value at the end of each calendar month.

    A daily mean stands for the middle of its day, so the state at the boundary between month ``m``
    and ``m + 1`` (00:00 on the 1st) is taken half-way between the last day of ``m`` and the first day
    of ``m + 1``: the mean of the two (linear in time between day centres). Either day missing leaves
    the month's end state empty (NaN), never taken from another day.

    Parameters
    ----------
    daily : DataFrame
        Columns ``station``, ``t`` (the day, 00:00; one row per station and day) and ``v`` (NaN = missing).

    Returns
    -------
    DataFrame indexed by (``station``, ``month``: month-start stamps) with ``state`` (unit of ``v``):
    every month from a station's first to its last record.
    """
    parts = []
    for station, sub in daily.groupby("station", sort=True):
        v = pd.Series(sub["v"].to_numpy(float), index=pd.DatetimeIndex(sub["t"]))
        months = station_month_range(v.index.min(), v.index.max())
        last = months + pd.offsets.MonthEnd(0)
        first_next = last + pd.Timedelta(days=1)
        a = v.reindex(last).to_numpy()
        b = v.reindex(first_next).to_numpy()
        parts.append(pd.DataFrame({"station": station, "month": months, "state": 0.5 * (a + b)}))
    if not parts:
        return pd.DataFrame({"state": []}, index=pd.MultiIndex.from_arrays([[], pd.DatetimeIndex([])],
                                                                             names=["station", "month"]))
    return pd.concat(parts, ignore_index=True).set_index(["station", "month"])
