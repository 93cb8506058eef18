"""What made one selection fast must not change a number (issue 14, performance; speed itself is measured in
benchmarks/balance.py, never here).

- Collocation error variances are memoised by content (`uncertainty.collocation_variances`): checked against
  `collocation.multiple_collocation` called directly, and a series changed in place must never be served a
  stale estimate (the risk of a cache keyed on the object instead of its values).
- A selection computed with a warm memo equals, bitwise, the same selection computed with an empty one.
- The metrics' climatology and annual totals gather all months (years) at once: bitwise the month-by-month
  and year-by-year loops with `numpy.nanmean` / `numpy.sum` they replace; `_nanmean` is bitwise `numpy.nanmean`.
- Years and months of the stamps, and the period mask, against pandas' own field accessors and comparisons.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wbexplore.balance import Selection, compute_selection
from wbexplore.balance import collocation, metrics
from wbexplore.balance import uncertainty as unc
from wbexplore.balance.engine import _year_month, water_year
from wbexplore.balance.options import period_mask


def _stack(rng, k=4, n=120):
    t = rng.gamma(3.0, 30.0, n)
    x = np.stack([t * (1 + 0.1 * i) + rng.normal(0, 4.0 + 2 * i, n) for i in range(k)])
    x[:, rng.random(n) < 0.1] = np.nan
    return x


@pytest.fixture
def counted(monkeypatch):
    """Empty memo; counts the collocations actually computed."""
    calls = []
    real = unc.multiple_collocation

    def counting(*a, **kw):
        calls.append(1)
        return real(*a, **kw)

    monkeypatch.setattr(unc, "multiple_collocation", counting)
    unc._MEMO.clear()
    yield calls
    unc._MEMO.clear()


def test_memoised_collocation_is_the_direct_one_and_computed_once(counted):
    rng = np.random.default_rng(14)
    x = _stack(rng)
    names = ["a", "b", "c", "d"]
    direct = collocation.multiple_collocation(x, names=names, min_samples=unc.MIN_COLLOCATION_MONTHS)
    first = unc.collocation_variances(x, names, component="P")
    first["a"]["error_variance"] = -1.0  # a caller changing its copy changes nothing for the next one
    second = unc.collocation_variances(x.copy(), names, component="P")
    assert first is not second
    assert len(counted) == 1
    assert second == direct
    # other ids, component or values: computed again
    unc.collocation_variances(x, ["a", "b", "c", "e"], component="P")
    unc.collocation_variances(x, names, component="ET")
    y = x.copy()
    y[0, 5] += 1e-9
    assert unc.collocation_variances(y, names, component="P") == collocation.multiple_collocation(
        y, names=names, min_samples=unc.MIN_COLLOCATION_MONTHS)
    assert len(counted) == 4


def _series(rng, months=96):
    time = pd.date_range("2001-01-01", periods=months, freq="MS")
    ds = xr.Dataset(coords={"basin": ["B", "C"], "time": time})
    t = rng.gamma(3.0, 30.0, (2, months))
    for comp, k in (("P", 4), ("ET", 3), ("TWSA", 3)):
        for i in range(k):
            ds[f"{comp}{i}"] = (("basin", "time"), t * (0.5 + 0.1 * i) + rng.normal(0, 3.0 + 2 * i, (2, months)),
                                {"role": "source", "component": comp})
    ds["discharge"] = (("basin", "time"), 0.3 * t, {"component": "Q"})
    return ds


def test_series_changed_in_place_is_not_served_a_stale_estimate(counted):
    ds = _series(np.random.default_rng(1))
    before = unc.product_error(ds, "P1", 0)
    assert before.method == unc.COLLOCATION
    ds["P2"].values[0] += np.random.default_rng(2).normal(0, 10.0, ds.sizes["time"])  # same object, new values
    after = unc.product_error(ds, "P1", 0)
    stack = np.stack([ds[f"P{i}"].values[0] for i in range(4)])
    direct = collocation.multiple_collocation(stack, names=["P0", "P1", "P2", "P3"], min_samples=24)
    assert after.variance[0] == direct["P1"]["error_variance"]
    assert after.variance[0] != before.variance[0]
    assert len(counted) == 2


@pytest.mark.parametrize("options", [{}, {"start": "2002-03", "end": "2006-08"}, {"storage_change": "backward"},
                                     {"min_valid_fraction": 0.9, "fill_gaps": True}])
def test_selection_with_a_warm_memo_is_bitwise_the_cold_one(options, counted):
    ds = _series(np.random.default_rng(3))
    picks = [("P0", "ET0", "TWSA0"), ("P2", "ET1", "TWSA2"), ("P3", "ET2", "TWSA1")]
    cold = []
    for p, e, s in picks:
        unc._MEMO.clear()
        cold.append(compute_selection(ds, Selection("C", p, e, s, **options)))
    n_cold = len(counted)
    for (p, e, s), c in zip(picks, cold):
        warm = compute_selection(ds, Selection("C", p, e, s, **options))
        pd.testing.assert_frame_equal(warm.frame, c.frame, check_exact=True)
        assert warm.metrics == pytest.approx(c.metrics, rel=0, abs=0, nan_ok=True)
        assert warm.messages == c.messages
        assert {k: (e.method, e.note) for k, e in warm.uncertainty.items()} == \
               {k: (e.method, e.note) for k, e in c.uncertainty.items()}
    assert len(counted) == n_cold  # every collocation of the warm pass came from the memo


def test_memo_is_bounded_least_recently_used():
    m = unc._Memo(2)
    m.put("a", 1)
    m.put("b", 2)
    assert m.get("a") == 1  # "a" used: "b" is now the oldest
    m.put("c", 3)
    assert len(m) == 2 and m.get("b") is None and m.get("a") == 1 and m.get("c") == 3


# --------------------------------------------------------------------------- metrics: grouped = looped, bitwise
def _loops(res, Q, moy, wy):
    """Climatology of Q and annual residual totals, month by month and year by year (the form replaced)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        clim = np.full(Q.shape, np.nan)
        for m in range(1, 13):
            sel = moy == m
            if sel.any():
                clim[..., sel] = np.nanmean(Q[..., sel], axis=-1)[..., None]
        totals = []
        for y in np.unique(wy):
            sel = wy == y
            if sel.sum() != 12:
                continue
            blk = res[..., sel]
            totals.append(np.where(np.all(np.isfinite(blk), axis=-1), np.sum(blk, axis=-1), np.nan))
        tot = np.stack(totals, axis=-1)
        return clim, np.nanmean(tot, axis=-1), np.nanmean(tot * tot, axis=-1)


@pytest.mark.parametrize("shape", [(173,), (3, 173), (2, 3, 4, 173), (1, 5, 1, 2, 173), (7, 1, 173)])
@pytest.mark.parametrize("first", ["2001-04-01", "1965-11-01"])
def test_grouped_climatology_and_annual_totals_are_the_loops(shape, first):
    rng = np.random.default_rng(len(shape))
    months = pd.date_range(first, periods=shape[-1], freq="MS")
    res, Q = rng.normal(0, 20, shape), rng.gamma(2.0, 30.0, shape)
    res[rng.random(shape) < 0.05] = np.nan
    Q[rng.random(shape) < 0.1] = np.nan
    moy = months.month.values
    wy = water_year(months, 10)
    clim = np.full(Q.shape, np.nan)
    for idx in metrics._month_groups(moy):
        clim[..., idx] = metrics._nanmean(Q[..., idx])[..., None]
    idx = metrics._complete_years(wy)
    blk = res[..., idx]
    tot = np.ascontiguousarray(np.where(np.all(np.isfinite(blk), axis=-1), np.sum(blk, axis=-1), np.nan))
    ref_clim, ref_bias, ref_sq = _loops(res, Q, moy, wy)
    np.testing.assert_array_equal(clim, ref_clim)
    np.testing.assert_array_equal(metrics._nanmean(tot), ref_bias)
    np.testing.assert_array_equal(metrics._nanmean(tot * tot), ref_sq)
    # and through the public function: out-of-range month numbers get no climatology, as before
    bad = moy.copy()
    bad[:5] = 0
    got = metrics.metrics_from_residual(res, res + Q, Q, Q, month_of_year=bad, water_year=wy)
    qhat = res + Q
    ok = np.isfinite(res) & np.isfinite(Q)
    Qm, qm = np.where(ok, Q, np.nan), np.where(ok, qhat, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        c = np.full(Q.shape, np.nan)
        for m in range(1, 13):
            c[..., bad == m] = np.nanmean(Qm[..., bad == m], axis=-1)[..., None]
        with np.errstate(invalid="ignore", divide="ignore"):
            ref = 1 - np.nansum((qm - Qm) ** 2, axis=-1) / np.nansum((Qm - c) ** 2, axis=-1)
    np.testing.assert_array_equal(got["nse_cyclo"], np.where(np.isfinite(ref), ref, np.nan))


@pytest.mark.parametrize("shape", [(240,), (5, 240), (2, 3, 1, 37), (4, 0)])
def test_nanmean_is_numpys(shape):
    rng = np.random.default_rng(7)
    a = rng.normal(50, 30, shape)
    a[rng.random(shape) < 0.2] = np.nan
    if a.ndim > 1 and a.shape[-1]:
        a[0] = np.nan  # a slice with no value: NaN, without numpy's warning
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = np.nanmean(a, axis=-1)
    got = metrics._nanmean(a)
    np.testing.assert_array_equal(got, ref)
    assert type(got) is type(ref)


def test_years_months_and_period_mask_are_pandas():
    months = pd.date_range("1958-07-01", periods=900, freq="MS")
    y, m = _year_month(months)
    np.testing.assert_array_equal(y, months.year.values)
    np.testing.assert_array_equal(m, months.month.values)
    assert y.dtype == months.year.values.dtype and m.dtype == months.month.values.dtype
    for start, end in ((None, None), ("1960-02", "1999-12"), ("1958-07", None), (None, "1958-07"), ("2030-01", None)):
        lo = pd.Timestamp(start) if start else months[0]
        hi = pd.Timestamp(end) if end else months[-1]
        np.testing.assert_array_equal(period_mask(months, start, end), np.asarray((months >= lo) & (months <= hi)))
