"""wbexplore.temporal: time steps onto calendar months.

Outside references: calendar facts from the standard library's ``calendar``; xarray's own
``resample`` on daily data; for composites an independent day-expansion (repeat each period's
rate over its days, sum per month) written here with plain pandas.
"""

import calendar
from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from wbexplore import temporal as T

YEARS = range(2019, 2026)  # includes the leap years 2020 and 2024


def _len(start, step):
    return (T.period_end(start, step) - start).days


def test_dekad_and_pentad_lengths_follow_the_calendar():
    # reference: calendar.monthrange; dekads 10/10/8-11 days, pentads 5 days except the sixth
    for y in YEARS:
        for m in range(1, 13):
            dim = calendar.monthrange(y, m)[1]
            assert [_len(T.dekad_start(y, m, k), "dekad") for k in (1, 2, 3)] == [10, 10, dim - 20]
            assert [_len(T.pentad_start(y, m, k), "pentad") for k in range(1, 7)] == [5] * 5 + [dim - 25]
    assert {calendar.monthrange(y, m)[1] - 20 for y in YEARS for m in range(1, 13)} == {8, 9, 10, 11}


@pytest.mark.parametrize("step, n", [("8-day", 8), ("16-day", 16)])
def test_composites_restart_on_1_january_and_the_last_is_shorter(step, n):
    for y in YEARS:
        days = 366 if calendar.isleap(y) else 365
        s = T.period_starts_between(step, f"{y}-01-01", f"{y}-12-31")
        assert len(s) == -(-days // n)
        ends = T.period_ends(s, step)
        assert ends[-1] == pd.Timestamp(y + 1, 1, 1)  # the last composite ends on 31 December
        assert (ends[-1] - s[-1]).days == days - n * (len(s) - 1)
        assert ((ends[:-1] - s[:-1]).days == n).all()


def test_bad_period_numbers_refused():
    with pytest.raises(T.TemporalError, match="dekad 4"):
        T.dekad_start(2020, 1, 4)
    with pytest.raises(T.TemporalError, match="pentad 7"):
        T.pentad_start(2020, 1, 7)
    with pytest.raises(T.TemporalError, match="2020-01-05 is not the first day"):
        T.period_end(date(2020, 1, 5), "dekad")


def test_daily_path_matches_xarray_resample():
    # reference: xarray's resample(time="MS").sum() on complete daily data
    days = pd.date_range("2019-01-01", "2020-12-31", freq="D")
    rng = np.random.default_rng(1)
    vals = rng.gamma(1.0, 2.0, (len(days), 3, 4))
    da = xr.DataArray(vals, dims=("time", "y", "x"), coords={"time": days})
    ref = da.resample(time="MS").sum()
    got, months, inc = T.periods_to_months(days, "day", da, "rate")
    np.testing.assert_allclose(got.values, ref.values, rtol=1e-12)
    assert len(inc) == 0
    # the general overlap arithmetic gives the same on plain numpy
    got2, months2, _ = T.periods_to_months(days, days + pd.Timedelta(days=1), vals, "rate")
    np.testing.assert_allclose(got2, ref.values, rtol=1e-12)
    assert (months2 == pd.DatetimeIndex(ref.time.values)).all()


def _day_expansion(starts, step, values, kind):
    """Independent reference: spread each period over its days, sum per calendar month."""
    rows = []
    for s, v in zip(starts, values):
        e = T.period_end(s.date(), step)
        n = (e - s.date()).days
        for k in range(n):
            rows.append((s + timedelta(days=k), v if kind == "rate" else v / n))
    df = pd.DataFrame(rows, columns=["day", "v"]).set_index("day")
    return df["v"].groupby(df.index.to_period("M")).sum()


@pytest.mark.parametrize("step", ["pentad", "dekad", "8-day", "16-day"])
@pytest.mark.parametrize("kind", ["rate", "amount"])
def test_composites_match_a_day_expansion(step, kind):
    starts = T.period_starts_between(step, "2019-01-01", "2020-12-31")
    vals = np.random.default_rng(2).uniform(0, 5, len(starts))
    got, months, inc = T.periods_to_months(starts, step, vals, kind)
    ref = _day_expansion(starts, step, vals, kind)
    assert len(inc) == 0
    np.testing.assert_allclose(got, ref.values, rtol=1e-12)
    assert list(months.to_period("M")) == list(ref.index)


def test_state_is_the_day_weighted_mean():
    starts = T.period_starts_between("dekad", "2021-02-01", "2021-02-28")
    got, _, _ = T.periods_to_months(starts, "dekad", np.array([10.0, 20.0, 40.0]), "state")
    assert got[0] == pytest.approx((10 * 10 + 20 * 10 + 40 * 8) / 28)


def test_partial_months_are_empty_and_flagged():
    starts = T.period_starts_between("8-day", "2020-01-01", "2020-03-31")[1:]  # starts 9 January
    got, months, inc = T.periods_to_months(starts, "8-day", np.ones(len(starts)), "rate")
    assert pd.Timestamp("2020-01-01") in inc and np.isnan(got[0])
    assert np.isfinite(got[1])


def test_overlapping_periods_refused():
    s = pd.DatetimeIndex(["2020-01-01", "2020-01-05"])
    e = pd.DatetimeIndex(["2020-01-09", "2020-01-13"])
    with pytest.raises(T.TemporalError, match="2020-01-01 and 2020-01-05 overlap"):
        T.periods_to_months(s, e, np.ones(2), "rate")


@pytest.mark.parametrize("step", ["day", "pentad", "dekad", "8-day", "16-day", "month"])
def test_steps_inferred_where_unambiguous(step):
    s = T.period_starts_between(step, "2020-01-01", "2021-12-31")
    assert T.infer_step(s) == step
    assert T.step_fits_stamps(s, step) is None


def test_a_declared_step_that_does_not_fit_names_two_stamps():
    s = T.period_starts_between("8-day", "2020-01-01", "2020-03-31")
    assert T.step_fits_stamps(s, "dekad") == (pd.Timestamp("2020-01-01"), pd.Timestamp("2020-01-09"))
    assert T.infer_step(pd.DatetimeIndex(["2020-01-01", "2020-01-04", "2020-01-07"])) is None


STEP = st.sampled_from(["day", "pentad", "dekad", "8-day", "16-day", "month"])


@settings(max_examples=40, deadline=None)
@given(step=STEP, year=st.integers(1999, 2030), years=st.integers(1, 3), n=st.integers(2, 60),
       drop=st.integers(0, 59), kind=st.sampled_from(["rate", "amount"]), seed=st.integers(0, 2**16))
def test_property_totals_add_up_and_a_gap_empties_exactly_its_months(step, year, years, n, drop, kind, seed):
    rng = np.random.default_rng(seed)
    # gap-free periods over whole years: every month complete, monthly totals add up to the total
    starts = T.period_starts_between(step, f"{year}-01-01", f"{year + years - 1}-12-31")
    ends = T.period_ends(starts, step)
    vals = rng.uniform(0, 10, len(starts))
    got, months, inc = T.periods_to_months(starts, ends, vals, kind)
    per_period = vals * (ends - starts).days.values if kind == "rate" else vals
    assert len(inc) == 0 and len(months) == 12 * years
    assert got.sum() == pytest.approx(per_period.sum(), rel=1e-9)
    # any gap-free run: each period's days are shared out exactly over the months
    run = starts[:n]
    _, overlap, _ = T.month_overlap_days(run, T.period_ends(run, step))
    np.testing.assert_array_equal(overlap.sum(axis=0), (T.period_ends(run, step) - run).days.values)
    # one missing period empties exactly the months it touches (and no other)
    k = drop % len(starts)
    if 0 < k < len(starts) - 1:
        keep = np.arange(len(starts)) != k
        got2, months2, inc2 = T.periods_to_months(starts[keep], ends[keep], vals[keep], kind)
        touched = set(pd.period_range(starts[k].to_period("M"), (ends[k] - pd.Timedelta(days=1)).to_period("M")))
        assert set(inc2.to_period("M")) == touched
        empty = np.isnan(got2)
        assert set(months2[empty].to_period("M")) == touched
        np.testing.assert_allclose(got2[~empty], pd.Series(got, index=months).reindex(months2[~empty]).values,
                                   rtol=1e-12)
