"""Caches that cannot lie: content keys, checked cache files, no temporary file left behind.

Expected numbers come from a cold run (an empty cache folder) or from arithmetic on the invented
inputs (P - ET - Q - dS closes exactly for the right source); what is checked is that a warm
cache gives the same answer as no cache at all, which is the contract of any cache (common practice).
"""

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
from wbexplore.io.catalog import open_catalog

NT = 36
WEST, EAST = (0.5, 0.5, 1.5, 1.5), (2.5, 0.5, 3.5, 1.5)


def _study(folder: Path, ids=("W", "E")) -> Path:
    """Two basins; source p1 is right in the west and too wet in the east, p2 the reverse.

    Truth (times a seasonal factor): P 100 mm/month in the west, 60 in the east; ET 70 in the
    west, 10 in the east; no storage change; so Q = P - ET is 30 in the west and 50 in the east.
    """
    lon, lat = lonlat_grid(0, 4, 0, 2, 0.25)
    season = 1 + 0.3 * np.sin(2 * np.pi * np.arange(NT) / 12)
    west = (lon < 2)[None, None, :]
    truth = np.where(west, 100.0, 60.0) * season[:, None, None] * np.ones((NT, lat.size, lon.size))
    times = monthly("2001-01", NT)
    write_nc(folder / "p1.nc", np.where(west, truth, truth * 100 / 60), lon, lat, times, var="p", units="mm")
    write_nc(folder / "p2.nc", np.where(west, truth * 60 / 100, truth), lon, lat, times, var="p", units="mm")
    write_nc(folder / "et.nc", np.where(west, 0.7, 1 / 6) * truth, lon, lat, times, var="e", units="mm")
    write_nc(folder / "tws.nc", np.zeros_like(truth), lon, lat, times, var="s", units="mm")
    _basins_and_q(folder, ids)
    return write_catalog(folder, [
        {"id": "p1", "component": "P", "path": "p1.nc", "variable": "p"},
        {"id": "p2", "component": "P", "path": "p2.nc", "variable": "p"},
        {"id": "et", "component": "ET", "path": "et.nc", "variable": "e"},
        {"id": "tws", "component": "TWSA", "path": "tws.nc", "variable": "s"},
    ], discharge={"path": "q.csv", "time_field": "date", "basin_field": "basin", "value_field": "q",
                  "units": "mm/month"})


def _basins_and_q(folder: Path, ids):
    """Basin file (west box first) and discharge table labelled with ``ids`` = (west id, east id)."""
    box_basins(folder / "basins.geojson", [WEST, EAST], ids=list(ids))
    season = 1 + 0.3 * np.sin(2 * np.pi * np.arange(NT) / 12)
    rows = []
    for bid, q in zip(ids, (30.0, 50.0)):
        for t, f in zip(monthly("2001-01", NT), season):
            rows.append({"date": f"{t:%Y-%m-%d}", "basin": bid, "q": q * f})
    pd.DataFrame(rows).to_csv(folder / "q.csv", index=False)


def _rank(cat, basin, cache, capsys):
    from wbexplore.cli import main

    rc = main(["rank", str(cat), "--basin", basin, "--format", "json", "--cache-dir", str(cache)])
    out = capsys.readouterr().out
    assert rc == 0
    return [(r["P"], r["ET"], r["TWSA"], r["rmse"], r["bias"]) for r in json.loads(out)["rows"]]


def test_swapped_basin_ids_rank_on_warm_cache(tmp_path, capsys):
    cat = _study(tmp_path)
    cache = tmp_path / "cache"
    # west: p1 closes exactly, east: p2 (arithmetic of the invented truth)
    for basin, best in (("W", "p1"), ("E", "p2")):
        top = _rank(cat, basin, cache, capsys)[0]
        assert top[0] == best and top[3] == pytest.approx(0, abs=1e-3)
    # the two basins swap ids in the basin file and in the discharge table (same geometries, same order)
    _basins_and_q(tmp_path, ("E", "W"))
    warm = _rank(cat, "W", cache, capsys)
    cold = _rank(cat, "W", tmp_path / "cold", capsys)
    assert warm == cold
    # "W" is now the eastern box: p2 closes exactly (stale labels would pair western P and ET with
    # eastern Q, and rank p1 first)
    assert warm[0][0] == "p2" and warm[0][3] == pytest.approx(0, abs=1e-3)


def _flip(path: Path, needle: bytes | None = None):
    raw = bytearray(path.read_bytes())
    at = raw.find(needle) if needle else -1
    at = at + 7 if at >= 0 else len(raw) // 2  # a float64's sign/exponent byte (little endian) or the middle
    raw[at] ^= 0x41
    path.write_bytes(bytes(raw))


def test_flipped_bits_in_series_cache_rebuilt(tmp_path):
    from wbexplore.pipeline import load_series

    cat = _study(tmp_path)
    cache = tmp_path / "cache"
    first = load_series(cat, cache_dir=cache)
    (cached,) = [p for p in cache.iterdir() if p.name.startswith("series-")]
    _flip(cached, np.ascontiguousarray(first["p1"].values[0]).tobytes())
    with pytest.warns(UserWarning) as rec:
        again = load_series(cat, cache_dir=cache)
    notes = [str(r.message) for r in rec if r.category.__name__ == "CacheRebuiltWarning"]
    assert len(notes) == 1 and cached.name in notes[0] and "\n" not in notes[0]
    for v in ("p1", "p2", "et", "tws", "discharge"):
        np.testing.assert_array_equal(again[v].values, first[v].values)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the rebuilt file reads cleanly
        third = load_series(cat, cache_dir=cache)
    np.testing.assert_array_equal(third["p1"].values, first["p1"].values)


def test_flipped_bits_in_weights_cache_rebuilt(tmp_path):
    """A fresh process (nothing remembered in memory) reads the damaged weights file."""
    cat = _study(tmp_path)
    cache = tmp_path / "cache"

    def run(out):
        return subprocess.run([sys.executable, "-m", "wbexplore.cli", "extract", str(cat), "--out", str(out),
                               "--cache-dir", str(cache), "--quiet"], capture_output=True, text=True, timeout=300)

    r = run(tmp_path / "a.nc")
    assert r.returncode == 0, r.stderr
    weights = sorted(p for p in cache.iterdir() if p.name.startswith("weights-") or p.suffix == ".npz")
    assert weights
    for p in weights:
        _flip(p)
    r = run(tmp_path / "b.nc")
    assert r.returncode == 0, r.stderr
    notes = [ln for ln in r.stderr.splitlines() if "rebuilt" in ln]
    assert len(notes) == len(weights) and all(any(p.name in n for p in weights) for n in notes)
    with xr.open_dataset(tmp_path / "a.nc") as a, xr.open_dataset(tmp_path / "b.nc") as b:
        for v in ("p1", "p2", "et", "tws"):
            np.testing.assert_array_equal(a[v].values, b[v].values)


def test_product_edited_in_place_mtime_restored(tmp_path):
    from wbexplore.pipeline import load_series

    cat = _study(tmp_path)
    time.sleep(2.2)  # old enough for their digests to be remembered (the warm path is the one under test)
    cache = tmp_path / "cache"
    first = load_series(cat, cache_dir=cache)
    load_series(cat, cache_dir=cache)  # warm: digests from the memo
    # edit p1.nc in place: same size, same layout, every value doubled; then restore its times
    p1 = tmp_path / "p1.nc"
    st = p1.stat()
    with xr.open_dataset(p1) as d:
        old = np.ascontiguousarray(d["p"].values)
    raw = p1.read_bytes()
    assert raw.count(old.tobytes()) == 1
    p1.write_bytes(raw.replace(old.tobytes(), (old * 2).astype(np.float32).tobytes()))
    os.utime(p1, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert p1.stat().st_size == st.st_size and p1.stat().st_mtime_ns == st.st_mtime_ns
    again = load_series(cat, cache_dir=cache)
    np.testing.assert_allclose(again["p1"].values, 2 * first["p1"].values, rtol=1e-6)
    np.testing.assert_array_equal(again["p2"].values, first["p2"].values)


_CHILD = textwrap.dedent("""
    import sys, time
    import xarray as xr
    from wbexplore.pipeline import load_series

    original = xr.Dataset.to_netcdf

    def slow(self, path=None, *a, **k):  # write, say where, then linger as a large write would
        out = original(self, path, *a, **k)
        print("WRITING", path, flush=True)
        time.sleep(120)
        return out

    xr.Dataset.to_netcdf = slow
    load_series(sys.argv[1], cache_dir=sys.argv[2])
""")


def _interrupted_write(tmp_path, sig):
    cat = _study(tmp_path)
    cache = tmp_path / "cache"
    script = tmp_path / "child.py"
    script.write_text(_CHILD)
    proc = subprocess.Popen([sys.executable, str(script), str(cat), str(cache)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        assert line.startswith("WRITING"), proc.stderr.read()
        tmp = Path(line.split(None, 1)[1].strip())
        assert tmp.exists() and tmp.parent == cache
        proc.send_signal(sig)
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    return proc, tmp, cache


def _leftovers(cache: Path):
    return [p.name for p in cache.iterdir() if not (p.name.startswith(("weights-", "series-", "cells-"))
                                                    and p.suffix == ".wbxc") and p.name != "file-digests.json"]


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_signal_during_write_leaves_no_temp(tmp_path, sig):
    proc, tmp, cache = _interrupted_write(tmp_path, sig)
    assert proc.returncode != 0
    assert not tmp.exists()
    assert _leftovers(cache) == []
    assert not [p for p in cache.iterdir() if p.name.startswith("series-")]  # nothing half-written kept


def test_stale_temp_removed_at_start(tmp_path):
    """A write killed outright (SIGKILL cannot be caught) leaves its temporary file; the next run removes it."""
    from wbexplore.pipeline import load_series

    proc, tmp, cache = _interrupted_write(tmp_path, signal.SIGKILL)
    assert proc.returncode == -signal.SIGKILL and tmp.exists()  # the dead writer's leftover
    load_series(tmp_path / "catalog.yaml", cache_dir=cache)
    assert not tmp.exists()
    assert _leftovers(cache) == []


def test_old_temp_of_a_live_pid_removed(tmp_path):
    """Pids are reused: a temporary name older than the limit goes even if its pid runs (pid 1 here)."""
    from wbexplore import cache as c

    root = tmp_path / "cache"
    root.mkdir()
    old = root / f"{c.TMP_PREFIX}{c._HOST}-1-0123abcd.part"
    fresh = root / f"{c.TMP_PREFIX}{c._HOST}-1-4567abcd.part"
    legacy = root / f"series-{'0a' * 12}.999999999.tmp"  # the earlier cache layout's name, its pid gone
    # not names the cache writes: never touched, however old
    mine = [root / "notes.txt", root / "data.999999999.tmp", root / f"{c.TMP_PREFIX}notes.txt"]
    for p in (old, fresh, legacy, *mine):
        p.write_bytes(b"x")
    t = time.time() - c.STALE_SECONDS - 60
    for p in (old, *mine):
        os.utime(p, (t, t))
    c.cache_root(root)
    assert not old.exists() and not legacy.exists()
    assert fresh.exists() and all(p.exists() for p in mine)


@pytest.mark.parametrize("command", ["extract", "rank", "export", "replay", "report", "serve"])
@pytest.mark.parametrize("where", ["under-a-file", "a-file"])
def test_unusable_cache_dir_exit_2(tmp_path, capsys, command, where):
    from wbexplore.cli import main

    cat = _study(tmp_path)
    blocker = tmp_path / "blocker"
    blocker.write_text("not a folder")
    bad = blocker / "cache" if where == "under-a-file" else blocker
    sel = ["--basin", "W"]
    srcs = ["--P", "p1", "--ET", "et", "--TWSA", "tws"]
    argv = {
        "extract": ["extract", str(cat), "--out", str(tmp_path / "o.nc"), "--quiet"],
        "rank": ["rank", str(cat), *sel],
        "export": ["export", str(cat), *sel, *srcs, "--out", str(tmp_path / "o.yaml")],
        "replay": ["replay", str(tmp_path / "s.yaml")],
        "report": ["report", str(cat), *sel, "--out", str(tmp_path / "o.html")],
        "serve": ["serve", str(cat), "--port", "1"],
    }[command]
    if command == "replay":
        assert main(["export", str(cat), *sel, *srcs, "--out", str(tmp_path / "s.yaml"),
                     "--cache-dir", str(tmp_path / "good")]) == 0
        capsys.readouterr()
    rc = main([*argv, "--cache-dir", str(bad)])
    err = capsys.readouterr().err
    assert rc == 2
    assert len(err.strip().splitlines()) == 1 and str(bad) in err and "--cache-dir" in err
    assert blocker.read_text() == "not a folder"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith("o.")]


def test_unusable_cache_dir_from_environment(tmp_path, monkeypatch):
    from wbexplore.errors import InputError
    from wbexplore.pipeline import load_series

    cat = _study(tmp_path)
    (tmp_path / "blocker").write_text("")
    monkeypatch.setenv("WBEXPLORE_CACHE", str(tmp_path / "blocker" / "sub"))
    with pytest.raises(InputError, match="WBEXPLORE_CACHE .*blocker"):
        load_series(cat)


def test_digest_memo_trusts_only_an_identical_fingerprint(tmp_path):
    """The memo of content digests (hashlib.sha256 of the bytes is the reference) survives a new
    process but never an in-place edit with the mtime restored, and never remembers a file
    changed within the last `RACY_SECONDS` (its time stamps could still repeat)."""
    import hashlib

    from wbexplore import cache as c

    old, fresh = tmp_path / "old.bin", tmp_path / "fresh.bin"
    old.write_bytes(b"a" * 4096)
    time.sleep(c.RACY_SECONDS + 0.2)
    fresh.write_bytes(b"b" * 4096)
    memo: dict = {}
    assert c.file_digest(old, memo) == hashlib.sha256(b"a" * 4096).hexdigest()
    assert c.file_digest(fresh, memo) == hashlib.sha256(b"b" * 4096).hexdigest()
    assert str(old) in memo and str(fresh) not in memo  # fresh is too recent to be remembered
    st = old.stat()
    with open(old, "r+b") as fh:  # same size, one byte changed, times put back
        fh.write(b"z")
    os.utime(old, ns=(st.st_atime_ns, st.st_mtime_ns))
    c.clear_memory()  # as a new process: only the memo is left
    assert c.file_digest(old, memo) == hashlib.sha256(b"z" + b"a" * 4095).hexdigest()


def test_memo_file_with_a_bad_checksum_is_ignored(tmp_path):
    from wbexplore import cache as c

    cat = _study(tmp_path)
    root = tmp_path / "cache"
    root.mkdir()
    time.sleep(c.RACY_SECONDS + 0.2)
    key = c.inputs_digest(open_catalog(cat), root=root)
    memo = json.loads((root / c.MEMO_NAME).read_text())
    some = next(iter(memo["entries"]))
    memo["entries"][some][1] = "0" * 64  # a wrong digest with a stale checksum
    (root / c.MEMO_NAME).write_text(json.dumps(memo))
    c.clear_memory()
    assert c.inputs_digest(open_catalog(cat), root=root) == key


def test_basins_reread_after_ids_swapped_with_mtime_restored(tmp_path):
    """The in-process basin cache is keyed by content: same size, same mtime, different ids."""
    from wbexplore.pipeline import load_basins

    cat = _study(tmp_path)
    path = tmp_path / "basins.geojson"
    assert load_basins(open_catalog(cat)).index.tolist() == ["W", "E"]
    st = path.stat()
    _basins_and_q(tmp_path, ("E", "W"))
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert path.stat().st_size == st.st_size and path.stat().st_mtime_ns == st.st_mtime_ns
    assert load_basins(open_catalog(cat)).index.tolist() == ["E", "W"]


def test_geotiff_sidecar_changes_the_series_key(tmp_path):
    """A '.aux.xml' beside a GeoTIFF changes what GDAL reads (here a scale of 10), so it must change the
    series key (seen: same key, old series served)."""
    import rasterio

    from utils import write_tif
    from wbexplore.cache import inputs_digest

    lon, lat = lonlat_grid(0, 2, 0, 2, 0.5)
    write_tif(tmp_path / "p.tif", np.ones((3, lat.size, lon.size)), lon, lat)
    box_basins(tmp_path / "basins.geojson", [(0.2, 0.2, 1.8, 1.8)])
    cat = open_catalog(write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.tif", "units": "mm",
                                                 "time_start": "2001-01"}]))
    before = inputs_digest(cat)
    (tmp_path / "p.tif.aux.xml").write_text(
        '<PAMDataset><PAMRasterBand band="1"><Scale>10</Scale></PAMRasterBand></PAMDataset>\n')
    with rasterio.open(tmp_path / "p.tif") as src:  # GDAL does read it
        assert src.scales[0] == 10.0
    assert inputs_digest(cat) != before


def test_cache_folder_inside_an_input_is_refused(tmp_path, capsys):
    """A cache folder inside a zarr store (or matched by a product glob) would write into the inputs it
    caches (seen: rank exit 0 and weights files inside the store)."""
    import zarr  # noqa: F401

    from wbexplore.cli import main

    lon, lat = lonlat_grid(0, 2, 0, 2, 0.5)
    t = monthly("2001-01", 30)
    rng = np.random.default_rng(3)
    for name in ("p", "e"):
        write_nc(tmp_path / f"{name}.nc", 1 + rng.random((t.size, lat.size, lon.size)), lon, lat, t, var="v")
    da = xr.DataArray(rng.standard_normal((t.size, lat.size, lon.size)), dims=("time", "lat", "lon"),
                      coords={"time": t, "lat": lat, "lon": lon}, attrs={"units": "mm"})
    xr.Dataset({"lwe": da}).to_zarr(tmp_path / "tws.zarr", consolidated=False)
    box_basins(tmp_path / "basins.geojson", [(0.2, 0.2, 1.8, 1.8)], ids=["B"])
    pd.DataFrame({"date": [f"{m:%Y-%m-%d}" for m in t], "basin_id": "B", "q": 5.0}).to_csv(tmp_path / "q.csv",
                                                                                       index=False)
    cat = write_catalog(tmp_path, [
        {"id": "p", "component": "P", "path": "p.nc", "variable": "v", "units": "mm/day"},
        {"id": "e", "component": "ET", "path": "e.nc", "variable": "v", "units": "mm/day"},
        {"id": "t", "component": "TWSA", "path": "tws.zarr", "variable": "lwe", "units": "mm"}],
        discharge={"path": "q.csv", "time_field": "date", "basin_field": "basin_id", "value_field": "q",
                   "units": "m3/s"})
    store_files = sorted(p.relative_to(tmp_path) for p in (tmp_path / "tws.zarr").rglob("*"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["rank", str(cat), "--basin", "B", "--cache-dir", str(tmp_path / "tws.zarr" / "cache")])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and len(err.splitlines()) == 1 and "tws.zarr" in err, err
    assert sorted(p.relative_to(tmp_path) for p in (tmp_path / "tws.zarr").rglob("*")) == store_files


# ---------------------------------------------------------------- series cache decoded without xarray's probes
def _xarray_decodes(payload: bytes) -> xr.Dataset:
    """The reference: xarray's own CF decoding of a series cache payload (what the cache did before)."""
    import netCDF4

    nc = netCDF4.Dataset("wbexplore-series-cache.nc", mode="r", memory=payload)  # the name the cache gives it
    try:
        with xr.open_dataset(xr.backends.NetCDF4DataStore(nc), engine="store") as ds:
            return ds.load()
    finally:
        if nc.isopen():  # closing the dataset closed it
            nc.close()


def _same_encoding(a: dict, b: dict, what) -> None:
    assert set(a) == set(b), (what, a, b)
    for k, u in a.items():
        v = b[k]
        nan = isinstance(u, float) and np.isnan(u) and np.isnan(v)  # a NaN _FillValue
        assert type(u) is type(v) and (u is v or nan or u == v), (what, k, u, v)


def assert_same_dataset(got: xr.Dataset, ref: xr.Dataset) -> None:
    """Identical values, names, attributes, dtypes, encodings, order of variables and kind of indexes."""
    xr.testing.assert_identical(got, ref)
    assert list(got.variables) == list(ref.variables) and list(got.coords) == list(ref.coords)
    _same_encoding(got.encoding, ref.encoding, "dataset")
    for k, v in ref.variables.items():
        g = got.variables[k]
        assert g.dtype == v.dtype and type(g) is type(v) and type(g._data) is type(v._data), k
        _same_encoding(g.encoding, v.encoding, k)
    for k, ix in ref.xindexes.items():
        assert type(got.xindexes[k]) is type(ix) and got.xindexes[k].coord_dtype == ix.coord_dtype, k
        assert got.indexes[k].equals(ix.to_pandas_index()) and got.indexes[k].dtype == ix.to_pandas_index().dtype


def _labelled_series() -> xr.Dataset:
    """Canonical series with text where the cache meets it: ids that look like numbers or are not ASCII,
    names, an upstream-basins coordinate with attributes, a text data variable."""
    from utils import canonical_series

    ds, _ = canonical_series(nb=4, nt=30)
    ids = ["0123", "Ünterå", "B-2", "x"]
    ds = ds.assign_coords(basin=ids, basin_name=("basin", ["Alpha", "Beta river", "", "Ω"]),
                          upstream_basins=("basin", ["", "0123", "0123 B-2", ""], {"long_name": "upstream basins"}))
    ds["basin"].attrs["long_name"] = "basin id"
    ds["note"] = ("basin", np.array(["a", "bb", "", "dddd"], dtype=object), {"comment": "text"})
    return ds


@pytest.mark.parametrize("case", ["demo", "labelled", "hours since", "float days"])
def test_series_cache_decoded_as_xarray_decodes_it(case, request, tmp_path):
    """The cache's own decoding (no dask or pint import) gives exactly what xarray's CF decoding gives
    (the reference); a payload it does not know (time in hours, or not whole days) goes to xarray."""
    from wbexplore import cache

    ds = request.getfixturevalue("demo_series") if case == "demo" else _labelled_series()
    if case == "hours since":
        ds["time"].encoding.update(units="hours since 2000-01-01 00:00:00")
    if case == "float days":
        ds["time"].encoding.update(units="days since 2000-01-01", dtype="float64")
    payload = cache._series_payload(tmp_path, ds)
    import netCDF4

    nc = netCDF4.Dataset("probe.nc", mode="r", memory=payload)
    try:
        shortcut = cache._decode_without_probes(xr.backends.NetCDF4DataStore(nc), nc)
    finally:
        if nc.isopen():  # closing the dataset closed it
            nc.close()
    assert (shortcut is not None) is (case in ("demo", "labelled"))  # the shortcut is taken where it applies
    got = cache._series_from(payload)
    assert_same_dataset(got, _xarray_decodes(payload))
    np.testing.assert_array_equal(got["basin"].values, ds["basin"].values.astype(str))
    np.testing.assert_array_equal(got["time"].values, ds["time"].values)
