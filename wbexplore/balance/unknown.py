"""The unknown term by difference, in the form older callers take: a view of `estimate.estimate_by_difference`.

    ET = P - Q - dS,   Q = P - ET - dS,   dS = P - ET - Q     (each + inflows - outflows, with flows)

Monthly, per water year, and as long-term means over whole water years (the mean of the yearly estimates,
which keep the storage term, beside the mean without it). The standard errors are those of `estimate`
(random errors through the kernels); the long-term one treats the years as independent (the window-matched
months at two years' boundary share a raw month: slightly optimistic). New code should use
`estimate.estimate_by_difference` directly.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from .closure import Q_RELATIVE_ERROR, Selection, compute_selection
from .engine import water_year
from .estimate import TERMS, estimate_by_difference

__all__ = ["by_difference", "UNKNOWNS"]

UNKNOWNS = TERMS


def by_difference(ds: xr.Dataset, sel: Selection, unknown: str = "ET", **kwargs) -> dict:
    """Estimate ``unknown`` from the other terms of ``sel``.

    ``kwargs`` go to `compute_selection` (``q_relative_error``, ``min_valid``, ``uncertainty``, ...).

    Returns dict with ``monthly`` (DataFrame: estimate, sigma, and the term as the selection has it,
    ``reference``), ``annual`` (whole water years: year, estimate, sigma, without_storage, dS_total),
    ``long_term`` (mean annual estimate with and without the storage term, its sigma, years used) and
    ``selection`` (the `SelectionResult`).
    """
    if unknown not in UNKNOWNS:
        raise InputError(f"unknown term {unknown!r} is not one of {', '.join(UNKNOWNS)}")
    res = compute_selection(ds, sel, **kwargs)
    est = estimate_by_difference(ds, sel, unknown, q_relative_error=kwargs.get("q_relative_error", Q_RELATIVE_ERROR),
                                 uncertainty=kwargs.get("uncertainty"))
    m = est.monthly
    monthly = pd.DataFrame({"estimate": m["estimate"].to_numpy(), "sigma": m["standard_error"].to_numpy(),
                            "reference": res.frame[unknown].to_numpy()}, index=res.frame.index)
    a = est.annual
    wy = water_year(pd.DatetimeIndex(m.index), sel.water_year_start)
    ds_month = res.frame["dS"].to_numpy()
    rows = []
    for y, r in a.iterrows():
        dS_total = float(r["storage_change"]) if "storage_change" in a else float(ds_month[wy == y].sum())
        rows.append({"year": int(y), "estimate": float(r["estimate"]), "sigma": float(r["standard_error"]),
                     "without_storage": float(r["estimate"] + r["storage_change"]) if unknown != "dS" else None,
                     "dS_total": dS_total})
    annual = pd.DataFrame(rows)
    if len(annual):
        lt = {"years": int(len(annual)), "estimate_mm_per_year": float(annual["estimate"].mean()),
              "sigma_mm_per_year": float(np.sqrt((annual["sigma"] ** 2).sum()) / len(annual)),
              "without_storage_mm_per_year": (float(annual["without_storage"].mean())
                                              if unknown != "dS" else None),
              "mean_storage_change_mm_per_year": float(annual["dS_total"].mean())}
    else:
        lt = {"years": 0, "estimate_mm_per_year": float("nan"), "sigma_mm_per_year": float("nan"),
              "without_storage_mm_per_year": None, "mean_storage_change_mm_per_year": float("nan")}
    return {"unknown": unknown, "monthly": monthly, "annual": annual, "long_term": lt, "selection": res}
