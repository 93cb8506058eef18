"""Discharge lag: compare gauged Q shifted by k months and report which closes best.

In large basins the water gauged at the outlet left the hillslopes weeks to months
earlier (routing), so P - ET - dS of month t meets the gauge in month t + k. The
lag is reported, never applied silently: pass ``lag=k`` to a `Selection` to use it.
"""

from __future__ import annotations

import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from .closure import Selection, compute_selection
from .metrics import check_metric, sort_key

__all__ = ["discharge_lag"]


def discharge_lag(ds: xr.Dataset, sel: Selection, *, max_lag: int = 3, by: str = "rmse") -> pd.DataFrame:
    """Metrics of ``sel`` with Q compared k = 0..max_lag months later; column ``best`` marks the winner."""
    check_metric(by)
    rows = []
    for k in range(0, max_lag + 1):
        r = compute_selection(ds, sel.replace(lag=k))
        rows.append({"lag_months": k, **{m: r.metrics[m] for m in ("rmse", "bias", "kge", "nse", "r", "n_valid")},
                     by: r.metrics[by]})
    df = pd.DataFrame(rows)
    key = sort_key(by, df[by].values)
    df["best"] = False
    df.loc[int(key.argmin()), "best"] = True
    return df
