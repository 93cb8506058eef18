"""Closure-constrained correction (Pan and Wood 2006, J. Hydrometeorol. 7:534).

The state x = (P, ET, Q, dS) with error covariance C must satisfy the balance
G x = g with G = (1, -1, -1, -1), g = 0. The constrained-Kalman-filter projection

    x+ = x - f * C G^T (G C G^T)^-1 (G x - g)
    C+ = C - C G^T (G C G^T)^-1 G C           (for f = 1)

redistributes the residual among the components in proportion to their error
variances; ``f`` < 1 redistributes only that fraction of the residual
(the posterior covariance is then C - (2f - f^2) C G^T (G C G^T)^-1 G C).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import InputError
from .terms import BASE_TERMS, term_signs

__all__ = ["constrained_correction", "correct_frame", "G_BALANCE", "constrained_projection"]

# the balance row over (P, ET, Q, dS): the signs of the term table
_TERMS = BASE_TERMS
G_BALANCE = term_signs(_TERMS)


def constrained_correction(x, cov, *, G=G_BALANCE, g: float = 0.0, fraction: float = 1.0):
    """Project ``x`` (..., n) with covariance ``cov`` (..., n, n) or variances (..., n) onto G x = g.

    Returns (x_corrected, posterior_covariance). Raises `InputError` for zero or negative variances.
    """
    x = np.asarray(x, dtype=np.float64)
    C = np.asarray(cov, dtype=np.float64)
    if C.shape == x.shape:
        if np.any(~(C > 0)):
            raise InputError("error variances must be positive (found zero, negative or missing)")
        C = C[..., :, None] * np.eye(x.shape[-1])
    else:
        d = np.diagonal(C, axis1=-2, axis2=-1)
        if np.any(~(d > 0)):
            raise InputError("error variances must be positive (found zero, negative or missing)")
    if not 0.0 <= fraction <= 1.0:
        raise InputError(f"fraction {fraction} must be between 0 and 1")
    G = np.asarray(G, dtype=np.float64)
    CG = C @ G  # (..., n)
    s = CG @ G  # (...,)
    r = x @ G - g
    gain = CG / s[..., None]
    x_new = x - fraction * gain * r[..., None]
    shrink = 2 * fraction - fraction**2
    C_new = C - shrink * gain[..., :, None] * CG[..., None, :]
    return x_new, C_new


def correct_frame(frame: pd.DataFrame, *, fraction: float = 1.0, variances: dict | None = None) -> pd.DataFrame:
    """Apply the correction month by month to a selection frame (columns P, ET, Q, dS, sigma_*).

    ``variances`` (mm^2, per component) overrides the frame's sigmas, e.g. from triple collocation.
    Adds P_corr, ET_corr, Q_corr, dS_corr, their posterior sigmas, residual_corr, and
    ``negative_flux`` (a corrected P, ET or Q below zero).
    """
    comps = tuple(t.name for t in _TERMS)
    fluxes = [i for i, t in enumerate(_TERMS) if not t.storage]
    x = frame[list(comps)].to_numpy(dtype=float)
    if variances is not None:
        v = np.array([[variances[c] for c in comps]] * len(frame), dtype=float)
    else:
        v = frame[[f"sigma_{c}" for c in comps]].to_numpy(dtype=float) ** 2
    ok = np.all(np.isfinite(x), axis=1) & np.all(np.isfinite(v), axis=1)
    if ok.any() and np.any(v[ok] <= 0):
        raise InputError("error variances must be positive (found zero or negative)")
    xn = np.full_like(x, np.nan)
    vn = np.full_like(x, np.nan)
    if ok.any():
        a, C = constrained_correction(x[ok], v[ok], fraction=fraction)
        xn[ok] = a
        vn[ok] = np.diagonal(C, axis1=-2, axis2=-1)
    out = frame.copy()
    for i, c in enumerate(comps):
        out[f"{c}_corr"] = xn[:, i]
        out[f"sigma_{c}_corr"] = np.sqrt(vn[:, i])
    out["residual_corr"] = xn @ G_BALANCE
    out["negative_flux"] = np.any(xn[:, fluxes] < 0, axis=1)
    return out


def constrained_projection(x, prior, G, *, variance=None):
    """Project ``x`` onto many balance rows at once, ``G x = 0`` (the filter of `constrained_correction`,
    generalised to rows that share unknowns, e.g. window-matched fluxes and storage differences).

    Parameters
    ----------
    x : (n,) array
        The unknowns (mm or mm/month); NaN only where no row of ``G`` uses them.
    prior : (n,) array, >= 0
        The metric of the projection: error variances (mm2) for the constrained Kalman filter (Pan and
        Wood 2006), or any other non-negative weights (proportional redistribution uses magnitudes).
    G : scipy.sparse matrix (r, n)
        The balance rows; rows whose prior-weighted norm is zero (every unknown they use has zero weight)
        are left out.
    variance : (n,) array, optional
        Error variances (mm2) to carry through the (linear) projection; default ``prior``.

    Returns
    -------
    (x_projected, posterior_variance) : two (n,) arrays. With ``variance`` equal to ``prior`` the posterior
    is ``diag(C - C G^T (G C G^T)^-1 G C)``; otherwise ``diag(A V A^T)`` with ``A = I - C G^T (G C G^T)^-1 G``.
    Unknowns that no row uses come back unchanged.
    """
    from scipy.linalg import cho_solve_banded, cholesky_banded
    from scipy.sparse import csr_matrix, diags

    x = np.asarray(x, dtype=np.float64)
    c = np.asarray(prior, dtype=np.float64)
    v = c if variance is None else np.asarray(variance, dtype=np.float64)
    G = csr_matrix(G)
    used = np.zeros(x.size, dtype=bool)
    used[G.indices[G.data != 0]] = True
    if np.any(~np.isfinite(x[used])) or np.any(~(c[used] >= 0)) or np.any(~np.isfinite(v[used])):
        raise InputError("constrained projection: the rows use missing values or non-finite weights")
    S = (G @ diags(c) @ G.T).tocsr()
    keep = S.diagonal() > 0
    if not keep.all():
        G = G[keep]
        S = (G @ diags(c) @ G.T).tocsr()
    if G.shape[0] == 0:
        return x.copy(), v.copy()
    x0 = np.where(used, x, 0.0)
    coo = S.tocoo()
    up = coo.col >= coo.row
    bw = int((coo.col - coo.row)[up].max())
    ab = np.zeros((bw + 1, S.shape[0]))
    ab[bw + coo.row[up] - coo.col[up], coo.col[up]] = coo.data[up]  # upper banded form (scipy.linalg)
    try:
        factor = (cholesky_banded(ab, check_finite=False), False)
    except np.linalg.LinAlgError:
        raise InputError("constrained projection: the balance rows are not independent under these weights") from None

    def solve(b):
        return cho_solve_banded(factor, b, check_finite=False)

    lam = solve(G @ x0)
    x_new = x - c * (G.T @ lam)
    # diag(G' K G) needs K only where a column of G has two rows: G' K as (n, r), then the products on G's
    # non-zeros (each column of G has a few). Banded solves only: a dense inverse goes through threaded BLAS,
    # which on a loaded machine cost 100 times more.
    eye = np.eye(S.shape[0])
    Sinv = solve(eye)
    Gt = G.T.tocsr()

    def gkg(K):
        return np.asarray(Gt.multiply(Gt @ K).sum(axis=1)).ravel()

    if variance is None:
        post = v - c * c * gkg(Sinv)
    else:
        U = (G @ diags(v) @ G.T).toarray()
        K = solve(solve(U).T)  # S^-1 U S^-1 (U and S symmetric)
        post = v - 2.0 * c * v * gkg(Sinv) + c * c * gkg(K)
    return x_new, post
