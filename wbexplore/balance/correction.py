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

__all__ = ["constrained_correction", "correct_frame", "G_BALANCE"]

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
