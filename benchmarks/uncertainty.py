"""Uncertainty benchmark (issue 16): collocation for one basin and all combinations.

Synthetic canonical series of `balance.synthetic` (5 P x 5 ET x 3 TWSA products, 240 months), one basin.
"All combinations": the error of every source as the balance uses it (`uncertainty.all_product_errors`,
multiple collocation over each component's products, once per component) plus the triple-collocation estimate of every triplet of every
component (10 + 10 + 1). Target <= 50 ms (median). Beside it, side by side in the same run:

- a plain numpy pass: one ``np.cov`` of each component's (products x months) stack, the least work any
  collocation needs (the ratio says what the bookkeeping costs);
- one selection (`compute_selection`) with the default uncertainty (collocation) and with the product
  spread (what it was before issue 16), against the 5 ms target of issue 14;
- an estimate by difference (`estimate_by_difference`, monthly, water years, long term).

    python benchmarks/uncertainty.py
"""

from __future__ import annotations

import itertools
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import median_time  # noqa: E402
from balance import synthetic  # noqa: E402


def main():
    from wbexplore.balance import Selection, compute_selection
    from wbexplore.balance import uncertainty as unc
    from wbexplore.balance.collocation import triple_collocation
    from wbexplore.balance.estimate import estimate_by_difference
    from wbexplore.series import source_ids

    ds = synthetic(nb=1)
    comps = {c: source_ids(ds, c) for c in ("P", "ET", "TWSA")}
    stacks = {c: np.stack([ds[s].values[0] for s in ids]) for c, ids in comps.items()}

    def every_combination():
        out = {s: e.method for s, e in unc.all_product_errors(ds, 0).items()}
        for c, ids in comps.items():
            for tri in itertools.combinations(range(len(ids)), 3):
                triple_collocation(*stacks[c][list(tri)], names=[ids[i] for i in tri])
        return out

    def plain_numpy():
        return [np.cov(st) for st in stacks.values()]

    t_all, methods = median_time(every_combination, repeat=31, warmup=3)
    t_np, _ = median_time(plain_numpy, repeat=101, warmup=5)
    sel = Selection("B000", "P0", "ET0", "TWSA0")
    t_auto, r = median_time(lambda: compute_selection(ds, sel), repeat=51, warmup=3)
    t_spread, _ = median_time(lambda: compute_selection(ds, sel, uncertainty="spread"), repeat=51, warmup=3)
    t_est, _ = median_time(lambda: estimate_by_difference(ds, sel, "ET"), repeat=31, warmup=3)
    n_tri = sum(len(list(itertools.combinations(ids, 3))) for ids in comps.values())
    print(f"sources: {', '.join(f'{s} {m}' for s, m in methods.items())}")
    print(f"collocation, one basin, 13 sources + {n_tri} triplets: {t_all * 1e3:.2f} ms (target <= 50 ms: "
          f"{t_all / 0.050:.2f} of it)")
    print(f"plain numpy pass (np.cov of each component's stack): {t_np * 1e3:.3f} ms; ratio {t_all / t_np:.1f}")
    print(f"one selection: default ({r.uncertainty_source}) {t_auto * 1e3:.2f} ms, product spread "
          f"{t_spread * 1e3:.2f} ms; ratio {t_auto / t_spread:.2f} (target <= 5 ms: {t_auto / 0.005:.2f} of it)")
    print(f"estimate by difference (ET, monthly + water years + long term): {t_est * 1e3:.2f} ms")


if __name__ == "__main__":
    main()
