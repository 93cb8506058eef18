"""Merged sources in the explorer and the band's named source (issue 16, item 5), and three review findings.

Outside references: the closed-form inverse-variance formula (the variance of an inverse-variance weighted mean of
independent estimates is ``1 / sum(1 / v_k)``; e.g. Cochran 1954, Biometrics 10:101) for the merged posterior
variance without a constraint; hand arithmetic with pandas for the ensemble mean and the long-term years; the
state's own `balance/` calls for everything the views show (common practice, there is no outside reference for a
page's state).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from utils import canonical_series
from wbexplore.balance import uncertainty as unc
from wbexplore.balance.engine import with_ensembles
from wbexplore.balance.merge import merge_products, with_merged

GIVEN = {s: 4.0 for s in ("P0", "P1", "ET0", "ET1", "TWSA0", "TWSA1")}


def _stated(ds):
    """Stated absolute errors (mm) on every product: the merge can be built from them."""
    ds = ds.copy()
    for s, err in (("P0", 4.0), ("P1", 6.0), ("ET0", 3.0), ("ET1", 5.0), ("TWSA0", 4.0), ("TWSA1", 6.0)):
        ds[s].attrs = {**ds[s].attrs, "absolute_error_mm": err}
    return ds


# --------------------------------------------------------------------------- review findings, reproduced first
def test_ensembles_leave_merged_sources_out():
    """`with_ensembles` averaged ``merged_P`` with the products it is made of (found in review): the ensemble
    mean is the plain mean of the products only (pandas' mean over the two product columns, by hand)."""
    ds, _ = canonical_series(nb=2, nt=48)
    both = with_merged(ds, merge_products(ds, method="ckf", variances=GIVEN))
    out = with_ensembles(both)
    for c in ("P", "ET", "TWSA"):
        want = pd.DataFrame({s: ds[s].values[0] for s in (f"{c}0", f"{c}1")}).mean(axis=1).to_numpy()
        np.testing.assert_allclose(out[f"ensemble_{c}"].values[0], want, rtol=0, atol=1e-12)
        assert "merged" not in out[f"ensemble_{c}"].attrs["long_name"]


def test_a_merged_source_gets_its_posterior_error_not_the_spread():
    """A selection of ``merged_P`` got the product spread as its error (found in review); its error is the
    merge's posterior standard error, month by month, and says so."""
    ds, _ = canonical_series(nb=2, nt=48)
    m = merge_products(_stated(ds), method="ckf")
    both = with_merged(_stated(ds), m)
    for c in ("P", "ET", "TWSA"):
        e = unc.product_error(both, f"merged_{c}", 1)
        assert e.method == unc.POSTERIOR, e
        np.testing.assert_array_equal(e.variance, m[f"merged_{c}_standard_error"].values[1] ** 2)
        assert "constrained Kalman filter" in e.note
    assert unc.product_error(both, "merged_P", 1, method="spread").method == unc.SPREAD  # asked for: the spread


def test_posterior_variance_without_a_constraint_is_the_inverse_variance_formula():
    """Before the closure constraint, the merged variance is the closed-form inverse-variance one,
    ``1 / (1/v0 + 1/v1)``; the constraint only lowers it (a projection removes variance)."""
    from wbexplore.balance.merge import inverse_variance_merge

    ds, _ = canonical_series(nb=1, nt=48)
    ds = _stated(ds)
    _, var, n = inverse_variance_merge(np.stack([ds["P0"].values[0], ds["P1"].values[0]]),
                                       np.stack([np.full(48, 16.0), np.full(48, 36.0)]))
    np.testing.assert_allclose(var, 1.0 / (1 / 16.0 + 1 / 36.0), rtol=1e-15)
    post = merge_products(ds, method="ckf")["merged_P_standard_error"].values[0] ** 2
    ok = np.isfinite(post)
    assert ok.sum() > 40 and np.all(post[ok] <= 1.0 / (1 / 16.0 + 1 / 36.0) + 1e-12)
    assert np.any(post[ok] < 0.999 / (1 / 16.0 + 1 / 36.0))


def test_long_term_estimate_names_the_water_years_it_used():
    """The long-term row said WY<first>..WY<last> although a year in between was left out (found in review):
    it names the years actually used."""
    from wbexplore.balance import Selection
    from wbexplore.balance.estimate import estimate_by_difference
    from wbexplore.io.estimates import estimate_table

    ds, _ = canonical_series(nb=1, nt=60, flows=())
    ds = _stated(ds)
    ds["discharge"][0, 12 * 2 + 5] = np.nan  # 2003 loses a month of Q: not a whole year of known fluxes
    est = estimate_by_difference(ds, Selection("B0", "P0", None, "TWSA0"), "ET")
    assert est.long_term["years"] == [2001, 2002, 2004, 2005]
    row = estimate_table(est).set_index("scale").loc["long_term"]
    assert row["period"] == "WY2001..WY2002, WY2004..WY2005" and row["months"] == 48
