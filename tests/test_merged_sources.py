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
from wbexplore.balance import ClosureOptions
from wbexplore.balance import uncertainty as unc
from wbexplore.balance.engine import with_ensembles
from wbexplore.balance.merge import merge_products, merged_label, with_merged

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
    _, var, _ = inverse_variance_merge(np.stack([ds["P0"].values[0], ds["P1"].values[0]]),
                                       np.stack([np.full(48, 16.0), np.full(48, 36.0)]))
    np.testing.assert_allclose(var, 1.0 / (1 / 16.0 + 1 / 36.0), rtol=1e-15)
    post = merge_products(ds, method="ckf")["merged_P_standard_error"].values[0] ** 2
    ok = np.isfinite(post)
    assert ok.sum() > 40 and np.all(post[ok] <= 1.0 / (1 / 16.0 + 1 / 36.0) + 1e-12)
    assert np.any(post[ok] < 0.999 / (1 / 16.0 + 1 / 36.0))
    # raw fluxes and a backward difference: month 0 has no storage difference, so no balance row holds its P,
    # and its posterior is the inverse-variance formula itself
    raw = merge_products(ds, method="ckf", options=ClosureOptions(storage_change="backward", matched=False))
    assert raw["merged_P_standard_error"].values[0, 0] ** 2 == pytest.approx(1.0 / (1 / 16.0 + 1 / 36.0), rel=1e-12)


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


# --------------------------------------------------------------------------- the explorer: merged sources and the band
def _three_products(nb=3, nt=72, seed=5):
    """Three noisy products of each component (independent random errors: collocation sees them), except in B1,
    where P2 is a copy of P1 (their errors are one error: collocation finds P1's at zero and the merge refuses)."""
    ds, tr = canonical_series(nb=nb, nt=nt, flows=())
    rng = np.random.default_rng(seed)
    ds = ds.copy()
    for c, base in (("P", tr["P"]), ("ET", tr["ET"]), ("TWSA", tr["M"])):
        for j, sd in enumerate((8.0, 10.0, 12.0)):
            ds[f"{c}{j}"] = (("basin", "time"), base + rng.normal(0, sd, base.shape), {"role": "source", "component": c})
            ds[f"valid_fraction_{c}{j}"] = (("basin", "time"), np.ones(base.shape))
    ds["P2"].values[1] = ds["P1"].values[1]
    return ds


@pytest.fixture
def merged_state():
    from wbexplore.explorer.state import ClosureState

    return ClosureState(_three_products(), P="P0", ET="ET0", TWSA="TWSA0")


def test_pickers_offer_the_merged_source_where_it_can_be_built(merged_state):
    """B0 and B2 merge (collocation of three products); B1 cannot: no merged entry, and one line says why. A
    merged choice left for B1 goes back to the product chosen before it."""
    from wbexplore.balance import Selection, compute_selection

    s = merged_state
    assert s.param.P.objects == ["P0", "P1", "P2", "merged_P"] and s.merged_note() == ""
    assert s.labels["merged_ET"] == "Merged (constrained Kalman filter)"
    s.param.update(P="P2", ET="merged_ET", TWSA="merged_TWSA")
    s.P = "merged_P"
    res = s.result()
    assert res.uncertainty_source == {"P": "posterior", "ET": "posterior", "TWSA": "posterior"}
    # the same as a plain script: merge through balance/merge.py, add the merged sources, compute the selection
    ds = _three_products()
    m = merge_products(ds, method="ckf", basins=["B0"], options=ClosureOptions())
    ref = compute_selection(with_merged(ds, m.reindex(basin=ds["basin"].values)),
                            Selection("B0", "merged_P", "merged_ET", "merged_TWSA"))
    pd.testing.assert_frame_equal(res.frame, ref.frame)
    # the band is the posterior, not the spread of the products
    assert not np.allclose(res.frame["sigma_P"], np.sqrt(res.frame["disagreement_P"] ** 2), equal_nan=True)
    s.basin = "B1"
    assert "merged_P" not in s.param.P.objects and "merged_TWSA" not in s.param.TWSA.objects
    assert (s.P, s.ET, s.TWSA) == ("P2", "ET0", "TWSA0")  # the products chosen before the merged ones
    note = s.merged_note()
    assert note.startswith("Merged (constrained Kalman filter) not offered for B1: P: collocation cannot separate "
                           "P1's error from zero") and "\n" not in note
    from wbexplore.explorer import views

    assert "not offered for B1" in views.warnings_markdown(s.result(), s.unit_series(), notes=[s.merged_note()])
    assert "not offered" not in views.warnings_markdown(s.result(), s.unit_series())
    s.basin = "B2"
    assert s.param.ET.objects[-1] == "merged_ET" and s.merged_note() == ""
    s.P = "merged_P"
    mb = s.multi_basin()  # every basin's merged P where it can be built, none for B1
    assert np.isnan(mb.set_index("basin").loc["B1", "P_minus_ET"])
    assert np.isfinite(mb.set_index("basin").loc[["B0", "B2"], "P_minus_ET"]).all()


def test_ranking_and_best_take_the_merged_sources(merged_state):
    """The merged combination is ranked like any other; `select_best` may pick it."""
    s = merged_state
    r = s.ranking()
    assert len(r) == 4 * 4 * 4 and "merged_P" in set(r["P"])
    s.select_best()
    assert (s.P, s.ET, s.TWSA) == tuple(r.iloc[0][["P", "ET", "TWSA"]])


def test_the_page_names_the_band_source(merged_state):
    """The summary has one line naming each component's error (with the reason of a fallback) and the
    residual plot's legend names it too; the uncertainty messages are no longer dropped unseen."""
    from wbexplore import plots
    from wbexplore.explorer import views

    s = merged_state
    s.param.update(P="merged_P", ET="ET1", TWSA="TWSA0")
    html = views.summary_html(s.result())
    line = html.split("<div class='wbx-band'>")[1].split("</div>")[0]
    assert line == ("Band ± 2 sigma: P merge posterior; ET collocation (random error only); TWSA collocation "
                    "(random error only); Q 5% of flow")
    p = plots.ResidualPlot()
    p.update(s.result())
    assert p.band_item.label.value == "± 2 sigma (P merge posterior, ET collocation, TWSA collocation); collocation: random error only"
    s.basin = "B1"  # P1 and P2 share their error: collocation sees none in P1, the band falls back to the spread
    s.P = "P1"
    line = views.summary_html(s.result()).split("<div class='wbx-band'>")[1].split("</div>")[0]
    assert line.startswith("Band ± 2 sigma: P product spread (collocation sees no random error in it); ")
    p.update(s.result())
    assert p.band_item.label.value.startswith("± 2 sigma (P product spread, ET collocation")


def test_two_products_give_no_merged_entry_and_say_why():
    """Two products and no stated error: collocation needs three, so the merge is refused and said so."""
    from wbexplore.explorer.state import ClosureState

    ds, _ = canonical_series(nb=2, nt=48)
    s = ClosureState(ds)
    assert all(not str(o).startswith("merged_") for c in ("P", "ET", "TWSA") for o in getattr(s.param, c).objects)
    assert "has 2 product(s) (P0, P1): collocation needs at least 3" in s.merged_note()
    e = s.result().uncertainty["P"]
    assert e.method == "spread" and e.reason == "2 P products, collocation needs 3"


def test_page_pickers_follow_the_merged_sources(merged_state):
    """The page's source pickers (panel widgets, no browser) offer the merged entry under its label where the
    basin has one, drop it where it has not, and the warnings pane says why."""
    from wbexplore.explorer.app import Explorer

    s = merged_state
    ex = Explorer(s)
    ex.panel()
    assert ex.w_src["P"].options["Merged (constrained Kalman filter) [merged_P]"] == "merged_P"
    ex.w_src["TWSA"].value = "merged_TWSA"  # as a click would
    assert s.TWSA == "merged_TWSA" and s.result().uncertainty["TWSA"].method == "posterior"
    s.basin = "B1"
    assert "merged_P" not in ex.w_src["P"].options.values() and ex.w_src["TWSA"].value == s.TWSA == "TWSA0"
    warn = next(o for o in ex.panel().select(lambda o: "wbx-warnings" in getattr(o, "css_classes", [])))
    text = warn.object if isinstance(warn.object, str) else warn.object()
    assert "Kalman filter\\) not offered for B1" in str(text)  # escaped to literal Markdown text


def test_another_merge_variant_relabels_the_pickers_and_recomputes(merged_state):
    """`merge_method` set after the page is built (a notebook cell may): the merged entries' labels and the
    page's pickers name the new variant, and the merged result is that variant's, as a plain script computes it
    (found in review: the labels kept the first variant's name while the numbers were the new one's)."""
    from wbexplore.balance import Selection, compute_selection
    from wbexplore.explorer.app import Explorer

    s = merged_state
    ex = Explorer(s)
    ex.panel()
    s.P = "merged_P"
    s.merge_method = "pr"
    assert s.labels["merged_P"] == merged_label("pr") != merged_label("ckf")
    assert ex.w_src["P"].options[f"{merged_label('pr')} [merged_P]"] == "merged_P" == s.P
    assert not any(merged_label("ckf") in k for k in ex.w_src["ET"].options)
    ds = _three_products()
    m = merge_products(ds, method="pr", basins=["B0"], options=ClosureOptions())
    ref = compute_selection(with_merged(ds, m.reindex(basin=ds["basin"].values)),
                            Selection("B0", "merged_P", s.ET, s.TWSA))
    pd.testing.assert_frame_equal(s.result().frame, ref.frame)
    # the page's views follow the variant too (found by review: merge_method was in no view's parameters)
    resid = next(o for o in ex.panel().select(lambda o: "wbx-residual" in (getattr(o, "css_classes", None) or [])))
    np.testing.assert_allclose(resid.object.renderers[1].data_source.data["residual"],
                               ref.frame["residual"].to_numpy(), equal_nan=True)
    s.merge_method = "ckf"
    ck = merge_products(ds, method="ckf", basins=["B0"], options=ClosureOptions())
    ref = compute_selection(with_merged(ds, ck.reindex(basin=ds["basin"].values)),
                            Selection("B0", "merged_P", s.ET, s.TWSA))
    np.testing.assert_allclose(resid.object.renderers[1].data_source.data["residual"],
                               ref.frame["residual"].to_numpy(), equal_nan=True)
