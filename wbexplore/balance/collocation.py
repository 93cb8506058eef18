"""Triple collocation: error variances of three products without knowing the truth.

Covariance form (Stoffelen 1998, J. Geophys. Res. 103:7755; extended by McColl et al.
2014, GRL 41:6229): for products x, y, z measuring one truth with independent,
zero-mean errors and linear scalings, with sample covariances Q,

    var(e_x) = Qxx - Qxy Qxz / Qyz
    rho_x^2  = Qxy Qxz / (Qxx Qyz)          (correlation of x with the truth, squared)

and cyclically for y and z.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["triple_collocation", "collocation_from_covariance"]


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
