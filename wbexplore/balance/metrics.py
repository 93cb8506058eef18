"""Closure metrics, vectorised over any leading axes (time on the last axis).

All metrics use the months where every term is valid. With residual
``r = P - ET - Q - dS`` and the balance estimate of discharge ``Qhat = P - ET - dS``
(so ``r = Qhat - Q``):

bias            mean r (mm/month)
rmse            sqrt(mean r^2) (mm/month)
mae             mean |r| (mm/month)
rel_imbalance   100 * mean r / mean P (%); mean-based ratios are never taken of dS or r
nse             Nash and Sutcliffe (1970): 1 - sum (Qhat - Q)^2 / sum (Q - mean Q)^2
nse_cyclo       cyclostationary NSE (Lehmann et al. 2022, HESS 26:35): the denominator is
                taken about the monthly climatology of Q, so the seasonal cycle earns no credit
kge             Gupta et al. (2009): 1 - sqrt((r-1)^2 + (alpha-1)^2 + (beta-1)^2),
                alpha = sd(Qhat)/sd(Q), beta = mean(Qhat)/mean(Q)
kge_prime       Kling et al. (2012): gamma = CV(Qhat)/CV(Q) replaces alpha
r               Pearson correlation of Qhat and Q
pbias           Moriasi et al. (2007): 100 * sum(Q - Qhat) / sum Q (positive = underestimate)
annual_bias     mean residual of complete (water) years, mm/year
annual_rmse     RMSE of the residual totals of complete (water) years, mm/year
n_valid         number of valid months

Degenerate data leave some of these undefined (a ratio with a zero denominator): observed
discharge without variance (nse, kge, kge_prime, r), with zero mean (kge, kge_prime, pbias), or
equal to its monthly climatology (nse_cyclo); P - ET - dS without variance (r, kge, kge_prime) or
with zero mean (kge_prime); a zero mean P (rel_imbalance). Such a metric is NaN, never +-inf, and
``compute_metrics(..., explain=True)`` says why in an ``undefined`` entry (text per combination).
"""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import InputError
from .terms import BASE_TERMS, combine

__all__ = ["METRICS", "compute_metrics", "metrics_from_residual", "sort_key", "kge", "kge_prime", "nse", "pbias", "check_metric"]

# name -> (higher is better | "abs" for closest to zero, units, short description)
METRICS = {
    "rmse": ("lower", "mm/month", "root-mean-square residual"),
    "mae": ("lower", "mm/month", "mean absolute residual"),
    "bias": ("abs", "mm/month", "mean residual"),
    "rel_imbalance": ("abs", "%", "mean residual / mean P"),
    "nse": ("higher", "-", "Nash-Sutcliffe efficiency of P-ET-dS vs Q"),
    "nse_cyclo": ("higher", "-", "cyclostationary NSE (about the monthly climatology)"),
    "kge": ("higher", "-", "Kling-Gupta efficiency (2009)"),
    "kge_prime": ("higher", "-", "modified KGE (2012)"),
    "r": ("higher", "-", "correlation of P-ET-dS with Q"),
    "pbias": ("abs", "%", "percent bias of P-ET-dS vs Q (positive = underestimate)"),
    "annual_bias": ("abs", "mm/year", "mean residual of complete years"),
    "annual_rmse": ("lower", "mm/year", "RMSE of annual residual totals"),
    "n_valid": ("higher", "months", "valid months"),
}


def check_metric(name: str) -> str:
    if name not in METRICS:
        raise InputError(f"metric {name!r} does not exist; valid metrics: {', '.join(METRICS)}")
    return name


def check_waterbody_metric(name: str, unit: str) -> str:
    """Refuse ranking water body ``unit`` by a metric that compares with gauged discharge (NaN for every one of
    its combinations: a water body's balance has no gauged outlet Q); `InputError` naming the metric and why."""
    check_metric(name)
    if name in _Q_METRICS:
        ok = [m for m in METRICS if m not in _Q_METRICS and m != "n_valid"]
        raise InputError(f"--by {name}: undefined for water body {unit!r}, which has no gauged discharge to compare "
                         f"with; rank it by {', '.join(ok)}")
    return name


def sort_key(name: str, values) -> np.ndarray:
    """Values mapped so that smaller is better (NaN sorts last)."""
    check_metric(name)
    v = np.asarray(values, dtype=float)
    kind = METRICS[name][0]
    key = v if kind == "lower" else (np.abs(v) if kind == "abs" else -v)
    return np.where(np.isfinite(key), key, np.inf)


def _nanmean(a, axis=-1):
    """`numpy.nanmean` without its warning for all-NaN slices (NaN there): for float arrays the same operations
    as numpy's (NaN set to zero, ``add.reduce`` of the values and of the valid count, one division), so bitwise
    its result, at a third of its cost (this runs a dozen times per selection)."""
    a = np.asarray(a)
    if a.dtype.kind != "f":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmean(a, axis=axis)
    nan = np.isnan(a)
    cnt = np.add.reduce(~nan, axis=axis, dtype=np.intp)
    tot = np.add.reduce(np.where(nan, 0.0, a), axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.true_divide(tot, cnt)


def _month_groups(month_of_year) -> list:
    """Time positions of each calendar month, as index arrays (groups, n) of the months with n values each.

    ``a[..., idx]`` gathers every group at once with, for each row, the memory layout that ``a[..., month == m]``
    gives for that month alone, so reducing its last axis adds each month's values exactly as taking that month
    alone did (bitwise: numpy's summation order follows the layout; `np.take`, C-ordered, would differ for
    arrays of more than one dimension). tests/test_metrics_groups.py checks it against the month-by-month form."""
    moy = np.asarray(month_of_year)
    where = np.flatnonzero((moy >= 1) & (moy <= 12))  # other values have no climatology (NaN), as before
    return [where[g] for g in _groups(moy[where], keep=None)]


def _complete_years(water_year) -> np.ndarray:
    """Time positions (years, 12) of the (water) years with 12 months, years ascending, months in time order."""
    wy = np.asarray(water_year)
    groups = _groups(wy, keep=12)
    return groups[0] if groups else np.zeros((0, 12), dtype=np.intp)


def _groups(labels, *, keep) -> list:
    """Positions of equal ``labels`` (ints), one (groups, n) array per group size n (labels ascending within it,
    positions in order within each label); with ``keep``, only the groups of that size."""
    if labels.size == 0:
        return []
    lo = labels.min()
    counts = np.bincount(labels - lo)
    order = np.argsort(labels, kind="stable")  # by label, time order within each
    start = np.concatenate(([0], np.cumsum(counts)[:-1]))
    sizes = np.unique(counts[counts > 0]) if keep is None else [keep]
    out = []
    for n in sizes:
        which = np.flatnonzero(counts == n)
        if which.size:
            out.append(order[start[which][:, None] + np.arange(n)])
    return out


def _moments(sim, obs):
    ms, mo = _nanmean(sim), _nanmean(obs)
    ds = sim - ms[..., None]
    do = obs - mo[..., None]
    n = np.sum(np.isfinite(sim), axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        vs = np.nansum(ds * ds, axis=-1) / n
        vo = np.nansum(do * do, axis=-1) / n
        cov = np.nansum(ds * do, axis=-1) / n
        r = cov / np.sqrt(vs * vo)
    return ms, mo, np.sqrt(vs), np.sqrt(vo), r


def _kge_terms(ms, mo, ss, so, r):
    """KGE (Gupta 2009) and KGE' (Kling 2012) from the moments of sim and obs."""
    with np.errstate(invalid="ignore", divide="ignore"):
        k = 1 - np.sqrt((r - 1) ** 2 + (ss / so - 1) ** 2 + (ms / mo - 1) ** 2)
        gamma = (ss / ms) / (so / mo)
        kp = 1 - np.sqrt((r - 1) ** 2 + (gamma - 1) ** 2 + (ms / mo - 1) ** 2)
    return k, kp


def kge(sim, obs):
    """Kling-Gupta efficiency (Gupta et al. 2009, J. Hydrol. 377:80)."""
    return _kge_terms(*_moments(*_mask(sim, obs)))[0]


def kge_prime(sim, obs):
    """Modified KGE (Kling et al. 2012, J. Hydrol. 424:264): variability as the ratio of CVs."""
    return _kge_terms(*_moments(*_mask(sim, obs)))[1]


def nse(sim, obs):
    """Nash-Sutcliffe efficiency (Nash and Sutcliffe 1970, J. Hydrol. 10:282)."""
    sim, obs = _mask(sim, obs)
    mo = _nanmean(obs)
    with np.errstate(invalid="ignore", divide="ignore"):
        return 1 - np.nansum((sim - obs) ** 2, axis=-1) / np.nansum((obs - mo[..., None]) ** 2, axis=-1)


def pbias(sim, obs):
    """Percent bias, Moriasi et al. (2007) sign convention: positive = model underestimates."""
    sim, obs = _mask(sim, obs)
    with np.errstate(invalid="ignore", divide="ignore"):
        return 100.0 * np.nansum(obs - sim, axis=-1) / np.nansum(obs, axis=-1)


def _mask(*arrays):
    arrs = np.broadcast_arrays(*[np.asarray(a, dtype=np.float64) for a in arrays])
    ok = np.ones(arrs[0].shape, dtype=bool)
    for a in arrs:
        ok &= np.isfinite(a)
    return tuple(np.where(ok, a, np.nan) for a in arrs)


def compute_metrics(P, ET, Q, dS, *, month_of_year=None, water_year=None, min_valid: int = 1,
                    explain: bool = False) -> dict:
    """All closure metrics for series with time on the last axis (any leading axes broadcast).

    Parameters
    ----------
    P, ET, Q, dS : array-like, mm/month
    month_of_year : array of ints 1..12 (time axis), for ``nse_cyclo``
    water_year : array of ints (time axis), the water year of each month, for annual metrics
    min_valid : int
        Below this many valid months every metric but ``n_valid`` is NaN.
    explain : bool
        Add ``undefined``: per combination, the metrics left NaN by degenerate data and why
        ("" where every metric is defined).

    Returns
    -------
    dict of metric name -> array over the leading axes
    """
    P, ET, Q, dS = _mask(P, ET, Q, dS)
    res, qhat = combine({"P": P, "ET": ET, "Q": Q, "dS": dS}, BASE_TERMS)
    return _from_masked(res, qhat, Q, P, month_of_year=month_of_year, water_year=water_year, min_valid=min_valid,
                        explain=explain)


def metrics_from_residual(residual, qhat, Q, P, *, month_of_year=None, water_year=None, min_valid: int = 1,
                          explain: bool = False) -> dict:
    """All closure metrics from the residual and the balance estimate of discharge (time on the last axis).

    Parameters
    ----------
    residual : array-like, mm/month
        sum over the balance terms of sign * term (`wbexplore.balance.terms`), flows included.
    qhat : array-like, mm/month
        residual + Q: the discharge the other terms predict.
    Q : array-like or None, mm/month
        gauged discharge, compared with ``qhat``. None for a water body (its balance has no gauged
        discharge): the metrics that compare with Q (nse, nse_cyclo, kge, kge_prime, r, pbias) are NaN, and
        ``undefined`` says why; the residual-based ones (bias, rmse, mae, rel_imbalance, annual) are computed.
    P : array-like, mm/month
        precipitation (denominator of ``rel_imbalance``).
    month_of_year, water_year, min_valid, explain : as `compute_metrics`

    Every input broadcasts to one shape; a month counts where all four are finite. With the four base
    terms this gives bitwise what `compute_metrics(P, ET, Q, dS)` gives (the same operations in the same
    order on the same months).
    """
    if Q is None:  # a water body: no gauged discharge; the residual-based metrics only
        residual, qhat, P = _mask(residual, qhat, P)
        Q = np.full(residual.shape, np.nan)
        return _from_masked(residual, qhat, Q, P, month_of_year=month_of_year, water_year=water_year,
                            min_valid=min_valid, explain=explain, no_q=True)
    residual, qhat, Q, P = _mask(residual, qhat, Q, P)
    return _from_masked(residual, qhat, Q, P, month_of_year=month_of_year, water_year=water_year,
                        min_valid=min_valid, explain=explain)


def _from_masked(res, qhat, Q, P, *, month_of_year, water_year, min_valid, explain, no_q=False):
    n = np.sum(np.isfinite(res), axis=-1)
    out = {}
    mr = _nanmean(res)
    out["bias"] = mr
    out["rmse"] = np.sqrt(_nanmean(res * res))
    out["mae"] = _nanmean(np.abs(res))
    with np.errstate(invalid="ignore", divide="ignore"):
        out["rel_imbalance"] = 100.0 * mr / _nanmean(P)
    ms, mo, ss, so, r = _moments(qhat, Q)
    with np.errstate(invalid="ignore", divide="ignore"):
        den = np.nansum((Q - mo[..., None]) ** 2, axis=-1)
        num = np.nansum((qhat - Q) ** 2, axis=-1)
        out["nse"] = 1 - num / den
        if month_of_year is not None:
            clim = np.full(Q.shape, np.nan)
            for idx in _month_groups(month_of_year):  # the mean of each calendar month's values
                clim[..., idx] = _nanmean(Q[..., idx])[..., None]
            out["nse_cyclo"] = 1 - num / np.nansum((Q - clim) ** 2, axis=-1)
        else:
            out["nse_cyclo"] = np.full(n.shape, np.nan)
        out["kge"], out["kge_prime"] = _kge_terms(ms, mo, ss, so, r)
        out["r"] = r
    out["pbias"] = pbias(qhat, Q)
    if water_year is not None:
        idx = _complete_years(water_year)
        if idx.size:
            blk = res[..., idx]  # (..., years, 12): the residuals of each complete year
            # C order, as the year-by-year totals were stacked (the mean over years then adds them in the same order)
            tot = np.ascontiguousarray(np.where(np.all(np.isfinite(blk), axis=-1), np.sum(blk, axis=-1), np.nan))
            out["annual_bias"] = _nanmean(tot)
            out["annual_rmse"] = np.sqrt(_nanmean(tot * tot))
        else:
            out["annual_bias"] = out["annual_rmse"] = np.full(n.shape, np.nan)
    else:
        out["annual_bias"] = out["annual_rmse"] = np.full(n.shape, np.nan)
    few = n < max(1, min_valid)
    if no_q:
        reasons = [(_Q_METRICS, (np.ones(np.shape(n), dtype=bool),
                                 "a water body has no gauged discharge (the residual is the unmeasured exchange)"))]
        reasons += [(names, why) for names, why in _undefined(P, mo, so, ms, ss, out, cyclo=False)
                    if names == ("rel_imbalance",)]
    else:
        reasons = _undefined(P, mo, so, ms, ss, out, cyclo=month_of_year is not None)
    for names, (m, _) in reasons:
        for k in names:
            out[k] = np.where(m, np.nan, out[k])
    for k in list(out):
        # a metric that is still not finite is undefined too (a zero denominator): NaN, never +-inf
        out[k] = np.where(few | ~np.isfinite(out[k]), np.nan, out[k])
    out["n_valid"] = n
    if explain:
        text = np.full(n.shape, "", dtype=object)
        for names, why in reasons:
            m = np.broadcast_to(why[0], n.shape) & ~few
            if m.any():
                text[m] = text[m] + np.where(text[m] == "", "", "; ") + f"{', '.join(names)} undefined: {why[1]}"
        out["undefined"] = text
    return out


_Q_METRICS = ("nse", "nse_cyclo", "kge", "kge_prime", "r", "pbias")  # the metrics that compare with gauged Q


def _undefined(P, mo, so, ms, ss, out, *, cyclo: bool):
    """(metric names, (mask over the leading axes, reason)) of every way a metric has no value."""
    tiny = np.finfo(np.float64).tiny
    with np.errstate(invalid="ignore", divide="ignore"):
        # spreads compared with the magnitude, so that round-off of a constant series counts as no spread
        q_flat = so <= 1e-12 * np.maximum(np.abs(mo), tiny)
        s_flat = ss <= 1e-12 * np.maximum(np.abs(ms), tiny)
    q_zero = mo == 0
    s_zero = ms == 0
    p_zero = _nanmean(P) == 0
    # nse_cyclo's denominator is the spread about the monthly climatology: none with a single year
    cyc = ~q_flat & ~np.isfinite(out["nse_cyclo"]) if cyclo else np.zeros(np.shape(mo), dtype=bool)
    items = [
        (("nse", "nse_cyclo", "kge", "kge_prime", "r"), (q_flat, "observed discharge has no variance")),
        (("kge", "kge_prime", "pbias"), (q_zero, "observed discharge has zero mean")),
        (("r", "kge", "kge_prime"), (s_flat, "P - ET - dS has no variance")),
        (("kge_prime",), (s_zero, "P - ET - dS has zero mean")),
        (("rel_imbalance",), (p_zero, "mean P is zero")),
        (("nse_cyclo",), (cyc, "discharge equals its monthly climatology (too few years)")),
    ]
    return [(names, (np.asarray(m, dtype=bool), why)) for names, (m, why) in items]
