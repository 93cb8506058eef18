"""Atomic writers, the refusals that keep outputs off inputs, and the caution text every export carries.

Every file wbexplore writes goes through `atomic_path` (a temporary file next to the target, renamed onto it
only on success) and therefore through `check_output`, which refuses, even when overwriting was asked for:

- a target that *is* an input of the catalog (the catalog file, the basins file and its sidecars, the
  discharge table, every product file, a zarr store or any file inside one), compared by identity
  (``st_dev``, ``st_ino`` after following symlinks), so that a symlink or a hard link to an input is caught;
- a new file whose name matches a product's glob pattern (it would silently join that product);
- a target that is a folder, a device, a FIFO, a socket or anything else that is not a regular file, or a
  symlink to one of those (replacing them is never what ``--force`` means).
"""

from __future__ import annotations

import fnmatch
import glob as _glob
import os
import signal
import stat
import tempfile
import threading
from contextlib import contextmanager
from pathlib import Path

from ..errors import InputError

__all__ = ["CAUTION", "atomic_path", "check_output", "same_file", "terminate_unwinds"]

CAUTION = ("Screening-level analysis: results depend on the products and gauges used and carry their errors. "
           "For water-allocation, flood or drought decisions, defer to gauged data, local codes and "
           "licensed professional practice.")

_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISFIFO, "a FIFO"), (stat.S_ISSOCK, "a socket"))


def _inputs(protect) -> tuple[list[Path], list[str], str]:
    """(input paths, absolute glob patterns, a name for messages) of a Catalog or of a list of paths."""
    if protect is None:
        return [], [], ""
    if hasattr(protect, "input_paths"):
        return list(protect.input_paths()), list(protect.input_globs()), f"catalog {Path(protect.path).name}"
    return [Path(p) for p in protect], [], "the inputs"


def _is_within(child: str, folder: str) -> bool:
    return child == folder or child.startswith(folder.rstrip(os.sep) + os.sep)


def _refuse_input(p: Path, protect) -> None:
    paths, globs, name = _inputs(protect)
    if not paths and not globs:
        return
    try:
        st = os.stat(p)
    except OSError:
        st = None
    real = os.path.realpath(p)
    real_parent = os.path.realpath(p.parent if str(p.parent) else ".")
    ids, stores = set(), []
    for q in paths:
        try:
            qs = os.stat(q)
        except OSError:
            continue
        ids.add((qs.st_dev, qs.st_ino))
        if stat.S_ISDIR(qs.st_mode):
            stores.append(os.path.realpath(q))
    for d in stores:
        if _is_within(real_parent, d) or _is_within(real, d):
            raise InputError(f"{p}: output lies inside {os.path.basename(d)!r}, an input store of {name}; "
                             f"refused even with --force")
    if st is not None:
        if (st.st_dev, st.st_ino) in ids:
            raise InputError(f"{p}: output file is an input of {name}; refused even with --force")
        if st.st_nlink > 1 and stores:
            # a hard link into a store from outside: only then is walking the store worth its cost
            for d in stores:
                for root, _dirs, files in os.walk(d):
                    for f in files:
                        try:
                            fs = os.stat(os.path.join(root, f))
                        except OSError:
                            continue
                        if (fs.st_dev, fs.st_ino) == (st.st_dev, st.st_ino):
                            inner = os.path.relpath(os.path.join(root, f), os.path.dirname(d))
                            raise InputError(f"{p}: output file is a link to {inner!r}, an input of {name}; "
                                             f"refused even with --force")
    for pat in globs:
        pdir, pbase = os.path.split(pat)
        cands = [(os.path.abspath(p), pat)]
        if not _glob.has_magic(pdir):
            cands.append((real, os.path.join(os.path.realpath(pdir), pbase)))
        for target, pattern in cands:
            if fnmatch.fnmatchcase(target, pattern):
                raise InputError(f"{p}: output would be read as an input of {name} (it matches "
                                 f"{os.path.basename(pat)!r}); refused even with --force")


def check_output(path: str | os.PathLike, *, overwrite: bool = False, protect=None) -> Path:
    """Refuse an output path that must not be written, before anything is computed or written.

    Parameters
    ----------
    path : the output file
    overwrite : replace an existing regular file (``--force``); never lifts the refusals below
    protect : a `Catalog` (its `input_paths` and `input_globs`) or a list of input paths

    Raises
    ------
    InputError
        One line naming the file and the reason: folder missing or not writable; target is a folder, device,
        FIFO, socket or a symlink to one; target is an input of the catalog (same file by identity, inside a
        zarr store, or matching a product's glob); target exists and ``overwrite`` is false.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{p}: output folder {str(parent)!r} does not exist")
    if not os.access(parent, os.W_OK):
        raise InputError(f"{p}: output folder {str(parent)!r} is not writable")
    try:
        st = os.stat(p)  # follows symlinks: a link to a folder or a device is refused like its target
    except FileNotFoundError:
        st = None  # missing, or a dangling symlink (the rename replaces the link, not what it named)
    except OSError as exc:
        raise InputError(f"{p}: output path cannot be examined ({exc.strerror})") from None
    if st is not None:
        for test, kind in _KINDS:
            if test(st.st_mode):
                raise InputError(f"{p}: output is {kind}, not a file; refused even with --force")
        if not stat.S_ISREG(st.st_mode):
            raise InputError(f"{p}: output is not a regular file; refused even with --force")
    _refuse_input(p, protect)
    if st is not None and not overwrite:
        raise InputError(f"{p}: file exists (use --force to overwrite)")
    return p


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True when two output paths name the same file (same real path, or the same existing file by identity)."""
    if os.path.realpath(a) == os.path.realpath(b):
        return True
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


@contextmanager
def terminate_unwinds():
    """While inside, SIGTERM raises ``SystemExit(143)`` so that ``finally`` blocks remove temporary files.

    Only when SIGTERM has its default action (which ends the process at once, leaving them behind) and in
    the main thread (the only one that may set handlers); a handler someone else installed is kept.
    """
    if threading.current_thread() is not threading.main_thread() or \
            signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL:
        yield
        return

    def _raise(signum, frame):
        raise SystemExit(128 + signum)

    signal.signal(signal.SIGTERM, _raise)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, signal.SIG_DFL)


@contextmanager
def atomic_path(path: str | os.PathLike, *, overwrite: bool = False, protect=None):
    """Yield a temporary path next to ``path``; rename it onto ``path`` only on success.

    The refusals of `check_output` apply (``protect``: the catalog whose inputs must not be written). An
    `OSError` while writing (a full disk, a lost mount) becomes one `InputError` line naming ``path``; the
    temporary file is removed whatever happens (SIGTERM included, see `terminate_unwinds`), and ``path``
    keeps its old content.
    """
    p = check_output(path, overwrite=overwrite, protect=protect)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=p.parent)
        os.close(fd)
        os.unlink(tmp)
    except OSError as exc:
        raise InputError(f"{p}: cannot write the output file ({exc.strerror or exc})") from None
    try:
        with terminate_unwinds():
            try:
                yield Path(tmp)
                # checked again just before the rename: the target may have changed while the output was computed
                check_output(p, overwrite=overwrite, protect=protect)
                os.replace(tmp, p)
            except OSError as exc:
                raise InputError(f"{p}: cannot write the output file ({exc.strerror or exc})") from None
    finally:
        if os.path.lexists(tmp):
            try:
                os.unlink(tmp)
            except OSError:
                pass
