"""The unknown term by difference, with propagated uncertainty.

    ET = P - Q - dS,   Q = P - ET - dS,   dS = P - ET - Q     (each + inflows - outflows, with flows)

monthly, and as long-term means over whole years, where the storage term largely
vanishes (ET = P - Q is the classic long-term form; the dS term is reported).
Errors of the terms are taken as independent between terms and between months
(optimistic for systematic product errors: say so when you quote the band).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from .closure import Selection, compute_selection, water_year

__all__ = ["by_difference", "UNKNOWNS"]

UNKNOWNS = ("ET", "Q", "dS")


def by_difference(ds: xr.Dataset, sel: Selection, unknown: str = "ET", **kwargs) -> dict:
    """Estimate ``unknown`` from the other terms of ``sel``.

    Returns dict with ``monthly`` (DataFrame: estimate, sigma, and the term as the selection
    has it, ``reference``), ``annual`` (complete years: estimate, sigma), and ``long_term``
    (mean annual estimate with and without the storage term, its sigma, years used).
    """
    if unknown not in UNKNOWNS:
        raise InputError(f"unknown term {unknown!r} is not one of {', '.join(UNKNOWNS)}")
    res = compute_selection(ds, sel, **kwargs)
    f = res.frame
    rows_ = res.terms  # the term table's rows, flows included
    terms = {t.name: f[t.name] for t in rows_}
    sig = {k: f[f"sigma_{k}"] for k in terms}
    sign = {t.name: t.sign for t in rows_}
    others = [k for k in terms if k not in (unknown, "P")]
    est = terms["P"].copy()
    for k in others:
        est = est + sign[k] * terms[k]
    est = -est / sign[unknown]
    var = sig["P"] ** 2 + sum(sig[k] ** 2 for k in others)
    monthly = pd.DataFrame({"estimate": est, "sigma": np.sqrt(var), "reference": terms[unknown]})
    months = pd.DatetimeIndex(f.index)
    wy = water_year(months, sel.water_year_start)
    rows = []
    for y in np.unique(wy):
        m = wy == y
        blk = monthly[m]
        if m.sum() == 12 and blk["estimate"].notna().all():
            nos = None
            if unknown != "dS":
                nos_terms = terms["P"][m] + sum(sign[k] * terms[k][m] for k in others if k != "dS")
                nos = float(-(nos_terms.sum()) / sign[unknown])
            rows.append({"year": int(y), "estimate": float(blk["estimate"].sum()),
                         "sigma": float(np.sqrt((blk["sigma"] ** 2).sum())),
                         "without_storage": nos, "dS_total": float(terms["dS"][m].sum())})
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
