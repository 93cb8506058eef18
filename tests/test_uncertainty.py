"""The error of the chosen product (issue 16, item 1): collocation, stated errors, the spread, and the
propagation of monthly error variances through the window-matching and storage-difference kernels.

Outside references: Monte Carlo draws through the kernels themselves (`match_window`, `storage_change`,
plain sums), never the variance formulas under test; the collocation identities of Stoffelen (1998) and
McColl et al. (2014, GRL 41:6229) checked on synthetic products whose error variances are known by
construction; the demo's truth (truth.nc) for the products whose errors are of the kind collocation assumes.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from wbexplore.balance import Selection, compute_selection
from wbexplore.balance import uncertainty as unc
from wbexplore.balance.collocation import multiple_collocation, triple_collocation
from wbexplore.balance.storage import (DS_KERNELS, KERNELS, kernel, match_window, match_window_variance,
                                       storage_change, storage_change_variance, sum_variance)
from wbexplore.errors import InputError

DRAWS = 20_000


# --------------------------------------------------------------------------- Monte Carlo of the propagation
def _draws(var, rng):
    """DRAWS realisations (DRAWS, T) of independent zero-mean normal errors with per-month variances."""
    return rng.standard_normal((DRAWS, var.size)) * np.sqrt(var)


@pytest.mark.parametrize("method", ["central", "backward", "forward"])
def test_propagated_variances_match_monte_carlo(method):
    """Per-month variances of window-matched fluxes and of the storage change, and of their annual sums,
    against the empirical variance of 20,000 error draws pushed through the kernels themselves. The
    sampling error of a variance from 20,000 normal draws is sqrt(2/20000) = 1%: 3% is three of them."""
    rng = np.random.default_rng(16)
    T = 30
    var = rng.uniform(4.0, 400.0, T)  # heteroscedastic months, mm2
    e = _draws(var, rng)
    inner = slice(1, T - 1)  # the kernels need both neighbours
    mc = np.var(match_window(e, method), axis=0, ddof=1)
    np.testing.assert_allclose(match_window_variance(var, method)[inner], mc[inner], rtol=0.03)
    mc = np.var(storage_change(e, method), axis=0, ddof=1)
    np.testing.assert_allclose(storage_change_variance(var, method)[inner], mc[inner], rtol=0.03)
    # a water year (months 6..17) summed: the filtered months share raw months, so variances do not add
    year = np.zeros(T, bool)
    year[6:18] = True
    for term, filt in (("ET", match_window), ("dS", storage_change)):
        mc = np.var(filt(e, method)[:, year].sum(axis=1), ddof=1)
        got = sum_variance(var, kernel(term, method), year)
        assert got == pytest.approx(mc, rel=0.03), (term, method)
    # and the naive sum of per-month variances is wrong for the storage difference (telescoping sum)
    naive = storage_change_variance(var, method)[year].sum()
    assert abs(naive - np.var(storage_change(e, method)[:, year].sum(axis=1))) > 0.2 * naive


def test_kernels_are_the_storage_module_ones():
    assert kernel("ET", "central") == KERNELS["central"]
    assert kernel("P", "central", matched=False) == (0.0, 1.0, 0.0)
    assert kernel("dS", "backward") == DS_KERNELS["backward"]
    # the signed storage kernel reproduces storage_change (arithmetic on a ramp: M = 0, 1, 4, 9)
    m = np.array([0.0, 1.0, 4.0, 9.0])
    assert storage_change(m, "central")[1] == pytest.approx(-0.5 * 0.0 + 0.5 * 4.0)
    assert sum_variance(np.array([1.0, np.nan, 1.0]), (0.0, 1.0, 0.0), np.array([True, False, True])) == 2.0
    assert np.isnan(sum_variance(np.array([1.0, np.nan, 1.0]), (0.25, 0.5, 0.25), np.array([True, False, False])))


# --------------------------------------------------------------------------- collocation on synthetic products
def _products(rng, n, sds, scales, offsets):
    t = rng.gamma(3.0, 30.0, n)
    return np.stack([b * t + a + rng.normal(0.0, s, n) for s, b, a in zip(sds, scales, offsets)])


@pytest.mark.parametrize("k", [3, 4, 5])
def test_collocation_recovers_known_error_variances(k):
    """Error variances known by construction (x_i = a_i + b_i t + e_i, independent normal errors; the
    assumptions of Stoffelen 1998 / McColl et al. 2014). 400 replicates of 240 months: the mean estimate
    must be within 3 standard errors of that mean (its own sampling error, from the replicates; a 0.3%
    chance of a false failure for an unbiased estimator). One estimate from 20,000 samples must be within
    4 of its own standard errors (the replicates' spread scaled by sqrt(240 / 20000))."""
    rng = np.random.default_rng(100 + k)
    sds = [6.0, 10.0, 15.0, 8.0, 12.0][:k]
    scales = [1.0, 0.8, 1.2, 0.9, 1.1][:k]
    offs = [0.0, 10.0, -5.0, 3.0, 0.0][:k]
    names = [f"p{i}" for i in range(k)]
    est = np.array([[multiple_collocation(_products(rng, 240, sds, scales, offs), names=names)[n]["error_variance"]
                     for n in names] for _ in range(400)])
    truth = np.square(sds)
    se = est.std(axis=0, ddof=1) / np.sqrt(len(est))
    assert np.all(np.abs(est.mean(axis=0) - truth) < 3 * se), (est.mean(axis=0), truth, se)
    one = multiple_collocation(_products(rng, DRAWS, sds, scales, offs), names=names)
    got = np.array([one[n]["error_variance"] for n in names])
    assert np.all(np.abs(got - truth) < 4 * est.std(axis=0, ddof=1) * np.sqrt(240 / DRAWS)), (got, truth)


def test_three_products_is_triple_collocation():
    rng = np.random.default_rng(3)
    x = _products(rng, 500, [5.0, 9.0, 14.0], [1.0, 0.7, 1.3], [0.0, 4.0, 1.0])
    tc = triple_collocation(*x, names=["a", "b", "c"])
    mc = multiple_collocation(x, names=["a", "b", "c"])
    for n in "abc":
        assert mc[n]["error_variance"] == pytest.approx(tc[n]["error_variance"], rel=1e-12)
        assert mc[n]["triplets"] == 1


# --------------------------------------------------------------------------- the order: stated, collocation, spread
def _series(n_products=3, *, months=60, stated=None, seed=5):
    rng = np.random.default_rng(seed)
    t = rng.gamma(3.0, 30.0, months)
    time = xr.date_range("2001-01-01", periods=months, freq="MS", use_cftime=False)
    ds = xr.Dataset(coords={"basin": ["B"], "time": time})
    for i in range(n_products):
        ds[f"p{i}"] = (("basin", "time"), (t + rng.normal(0, 5.0 + 3 * i, months))[None])
        ds[f"p{i}"].attrs = {"role": "source", "component": "P", "units": "mm/month"}
    if stated:
        ds["p0"].attrs.update(stated)
    return ds


def test_order_stated_then_collocation_then_spread():
    ds = _series(3, stated={"relative_error": 0.1})
    e = unc.product_error(ds, "p0", 0)
    assert e.method == unc.STATED
    np.testing.assert_allclose(e.variance, (0.1 * ds["p0"].values[0]) ** 2)  # arithmetic of the stated form
    e = unc.product_error(ds, "p1", 0)
    assert e.method == unc.COLLOCATION and np.all(e.variance > 0) and "triple collocation" in e.note
    assert np.ptp(e.variance) == 0  # one error variance for every month
    two = _series(2)
    e = unc.product_error(two, "p1", 0)
    assert e.method == unc.SPREAD
    np.testing.assert_allclose(e.sigma, np.abs(two["p0"].values[0] - two["p1"].values[0]) / np.sqrt(2))
    assert "not the chosen product's error" in unc.method_label(e.method)
    assert unc.product_error(_series(1), "p0", 0).method == unc.NONE


def test_short_period_falls_back_with_reason_or_is_refused():
    ds = _series(3)
    short = np.zeros(ds.sizes["time"], bool)
    short[:12] = True
    e = unc.product_error(ds, "p1", 0, period=short)
    assert e.method == unc.SPREAD and "at least 24 needed" in e.note
    with pytest.raises(InputError, match=r"period too short .* 12 months .* at least 24 needed"):
        unc.product_error(ds, "p1", 0, period=short, strict=True)
    with pytest.raises(InputError, match="at least 24 needed"):
        unc.product_error(ds, "p1", 0, period=short, method="collocation")


def test_collocation_asked_with_two_products_says_how_many():
    with pytest.raises(InputError, match=r"at least three P products; there are 2 \(p0, p1\)"):
        unc.product_error(_series(2), "p0", 0, method="collocation")


@pytest.mark.parametrize("bad", [0.0, -0.1, float("inf"), float("nan"), "x"])
def test_stated_errors_must_be_positive_and_finite(bad):
    ds = _series(3, stated={"absolute_error_mm": bad})
    with pytest.raises(InputError, match="'p0': field 'absolute_error_mm'.*positive finite"):
        unc.product_error(ds, "p0", 0)


def test_unknown_method_refused():
    with pytest.raises(InputError, match="--uncertainty 'best'"):
        unc.product_error(_series(3), "p0", 0, method="best")


# --------------------------------------------------------------------------- on the demo
def test_selection_records_its_uncertainty_source(demo_series):
    sel = Selection("VEL", "heron", "tansy", "quarry")
    r = compute_selection(demo_series, sel)
    assert r.uncertainty_source == {"P": "collocation", "ET": "collocation", "TWSA": "spread"}
    assert "uncertainty: P collocation, ET collocation, TWSA spread" in r.messages[-1]
    s = compute_selection(demo_series, sel, uncertainty="spread")
    assert s.uncertainty_source == {"P": "spread", "ET": "spread", "TWSA": "spread"}
    # the spread stays available as the product disagreement, whichever source the sigmas use
    np.testing.assert_array_equal(r.frame["disagreement_P"], s.frame["disagreement_P"])
    ok = r.frame["valid"]
    # the finding: the spread of every product (biased ones included) is far wider than the
    # chosen product's own error
    assert s.frame.loc[ok, "sigma_P"].median() > 2 * r.frame.loc[ok, "sigma_P"].median()


# Products whose error is, by construction (demo.PRODUCTS), random and independent of the truth: the kind
# collocation assumes. kestrel (x1.15 south of 10 N), sedge (damped cycle) and fennel (x0.85) have
# systematic errors that a linear calibration absorbs: collocation must not (and does not) see them.
RANDOM_ERROR = ("plover", "tansy")
SYSTEMATIC = ("kestrel", "sedge", "fennel")


def test_demo_collocation_within_factor_1_5_of_truth(demo_series, demo_truth):
    """The truth error variance is that of the product about its linear calibration to truth.nc
    (x = a + b t + e, the error collocation estimates), over the months where all three are valid."""
    comps = {"P": ["kestrel", "plover", "heron"], "ET": ["sedge", "fennel", "tansy"]}
    for b in [str(x) for x in demo_series["basin"].values]:
        bi = [str(x) for x in demo_series["basin"].values].index(b)
        for comp, ids in comps.items():
            t = demo_truth[comp].sel(basin=b).values
            x = np.stack([np.where(demo_series[f"valid_fraction_{s}"].values[bi] >= 0.5,
                                   demo_series[s].values[bi], np.nan) for s in ids])
            ok = np.all(np.isfinite(x), axis=0)
            for i, s in enumerate(ids):
                e = unc.product_error(demo_series, s, bi)
                fit = np.polyval(np.polyfit(t[ok], x[i, ok], 1), t[ok])
                true_ev = np.var(x[i, ok] - fit, ddof=1)
                raw_ev = np.var(x[i, ok] - t[ok], ddof=1)
                if s in RANDOM_ERROR:
                    assert e.method == unc.COLLOCATION, (b, s, e.note)
                    ratio = e.variance[ok][0] / true_ev
                    assert 1 / 1.5 <= ratio <= 1.5, (b, s, ratio)
                elif s in SYSTEMATIC and raw_ev > 1.0:  # kestrel is exact north of 12 N
                    tc = unc.collocation_variances(x, ids, component=comp)[s]["error_variance"]
                    # blind to the systematic part: well below the error against the truth
                    assert abs(tc) < 0.5 * raw_ev, (b, s, tc, raw_ev)


# --------------------------------------------------------------------------- every output names the source
def test_closure_terms_record_the_uncertainty_source(demo_series):
    import json

    from wbexplore.balance import closure_terms

    t = closure_terms(demo_series, basins=["VEL", "TIR"])
    src = json.loads(t.attrs["uncertainty_source"])
    # two TWSA products: the spread; the products with random errors: collocation; kestrel, fennel and
    # sedge, whose errors are pure scalings (sedge: its departures halved) over Velumbe, come out as sampling
    # noise around zero (collocation cannot see a scaling) and fall back to the spread (sedge's tiny positive
    # estimate was used before the review of issue 16)
    assert src["VEL"] == {"kestrel": "spread", "plover": "collocation", "heron": "collocation",
                          "sedge": "spread", "fennel": "spread", "tansy": "collocation",
                          "quarry": "spread", "cairn": "spread"}
    assert src["TIR"]["quarry"] == "spread" and src["TIR"]["plover"] == "collocation"
    # a short period: collocation cannot be estimated, the spread is used (and recorded)
    short = closure_terms(demo_series, basins=["VEL"], start="2005-01", end="2005-12")
    assert set(json.loads(short.attrs["uncertainty_source"])["VEL"].values()) == {"spread"}


def test_export_and_replay_name_the_uncertainty_source(demo_dir, tmp_path, capsys, monkeypatch):
    import warnings

    import yaml

    from conftest import copy_demo
    from wbexplore.cli import main

    study = copy_demo(demo_dir, tmp_path)
    out, csv = tmp_path / "sel.yaml", tmp_path / "series.csv"
    argv = ["export", str(study / "catalog.yaml"), "--basin", "VEL", "--P", "plover", "--ET", "tansy", "--TWSA",
            "quarry", "--out", str(out), "--series", str(csv)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(argv) == 0
        doc = yaml.safe_load(out.read_text())
        assert doc["uncertainty_source"] == {"P": "collocation", "ET": "collocation", "TWSA": "spread", "Q": "gauge"}
        assert doc["uncertainty_notes"].startswith("P collocation (triple collocation with kestrel, heron")
        head = [line for line in csv.read_text().splitlines() if line.startswith("#")]
        assert any(line.startswith("# uncertainty_source: P collocation") for line in head)
        assert any("random error only" in line for line in head) and "random error only" in doc["uncertainty_notes"]
        assert main(["replay", str(out)]) == 0
        # a selection file written before issue 16 (product spread, no uncertainty_source) still replays
        monkeypatch.setattr(unc, "DEFAULT_METHOD", unc.SPREAD)
        old = tmp_path / "old.yaml"
        assert main(argv[:-4] + ["--out", str(old)]) == 0
        monkeypatch.setattr(unc, "DEFAULT_METHOD", "auto")
        d = yaml.safe_load(old.read_text())
        assert d["uncertainty_source"]["P"] == "spread"
        del d["uncertainty_source"], d["uncertainty_notes"]
        old.write_text(yaml.safe_dump(d))
        assert main(["replay", str(old)]) == 0, capsys.readouterr().err
        # a wrong entry is refused, naming the field
        d["uncertainty_source"] = {"P": "guess"}
        old.write_text(yaml.safe_dump(d))
        assert main(["replay", str(old)]) == 2
    assert "uncertainty_source.P" in capsys.readouterr().err


def test_legend_names_the_source():
    ds = _series(3)
    errs = {"P": unc.product_error(ds, "p1", 0)}
    assert unc.legend_text(errs) == "± 2 sigma (P collocation); collocation: random error only"
    errs = {"P": unc.product_error(_series(2), "p1", 0)}
    assert unc.legend_text(errs) == "± 2 sigma (P product spread)"


def test_non_positive_collocation_falls_back_or_is_refused_when_asked():
    """Errors of p1 and p2 anti-correlated (p1 = t + e, p2 = t - e: against the assumption of independent
    errors), so that p0's collocation error variance is negative by the identity:
    var t - (var t)^2 / (var t - var e) < 0 (arithmetic, var e = 0.3 var t)."""
    ds = _series(3, months=120)
    t = ds["p0"].values[0]
    e = np.random.default_rng(1).standard_normal(t.size)
    e = e / e.std() * np.sqrt(0.3) * t.std()
    ds["p1"].values[0] = t + e
    ds["p2"].values[0] = t - e
    got = unc.product_error(ds, "p0", 0)
    assert got.method == unc.SPREAD and "not positive" in got.note
    with pytest.raises(InputError, match="collocation error variance of 'p0' is -.*not positive"):
        unc.product_error(ds, "p0", 0, method="collocation")
    assert unc.product_error(ds, "p0", 0, strict=True).method == unc.SPREAD  # strict is about short periods only


def test_merged_sources_are_not_collocated_with_their_products():
    """A merged series is made from the component's products, so its error is not independent of theirs:
    collocation assumes independent errors (Stoffelen 1998) and must not count it as a third product
    (found here: two P products plus ``merged_P`` were collocated as three)."""
    from utils import canonical_series
    from wbexplore.balance.merge import merge_products, with_merged

    ds, _ = canonical_series(nb=1, nt=60)
    given = {s: 4.0 for s in ("P0", "P1", "ET0", "ET1", "TWSA0", "TWSA1")}
    both = with_merged(ds, merge_products(ds, method="ckf", variances=given))
    assert unc.component_products(both, "P") == ["P0", "P1"]
    e = unc.product_error(both, "P1", 0)
    assert e.method == unc.SPREAD and "merged_P" not in e.note, e.note


# --------------------------------------------------------------------------- is a collocation estimate distinguishable from zero?
def _population_cov(scale, signal_var, error_var):
    """Covariance of products x_i = scale_i t + e_i (t of variance ``signal_var``, independent errors)."""
    s = np.asarray(scale, dtype=np.float64)
    return signal_var * np.outer(s, s) + np.diag(error_var)


@pytest.mark.parametrize("scale, error_var", [
    ([0.5, 1.0, 1.2], [0.0, 25.0, 64.0]),           # a damped copy of the truth: no random error at all
    ([1.0, 0.9, 1.1], [9.0, 25.0, 64.0]),           # a small random error
    ([1.0, 1.0, 0.8, 1.3], [16.0, 25.0, 36.0, 9.0]),  # four products: multiple collocation
], ids=["damped-copy", "small-error", "four-products"])
def test_collocation_standard_error_matches_monte_carlo(scale, error_var):
    """The sampling standard error of a collocation error variance (first-order expansion, normal errors: see
    `collocation.collocation_standard_errors`) against the spread of the estimates of 4,000 synthetic series of
    120 months, drawn from the model collocation assumes. The expansion is first order: 10% (the Monte Carlo's
    own error on a standard deviation from 4,000 draws is 1/sqrt(8000), about 1%)."""
    from wbexplore.balance import collocation as col

    rng = np.random.default_rng(7)
    n, draws, signal_var = 120, 4000, 900.0
    k = len(scale)
    est = np.empty((draws, k))
    for d in range(draws):
        t = rng.normal(0.0, np.sqrt(signal_var), n)
        x = np.outer(scale, t) + rng.standard_normal((k, n)) * np.sqrt(np.asarray(error_var))[:, None]
        est[d] = col.collocation_from_covariance(np.cov(x))
    Q = _population_cov(scale, signal_var, error_var)
    predicted = col.collocation_standard_errors(Q, np.asarray(error_var, dtype=np.float64), n)
    np.testing.assert_allclose(est.std(axis=0, ddof=1), predicted, rtol=0.10)
    # the ratio estimator's bias is second order (of order v / n): small against the sampling error
    assert np.all(np.abs(est.mean(axis=0) - error_var) < 0.25 * predicted), (est.mean(axis=0), predicted)


def _damped_copy_series(months=240):
    """p0 = the truth with its departures from the mean halved, plus a trace of noise (sd 0.02 mm/month):
    a systematic error that a linear calibration absorbs; p1, p2 with random errors of sd 5 and 8."""
    rng = np.random.default_rng(10)  # a draw where the estimate comes out (tiny and) positive: the finding
    t = rng.gamma(3.0, 30.0, months)
    time = xr.date_range("2001-01-01", periods=months, freq="MS", use_cftime=False)
    ds = xr.Dataset(coords={"basin": ["B"], "time": time})
    vals = {"p0": t.mean() + 0.5 * (t - t.mean()) + rng.normal(0, 0.02, months),
            "p1": t + rng.normal(0, 5.0, months), "p2": t + rng.normal(0, 8.0, months)}
    for k, v in vals.items():
        ds[k] = (("basin", "time"), v[None], {"role": "source", "component": "P", "units": "mm/month"})
    return ds, t


def test_tiny_positive_collocation_error_is_not_used():
    """The review finding (issue 16): a damped copy of the truth gets a tiny positive collocation error
    variance, and that was used as its error (a band of a few hundredths of a mm/month around a product
    whose error against the truth is tens of mm/month). An estimate below its sampling error is no
    estimate: the band falls back to the spread and says why; asked for collocation, it is refused."""
    ds, t = _damped_copy_series()
    tc = unc.collocation_variances(np.stack([ds[s].values[0] for s in ("p0", "p1", "p2")]), ["p0", "p1", "p2"])
    assert tc["p0"]["error_variance"] > 0  # the trap: positive, yet only sampling noise
    assert tc["p0"]["error_variance"] < 1.645 * tc["p0"]["standard_error"]
    # the true error against the truth (arithmetic of the construction): far beyond the collocation estimate
    assert np.var(ds["p0"].values[0] - t) > 100 * tc["p0"]["error_variance"]
    e = unc.product_error(ds, "p0", 0)
    assert e.method == unc.SPREAD, e.note
    assert ("collocation cannot separate p0's error from zero: it sees no random error" in e.note
            and "systematic errors are invisible to collocation; the product spread is used" in e.note), e.note
    with pytest.raises(InputError, match="collocation cannot separate p0's error from zero"):
        unc.product_error(ds, "p0", 0, method="collocation")
    # the products with random errors keep their collocation errors, within the factor of the demo check
    for s, sd in (("p1", 5.0), ("p2", 8.0)):
        got = unc.product_error(ds, s, 0)
        assert got.method == unc.COLLOCATION and 1 / 1.5 < got.variance[0] / sd**2 < 1.5, (s, got.note)


def test_merge_refuses_a_collocation_error_indistinguishable_from_zero():
    from wbexplore.balance.merge import product_error_variances

    ds, _ = _damped_copy_series()
    with pytest.raises(InputError, match="basin 'B': P: collocation cannot separate p0's error from zero"):
        product_error_variances(ds, "P", "B")
    # stated errors take its place: the merge goes on
    ds["p0"].attrs["absolute_error_mm"] = 20.0
    _, errs = product_error_variances(ds, "P", "B")
    assert errs.methods == ("stated", "collocation", "collocation")


def test_collocation_texts_say_random_error_only():
    ds = _series(3)
    errs = {"P": unc.product_error(ds, "p1", 0)}
    assert "random error only" in unc.method_label(unc.COLLOCATION)
    assert "random error only" in unc.uncertainty_text(errs)
    assert "random error only" in unc.legend_text(errs)
    spread = {"P": unc.product_error(_series(2), "p1", 0)}
    assert "random error only" not in unc.uncertainty_text(spread)


def test_demo_damped_product_falls_back_to_the_spread(demo_series):
    """The finding on the demo: Velumbe with heron, sedge (seasonal departures halved by construction) and
    quarry. sedge's collocation error variance is sampling noise: the band uses the spread and says why."""
    r = compute_selection(demo_series, Selection("VEL", "heron", "sedge", "quarry"))
    assert r.uncertainty_source["ET"] == "spread"
    assert "collocation cannot separate sedge's error from zero" in r.uncertainty_line
    assert any(m.startswith("uncertainty of ET (sedge)") and "cannot separate" in m for m in r.messages), r.messages
    # the band is the spread now, not sedge's 0.024 mm/month of sampling noise (the median before the review)
    ok = r.frame["valid"]
    assert r.frame.loc[ok, "sigma_ET"].median() > 1.0
    # tansy (random error) keeps collocation, and its text says what collocation cannot see
    t = compute_selection(demo_series, Selection("VEL", "heron", "tansy", "quarry"))
    assert t.uncertainty_source["ET"] == "collocation" and "random error only" in t.uncertainty_line


def test_error_inputs_are_what_the_error_depends_on():
    # what a selection file records for exact replay (issue 17, item 8): a product named by `error_inputs` changes
    # the error when it changes, one it leaves out does not (checked against `product_error` itself)
    from utils import canonical_series

    ds, _ = canonical_series(nb=1, nt=96, flows=())
    rng = np.random.default_rng(7)
    ds["P2"] = ds["P1"] + rng.normal(0, 9, ds["P1"].shape)  # a third P product: collocation or spread
    ds["P2"].attrs = dict(ds["P1"].attrs)
    ds["valid_fraction_P2"] = ds["valid_fraction_P1"]
    ds["ET0"].attrs["absolute_error_mm"] = 4.0  # a stated error: no other product needed
    cases = {"P0": ("P1", "P2"), "ET0": (), "TWSA0": ("TWSA1",)}
    for source, expected in cases.items():
        err = unc.product_error(ds, source, 0)
        assert unc.error_inputs(ds, err) == expected, (source, err.method)
        for other in unc.component_products(ds, err.component):
            if other == source:
                continue
            changed = ds.copy()
            changed[other] = ds[other] * 1.3 + 2.0
            again = unc.product_error(changed, source, 0).variance
            same = np.array_equal(again, err.variance, equal_nan=True)
            assert same == (other not in expected), (source, other)
    one = ds.drop_vars(["TWSA1", "valid_fraction_TWSA1"])
    err = unc.product_error(one, "TWSA0", 0)
    assert err.method == unc.NONE and unc.error_inputs(one, err) == ()
