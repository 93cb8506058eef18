"""Extraction benchmark: wbexplore's weights + sparse apply against exactextract and the I/O floor.

Raster: 240 monthly bands of 600 x 600 cells of 0.05 degree (0 to 30 N), float32, about 6% NaN;
100 random star-shaped polygons 0.5 to 5 degrees across. Everything is measured side by side in
one run, as medians; the ratios are what to read (the machine is small and noisy).

    python benchmarks/extract.py            # full size (writes ~0.7 GB of test files in a temp dir)
    python benchmarks/extract.py --quick    # 60 bands, for a smoke test
    python benchmarks/extract.py --scale    # 1,000 basins on a 400 x 700 continent, streamed, + LocalCluster
    python benchmarks/extract.py --cells    # extraction with and without the per-cell long-term means (issue 17)
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import PeakRSS, median_time, star_polygons  # noqa: E402

warnings.simplefilter("ignore")


def make_stack(nt, ny, nx, rng):
    t = np.arange(nt, dtype=np.float32)[:, None, None]
    yy = np.linspace(0, 1, ny, dtype=np.float32)[None, :, None]
    xx = np.linspace(0, 1, nx, dtype=np.float32)[None, None, :]
    X = (50 + 30 * np.sin(t / 2 + 3 * xx) + 20 * yy).astype(np.float32)
    X += rng.normal(0, 5, X.shape).astype(np.float32)
    mask = rng.random((ny, nx)) < 0.06
    X[:, mask] = np.nan
    return X


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--scale", action="store_true")
    ap.add_argument("--cells", action="store_true")
    ap.add_argument("--repeat", type=int, default=5)
    a = ap.parse_args()
    if a.scale:
        return scale_run()
    if a.cells:
        return cells_run(quick=a.quick, repeat=a.repeat)
    import geopandas as gpd
    from exactextract import exact_extract
    from exactextract.raster import NumPyRasterSource

    from wbexplore.spatial import build_weights, cell_areas_m2, describe_grid
    from wbexplore.spatial.zonal import apply_weights_numpy

    rng = np.random.default_rng(42)
    nt = 60 if a.quick else 240
    ny = nx = 600
    res = 0.05
    X = make_stack(nt, ny, nx, rng)  # rows south -> north
    lon = np.round(np.arange(res / 2, 30, res), 6)
    lat = np.round(np.arange(res / 2, 30, res), 6)
    polys = star_polygons(rng, 100, 0, 30, 0, 30, 0.5, 5.0)
    ids = [f"b{i}" for i in range(len(polys))]
    from wbexplore.io.basins import geodesic_area_m2

    areas = geodesic_area_m2(np.array(polys, dtype=object))
    grid = describe_grid(lon, lat, "EPSG:4326")
    print(f"raster {nt} x {ny} x {nx} float32 ({X.nbytes / 2**20:.0f} MiB), {len(polys)} polygons, "
          f"{np.isnan(X[0]).mean():.1%} NaN")

    t_build, W = median_time(lambda: build_weights(grid, polys, ids, areas), repeat=a.repeat)
    t_apply, (ours, _) = median_time(lambda: apply_weights_numpy(X, W), repeat=a.repeat)
    t_sum, _ = median_time(lambda: X.sum(), repeat=a.repeat)

    gdf = gpd.GeoDataFrame({"id": ids}, geometry=polys, crs="EPSG:4326")
    ext = (0.0, 0.0, 30.0, 30.0)
    Xn = X[:, ::-1, :].copy()  # north first, as a raster

    def ee_mem():
        bands = [NumPyRasterSource(Xn[i], *ext, nodata=np.nan, name=f"b{i}") for i in range(nt)]
        return exact_extract(bands, gdf, ["mean(coverage_weight=area_spherical_m2)"], output="pandas")

    t_ee, ee_sph = median_time(ee_mem, repeat=max(1, a.repeat // 2))

    # accuracy: exactextract weighted_mean with wbexplore's ellipsoidal areas as the weight raster
    area_r = cell_areas_m2(grid)  # north first already
    k = min(12, nt)

    def ee_weighted():
        vals = [NumPyRasterSource(Xn[i], *ext, nodata=np.nan, name=f"b{i}") for i in range(k)]
        wr = NumPyRasterSource(area_r, *ext, name="area")
        return exact_extract(vals, gdf, ["weighted_mean"], weights=wr, output="pandas")

    ref = ee_weighted()
    ref = np.stack([ref[f"b{i}_area_weighted_mean"].to_numpy() for i in range(k)], axis=1)
    rel = np.nanmax(np.abs(ours[:, :k] - ref) / np.abs(ref))
    sph = np.stack([ee_sph[f"b{i}_mean"].to_numpy() for i in range(k)], axis=1)
    rel_sph = np.nanmax(np.abs(ours[:, :k] - sph) / np.abs(sph))

    # float32 accumulation drift (why wbexplore accumulates in float64)
    rs, cs, wu_t, used = W.window()
    Xu = np.nan_to_num(X[:k, rs, cs].reshape(k, -1)[:, used])
    f32 = np.asarray(Xu @ wu_t.astype(np.float32)) / np.asarray((~np.isnan(X[:k, rs, cs].reshape(k, -1)[:, used])).astype(np.float32) @ wu_t.astype(np.float32))
    drift = np.nanmax(np.abs(f32.T - ours[:, :k]) / np.abs(ours[:, :k]))

    print("\nin memory (median of runs)")
    print(f"  wbexplore weights build        {t_build:8.3f} s")
    print(f"  wbexplore apply                {t_apply:8.3f} s")
    print(f"  exactextract mean (in memory)  {t_ee:8.3f} s")
    print(f"  numpy arr.sum() (the floor)    {t_sum:8.3f} s")
    print(f"  ratio (build + apply) / exactextract  {(t_build + t_apply) / t_ee:6.3f}   target <= 0.25")
    print(f"  ratio apply / numpy pass              {t_apply / t_sum:6.2f}   target <= 3")
    print(f"  max rel. difference vs exactextract weighted_mean (same areas): {rel:.2e}  target <= 1e-6")
    print(f"  max rel. difference vs exactextract area_spherical_m2 mean:     {rel_sph:.2e}  (sphere vs ellipsoid)")
    print(f"  float32 accumulation drift (not used):                          {drift:.2e}")

    with tempfile.TemporaryDirectory() as d:
        file_runs(Path(d), X, lon, lat, polys, gdf, ids, areas, a.repeat)


def file_runs(d, X, lon, lat, polys, gdf, ids, areas, repeat):
    import pandas as pd
    import rasterio
    import xarray as xr
    from exactextract import exact_extract
    from rasterio.transform import from_origin

    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source
    from wbexplore.io.blocks import release_handles
    from wbexplore.pipeline import source_means, weights_for
    from wbexplore.spatial.zonal import zonal_mean

    nt, ny, nx = X.shape
    tif = d / "stack.tif"
    with rasterio.open(tif, "w", driver="GTiff", width=nx, height=ny, count=nt, dtype="float32", crs="EPSG:4326",
                       transform=from_origin(0, 30, 0.05, 0.05), nodata=np.nan, tiled=True, blockxsize=256,
                       blockysize=256, interleave="band") as dst:
        dst.write(X[:, ::-1, :])
    nc = d / "stack.nc"
    months = pd.date_range("2001-01-01", periods=nt, freq="MS")
    xr.Dataset({"v": (("time", "lat", "lon"), X, {"units": "mm"})},
               coords={"time": months, "lat": lat, "lon": lon}).to_netcdf(
        nc, encoding={"v": {"chunksizes": (12, ny, nx)}})
    zr = d / "stack.zarr"  # zarr goes through xarray + dask (no block reader): measured for orientation
    xr.Dataset({"v": (("time", "lat", "lon"), X, {"units": "mm"})},
               coords={"time": months, "lat": lat, "lon": lon}).to_zarr(zr, encoding={"v": {"chunks": (12, ny, nx)}})
    gdf.assign(basin_id=ids, name=ids).to_file(d / "b.geojson")
    import yaml

    (d / "c.yaml").write_text(yaml.safe_dump({
        "catalog_version": 1, "basins": {"path": "b.geojson", "id_field": "basin_id"},
        "sources": [{"id": "t", "component": "P", "path": "stack.tif", "units": "mm", "time_start": "2001-01"},
                    {"id": "n", "component": "P", "path": "stack.nc", "variable": "v"},
                    {"id": "z", "component": "P", "path": "stack.zarr", "variable": "v"}]}))
    cat = open_catalog(d / "c.yaml")
    from wbexplore.pipeline import load_basins

    basins = load_basins(cat)
    print(f"\nfrom a file ({tif.stat().st_size / 2**20:.0f} MiB GeoTIFF, {nc.stat().st_size / 2**20:.0f} MiB netCDF)")

    def bare_tif():
        with rasterio.open(tif) as s:
            return s.read()

    def bare_nc():
        with xr.open_dataset(nc) as ds:
            return ds["v"].values

    def bare_zarr():
        with xr.open_zarr(zr) as ds:
            return ds["v"].values

    def ours(spec_id, streamed=True):
        """What `wbexplore.extract` does per source: open, weights (from the cache), means."""
        def run():
            src = open_source(cat.source(spec_id))
            w = weights_for(src, basins, cache_dir=d / "cache")
            zm = source_means(src, w) if streamed else zonal_mean(src.data, w)
            out = zm.compute(scheduler="threads")
            release_handles()  # as extract does: every run opens its file again
            return out
        return run

    def ee_file(path=tif):
        return exact_extract(str(path), gdf, ["mean(coverage_weight=area_spherical_m2)"], output="pandas",
                             strategy="raster-sequential")

    # interleaved, so that page-cache and machine drift hit both sides alike; medians
    import statistics

    runs = {"bare_tif": bare_tif, "ours_tif": ours("t"), "bare_nc": bare_nc, "ours_nc": ours("n"),
            "xr_tif": ours("t", streamed=False), "xr_nc": ours("n", streamed=False),
            "bare_zarr": bare_zarr, "xr_zarr": ours("z")}
    assert all(open_source(cat.source(k)).blocks is not None for k in "tn")  # the streamed path is measured
    times = {k: [] for k in runs}
    for fn in runs.values():
        fn()  # warm-up (numba compile, weights cache, page cache)
    for _ in range(max(7, repeat)):
        for k, fn in runs.items():
            t = time.perf_counter()
            fn()
            times[k].append(time.perf_counter() - t)
    med = {k: statistics.median(v) for k, v in times.items()}
    t_rt, t_ot, t_rn, t_on = med["bare_tif"], med["ours_tif"], med["bare_nc"], med["ours_nc"]
    import tracemalloc

    def peak_alloc_mib(fn):
        """Peak of the arrays and objects one streamed extraction allocates (tracemalloc sees numpy's
        buffers; the process RSS would not show it, as freed arenas of earlier runs are reused)."""
        tracemalloc.start()
        fn()
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        return peak / 2**20

    mem_t, mem_n = peak_alloc_mib(runs["ours_tif"]), peak_alloc_mib(runs["ours_nc"])
    t_ee, _ = median_time(ee_file, repeat=1, warmup=0)
    t_een, _ = median_time(lambda: ee_file(nc), repeat=1, warmup=0)  # GDAL's netCDF driver
    print(f"  bare read GeoTIFF (rasterio)            {t_rt:8.3f} s")
    print(f"  bare read netCDF (xarray .values)       {t_rn:8.3f} s")
    print(f"  wbexplore end to end, GeoTIFF           {t_ot:8.3f} s   peak allocations {mem_t:.0f} MiB")
    print(f"  wbexplore end to end, netCDF            {t_on:8.3f} s   peak allocations {mem_n:.0f} MiB")
    print(f"  same through xarray + dask, GeoTIFF     {med['xr_tif']:8.3f} s   (the path for other formats)")
    print(f"  same through xarray + dask, netCDF      {med['xr_nc']:8.3f} s")
    print(f"  bare read zarr (xarray .values)         {med['bare_zarr']:8.3f} s")
    print(f"  wbexplore end to end, zarr (dask)       {med['xr_zarr']:8.3f} s   ratio to bare read "
          f"{med['xr_zarr'] / med['bare_zarr']:.2f}")
    print(f"  exactextract raster-sequential, GeoTIFF {t_ee:8.3f} s")
    print(f"  exactextract raster-sequential, netCDF  {t_een:8.3f} s")
    print(f"  ratio wbexplore GeoTIFF / exactextract file   {t_ot / t_ee:6.3f}   target <= 0.5")
    print(f"  ratio wbexplore netCDF / exactextract file    {t_on / t_een:6.3f}   target <= 0.5")
    print(f"  ratio wbexplore GeoTIFF / bare read           {t_ot / t_rt:6.2f}   target <= 1.3")
    print(f"  ratio wbexplore netCDF / bare read            {t_on / t_rn:6.2f}   target <= 1.3")


def cells_run(*, quick: bool, repeat: int):
    """The disagreement map's reduction (per-cell long-term means, issue 17): the same extraction with and
    without it, interleaved, medians; target <= 10% added. Monthly netCDF and GeoTIFF (block reader, the
    separate cell pass) and two years of days in netCDF (the months kernel, where the cell sums are fused)."""
    import statistics

    import geopandas as gpd
    import pandas as pd
    import rasterio
    import xarray as xr
    import yaml
    from rasterio.transform import from_origin

    from wbexplore.io.blocks import release_handles
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source
    from wbexplore.pipeline import extract, load_basins, source_means, weights_for

    rng = np.random.default_rng(42)
    nt, ny, nx, res = (60 if quick else 240), 600, 600, 0.05
    X = make_stack(nt, ny, nx, rng)
    lon = np.round(np.arange(res / 2, 30, res), 6)
    lat = np.round(np.arange(res / 2, 30, res), 6)
    polys = star_polygons(rng, 100, 0, 30, 0, 30, 0.5, 5.0)
    ids = [f"b{i}" for i in range(len(polys))]
    days = pd.date_range("2001-01-01", periods=(180 if quick else 730), freq="D")
    dy, dx = 300, 300
    D = make_stack(days.size, dy, dx, rng) / 30
    with tempfile.TemporaryDirectory() as dd:
        d = Path(dd)
        months = pd.date_range("2001-01-01", periods=nt, freq="MS")
        xr.Dataset({"v": (("time", "lat", "lon"), X, {"units": "mm/day"})},
                   coords={"time": months, "lat": lat, "lon": lon}).to_netcdf(
            d / "m.nc", encoding={"v": {"chunksizes": (12, ny, nx)}})
        with rasterio.open(d / "m.tif", "w", driver="GTiff", width=nx, height=ny, count=nt, dtype="float32",
                           crs="EPSG:4326", transform=from_origin(0, 30, res, res), nodata=np.nan, tiled=True,
                           blockxsize=256, blockysize=256, interleave="band") as dst:
            dst.write(X[:, ::-1, :])
        dlon = np.round(np.arange(0.05, 30, 0.1), 6)
        xr.Dataset({"v": (("time", "lat", "lon"), D, {"units": "mm/day"})},
                   coords={"time": days, "lat": dlon, "lon": dlon}).to_netcdf(
            d / "d.nc", encoding={"v": {"chunksizes": (31, dy, dx)}})
        gpd.GeoDataFrame({"basin_id": ids, "name": ids}, geometry=polys, crs="EPSG:4326").to_file(d / "b.geojson")
        (d / "c.yaml").write_text(yaml.safe_dump({
            "catalog_version": 1, "basins": {"path": "b.geojson", "id_field": "basin_id", "name_field": "name"},
            "sources": [{"id": "n", "component": "P", "path": "m.nc", "variable": "v"},
                        {"id": "t", "component": "P", "path": "m.tif", "units": "mm/day", "time_start": "2001-01"},
                        {"id": "d", "component": "ET", "path": "d.nc", "variable": "v"}]}))
        cat = open_catalog(d / "c.yaml")
        basins = load_basins(cat)
        assert all(open_source(s).blocks is not None for s in cat.sources)  # the streamed paths are measured

        def stream(sid, cells):
            def run():
                src = open_source(cat.source(sid))
                w = weights_for(src, basins, cache_dir=d / "cache")
                out = source_means(src, w, cells=cells).compute(scheduler="threads")
                release_handles()
                return out
            return run

        def whole(cells):
            return lambda: extract(cat, cache_dir=d / "cache", cell_means=cells)

        runs = {}
        for sid in ("n", "t", "d"):
            runs[f"{sid} without"], runs[f"{sid} with"] = stream(sid, False), stream(sid, True)
        runs["extract without"], runs["extract with"] = whole(False), whole(True)
        for fn in runs.values():
            fn()  # warm-up: numba compile, weights cache, page cache
        same = (runs["n without"]()["mean"].values.tobytes() == runs["n with"]()["mean"].values.tobytes())
        times = {k: [] for k in runs}
        for _ in range(max(5, repeat)):
            for k, fn in runs.items():  # interleaved: drift and the other engineers' load hit both sides alike
                t = time.perf_counter()
                fn()
                times[k].append(time.perf_counter() - t)
        med = {k: statistics.median(v) for k, v in times.items()}
        print(f"per-cell long-term means: monthly {nt} x {ny} x {nx}, daily {days.size} x {dy} x {dx}, "
              f"100 basins; medians of {max(5, repeat)} interleaved runs")
        names = {"n": "monthly netCDF (stream)", "t": "monthly GeoTIFF (stream)", "d": "daily netCDF (stream)",
                 "extract": "extract(), all three"}
        for k, label in names.items():
            a, b = med[f"{k} without"], med[f"{k} with"]
            print(f"  {label:28s} without {a:7.3f} s   with {b:7.3f} s   ratio {b / a:5.3f}   target <= 1.10")
        print(f"  basin means bitwise the same with the extra reduction: {same}")


def scale_run():
    import pandas as pd
    import xarray as xr
    import yaml
    import geopandas as gpd

    from wbexplore.pipeline import extract

    rng = np.random.default_rng(7)
    nt, ny, nx, res = 240, 400, 700, 0.1
    lon = np.round(-10 + res / 2 + res * np.arange(nx), 6)
    lat = np.round(30 + res / 2 + res * np.arange(ny), 6)
    with tempfile.TemporaryDirectory() as dd:
        d = Path(dd)
        months = pd.date_range("2001-01-01", periods=nt, freq="MS")
        v = xr.Dataset({"v": (("time", "lat", "lon"), np.zeros((nt, ny, nx), np.float32), {"units": "mm"})},
                       coords={"time": months, "lat": lat, "lon": lon})
        v.to_netcdf(d / "c.nc", encoding={"v": {"chunksizes": (12, ny, nx)}}, compute=True)
        import netCDF4

        with netCDF4.Dataset(d / "c.nc", "a") as nc:
            for i in range(0, nt, 12):
                nc["v"][i:i + 12] = make_stack(12, ny, nx, rng)
        polys = star_polygons(rng, 1000, -10, 60, 30, 70, 0.3, 3.0)
        gpd.GeoDataFrame({"basin_id": [f"b{i}" for i in range(1000)]}, geometry=polys, crs=4326).to_file(d / "b.geojson")
        (d / "c.yaml").write_text(yaml.safe_dump({
            "catalog_version": 1, "basins": {"path": "b.geojson", "id_field": "basin_id"},
            "sources": [{"id": "n", "component": "P", "path": "c.nc", "variable": "v"}]}))
        print(f"scale run: {nt} x {ny} x {nx} float32 ({nt * ny * nx * 4 / 2**30:.2f} GiB), 1000 basins")
        with PeakRSS() as m1:
            t = time.perf_counter()
            a = extract(d / "c.yaml", cache_dir=d / "cache")
            t1 = time.perf_counter() - t
        print(f"  local threads: {t1:7.2f} s, peak RSS {m1.peak_gib:.2f} GiB (target <= 2 GiB)")
        from distributed import Client, LocalCluster

        with LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None, memory_limit="2GiB") as cl, \
                Client(cl) as client:
            t = time.perf_counter()
            b = extract(d / "c.yaml", cache_dir=d / "cache", client=client)
            t2 = time.perf_counter() - t
            wmem = max(w["metrics"]["memory"] for w in client.scheduler_info()["workers"].values()) / 2**30
        same = np.nanmax(np.abs(a["n"].values - b["n"].values) / np.abs(a["n"].values))
        print(f"  LocalCluster 2 workers: {t2:7.2f} s, largest worker {wmem:.2f} GiB, max rel. diff {same:.1e}")


if __name__ == "__main__":
    main()
