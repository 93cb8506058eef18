"""Merging benchmark: merged best estimates with the budget forced to close (issue 16).

Targets: merging for one basin and all its products (5 P, 5 ET, 3 TWSA, 240 months; collocation over every
triplet, the merge, the forced closure) <= 50 ms; ``wbexplore merge CATALOG --all`` on 100 basins <= 5 s as a
whole process (series cache warm). Medians of repeated runs, measured side by side in one run, with ratios to a
plain numpy pass over the same numbers (inverse-variance means of the stacks and the one-month filter of
`constrained_correction` on every month: what the merge costs without collocation and without rows that share
unknowns) and, for the whole process, to ``wbexplore rank --all`` on the same study.

    python benchmarks/merge.py            # in process
    python benchmarks/merge.py --cli      # also the whole-process merge --all (writes a small study)
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from balance import synthetic, write_study


def plain_numpy(ds, basin="B000"):
    """Inverse-variance means (variances: each product's variance about the stack mean) and the per-month
    filter over (P, ET, Q, dS): the same arithmetic without collocation or shared rows."""
    from wbexplore.balance import constrained_correction, storage_change

    b = list(ds.basin.values).index(basin)
    out = {}
    for comp in ("P", "ET", "TWSA"):
        X = np.stack([ds[v].values[b] for v in ds.data_vars if ds[v].attrs.get("component") == comp
                      and ds[v].attrs.get("role") == "source"])
        V = np.var(X - X.mean(axis=0), axis=1)[:, None] + 1.0
        w = np.broadcast_to(1.0 / V, X.shape)
        out[comp] = ((X * w).sum(0) / w.sum(0), 1.0 / w.sum(0))
    q = ds["discharge"].values[b]
    x = np.stack([out["P"][0], out["ET"][0], q, storage_change(out["TWSA"][0])], axis=1)
    v = np.stack([out["P"][1], out["ET"][1], (0.05 * q) ** 2, out["TWSA"][1] / 2], axis=1)
    ok = np.all(np.isfinite(x), axis=1)
    return constrained_correction(x[ok], v[ok])


def timed(fn, repeat):
    """(median wall s, median CPU s of this process) of ``fn`` after one warm-up call: on a shared, loaded
    machine the CPU time of this single-threaded work is the steadier figure."""
    fn()
    wall, cpu = [], []
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - w)
        cpu.append(time.process_time() - c)
    return statistics.median(wall), statistics.median(cpu)


def in_process():
    from wbexplore.balance.merge import merge_products

    ds = synthetic(nb=100)
    tp, cp = timed(lambda: plain_numpy(ds), repeat=21)
    print(f"plain numpy pass, one basin (13 products x 240 months): {tp * 1e3:.2f} ms wall, {cp * 1e3:.2f} ms CPU")
    for method in ("pr", "ckf", "collocation"):
        t1, c1 = timed(lambda m=method: merge_products(ds, method=m, basins=["B000"]), repeat=21)
        t100, c100 = timed(lambda m=method: merge_products(ds, method=m), repeat=3)
        worst = float(np.nanmax(np.abs(merge_products(ds, method=method)["residual_after"].values)))
        print(f"merge {method:11s}: one basin {t1 * 1e3:6.1f} ms wall, {c1 * 1e3:6.1f} ms CPU (target 50 ms: "
              f"{t1 / 0.05:.2f}, CPU {c1 / 0.05:.2f}; / plain pass {t1 / tp:.1f}, CPU {c1 / cp:.1f}); "
              f"100 basins {t100:.2f} s wall, {c100:.2f} s CPU; largest residual after {worst:.1e} mm/month")


def cli(repeat=5):
    with tempfile.TemporaryDirectory() as tmp:
        cat = write_study(Path(tmp) / "study")
        env = {**__import__("os").environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}
        cache = str(Path(tmp) / "cache")
        out = str(Path(tmp) / "merged.nc")
        merge = [sys.executable, "-m", "wbexplore.cli", "merge", str(cat), "--all", "--method", "ckf", "--out", out,
                 "--force", "--cache-dir", cache]
        rank = [sys.executable, "-m", "wbexplore.cli", "rank", str(cat), "--all", "--format", "csv", "--cache-dir",
                cache]
        subprocess.run(merge, check=True, capture_output=True, env=env)  # fills the series cache

        def run(c):
            import resource

            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            t = time.perf_counter()
            subprocess.run(c, check=True, capture_output=True, env=env)
            wall = time.perf_counter() - t
            after = resource.getrusage(resource.RUSAGE_CHILDREN)
            return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)

        tm, tr, tv = [], [], []
        for _ in range(repeat):
            tm.append(run(merge))
            tr.append(run(rank))
            tv.append(run([sys.executable, "-m", "wbexplore.cli", "--version"]))
    (m, mc), (r, rc), (v, vc) = ((statistics.median(a for a, _ in x), statistics.median(b for _, b in x))
                                 for x in (tm, tr, tv))
    print(f"whole process, 100 basins, warm series cache (medians of {repeat}): merge --all {m:.2f} s wall, "
          f"{mc:.2f} s CPU (target 5 s: {m / 5:.2f}, CPU {mc / 5:.2f}); rank --all {r:.2f} s wall, {rc:.2f} s CPU "
          f"(merge / rank {m / r:.2f}, CPU {mc / rc:.2f}); --version {v:.2f} s wall, {vc:.2f} s CPU")


if __name__ == "__main__":
    in_process()
    if "--cli" in sys.argv:
        cli()
