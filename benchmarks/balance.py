"""Balance-engine benchmark: ranking every combination and recomputing one selection.

Synthetic canonical series with 5 P x 5 ET x 3 TWSA products, 240 months; targets (issues 3 and 14):
one basin <= 20 ms, 100 basins <= 1 s, one selection <= 5 ms, the same with two flows present, and
``wbexplore rank CATALOG --all`` on 100 basins <= 2 s as a whole process (series cache warm).
Medians of repeated runs, measured side by side in one run.

    python benchmarks/balance.py            # engine only
    python benchmarks/balance.py --cli      # also the whole-process rank --all (writes a small study)
    python benchmarks/balance.py --cli --against ../other-checkout   # and the same command from another checkout
    python benchmarks/balance.py --cli-only [--against DIR] [--repeat N]   # the whole-process part alone
    python benchmarks/balance.py --selection-against DIR [--rounds N]   # one selection, ours and DIR's engine in
                                                                          # child processes taking turns

One selection is timed twice: recomputed as it is (the explorer redrawing after another option changed:
collocation estimates come from the memo of `balance.uncertainty`) and with a new period each call (the first
visit: every collocation computed).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import median_time  # noqa: E402


def synthetic(nb=100, nt=240, seed=0, flows=0):
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
    for j in range(flows):
        v = np.abs(rng.normal(10, 3, (nb, nt)))
        ds[f"flow_f{j}"] = (("basin", "time"), v, {"role": "flow", "flow_id": f"f{j}", "direction": ("in", "out")[j % 2],
                                                   "label": f"flow {j}", "units": "mm/month", "component": "flow"})
    return ds


def waterbodies(ds):
    """``ds`` (with one TWSA product kept) as water bodies (issue 15): no discharge, the storage as the pseudo-source
    ``levels``, half of them end-of-month states and half monthly means, the surface area = the outline's."""
    from wbexplore.series import LEVELS, STORAGE_STATE, SURFACE_AREA

    drop = [v for v in ds.data_vars if str(v).startswith(("TWSA", "valid_fraction_TWSA"))] + ["discharge"]
    out = ds.drop_vars(drop)
    out[LEVELS] = ds["TWSA0"].assign_attrs(role="source", component="TWSA", units="mm")
    nb = ds.sizes["basin"]
    out.coords[STORAGE_STATE] = ("basin", ["end_of_month" if i % 2 else "monthly_mean" for i in range(nb)])
    out[SURFACE_AREA] = ds["basin_area_km2"].broadcast_like(ds["P0"]).transpose("basin", "time")
    out.attrs["unit"] = "waterbody"
    return out


def basins_one_twsa(ds):
    """``ds`` with TWSA0 only: the same combinations as its water-body form."""
    return ds.drop_vars([v for v in ds.data_vars if str(v).startswith(("TWSA", "valid_fraction_TWSA"))
                         and str(v) not in ("TWSA0", "valid_fraction_TWSA0")])


def engine_times(ds, twsa="TWSA0"):
    from wbexplore.balance import Selection, compute_selection, rank, rank_all

    t1, r = median_time(lambda: rank(ds, "B000"), repeat=21)
    t100, _ = median_time(lambda: rank_all(ds), repeat=5)
    sel = Selection("B000", "P0", "ET0", twsa)
    ts, _ = median_time(lambda: compute_selection(ds, sel), repeat=51)
    return t1, t100, ts, len(r)


def selection_times(ds, twsa="TWSA0", repeat=51):
    """(one selection recomputed, one selection over a period not seen before) medians, s."""
    from wbexplore.balance import Selection, compute_selection

    sel = Selection("B000", "P0", "ET0", twsa)
    warm, _ = median_time(lambda: compute_selection(ds, sel), repeat=repeat)
    starts = iter(pd.date_range("2001-02-01", periods=repeat + 1, freq="MS").strftime("%Y-%m"))
    cold, _ = median_time(lambda: compute_selection(ds, sel.replace(start=next(starts))), repeat=repeat)
    return warm, cold


def _selection_child():
    """``--selection-child``: one line of JSON, the selection medians (no flows, two flows) of the wbexplore found
    first on the path (PYTHONPATH: ours or another checkout)."""
    import json

    out = {}
    for flows in (0, 2):
        out[f"warm{flows}"], out[f"cold{flows}"] = selection_times(synthetic(flows=flows))
    print(json.dumps(out))


def selection_against(other, rounds=5):
    """One selection, ours and ``other``'s engine in child processes taking turns (``rounds`` each); medians of
    the children's medians."""
    import json
    import os
    import statistics
    import subprocess
    import tempfile

    sides = {"ours": Path(__file__).resolve().parent.parent, "against": Path(other).resolve()}
    got = {k: [] for k in sides}
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(rounds):
            for k, root in sides.items():
                p = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--selection-child"], check=True,
                                   capture_output=True, text=True, cwd=tmp, env={**os.environ, "PYTHONPATH": str(root)})
                got[k].append(json.loads(p.stdout.strip().splitlines()[-1]))
    med = {k: {m: statistics.median(r[m] for r in v) for m in v[0]} for k, v in got.items()}
    o, a = med["ours"], med["against"]
    for f in (0, 2):
        print(f"one selection, {'two flows' if f else 'no flows '}: recomputed {o[f'warm{f}'] * 1e3:5.2f} ms "
              f"(that: {a[f'warm{f}'] * 1e3:5.2f}, ratio {o[f'warm{f}'] / a[f'warm{f}']:.2f}); new period "
              f"{o[f'cold{f}'] * 1e3:5.2f} ms (that: {a[f'cold{f}'] * 1e3:5.2f}, ratio {o[f'cold{f}'] / a[f'cold{f}']:.2f}); "
              f"target <= 5 ms (ratio to it {o[f'warm{f}'] / 0.005:.2f}, new period {o[f'cold{f}'] / 0.005:.2f})")
    print(f"  {rounds} child processes each, taking turns, against {other}")


def write_study(d: Path, nb=100, nt=240, seed=0):
    """A catalog of ``nb`` box basins on a small grid, 5 P, 5 ET, 3 TWSA netCDF products, long discharge CSV."""
    import geopandas as gpd
    import shapely
    import yaml

    rng = np.random.default_rng(seed)
    d.mkdir(parents=True, exist_ok=True)
    side = int(np.ceil(np.sqrt(nb)))
    res = 0.5
    lon = np.arange(res / 2, side * 2, res)
    lat = np.arange(res / 2, side * 2, res)
    t = pd.date_range("2001-01-01", periods=nt, freq="MS")
    ids = [f"B{i:03d}" for i in range(nb)]
    boxes = [shapely.box(2 * (i % side) + 0.1, 2 * (i // side) + 0.1, 2 * (i % side) + 1.9, 2 * (i // side) + 1.9)
             for i in range(nb)]
    gpd.GeoDataFrame({"basin_id": ids}, geometry=boxes, crs="EPSG:4326").to_file(d / "b.geojson", driver="GeoJSON")
    season = np.sin(2 * np.pi * (t.month.values - 3) / 12)[:, None, None]
    sources = []
    for comp, k, base, units in (("P", 5, 90 + 60 * season, "mm/month"), ("ET", 5, 55 + 30 * season, "mm/month"),
                                 ("TWSA", 3, 40 * season, "mm")):
        for j in range(k):
            v = (base + rng.normal(0, 5, (nt, lat.size, lon.size))).astype("float32")
            xr.Dataset({"v": (("time", "lat", "lon"), v)}, coords={"time": t, "lat": lat, "lon": lon}).to_netcdf(
                d / f"{comp}{j}.nc")
            sources.append({"id": f"{comp.lower()}{j}", "component": comp, "path": f"{comp}{j}.nc", "variable": "v",
                            "units": units, "crs": "EPSG:4326"})
    q = pd.DataFrame({"date": np.tile(t.strftime("%Y-%m-%d"), nb), "basin_id": np.repeat(ids, nt),
                      "q": np.abs(rng.normal(20, 5, nb * nt))})
    q.to_csv(d / "q.csv", index=False)
    cat = {"catalog_version": 1, "title": "benchmark", "basins": {"path": "b.geojson", "id_field": "basin_id"},
           "discharge": {"path": "q.csv", "time_field": "date", "basin_field": "basin_id", "value_field": "q",
                         "units": "mm/month"}, "sources": sources}
    (d / "c.yaml").write_text(yaml.safe_dump(cat, sort_keys=False))
    return d / "c.yaml"


def cli_times(repeat=5, against=None):
    """Whole-process `wbexplore rank CATALOG --all` (warm series cache) and, side by side (interleaved),
    `wbexplore --version` and, with ``against`` (another checkout, e.g. ../other-checkout), the same command there."""
    import os
    import resource
    import statistics
    import subprocess
    import tempfile
    import time

    with tempfile.TemporaryDirectory() as tmp:
        cat = write_study(Path(tmp) / "study")
        sides = {"ours": Path(__file__).resolve().parent.parent}
        if against:
            sides["against"] = Path(against).resolve()
        cmds = {}
        for k, root in sides.items():
            env = {**os.environ, "PYTHONPATH": str(root)}
            cmds[k] = ([sys.executable, "-m", "wbexplore.cli", "rank", str(cat), "--all", "--format", "csv",
                        "--cache-dir", str(Path(tmp) / f"cache-{k}")], env)
            subprocess.run(cmds[k][0], check=True, capture_output=True, env=env, cwd=tmp)  # fills the series cache
        cmds["version"] = ([sys.executable, "-m", "wbexplore.cli", "--version"], cmds["ours"][1])

        def run(c, env):
            r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            t = time.perf_counter()
            # cwd: a neutral folder (`python -m` puts the working folder first on the path)
            p = subprocess.run(c, check=True, capture_output=True, env=env, cwd=tmp)
            dt = time.perf_counter() - t
            r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
            return dt, r1.ru_utime + r1.ru_stime - r0.ru_utime - r0.ru_stime, p.stdout

        times = {k: [] for k in cmds}
        cpu = {k: [] for k in cmds}
        outs = {}
        for _ in range(repeat):
            for k, (c, env) in cmds.items():
                dt, dc, outs[k] = run(c, env)
                times[k].append(dt)
                cpu[k].append(dc)
        rows = outs["ours"].decode().count("\n") - 1
        same = outs.get("against", outs["ours"]) == outs["ours"]
    return ({k: statistics.median(v) for k, v in times.items()}, {k: statistics.median(v) for k, v in cpu.items()},
            rows, same)


def main():
    if "--selection-child" in sys.argv:
        return _selection_child()
    if "--selection-against" in sys.argv:
        rounds = int(sys.argv[sys.argv.index("--rounds") + 1]) if "--rounds" in sys.argv else 5
        return selection_against(sys.argv[sys.argv.index("--selection-against") + 1], rounds=rounds)
    if "--cli-only" in sys.argv:
        sys.argv.append("--cli")
        return _cli()
    ds = synthetic()
    t1, t100, ts, n = engine_times(ds)
    f1, f100, fs, _ = engine_times(synthetic(flows=2))
    print(f"rank 5 x 5 x 3 combinations, 240 months, one basin: {t1 * 1e3:7.2f} ms   target <= 20 ms  ({n} rows)")
    print(f"rank all combinations for 100 basins:               {t100 * 1e3:7.1f} ms   target <= 1000 ms")
    print(f"recompute one selection (series, sigma, metrics):    {ts * 1e3:7.2f} ms   target <= 5 ms")
    print(f"with two flows: one basin {f1 * 1e3:.2f} ms, 100 basins {f100 * 1e3:.1f} ms, one selection {fs * 1e3:.2f} ms")
    print(f"ratios to target: {t1 / 0.020:.2f}, {t100 / 1.0:.2f}, {ts / 0.005:.2f}; "
          f"with two flows: {f1 / 0.020:.2f}, {f100 / 1.0:.2f}, {fs / 0.005:.2f}")
    print(f"two flows / none: {f1 / t1:.2f}, {f100 / t100:.2f}, {fs / ts:.2f}")
    sw, sc = selection_times(ds)
    print(f"one selection recomputed {sw * 1e3:.2f} ms, over a period not seen before {sc * 1e3:.2f} ms "
          f"(every collocation computed); ratios to target {sw / 0.005:.2f}, {sc / 0.005:.2f}")
    # water bodies (issue 15): the same 5 x 5 x 1 combinations and two flows as basins, side by side
    two = synthetic(flows=2)
    b1, b100, bs, _ = engine_times(basins_one_twsa(two))
    w1, w100, ws, _ = engine_times(waterbodies(two), twsa="levels")
    print(f"water bodies, 5 x 5 x 1 combinations, two flows: one {w1 * 1e3:.2f} ms (basin {b1 * 1e3:.2f}), 100 "
          f"{w100 * 1e3:.1f} ms (basins {b100 * 1e3:.1f}), one selection {ws * 1e3:.2f} ms (basin {bs * 1e3:.2f}); "
          f"water body / basin: {w1 / b1:.2f}, {w100 / b100:.2f}, {ws / bs:.2f}")
    if "--cli" in sys.argv:
        _cli()


def _cli():
    against = sys.argv[sys.argv.index("--against") + 1] if "--against" in sys.argv else None
    repeat = int(sys.argv[sys.argv.index("--repeat") + 1]) if "--repeat" in sys.argv else 5
    med, cpu, rows, same = cli_times(repeat=repeat, against=against)
    tc, tv = med["ours"], med["version"]
    print(f"wbexplore rank --all, 100 basins, whole process:     {tc:7.2f} s    target <= 2 s  ({rows} rows); "
          f"ratio {tc / 2.0:.2f}; bare `wbexplore --version` {tv:.2f} s")
    print(f"  CPU time (user + system) of the process: {cpu['ours']:.2f} s; `wbexplore --version` {cpu['version']:.2f} s "
          "(on a loaded machine CPU time says more than wall time)")
    if against:
        print(f"  same command from {against}: {med['against']:.2f} s wall, {cpu['against']:.2f} s CPU; ours / that: "
              f"wall {tc / med['against']:.2f}, CPU {cpu['ours'] / cpu['against']:.2f}; "
              f"outputs {'identical' if same else 'DIFFER'}")

if __name__ == "__main__":
    main()
