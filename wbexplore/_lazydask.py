"""Keep xarray from importing ``dask.array`` before anything uses it (about 0.3 to 0.6 s of every command).

xarray asks, for every array it wraps, "is this a dask array?", and answers it the first time by importing
``dask.array`` to get its class (``xarray.namedarray.pycompat``, its cache of duck-array modules). A command
that never builds a dask array (the local streamed extraction, ``check``, a report) pays that import for
nothing. Importing this module answers the question in xarray's cache with a class whose ``isinstance``
test looks at ``dask.array`` only once something has imported it: no object can be a dask array before its
class exists, and afterwards the test is dask's own ``isinstance``. So the answer is never wrong; only the
import is deferred to where it is needed.

Measured (monthly 240 x 600 x 600 netCDF, 100 basins, `wbexplore extract` as a whole process, 2 cores,
quiet machine, three runs each): 1.99 to 2.38 s -> 1.71 to 1.99 s.

Where xarray keeps its cache elsewhere (another version), nothing is changed and xarray imports as before.
"""

from __future__ import annotations

import sys

__all__ = ["DaskArrayClass", "defer_dask_array"]


class _Deferred(type):
    def __instancecheck__(cls, obj) -> bool:
        core = sys.modules.get("dask.array.core")
        return core is not None and isinstance(obj, core.Array)

    def __subclasscheck__(cls, sub) -> bool:
        core = sys.modules.get("dask.array.core")
        return core is not None and isinstance(sub, type) and issubclass(sub, core.Array)


class DaskArrayClass(metaclass=_Deferred):
    """Stands for ``dask.array.Array`` in ``isinstance`` tests, without importing it."""


class _DeferredDaskModule:
    """What xarray's ``DuckArrayModule("dask")`` holds, with the module and version looked up on use."""

    type = (DaskArrayClass,)

    @property
    def module(self):
        try:
            import dask
        except ImportError:  # pragma: no cover - dask is a dependency
            return None
        return dask

    @property
    def available(self) -> bool:
        return self.module is not None

    @property
    def version(self):
        from packaging.version import Version

        mod = self.module
        return Version(mod.__version__ if mod is not None else "0.0.0")


def defer_dask_array() -> bool:
    """Seed xarray's duck-array cache with the deferred dask entry; True where it was seeded now or before."""
    try:
        from xarray.namedarray import pycompat
    except ImportError:  # pragma: no cover - another xarray layout: leave it alone
        return False
    cache = getattr(pycompat, "_cached_duck_array_modules", None)
    if not isinstance(cache, dict) or not callable(getattr(pycompat, "array_type", None)):
        return False  # pragma: no cover - another xarray layout
    if "dask" not in cache:
        if "dask.array" in sys.modules:
            return False  # already imported: nothing to save, leave xarray's own entry to be made
        cache["dask"] = _DeferredDaskModule()
    return isinstance(cache["dask"], _DeferredDaskModule)


defer_dask_array()
