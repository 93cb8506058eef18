"""Balance-engine benchmark: ranking every combination and recomputing one selection.

Synthetic canonical series with 5 P x 5 ET x 3 TWSA products, 240 months; targets (issue):
one basin <= 20 ms, 100 basins <= 1 s, one selection <= 5 ms. Medians of repeated runs.

    python benchmarks/balance.py
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import median_time  # noqa: E402


def synthetic(nb=100, nt=240, seed=0):
    rng = np.random.default_rng(seed)
    t = pd.date_range("2001-01-01", periods=nt, freq="MS")
    season = np.sin(2 * np.pi * (t.month.values - 3) / 12)
    P = 90 + 60 * season[None] + rng.normal(0, 15, (nb, nt))
    ET = 55 + 30 * season[None] + rng.normal(0, 8, (nb, nt))
    Q = 0.35 * np.clip(P - ET, 1, None)
    S = np.cumsum(P - ET - Q, axis=1)
    M = 0.5 * (S + np.concatenate([S[:, :1], S[:, :-1]], axis=1))
    ds = xr.Dataset(coords={"basin": [f"B{i:03d}" for i in range(nb)], "time": t,
                            "basin_area_km2": ("basin", rng.uniform(5e3, 3e5, nb))})
    for comp, base, k in (("P", P, 5), ("ET", ET, 5), ("TWSA", M - M.mean(axis=1, keepdims=True), 3)):
        for j in range(k):
            v = base * rng.uniform(0.85, 1.15) + rng.normal(0, 5, base.shape)
            ds[f"{comp}{j}"] = (("basin", "time"), v, {"role": "source", "component": comp})
            ds[f"valid_fraction_{comp}{j}"] = (("basin", "time"), np.ones_like(v))
    ds["discharge"] = (("basin", "time"), Q, {"component": "Q"})
    return ds


def main():
    from wbexplore.balance import Selection, compute_selection, rank, rank_all

    ds = synthetic()
    one = ds.isel(basin=[0])
    t1, r = median_time(lambda: rank(ds, "B000"), repeat=21)
    t100, _ = median_time(lambda: rank_all(ds), repeat=5)
    sel = Selection("B000", "P0", "ET0", "TWSA0")
    ts, _ = median_time(lambda: compute_selection(ds, sel), repeat=51)
    del one
    print(f"rank 5 x 5 x 3 combinations, 240 months, one basin: {t1 * 1e3:7.2f} ms   target <= 20 ms  ({len(r)} rows)")
    print(f"rank all combinations for 100 basins:               {t100 * 1e3:7.1f} ms   target <= 1000 ms")
    print(f"recompute one selection (series, sigma, metrics):    {ts * 1e3:7.2f} ms   target <= 5 ms")
    print(f"ratios to target: {t1 / 0.020:.2f}, {t100 / 1.0:.2f}, {ts / 0.005:.2f}")


if __name__ == "__main__":
    main()
