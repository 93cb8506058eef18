"""Atomic writers and the caution text every export carries."""

from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

from ..errors import InputError

__all__ = ["CAUTION", "atomic_path", "check_output"]

CAUTION = ("Screening-level analysis: results depend on the products and gauges used and carry their errors. "
           "For water-allocation, flood or drought decisions, defer to gauged data, local codes and "
           "licensed professional practice.")


def check_output(path: str | os.PathLike, *, overwrite: bool = False) -> Path:
    """Refuse an output path whose folder is missing or not writable, or that exists (unless asked)."""
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{p}: output folder {str(parent)!r} does not exist")
    if not os.access(parent, os.W_OK):
        raise InputError(f"{p}: output folder {str(parent)!r} is not writable")
    if p.exists() and not overwrite:
        raise InputError(f"{p}: file exists (use --force to overwrite)")
    return p


@contextmanager
def atomic_path(path: str | os.PathLike, *, overwrite: bool = False):
    """Yield a temporary path next to ``path``; rename it onto ``path`` only on success."""
    p = check_output(path, overwrite=overwrite)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=p.parent)
    os.close(fd)
    os.unlink(tmp)
    try:
        yield Path(tmp)
        os.replace(tmp, p)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
