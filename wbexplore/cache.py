"""The weights and series caches: the one module that knows them.

A cache may make a run faster; it must never make it wrong. Three rules follow.

Keys come from content
    * weights: the grid description signature (cell-centre coordinates and CRS), the engine,
      the basin ids, their areas and their geometries (WKB, in order), and `CACHE_FORMAT`.
      Ids are part of the key because the weights carry the basin labels: two basins whose ids
      are swapped have the same geometries in the same order but different weights rows.
    * series: the catalog text (its sha256), a content hash of every input file (basin file and
      its sidecars, discharge table, every product file, zarr stores file by file, each with its
      path), the extraction options that change the result (sources, basins, engine), the
      wbexplore version and `CACHE_FORMAT`.

    Content hashes are SHA-256 (`hashlib.file_digest`): collision resistant, the algorithm the
    catalog already uses for its own text, and on processors with SHA instructions faster than
    BLAKE2b here (35 MB of demo files: 32 ms against 52 ms from the page cache).

    A file is hashed again unless its *fingerprint* is unchanged since it was last hashed:
    (device, inode, size, st_mtime_ns, st_ctime_ns) of the file, or of every file below a zarr
    store (then with relative paths, so an added or removed chunk changes it too). That is
    enough: the kernel sets ctime to the current time on every write and on every metadata
    change, including the ``utime`` call that restores an mtime, and user space cannot set it
    back (short of setting the system clock back). So "edited in place with its mtime restored"
    still changes ctime, and a file replaced by another (a rename) has another inode or ctime. Timestamps are
    coarse (a clock tick, a few ms), so a file changed within the same tick as it was hashed
    could keep its fingerprint: a digest is only remembered when the file's newest time stamp
    is more than `RACY_SECONDS` older than the moment it was hashed (as git does with "racily
    clean" entries), and only when the fingerprint did not change while it was read. The
    remembered digests live in memory and, for the series key, in ``file-digests.json`` in the
    cache folder (itself checksummed).

    Cost of the series key of the demo study (`wbexplore demo`: 249 input files, 35 MB), measured
    on a shared 2-core machine with the files in the page cache, medians of 9: cold (every file
    hashed, memo written) 64 to 99 ms, of which the hashing itself is about 32 ms; warm (every
    fingerprint unchanged, digests from the memo file or memory) 4 to 9 ms. A warm `load_series`
    of the demo (key, checksum of the cache file, parse) takes about 72 ms against 61 ms for the
    former size-and-mtime key, and a cold extraction 14 s. From a cold disk the cold case is bound
    by the read, as the extraction that follows is.

Cached files are checked on read
    Each cache file is one header line (``wbexplore-cache <format> <kind> <key> sha256=<hex>``)
    then the payload (an ``.npz`` for weights, a netCDF-4 file for series). The SHA-256 of the
    payload and the key are verified before the payload is parsed; a file that fails (flipped
    bits, truncated, unreadable, another key) is rebuilt with a `CacheRebuiltWarning` naming it.

No temporary file survives
    Cache files are written to a temporary name in the cache folder (``.wbx-tmp-<host>-<pid>-…``)
    and renamed. Temporary names are registered and removed on SIGINT and SIGTERM (handlers are
    installed only while writing, in the main thread, and chain to the previous ones) and at
    exit; the first use of a cache folder in a process removes temporary names left by a
    process of this host that no longer runs, or older than `STALE_SECONDS`.
"""

from __future__ import annotations

import atexit
import hashlib
import io
import json
import os
import re
import secrets
import signal
import socket
import stat as stat_mod
import threading
import time
import warnings
import zipfile
from contextlib import contextmanager
from pathlib import Path
from typing import Callable

import numpy as np

from . import __version__
from .errors import InputError

__all__ = ["CACHE_FORMAT", "CacheRebuiltWarning", "CacheWriteWarning", "default_cache_dir", "cache_root",
           "file_digest", "input_files", "inputs_digest", "sweep_stale", "weights_key", "cached_weights", "cached_series", "cached_extraction",
           "check_root_for", "load_basins", "clear_memory"]

CACHE_FORMAT = "wbx-cache-2"
RACY_SECONDS = 2.0  # a digest is remembered only for files whose newest time stamp is older than this
STALE_SECONDS = 15 * 60  # a temporary name this old is stale even if its pid looks alive (pids are reused)
TMP_PREFIX = ".wbx-tmp-"
MEMO_NAME = "file-digests.json"
_MEMO_MAX = 4096  # remembered digests per cache folder (one per input file or zarr store)
_HEADER_MAX = 512
# the files a shapefile is made of; read together by the vector driver, hashed together
_SHAPEFILE_PARTS = (".shp", ".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx")


class CacheRebuiltWarning(UserWarning):
    """A cache file failed its check (damaged, truncated, unreadable) and was rebuilt."""


class CacheWriteWarning(UserWarning):
    """A result could not be stored in the cache (it is still returned, just not cached)."""


# --------------------------------------------------------------------------- the cache folder
def default_cache_dir() -> Path:
    """Cache folder: ``$WBEXPLORE_CACHE`` or ``~/.cache/wbexplore``."""
    env = os.environ.get("WBEXPLORE_CACHE")
    return Path(env) if env else Path.home() / ".cache" / "wbexplore"


_SWEPT: set[str] = set()


def cache_root(cache_dir: str | os.PathLike | None = None) -> Path:
    """The usable cache folder (created if missing); stale temporary names in it removed once per process.

    Raises `InputError` naming the folder (and whether it came from ``--cache-dir`` or
    ``WBEXPLORE_CACHE``) when it cannot be created, is not a folder or is not writable.
    """
    if cache_dir is not None and str(cache_dir) != "":
        root, origin = Path(cache_dir), "--cache-dir"
    else:
        root = default_cache_dir()
        origin = "WBEXPLORE_CACHE" if os.environ.get("WBEXPLORE_CACHE") else "cache directory"
    try:
        root.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise InputError(f"{origin} {root}: cannot be used as the cache directory (it is not a directory)") from None
    except OSError as exc:
        raise InputError(f"{origin} {root}: cannot be used as the cache directory "
                         f"({exc.strerror or exc.__class__.__name__})") from None
    if not root.is_dir():
        raise InputError(f"{origin} {root}: cannot be used as the cache directory (it is not a directory)")
    if not os.access(root, os.W_OK | os.X_OK):
        raise InputError(f"{origin} {root}: cannot be used as the cache directory (not writable)")
    key = os.path.realpath(root)
    if key not in _SWEPT:
        _SWEPT.add(key)
        sweep_stale(root)
    return root


_HOST = hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]
# exactly the temporary names this module writes, and those of the cache layout before it (nothing else is removed)
_TMP_NAME = re.compile(r"^" + re.escape(TMP_PREFIX) + r"([0-9a-f]{8})-(\d+)-[0-9a-f]{8}\.(?:part|nc|json)$")
_LEGACY_TMP = re.compile(r"^(?:series-[0-9a-f]{24}\.(\d+)\.tmp|[0-9a-f]{20}-[0-9a-f]{20}-[a-z]+\.(\d+)\.tmp\.npz)$")


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, owned by someone else
    except OSError:
        return False
    return True


def sweep_stale(root: Path, *, now: float | None = None) -> list[Path]:
    """Remove temporary names in ``root`` left by dead processes of this host or older than `STALE_SECONDS`."""
    now = time.time() if now is None else now
    removed = []
    try:
        entries = list(os.scandir(root))
    except OSError:
        return removed
    for e in entries:
        legacy = _LEGACY_TMP.match(e.name)
        ours = _TMP_NAME.match(e.name)
        if legacy:  # written by wbexplore before this module: <key>.<pid>.tmp[.npz]
            parts = [_HOST, legacy.group(1) or legacy.group(2)]
        elif ours:
            parts = [ours.group(1), ours.group(2)]
        else:
            continue
        try:
            age = now - e.stat(follow_symlinks=False).st_mtime
        except OSError:
            continue
        stale = age > STALE_SECONDS
        if not stale and len(parts) >= 2 and parts[0] == _HOST and parts[1].isdigit():
            pid = int(parts[1])
            stale = pid != os.getpid() and not _pid_alive(pid)
        if stale:
            try:
                os.unlink(e.path)
                removed.append(Path(e.path))
            except OSError:
                pass
    return removed


# --------------------------------------------------------------------------- temporary names and signals
_LIVE_TMP: set[str] = set()
_LOCK = threading.RLock()
_HANDLERS: dict[int, object] = {}  # signal -> the handler we replaced (while any write is in progress)
_DEPTH = 0


def _remove_live() -> None:
    for t in list(_LIVE_TMP):
        try:
            os.unlink(t)
        except OSError:
            pass
        _LIVE_TMP.discard(t)


atexit.register(_remove_live)


def _on_signal(signum, frame):
    _remove_live()
    prev = _HANDLERS.get(signum)
    if prev is None:  # a handler not installed from Python: the default is the closest we can restore
        prev = signal.SIG_DFL
    if callable(prev):
        prev(signum, frame)  # e.g. Python's own SIGINT handler: KeyboardInterrupt
    elif prev == signal.SIG_DFL:
        signal.signal(signum, signal.SIG_DFL)
        os.kill(os.getpid(), signum)  # die of the signal, as without us
    # SIG_IGN: ignored, as without us


@contextmanager
def _guard_signals():
    """While writing: SIGINT/SIGTERM first remove our temporary files, then do what they did before."""
    global _DEPTH
    main = threading.current_thread() is threading.main_thread()
    with _LOCK:
        if main and _DEPTH == 0:
            for s in (signal.SIGINT, signal.SIGTERM):
                try:
                    _HANDLERS[s] = signal.signal(s, _on_signal)
                except (ValueError, OSError):
                    pass
        if main:
            _DEPTH += 1
    try:
        yield
    finally:
        if main:
            with _LOCK:
                _DEPTH -= 1
                if _DEPTH == 0:
                    for s, h in list(_HANDLERS.items()):
                        try:
                            signal.signal(s, h if h is not None else signal.SIG_DFL)
                        except (ValueError, OSError):
                            pass
                    _HANDLERS.clear()


@contextmanager
def _temp_name(root: Path, suffix: str):
    """A registered temporary path in ``root``, removed on exit, signal or interpreter exit."""
    tmp = root / f"{TMP_PREFIX}{_HOST}-{os.getpid()}-{secrets.token_hex(4)}{suffix}"
    with _LOCK:
        _LIVE_TMP.add(str(tmp))
    try:
        yield tmp
    finally:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        except OSError:
            pass
        with _LOCK:
            _LIVE_TMP.discard(str(tmp))


def _write_payload(fh, payload: bytes) -> None:
    """Write the payload bytes (a seam for tests that interrupt a write)."""
    fh.write(payload)


# --------------------------------------------------------------------------- content digests
_DIGESTS: dict[str, tuple[str, str]] = {}  # path -> (fingerprint, sha256 hex): in-process memo


def _files_below(folder: str) -> list[str]:
    """Every regular file below a store folder (relative paths, sorted; links to folders not followed)."""
    out = []
    for dirpath, dirnames, filenames in os.walk(folder, followlinks=False):
        dirnames.sort()
        for f in sorted(filenames):
            q = os.path.join(dirpath, f)
            if os.path.isfile(q):
                out.append(os.path.relpath(q, folder).replace(os.sep, "/"))
    return out


def _stamp(st) -> str:
    return f"{st.st_dev}:{st.st_ino}:{st.st_size}:{st.st_mtime_ns}:{st.st_ctime_ns}"


def _fingerprint(name: str) -> tuple[str, int, list[str] | None]:
    """(fingerprint, newest mtime/ctime in ns, files below it or None) of a file or a store folder."""
    st = os.stat(name)
    if not stat_mod.S_ISDIR(st.st_mode):
        return _stamp(st), max(st.st_mtime_ns, st.st_ctime_ns), None
    files = _files_below(name)
    h = hashlib.sha256()
    newest = 0
    for rel in files:
        st = os.stat(os.path.join(name, rel))
        h.update(f"{rel}\0{_stamp(st)}\n".encode())
        newest = max(newest, st.st_mtime_ns, st.st_ctime_ns)
    return f"dir:{len(files)}:{h.hexdigest()}", newest, files


def _sha256_of(name: str) -> str:
    with open(name, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def _hash_content(name: str, files: list[str] | None) -> str:
    if files is None:
        return _sha256_of(name)
    h = hashlib.sha256()
    for rel in files:
        h.update(f"{rel}\0{_sha256_of(os.path.join(name, rel))}\n".encode())
    return h.hexdigest()


def file_digest(path: str | os.PathLike, memo: dict | None = None) -> str:
    """SHA-256 (hex) of a file's content, or of a store folder's files with their relative paths.

    ``memo`` (path -> (fingerprint, digest)) is consulted and updated along with the
    in-process memo; a digest is reused only when the fingerprint is identical (see module docstring).
    """
    name = os.path.abspath(path)
    try:
        fp, newest, files = _fingerprint(name)
    except OSError as exc:
        raise InputError(f"{name}: cannot be read ({exc.strerror or exc.__class__.__name__})") from None
    for m in (_DIGESTS, memo):
        if m is not None:
            hit = m.get(name)
            if hit is not None and hit[0] == fp:
                if m is not _DIGESTS:
                    _DIGESTS[name] = (fp, hit[1])
                return hit[1]
    started = time.time_ns()
    try:
        digest = _hash_content(name, files)
        fp_after = _fingerprint(name)[0]
    except OSError as exc:
        raise InputError(f"{name}: cannot be read ({exc.strerror or exc.__class__.__name__})") from None
    if fp_after == fp and newest < started - int(RACY_SECONDS * 1e9):
        _DIGESTS[name] = (fp, digest)
        if memo is not None:
            memo[name] = (fp, digest)
    return digest


def _memo_path(root: Path) -> Path:
    return root / MEMO_NAME


def _read_memo(root: Path) -> dict:
    """Remembered digests of a cache folder; an unreadable or damaged memo is simply empty."""
    try:
        raw = _memo_path(root).read_bytes()
        doc = json.loads(raw)
        body = json.dumps(doc["entries"], sort_keys=True, separators=(",", ":")).encode()
        if doc.get("format") != CACHE_FORMAT or doc.get("sha256") != hashlib.sha256(body).hexdigest():
            return {}
        return {str(k): (str(v[0]), str(v[1])) for k, v in doc["entries"].items()}
    except (OSError, ValueError, KeyError, TypeError, IndexError):
        return {}


def _write_memo(root: Path, memo: dict) -> None:
    if len(memo) > _MEMO_MAX:
        for k in list(memo)[: len(memo) - _MEMO_MAX]:
            del memo[k]
    entries = {k: list(v) for k, v in memo.items()}
    body = json.dumps(entries, sort_keys=True, separators=(",", ":")).encode()
    doc = {"format": CACHE_FORMAT, "sha256": hashlib.sha256(body).hexdigest(), "entries": entries}
    try:
        with _guard_signals(), _temp_name(root, ".json") as tmp:
            tmp.write_text(json.dumps(doc))
            os.replace(tmp, _memo_path(root))
    except OSError:
        pass  # a memo that cannot be written only costs hashing again next time


def _basin_files(cat) -> list[Path]:
    """The basin file and, for a shapefile, the parts read with it."""
    b = Path(cat.basins.path)
    out = [b]
    if b.suffix.lower() == ".shp":
        for ext in _SHAPEFILE_PARTS[1:]:
            for cand in (b.with_suffix(ext), b.with_suffix(ext.upper())):
                if cand.is_file():
                    out.append(cand)
    return out


def input_files(cat) -> list[tuple[str, Path]]:
    """(role, path) of every file a catalog's extraction reads: basins (with shapefile parts),
    discharge, the station table of each flow, the water bodies' outlines, levels, curves and pan table,
    product files (zarr stores as folders)."""
    from .io.catalog import GEOTIFF_SIDECARS

    out: list[tuple[str, Path]] = [("basins", b) for b in _basin_files(cat)]
    if cat.discharge is not None:
        out.append(("discharge", Path(cat.discharge.path)))
    for f in getattr(cat, "flows", ()):
        out.append((f"flow {f.id}", Path(f.table.path)))
    wb = getattr(cat, "waterbodies", None)
    if wb is not None:  # outlines (with a shapefile's parts), levels, storage curve, pan table
        out += [("waterbodies", Path(p)) for p in wb.input_paths()]
    # folder -> names in it: one listing instead of a stat per sidecar (460 GeoTIFFs: 22 ms a call, was 35 ms)
    listed: dict[str, set[str] | None] = {}
    for s in cat.sources:
        for f in s.paths:
            out.append((f"source {s.id}", Path(f)))
            if Path(f).suffix.lower() in (".tif", ".tiff"):
                # sidecars GDAL reads with a GeoTIFF (nodata, scale, masks, overviews): one appearing,
                # changing or going away changes the numbers, so it changes the key
                folder, name = os.path.split(str(f))
                if folder not in listed:
                    try:
                        listed[folder] = set(os.listdir(folder or "."))
                    except OSError:
                        listed[folder] = None
                names = listed[folder]
                for ext in GEOTIFF_SIDECARS:
                    side = Path(str(f) + ext)
                    if (names is None or name + ext in names) and side.is_file():
                        out.append((f"source {s.id} sidecar", side))
    return out


def check_root_for(cat, root: Path) -> None:
    """Refuse a cache folder that lies among the catalog's inputs: inside a zarr store or an input
    folder, or matched by a product glob (its files would change or join the inputs it caches)."""
    import fnmatch

    r = Path(os.path.realpath(root))
    chain = [r, *r.parents]
    for role, p in input_files(cat):
        # only folders can hold the cache: files are not resolved (460 GeoTIFFs: 30 ms a call, was 70 ms)
        if os.path.isdir(p) and Path(os.path.realpath(p)) in chain:
            raise InputError(f"{root}: cache folder lies inside input {p.name!r} ({role}) of catalog "
                             f"{cat.path.name}; choose a folder outside the study's inputs")
    globs = cat.input_globs() if hasattr(cat, "input_globs") else ()
    for pat in globs:
        for cand in chain[:-1]:
            if fnmatch.fnmatch(str(cand), pat) or fnmatch.fnmatch(os.path.realpath(str(cand)), pat):
                raise InputError(f"{root}: cache folder matches the file pattern of an input of catalog "
                                 f"{cat.path.name} ({os.path.basename(pat)!r}); choose another folder")


def inputs_digest(cat, *, root: Path | None = None, options: dict | None = None) -> str:
    """Series key: catalog text, content of every input file, options, version, cache format."""
    memo = _read_memo(root) if root is not None else None
    before = dict(memo) if memo is not None else None
    h = hashlib.sha256(f"{CACHE_FORMAT}\0wbexplore {__version__}\0catalog {cat.sha256}\0".encode())
    h.update(json.dumps(options or {}, sort_keys=True, default=str).encode())
    for role, p in input_files(cat):
        h.update(f"\0{role}\0{os.path.abspath(p)}\0{file_digest(p, memo)}".encode())
    if root is not None and memo != before:
        _write_memo(root, memo)
    return h.hexdigest()[:32]


# --------------------------------------------------------------------------- cache files
def _header(kind: str, key: str, payload: bytes) -> bytes:
    return f"wbexplore-cache {CACHE_FORMAT} {kind} {key} sha256={hashlib.sha256(payload).hexdigest()}\n".encode()


def _read_checked(path: Path, kind: str, key: str) -> bytes:
    """The payload of a cache file, or ValueError/OSError saying why it cannot be trusted."""
    with open(path, "rb") as fh:
        line = fh.readline(_HEADER_MAX)
        payload = fh.read()
    parts = line.rstrip(b"\n").decode("ascii", "replace").split(" ")
    if len(parts) != 5 or parts[0] != "wbexplore-cache" or not line.endswith(b"\n"):
        raise ValueError("no cache header")
    if parts[1] != CACHE_FORMAT or parts[2] != kind or parts[3] != key:
        raise ValueError("header of another cache entry")
    if parts[4] != f"sha256={hashlib.sha256(payload).hexdigest()}":
        raise ValueError("checksum mismatch")
    return payload


def _store(root: Path, path: Path, kind: str, key: str, payload: bytes) -> None:
    data = _header(kind, key, payload)
    try:
        with _guard_signals(), _temp_name(root, ".part") as tmp:
            with open(tmp, "wb") as fh:
                fh.write(data)
                _write_payload(fh, payload)
            os.replace(tmp, path)
    except OSError as exc:
        warnings.warn(f"{path}: cache file not written ({exc.strerror or exc.__class__.__name__}); "
                      f"the result is used without caching", CacheWriteWarning, stacklevel=3)


def _rebuilt(path: Path, why: str) -> None:
    warnings.warn(f"{path}: cache file rejected ({why}); rebuilt", CacheRebuiltWarning, stacklevel=3)


# --------------------------------------------------------------------------- weights
_WEIGHTS_MEMO: dict = {}  # key -> Weights, within a process (keeps their derived kernel arrays too)


def weights_key(grid_signature: str, ids, geoms, areas_m2, engine: str) -> str:
    """Weights key: grid signature, engine, basin ids, areas and geometries (WKB) in order, format."""
    import shapely

    h = hashlib.sha256(f"{CACHE_FORMAT}\0weights\0{grid_signature}\0{engine}\0{len(ids)}\0".encode())
    areas = np.ascontiguousarray(areas_m2, dtype=np.float64)
    wkb = shapely.to_wkb(np.asarray(geoms, dtype=object), output_dimension=2, byte_order=1)  # one call for all
    for i, g in zip(ids, wkb):
        h.update(f"{i}\0{len(g)}\0".encode())
        h.update(g)
    h.update(areas.tobytes())
    return h.hexdigest()[:32]


def _weights_payload(w) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, data=w.matrix.data, indices=w.matrix.indices, indptr=w.matrix.indptr,
             mshape=np.array(w.matrix.shape), basin=w.basin.astype(str), area=w.basin_area_m2,
             shape=np.array(w.shape), signature=np.array(w.grid_signature), engine=np.array(w.engine))
    return buf.getvalue()


def _weights_from(payload: bytes, ids):
    import scipy.sparse as sp

    from .spatial.zonal import Weights

    with np.load(io.BytesIO(payload), allow_pickle=False) as z:
        m = sp.csr_matrix((z["data"], z["indices"], z["indptr"]), shape=tuple(int(v) for v in z["mshape"]))
        w = Weights(matrix=m, basin=z["basin"].astype(str), basin_area_m2=z["area"],
                    shape=tuple(int(v) for v in z["shape"]), grid_signature=str(z["signature"]),
                    engine=str(z["engine"]))
    if list(w.basin) != [str(i) for i in ids]:
        raise ValueError("basin ids differ from the key")
    return w


def cached_weights(key: str, ids, build: Callable[[], object], *, cache_dir=None, use_cache: bool = True):
    """Weights under ``key`` (see `weights_key`): from memory, from a checked cache file, or ``build()``."""
    if not use_cache:
        return build()
    root = cache_root(cache_dir)
    path = root / f"weights-{key}.wbxc"
    mkey = (os.path.realpath(root), key)
    hit = _WEIGHTS_MEMO.get(mkey)
    if hit is not None:  # built or read (and checked) by this process under the same content key
        return hit
    if path.exists():
        try:
            w = _weights_from(_read_checked(path, "weights", key), ids)
            _remember(mkey, w)
            return w
        except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as exc:
            _rebuilt(path, _why(exc))
    w = build()
    _store(root, path, "weights", key, _weights_payload(w))
    _remember(mkey, w)
    return w


def _remember(mkey, w) -> None:
    if len(_WEIGHTS_MEMO) >= 32:
        _WEIGHTS_MEMO.pop(next(iter(_WEIGHTS_MEMO)))
    _WEIGHTS_MEMO[mkey] = w


def _why(exc: BaseException) -> str:
    if isinstance(exc, OSError):
        return f"unreadable: {exc.strerror or exc.__class__.__name__}"
    msg = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
    return msg[:120]


# --------------------------------------------------------------------------- series
def _series_payload(root: Path, ds) -> bytes:
    with _guard_signals(), _temp_name(root, ".nc") as tmp:
        ds.to_netcdf(tmp, format="NETCDF4")
        return tmp.read_bytes()


def _series_from(payload: bytes):
    import netCDF4
    import xarray as xr

    nc = netCDF4.Dataset("wbexplore-series-cache.nc", mode="r", memory=payload)
    try:
        store = xr.backends.NetCDF4DataStore(nc)
        ds = _decode_without_probes(store, nc)
        if ds is not None:
            return ds
        # the engine named: guessing it imports every backend (rioxarray + rasterio, ~0.6 s at start-up)
        with xr.open_dataset(store, engine="store") as ds:
            return ds.load()
    finally:
        if nc.isopen():
            nc.close()


# "days since 2001-01-01 00:00:00", as xarray's netCDF writer stamps month-start datetimes
_DAYS_SINCE = re.compile(r"^days since (\d{4}-\d{2}-\d{2})(?:[ T]00:00(?::00)?)?$")


def _decode_without_probes(store, nc):
    """The cached series decoded as ``xr.open_dataset(store, engine="store").load()`` decodes them (same
    values, dtypes, attributes, encodings, coordinates, indexes and order: `tests/test_cache.py` compares
    them), or None where the payload holds something this shortcut does not know (then xarray decodes it).

    Why: xarray decodes variable-length strings (the basin ids) with ``astype(str)``, whose result asks
    whether it is a dask array, and builds each index through a check for pint arrays; answering imports
    dask.array (with scipy.fft and toolz) and pint, 0.9 to 1.3 s of a warm ``rank --all``'s 2.3 to 2.6 s
    (100 basins, 2 cores, medians). Here the numbers are still decoded by xarray (with those variables
    left out: masking and scaling ask nothing); the strings are turned into ``<U`` arrays by numpy as
    ``astype(str)`` does, the month stamps (whole days since a date, proleptic Gregorian calendar: what
    xarray writes for datetime64) by numpy, and each index is built from a `pandas.Index` of them.
    """
    import pandas as pd
    import xarray as xr

    if "coordinates" in nc.ncattrs():  # coordinates named at file level: left to xarray
        return None
    dims = set(nc.dimensions)
    special = [n for n, v in nc.variables.items() if v.dtype is str or (n in dims and v.dimensions == (n,))]
    decoded = {}
    for name in special:
        raw = store.open_store_variable(name, nc.variables[name])
        attrs = dict(raw.attrs)
        if "_FillValue" in attrs or "missing_value" in attrs:
            return None
        if nc.variables[name].dtype is str:
            values = np.asarray(raw.values).astype(str)
            encoding = {"dtype": values.dtype}
        else:
            m = _DAYS_SINCE.match(str(attrs.get("units", "")))
            if (m is None or attrs.get("calendar") != "proleptic_gregorian" or set(attrs) != {"units", "calendar"}
                    or raw.dtype.kind not in "iu"):
                return None
            days = np.asarray(raw.values)
            if days.size and np.abs(days).max() > 100_000:  # far from the reference date: let xarray decide
                return None
            values = np.datetime64(m.group(1), "ns") + days.astype("timedelta64[D]")
            encoding = {**raw.encoding, "units": attrs.pop("units"), "calendar": attrs.pop("calendar")}
        if "coordinates" in attrs:
            encoding["coordinates"] = attrs.pop("coordinates")
        decoded[name] = (raw.dims, values, attrs, encoding)
    with xr.open_dataset(store, engine="store", drop_variables=special) as rest:
        rest = rest.load()
    encodings = [v.encoding for v in rest.variables.values()] + [d[3] for d in decoded.values()]
    named = {c for e in encodings for c in str(e.get("coordinates", "")).split()}  # CF "coordinates"
    coords, indexes, data_vars = {}, {}, {}
    for name in nc.variables:
        if name in decoded:
            vdims, values, attrs, encoding = decoded[name]
            if vdims == (name,) and name in dims:
                index = xr.indexes.PandasIndex(pd.Index(values), name, coord_dtype=values.dtype)
                indexes[name] = index
                var = index.create_variables()[name]
                var.attrs, var.encoding = attrs, encoding
            else:
                var = xr.Variable(vdims, values, attrs, encoding, fastpath=True)
            (coords if name in indexes or name in named else data_vars)[name] = var
        else:
            (coords if name in rest.coords else data_vars)[name] = rest.variables[name]
    ds = xr.Dataset(data_vars, coords=xr.Coordinates(coords, indexes=indexes), attrs=rest.attrs)
    ds.encoding = dict(rest.encoding)
    return ds


def cached_series(cat, build: Callable[[], object], *, cache_dir=None, use_cache: bool = True,
                  options: dict | None = None):
    """The canonical series of ``cat``: from a checked cache file under its content key, or ``build()``.

    When an input file changes while ``build()`` runs, the result is returned but not stored.
    """
    if not use_cache:
        return build()
    root = cache_root(cache_dir)
    check_root_for(cat, root)
    key = inputs_digest(cat, root=root, options=options)
    path = root / f"series-{key}.wbxc"
    if path.exists():
        try:
            return _series_from(_read_checked(path, "series", key))
        except (OSError, ValueError, KeyError, RuntimeError) as exc:
            _rebuilt(path, _why(exc))
    ds = build()
    if inputs_digest(cat, root=root, options=options) != key:
        warnings.warn(f"{cat.path}: an input file changed during the extraction; the series are not cached",
                      CacheWriteWarning, stacklevel=2)
        return ds
    try:
        payload = _series_payload(root, ds)
    except (OSError, RuntimeError) as exc:
        warnings.warn(f"{path}: cache file not written ({_why(exc)}); the result is used without caching",
                      CacheWriteWarning, stacklevel=2)
        return ds
    _store(root, path, "series", key, payload)
    return ds


def _cells_payload(cells: dict) -> bytes:
    """Cell means (basin id -> product id -> `CellMeans`) as one npz: a JSON index plus five arrays each
    (the cell corners are computed again from the centres when they are drawn)."""
    index, arrays = [], {}
    for basin, by_source in cells.items():
        for source, cm in by_source.items():
            i = len(index)
            index.append({"basin": str(basin), "source": str(source), "component": cm.component, "units": cm.units,
                          "row0": int(cm.row0), "col0": int(cm.col0), "period": list(cm.period),
                          "dx": float(cm.dx), "dy": float(cm.dy), "crs": cm.crs, "lon_offset": float(cm.lon_offset)})
            arrays.update({f"mean{i}": cm.mean, f"months{i}": cm.months, f"coverage{i}": cm.coverage,
                           f"x{i}": cm.x, f"y{i}": cm.y})
    buf = io.BytesIO()
    np.savez(buf, index=np.array(json.dumps(index, sort_keys=True)), basins=np.array(list(cells), dtype=str),
             **arrays)
    return buf.getvalue()


def _cells_from(payload: bytes) -> dict:
    from .spatial.cells import CellMeans

    with np.load(io.BytesIO(payload), allow_pickle=False) as z:
        out = {str(b): {} for b in z["basins"]}
        for i, e in enumerate(json.loads(str(z["index"]))):
            out[e["basin"]][e["source"]] = CellMeans(
                basin=e["basin"], source=e["source"], component=e["component"], units=e["units"],
                mean=z[f"mean{i}"], months=z[f"months{i}"], coverage=z[f"coverage{i}"], x=z[f"x{i}"], y=z[f"y{i}"],
                dx=e["dx"], dy=e["dy"], crs=e["crs"], lon_offset=e["lon_offset"], row0=e["row0"], col0=e["col0"],
                period=tuple(e["period"]))
    return out


def cached_extraction(cat, build: Callable[[], tuple], *, want: str, cache_dir=None, use_cache: bool = True,
                      options: dict | None = None):
    """The series or the cell means of ``cat`` (``want``: "series" | "cells"), from a checked cache file, or
    ``build()`` -> ``(series, cell means)``: one extraction gives both, and both are stored under the one
    content key of `cached_series` (catalog text, every input file's SHA-256, options, version), so a changed
    product file invalidates the cell means exactly as it does the series.
    """
    if want not in ("series", "cells"):
        raise ValueError(f"want={want!r}: 'series' or 'cells'")
    if not use_cache:
        return build()[0 if want == "series" else 1]
    root = cache_root(cache_dir)
    check_root_for(cat, root)
    key = inputs_digest(cat, root=root, options=options)
    paths = {"series": root / f"series-{key}.wbxc", "cells": root / f"cells-{key}.wbxc"}
    path = paths[want]
    if path.exists():
        try:
            payload = _read_checked(path, want, key)
            return _series_from(payload) if want == "series" else _cells_from(payload)
        except (OSError, ValueError, KeyError, RuntimeError, EOFError, zipfile.BadZipFile) as exc:
            _rebuilt(path, _why(exc))
    ds, cells = build()
    wanted = ds if want == "series" else cells
    if inputs_digest(cat, root=root, options=options) != key:
        warnings.warn(f"{cat.path}: an input file changed during the extraction; the series are not cached",
                      CacheWriteWarning, stacklevel=2)
        return wanted
    for kind, make in (("series", lambda: _series_payload(root, ds)), ("cells", lambda: _cells_payload(cells))):
        try:
            payload = make()
        except (OSError, RuntimeError) as exc:
            warnings.warn(f"{paths[kind]}: cache file not written ({_why(exc)}); the result is used without caching",
                          CacheWriteWarning, stacklevel=2)
            continue
        _store(root, paths[kind], kind, key, payload)
    return wanted


# --------------------------------------------------------------------------- basins (in process)
_BASINS: dict = {}


def load_basins(catalog):
    """Basins of a catalog, read once per content of the basin file(s) and basin settings."""
    from .io.basins import read_basins

    return _load_basin_units(catalog, "whole", read_basins)


def load_incremental_basins(catalog):
    """Incremental units of a catalog's nested basins (`wbexplore.io.basins.incremental_basins`), read
    once per content of the basin file(s) and basin settings (``downstream_field`` among them)."""
    from .io.basins import incremental_basins

    return _load_basin_units(catalog, "incremental", incremental_basins)


def _load_basin_units(catalog, kind: str, read):
    files = _basin_files(catalog)  # not input_files: listing 460 GeoTIFFs and their sidecars took 38 ms a call

    def digest():
        return tuple(file_digest(p) for p in files)

    key = (kind, tuple(os.path.abspath(p) for p in files), catalog.basins, digest())
    if key in _BASINS:
        return _BASINS[key]
    gdf = read(catalog.basins)
    if digest() == key[3]:  # not changed while it was read
        for k in [k for k in _BASINS if k[0] == kind]:
            del _BASINS[k]
        _BASINS[key] = gdf
    return gdf


def clear_memory() -> None:
    """Forget what this process remembers (digests, weights, basins); the cache files stay."""
    _DIGESTS.clear()
    _WEIGHTS_MEMO.clear()
    _BASINS.clear()
    _SWEPT.clear()
