"""Triple collocation: error variances of three products without knowing the truth.

Covariance form (Stoffelen 1998, J. Geophys. Res. 103:7755; extended by McColl et al.
2014, GRL 41:6229): for products x, y, z measuring one truth with independent,
zero-mean errors and linear scalings, with sample covariances Q,

    var(e_x) = Qxx - Qxy Qxz / Qyz
    rho_x^2  = Qxy Qxz / (Qxx Qyz)          (correlation of x with the truth, squared)

and cyclically for y and z.

With more than three products (`multiple_collocation`), every pair (j, k) of the other products gives
one estimate of the signal variance of product i, ``Qij Qik / Qjk`` (the same identity as above, for
every triplet that contains i); their mean over all pairs is subtracted from ``Qii``. With three
products this is exactly the triple-collocation estimate.

Sampling error (`collocation_standard_errors`; derived here, checked by Monte Carlo in
tests/test_uncertainty.py). Write each product in its own scale, ``x_i = a_i + b_i t + e_i``, and expand the
estimate to first order in the sample covariances of the errors ``S``: the signal cancels, and with the other
products' errors carried into product i's scale (``e_j b_i / b_j``)

    est_i - var(e_i) ~ (S_ii - var e_i) - 2/(k-1) sum_j S_ij + 1/P sum_{j<l} S_jl     (j, l != i; P pairs)

With independent normal errors these sample covariances are uncorrelated, ``var(S_ii) = 2 v_i^2 / n`` and
``var(S_ij) = v_i v_j / n`` (v: error variances in product i's scale), so

    SE_i^2 = [2 v_i^2 + 4/(k-1)^2 v_i sum_j v_j + 1/P^2 sum_{j<l} v_j v_l] / n.

For three products: ``(2 v_x^2 + v_x v_y + v_x v_z + v_y v_z) / n``: for a product without random error
``sqrt(v_y v_z / n)``, set by the *other* products' errors; for one whose error dominates, about
``sqrt(2 / n) v_x`` (the usual sampling error of a variance). Heavy-tailed errors make it larger.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["triple_collocation", "collocation_from_covariance", "collocation_standard_errors", "multiple_collocation"]


def triple_collocation(*series, names=None, min_samples: int = 10) -> dict:
    """Error variance (units of the data, squared) and correlation with truth of three products.

    Parameters
    ----------
    *series : three 1-D arrays (NaN allowed; only common valid samples are used)
    names : optional three names for the result keys

    Returns
    -------
    dict name -> {"error_variance", "error_sd", "rho", "n"}
    """
    if len(series) < 3:
        raise InputError(f"triple collocation needs three products of one component, got {len(series)}")
    if len(series) > 3:
        raise InputError("triple collocation takes exactly three products; pick three")
    arr = np.vstack([np.asarray(s, dtype=np.float64) for s in series])
    ok = np.all(np.isfinite(arr), axis=0)
    n = int(ok.sum())
    if n < min_samples:
        raise InputError(f"triple collocation needs at least {min_samples} common valid samples, got {n}")
    Q = np.cov(arr[:, ok])
    names = list(names) if names is not None else ["x", "y", "z"]
    out = {}
    for i in range(3):
        j, k = [m for m in range(3) if m != i]
        ev = Q[i, i] - Q[i, j] * Q[i, k] / Q[j, k]
        with np.errstate(invalid="ignore"):
            rho2 = Q[i, j] * Q[i, k] / (Q[i, i] * Q[j, k])
        out[names[i]] = {"error_variance": float(ev), "error_sd": float(np.sqrt(ev)) if ev > 0 else float("nan"),
                         "rho": float(np.sqrt(rho2)) if rho2 > 0 else float("nan"), "n": n}
    return out


def collocation_from_covariance(Q) -> np.ndarray:
    """Error variance of each of k >= 3 products from their (k, k) sample covariance (units of the data, squared).

    Each product's estimate is the mean of its triple-collocation estimates ``Q[i,i] - Q[i,j] Q[i,k] / Q[j,k]``
    over every pair (j, k) of the other products (for k = 3: the covariance form of `triple_collocation`; for
    more, a multiple-collocation estimate). The samples must be the same for every product (common valid months).
    """
    Q = np.asarray(Q, dtype=np.float64)
    k = Q.shape[0]
    if Q.shape != (k, k) or k < 3:
        raise InputError(f"collocation needs at least 3 products, got {k}")
    j, m = np.triu_indices(k, 1)
    out = np.empty(k)
    for i in range(k):
        pair = (j != i) & (m != i)
        a, b = j[pair], m[pair]
        out[i] = np.mean(Q[i, i] - Q[i, a] * Q[i, b] / Q[a, b])
    return out


def collocation_standard_errors(Q, error_variance, n: int) -> np.ndarray:
    """Sampling standard error (units of the data, squared) of each collocation error variance.

    Parameters
    ----------
    Q : array (k, k)
        Covariance of the k >= 3 products (mm2 for fluxes in mm/month).
    error_variance : array (k,)
        Their error variances (the estimates of `collocation_from_covariance`; values below zero count as zero).
    n : int
        Number of common samples the covariance is over.

    Returns
    -------
    array (k,): first-order standard error of each estimate for independent normal errors (module text);
    NaN where a product's signal variance ``Q_ii - v_i`` is not positive.
    """
    Q = np.asarray(Q, dtype=np.float64)
    v = np.clip(np.asarray(error_variance, dtype=np.float64), 0.0, None)
    k = Q.shape[0]
    signal = np.diag(Q) - v
    pairs = (k - 1) * (k - 2) / 2
    out = np.full(k, np.nan)
    for i in range(k):
        o = np.array([j for j in range(k) if j != i])
        if signal[i] <= 0 or np.any(signal[o] <= 0):
            continue
        w = v[o] * signal[i] / signal[o]  # the other products' error variances in product i's scale
        cross = (w.sum() ** 2 - (w**2).sum()) / 2  # sum over pairs j < l of w_j w_l
        var = 2 * v[i] ** 2 + 4 / (k - 1) ** 2 * v[i] * w.sum() + cross / pairs**2
        out[i] = np.sqrt(var / n)
    return out


def multiple_collocation(stack, *, names=None, min_samples: int = 10) -> dict:
    """Error variance of each of N >= 3 products of one truth (units of the data, squared).

    Parameters
    ----------
    stack : array (N, T)
        One row per product (same units, e.g. mm/month); NaN allowed: only samples where every product
        is valid are used.
    names : sequence of N str, optional
        Result keys (default "0", "1", ...).
    min_samples : int
        Fewest common valid samples accepted.

    Returns
    -------
    dict name -> {"error_variance", "error_sd", "rho", "n", "triplets", "standard_error"}: for each product i the signal
    variance ``mean over pairs (j, k) of Qij Qik / Qjk`` is subtracted from ``Qii`` (Stoffelen 1998;
    McColl et al. 2014, GRL 41:6229, for the covariance form); ``triplets`` is how many triplets the
    mean is over (1 for three products); ``standard_error`` is the estimate's sampling standard error
    (`collocation_standard_errors`). The error variance may come out zero, negative or tiny positive when a
    product's random error is small against the sampling error: callers decide what to do then.
    """
    arr = np.asarray(stack, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[0] < 3:
        n = arr.shape[0] if arr.ndim == 2 else 1
        raise InputError(f"collocation needs at least three products of one component, got {n}")
    ok = np.all(np.isfinite(arr), axis=0)
    n = int(ok.sum())
    if n < min_samples:
        raise InputError(f"collocation needs at least {min_samples} common valid samples, got {n}")
    Q = np.cov(arr[:, ok])
    m = arr.shape[0]
    names = [str(i) for i in range(m)] if names is None else [str(x) for x in names]
    errors = collocation_from_covariance(Q)  # the one covariance form (also used by balance.merge)
    triplets = (m - 1) * (m - 2) // 2  # pairs (j, k) of the other products
    se = collocation_standard_errors(Q, errors, n)
    out = {}
    for i in range(m):
        ev = float(errors[i])
        signal = float(Q[i, i] - ev)
        rho2 = signal / Q[i, i] if Q[i, i] > 0 else float("nan")
        out[names[i]] = {"error_variance": ev, "error_sd": float(np.sqrt(ev)) if ev > 0 else float("nan"),
                         "rho": float(np.sqrt(rho2)) if rho2 > 0 else float("nan"), "n": n, "triplets": triplets,
                    "standard_error": float(se[i])}
    return out
