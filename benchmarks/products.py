"""Whole-process benchmarks of products as they come: daily stacks, 8-day composites, monthly stacks.

Every side is a separate process (`python -m wbexplore.cli extract ...` against a `python -c` script),
so start-up (imports) counts as a user sees it. Runs are interleaved and repeated; medians and the
ratios of one run are what to read (the machine is small, shared and noisy).

    python benchmarks/products.py --daily        # 10 years x 240 x 300 daily netCDF (1 GiB), 50 basins
    python benchmarks/products.py --composite    # 8-day GeoTIFFs (one file per composite), same grid
    python benchmarks/products.py --monthly      # 240 x 600 x 600 monthly netCDF (0.33 GiB), 100 basins
    python benchmarks/products.py --memory       # peak allocations of a streamed daily extraction
    add --quick for 2 years / 60 months (a smoke test); --repeat N (default 5, at least 3);
    --against DIR: the same extract from another checkout (e.g. ../other-checkout) in the same interleaved runs

The do-it-yourself path of --daily is what a notebook user writes with regionmask and xarray from
PyPI (``pip install regionmask``; not a dependency of wbexplore): xarray resample to months, then
regionmask's fractional-overlap mask with cos(latitude) weights.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import star_polygons  # noqa: E402

warnings.simplefilter("ignore")
ROOT = Path(__file__).resolve().parents[1]
NY, NX, RES = 240, 300, 0.1  # daily / composite grid: 0 to 24 N, 0 to 30 E


def _env(root=ROOT):
    return dict(os.environ, PYTHONPATH=str(root) + os.pathsep + os.environ.get("PYTHONPATH", ""))


def _proc(argv, cwd, root=ROOT):
    def run():
        r = subprocess.run(argv, cwd=cwd, env=_env(root), capture_output=True, text=True)
        if r.returncode != 0:
            raise RuntimeError(f"{argv[:4]} failed: {r.stderr[-800:]}")
        return r
    return run


CPU: dict = {}  # side -> median CPU time (user + system) of its processes, filled by _interleaved


def _interleaved(runs: dict, repeat: int) -> dict:
    """Median wall time of each whole process, runs interleaved (one warm-up each: page cache, numba cache);
    the median CPU time of each side goes to `CPU` (on a loaded machine it varies far less than wall time)."""
    import resource

    for fn in runs.values():
        fn()
    times = {k: [] for k in runs}
    cpu = {k: [] for k in runs}
    for _ in range(max(3, repeat)):
        for k, fn in runs.items():
            r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            t = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t)
            r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpu[k].append(r1.ru_utime + r1.ru_stime - r0.ru_utime - r0.ru_stime)
    CPU.clear()
    CPU.update({k: statistics.median(v) for k, v in cpu.items()})
    return {k: (statistics.median(v), min(v), max(v)) for k, v in times.items()}


def _field(rng, t, ny, nx):
    """Smooth seasonal field plus noise, float32; about 6% of cells are NaN (a fixed mask)."""
    yy = np.linspace(0, 1, ny, dtype=np.float32)[None, :, None]
    xx = np.linspace(0, 1, nx, dtype=np.float32)[None, None, :]
    tt = np.asarray(t, np.float32)[:, None, None]
    X = (3 + 2 * np.sin(tt * 2 * np.pi / 365.25 + 3 * xx) + 2 * yy).astype(np.float32)
    X += rng.gamma(1.0, 0.5, X.shape).astype(np.float32)
    return X


def _basins(d: Path, rng, n, lon1, lat1):
    import geopandas as gpd

    polys = star_polygons(rng, n, 0, lon1, 0, lat1, 1.0, 5.0)
    gpd.GeoDataFrame({"basin_id": [f"b{i}" for i in range(n)]}, geometry=polys, crs=4326).to_file(d / "b.geojson")


def _catalog(d: Path, sources):
    import yaml

    (d / "c.yaml").write_text(yaml.safe_dump({
        "catalog_version": 2, "basins": {"path": "b.geojson", "id_field": "basin_id"}, "sources": sources}))
    return d / "c.yaml"


def _ours(d):
    return _proc([sys.executable, "-m", "wbexplore.cli", "extract", "c.yaml", "--out", "out.nc", "--force", "--quiet",
                  "--cache-dir", "cache"], d)


AGAINST: Path | None = None  # --against DIR: the same extract from another checkout, interleaved


def _with_against(runs: dict, d: Path) -> dict:
    if AGAINST is not None:
        runs["against"] = _proc([sys.executable, "-m", "wbexplore.cli", "extract", "c.yaml", "--out", "against.nc",
                                 "--force", "--quiet", "--cache-dir", "cache-against"], d, root=AGAINST)
    return runs


def _print_against(med, d: Path, var: str) -> None:
    import xarray as xr

    if AGAINST is None:
        return
    with xr.open_dataset(d / "out.nc") as a, xr.open_dataset(d / "against.nc") as b:  # the numbers (layouts may differ)
        same = all(np.array_equal(a[v].values, b[v].values, equal_nan=True) for v in (var, f"valid_fraction_{var}"))
    print(f"  against {AGAINST}: median {med['against'][0]:.3f} s; ours / that {med['ours'][0] / med['against'][0]:.2f} "
          f"(CPU time {CPU['ours'] / CPU['against']:.2f}); numbers {'identical' if same else 'DIFFER'}")


def write_daily(d: Path, years: int, rng):
    import netCDF4
    import pandas as pd

    days = pd.date_range("2001-01-01", f"{2000 + years}-12-31", freq="D")
    mask = rng.random((NY, NX)) < 0.06
    with netCDF4.Dataset(d / "daily.nc", "w") as nc:
        nc.createDimension("time", len(days))
        nc.createDimension("lat", NY)
        nc.createDimension("lon", NX)
        t = nc.createVariable("time", "i4", ("time",))
        t.units, t.calendar = "days since 2001-01-01", "standard"
        t[:] = np.arange(len(days))
        la = nc.createVariable("lat", "f8", ("lat",))
        la.units, la.standard_name = "degrees_north", "latitude"
        la[:] = np.round(RES / 2 + RES * np.arange(NY), 6)
        lo = nc.createVariable("lon", "f8", ("lon",))
        lo.units, lo.standard_name = "degrees_east", "longitude"
        lo[:] = np.round(RES / 2 + RES * np.arange(NX), 6)
        v = nc.createVariable("pr", "f4", ("time", "lat", "lon"), chunksizes=(31, NY, NX), fill_value=np.float32(np.nan))
        v.units = "mm/day"
        for i in range(0, len(days), 365):
            X = _field(rng, np.arange(i, min(len(days), i + 365)), NY, NX)
            X[:, mask] = np.nan
            v[i:i + X.shape[0]] = X
    return d / "daily.nc"


DIY = r"""
import sys, numpy as np, xarray as xr, geopandas as gpd, regionmask
ds = xr.open_dataset(sys.argv[1], engine="netcdf4")
monthly = ds["pr"].resample(time="MS").sum(skipna=False)          # mm/day summed over the days: mm/month
regions = regionmask.from_geopandas(gpd.read_file(sys.argv[2]), names="basin_id", overlap=True)
mask = regions.mask_3D_frac_approx(ds)                             # fractional overlap, (region, lat, lon)
weights = mask * np.cos(np.deg2rad(ds["lat"]))                     # cos(latitude) cell areas
out = monthly.weighted(weights.fillna(0)).mean(("lat", "lon"))      # (time, region)
out.to_netcdf(sys.argv[3])
"""


def daily(a):
    import xarray as xr

    rng = np.random.default_rng(11)
    years = 2 if a.quick else 10
    with tempfile.TemporaryDirectory() as dd:
        d = Path(dd)
        nc = write_daily(d, years, rng)
        _basins(d, rng, 50, NX * RES, NY * RES)
        _catalog(d, [{"id": "pd", "component": "P", "path": "daily.nc", "variable": "pr"}])
        (d / "diy.py").write_text(DIY)
        print(f"daily stack {years} years x {NY} x {NX} float32 ({nc.stat().st_size / 2**20:.0f} MiB), 50 basins")
        runs = {
            "ours": _ours(d),
            "bare": _proc([sys.executable, "-c", "import sys, xarray as xr; "
                           "xr.open_dataset(sys.argv[1], engine='netcdf4')['pr'].values", "daily.nc"], d),
        }
        have_rm = subprocess.run([sys.executable, "-c", "import regionmask"], env=_env()).returncode == 0
        if have_rm:
            runs["diy"] = _proc([sys.executable, "diy.py", "daily.nc", "b.geojson", "diy.nc"], d)
        med = _interleaved(_with_against(runs, d), a.repeat)
        _print(med, "ours", "bare", "wbexplore extract / bare read", 1.3)
        _print_against(med, d, "pd")
        if have_rm:
            _print(med, "ours", "diy", "wbexplore extract / do-it-yourself (regionmask + resample)", 0.3, show=False)
            ours = xr.open_dataset(d / "out.nc")["pd"].load()
            diy = xr.open_dataset(d / "diy.nc")["pr"].load().rename(region="basin")
            diy = diy.assign_coords(basin=ours["basin"].values).transpose("basin", "time")
            rel = np.abs(diy.values - ours.values) / np.abs(ours.values) * 100
            print(f"  do-it-yourself vs wbexplore, relative difference of basin-months: median {np.nanmedian(rel):.2f}%, "
                  f"95th percentile {np.nanpercentile(rel, 95):.2f}%, max {np.nanmax(rel):.2f}%")
        else:
            print("  regionmask is not installed (pip install regionmask): do-it-yourself side skipped")


def composite(a):
    import pandas as pd
    import rasterio
    from rasterio.transform import from_origin

    from wbexplore import temporal as T

    rng = np.random.default_rng(12)
    years = 2 if a.quick else 10
    starts = T.period_starts_between("8-day", "2001-01-01", f"{2000 + years}-12-31")
    mask = rng.random((NY, NX)) < 0.06
    with tempfile.TemporaryDirectory() as dd:
        d = Path(dd)
        (d / "et").mkdir()
        doy = np.asarray(pd.DatetimeIndex(starts).dayofyear) + 365.25 * (pd.DatetimeIndex(starts).year - 2001)
        for k in range(0, len(starts), 46):
            X = _field(rng, doy[k:k + 46], NY, NX)
            X[:, mask] = np.nan
            for s, v in zip(starts[k:k + 46], X):
                with rasterio.open(d / "et" / f"et8_{s:%Y%j}.tif", "w", driver="GTiff", width=NX, height=NY, count=1,
                                   dtype="float32", crs="EPSG:4326", transform=from_origin(0, NY * RES, RES, RES),
                                   nodata=np.nan) as dst:
                    dst.write(v[::-1][None])
        _basins(d, rng, 50, NX * RES, NY * RES)
        _catalog(d, [{"id": "e8", "component": "ET", "path": "et/et8_*.tif", "date_format": "%Y%j",
                      "units": "mm/day"}])
        size = sum(p.stat().st_size for p in (d / "et").iterdir())
        print(f"8-day composites: {len(starts)} GeoTIFF files of {NY} x {NX} float32 ({size / 2**20:.0f} MiB), 50 basins")
        bare = ("import glob, sys, rasterio\n"
                "for p in sorted(glob.glob('et/et8_*.tif')):\n"
                "    with rasterio.open(p) as s:\n"
                "        s.read(1)\n")
        med = _interleaved(_with_against({"ours": _ours(d), "bare": _proc([sys.executable, "-c", bare], d)}, d), a.repeat)
        _print(med, "ours", "bare", "wbexplore extract / bare rasterio read of every file", 1.3)
        _print_against(med, d, "e8")


EE = r"""
import sys, numpy as np, xarray as xr, geopandas as gpd
from exactextract import exact_extract
from exactextract.raster import NumPyRasterSource
ds = xr.open_dataset(sys.argv[1], engine="netcdf4")
X = ds["v"].values[:, ::-1, :]                                     # north first, as a raster
area = np.load(sys.argv[3])                                         # the same cell areas (m2), north first
gdf = gpd.read_file(sys.argv[2])
ext = (0.0, 0.0, 30.0, 30.0)
bands = [NumPyRasterSource(np.ascontiguousarray(X[i]), *ext, nodata=np.nan, name=f"b{i}") for i in range(X.shape[0])]
out = exact_extract(bands, gdf, ["weighted_mean"], weights=NumPyRasterSource(area, *ext, name="area"), output="pandas")
out.to_csv(sys.argv[4])
"""


def monthly(a):
    import pandas as pd
    import xarray as xr

    from wbexplore.spatial import cell_areas_m2, describe_grid

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from extract import make_stack

    rng = np.random.default_rng(42)
    nt = 60 if a.quick else 240
    ny = nx = 600
    res = 0.05
    X = make_stack(nt, ny, nx, rng)
    lon = np.round(np.arange(res / 2, 30, res), 6)
    lat = np.round(np.arange(res / 2, 30, res), 6)
    with tempfile.TemporaryDirectory() as dd:
        d = Path(dd)
        xr.Dataset({"v": (("time", "lat", "lon"), X, {"units": "mm"})},
                   coords={"time": pd.date_range("2001-01-01", periods=nt, freq="MS"), "lat": lat, "lon": lon}
                   ).to_netcdf(d / "m.nc", encoding={"v": {"chunksizes": (12, ny, nx)}})
        del X
        import geopandas as gpd

        polys = star_polygons(rng, 100, 0, 30, 0, 30, 0.5, 5.0)
        gpd.GeoDataFrame({"basin_id": [f"b{i}" for i in range(100)]}, geometry=polys, crs=4326).to_file(d / "b.geojson")
        np.save(d / "area.npy", cell_areas_m2(describe_grid(lon, lat, "EPSG:4326")))
        _catalog(d, [{"id": "m", "component": "P", "path": "m.nc", "variable": "v"}])
        (d / "ee.py").write_text(EE)
        print(f"monthly stack {nt} x {ny} x {nx} float32 ({(d / 'm.nc').stat().st_size / 2**20:.0f} MiB), 100 basins")
        runs = {"ours": _ours(d),
                "bare": _proc([sys.executable, "-c", "import sys, xarray as xr; "
                               "xr.open_dataset(sys.argv[1], engine='netcdf4')['v'].values", "m.nc"], d),
                "ee": _proc([sys.executable, "ee.py", "m.nc", "b.geojson", "area.npy", "ee.csv"], d)}
        med = _interleaved(_with_against(runs, d), a.repeat)
        _print(med, "ours", "ee", "wbexplore extract / xarray + exactextract weighted_mean (same areas)", 0.6)
        _print(med, "ours", "bare", "wbexplore extract / bare read", 1.2, show=False)
        _print_against(med, d, "m")
        ours = xr.open_dataset(d / "out.nc")["m"].values
        ee = pd.read_csv(d / "ee.csv")
        ref = np.stack([ee[f"b{i}_area_weighted_mean"].to_numpy() for i in range(nt)], axis=1)
        print(f"  max rel. difference vs exactextract weighted_mean: {np.nanmax(np.abs(ours - ref) / np.abs(ref)):.1e}")


def memory(a):
    """Peak allocations (tracemalloc: numpy buffers included) of one streamed daily extraction, against
    one streaming task's stored block plus the weights (what must be in memory at once)."""
    import tracemalloc

    from wbexplore.io.blocks import release_handles
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source
    from wbexplore.pipeline import load_basins, source_means, weights_for
    from wbexplore.spatial.zonal import TASK_BYTES

    rng = np.random.default_rng(13)
    years = 2 if a.quick else 10
    with tempfile.TemporaryDirectory() as dd:
        d = Path(dd)
        write_daily(d, years, rng)
        _basins(d, rng, 50, NX * RES, NY * RES)
        cat = open_catalog(_catalog(d, [{"id": "pd", "component": "P", "path": "daily.nc", "variable": "pr"}]))
        basins = load_basins(cat)

        def run():
            src = open_source(cat.sources[0])
            w = weights_for(src, basins, cache_dir=d / "cache")
            out = source_means(src, w).compute()
            release_handles()
            return src, w, out

        run()  # numba and weights caches
        tracemalloc.start()
        src, w, _ = run()
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        wbytes = w.matrix.data.nbytes + w.matrix.indices.nbytes + w.matrix.indptr.nbytes
        step = NY * NX * 4
        chunk = max(TASK_BYTES // step, 31) * step  # one task's stored block (at least one month of days)
        print(f"peak allocations of one streamed daily extraction: {peak / 2**20:.0f} MiB; one task's block "
              f"{chunk / 2**20:.0f} MiB + weights {wbytes / 2**20:.1f} MiB; ratio {peak / (chunk + wbytes):.2f}   target <= 2")
        print(f"  (the stack is {years * 365 * step / 2**20:.0f} MiB; two tasks run at once on this machine)")


def _print(med, num, den, what, target, show=True):
    if show:
        for k, (m, lo, hi) in med.items():
            print(f"  {k:6s} median {m:7.3f} s   (min {lo:.3f}, max {hi:.3f}; CPU median {CPU.get(k, float('nan')):.2f} s)")
    r = med[num][0] / med[den][0]
    print(f"  ratio {what}: {r:.2f}   target <= {target}   {'met' if r <= target else 'NOT met'}"
          f"   (CPU time: {CPU[num] / CPU[den]:.2f})")


def main():
    ap = argparse.ArgumentParser()
    for m in ("daily", "composite", "monthly", "memory"):
        ap.add_argument(f"--{m}", action="store_true")
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--against", type=Path, default=None, help="another checkout (e.g. ../other-checkout), run side by side")
    a = ap.parse_args()
    global AGAINST
    AGAINST = a.against
    chosen = [m for m in ("daily", "composite", "monthly", "memory") if getattr(a, m)] or ["daily", "composite"]
    for m in chosen:
        globals()[m](a)


if __name__ == "__main__":
    main()
