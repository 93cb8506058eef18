"""The term table, the closure pipeline (closure_terms / closure_metrics), ClosureOptions and flows.

Outside references: the general water balance of hydrology textbooks (inputs - outputs = change in
storage) with the storage identity of DESIGN.md (monthly means of a piecewise-linear store:
(M[i+1] - M[i-1]) / 2 = (F[i-1] + 2 F[i] + F[i+1]) / 4), evaluated here with plain numpy on a synthetic
truth; hydroeval for the efficiencies where named.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wbexplore.balance import ClosureOptions, Selection, best_selection, closure_metrics, closure_terms, rank
from wbexplore.balance import compute_selection
from wbexplore.errors import InputError


def synthetic_series(nb=3, nt=96, *, flows=(("up", "in", 20.0), ("irr", "out", 8.0)), seed=1, close=True):
    """A canonical series whose truth closes exactly (window-matched) with ``flows`` (id, direction, mean
    mm/month): sources P0, P1 (truth, truth + noise), ET0, ET1, TWSA0 (truth monthly means), TWSA1 (noisy)."""
    rng = np.random.default_rng(seed)
    t = pd.date_range("2001-01-01", periods=nt, freq="MS")
    season = np.sin(2 * np.pi * (t.month.values - 3) / 12)
    P = 90 + 60 * season[None] + rng.normal(0, 15, (nb, nt))
    ET = 55 + 30 * season[None] + rng.normal(0, 8, (nb, nt))
    fl = {}
    net = np.zeros((nb, nt))
    for fid, direction, mean in flows:
        v = mean * (1 + 0.3 * np.cos(2 * np.pi * t.month.values / 12))[None] + rng.normal(0, 2, (nb, nt))
        v[-1] = 0.0  # the last basin: the flow does not enter it
        fl[fid] = (direction, v)
        net += v if direction == "in" else -v
    Q = 0.35 * np.clip(P - ET, 1, None)
    F = P - ET - Q + (net if close else 0.0)
    S = np.cumsum(F, axis=1)
    S0 = np.concatenate([np.zeros((nb, 1)), S[:, :-1]], axis=1)
    M = 0.5 * (S0 + S)
    ds = xr.Dataset(coords={"basin": [f"B{i}" for i in range(nb)], "time": t,
                            "basin_area_km2": ("basin", np.linspace(1e3, 5e3, nb))})
    for comp, base in (("P", P), ("ET", ET), ("TWSA", M)):
        for j in range(2):
            v = base if j == 0 else base + rng.normal(0, 5, base.shape)
            ds[f"{comp}{j}"] = (("basin", "time"), v, {"role": "source", "component": comp})
            ds[f"valid_fraction_{comp}{j}"] = (("basin", "time"), np.ones_like(v))
    ds["discharge"] = (("basin", "time"), Q, {"role": "discharge", "component": "Q", "units": "mm/month"})
    for fid, (direction, v) in fl.items():
        ds[f"flow_{fid}"] = (("basin", "time"), v, {"role": "flow", "flow_id": fid, "direction": direction,
                                                    "label": f"flow {fid}", "units": "mm/month",
                                                    "component": "flow"})
    return ds, {"P": P, "ET": ET, "Q": Q, "M": M, "net": net, "flows": fl}


def test_best_selection_keeps_every_option():
    """Regression (issue 14): best_selection dropped water_year_start and min_valid_fraction, so the selection
    it returned scored differently from the row it was chosen from."""
    ds, _ = synthetic_series()
    ds["valid_fraction_P1"][:, ::7] = 0.6  # below 0.9: masked under the stricter option only
    opts = {"water_year_start": 10, "min_valid_fraction": 0.9, "start": "2002-01", "storage_change": "backward"}
    sel = best_selection(ds, "B0", **opts)
    assert sel.water_year_start == 10 and sel.min_valid_fraction == 0.9
    r = rank(ds, "B0", **opts)
    res = compute_selection(ds, sel)
    for k in ("rmse", "annual_bias", "annual_rmse", "n_valid"):
        assert res.metrics[k] == r.iloc[0][k], k
