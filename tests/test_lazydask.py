"""`wbexplore._lazydask`: xarray's "is this a dask array?" answered without importing dask.array, and
answered right once dask.array is there (each case in a fresh child process, where the import order is
known). The reference is xarray's and dask's own behaviour: a dask-backed DataArray stays lazy, keeps its
chunks and is computed by dask (xarray documentation, "Parallel computing with Dask"); a masked dask array
is filled as xarray fills it (xarray.core.variable.as_compatible_data)."""

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _child(code: str) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout.strip().splitlines()[-1])


def test_numpy_backed_arrays_do_not_import_dask_array():
    out = _child("""
import json, sys
import numpy as np, xarray as xr
import wbexplore.series  # seeds xarray's duck-array cache
from xarray.namedarray.pycompat import array_type
a = xr.DataArray(np.arange(6.0).reshape(2, 3), dims=("y", "x"))
m = xr.DataArray(np.ma.masked_array([1.0, 2.0], mask=[False, True]), dims="x")
print(json.dumps({"dask_array": "dask.array" in sys.modules, "sum": float(a.sum()),
                  "masked": [None if v != v else v for v in m.values.tolist()],
                  "is_dask": isinstance(a.data, array_type("dask"))}))
""")
    assert out == {"dask_array": False, "sum": 15.0, "masked": [1.0, None], "is_dask": False}


def test_dask_arrays_made_afterwards_are_recognised_and_stay_lazy():
    out = _child("""
import json, sys
import numpy as np, xarray as xr
import wbexplore.series
from wbexplore._lazydask import DaskArrayClass
xr.DataArray(np.zeros(3), dims="x")  # the question is asked (and answered) before dask.array exists
assert "dask.array" not in sys.modules
import dask.array as da
d = da.from_array(np.arange(12.0).reshape(3, 4), chunks=(1, 4))
a = xr.DataArray(d, dims=("t", "x"))
mean = a.mean("x")
m = xr.DataArray(da.ma.masked_array(da.from_array(np.array([1.0, 2.0, 3.0]), chunks=1),
                                    mask=[False, True, False]), dims="x")
print(json.dumps({"same_object": a.data is d, "chunks": [list(c) for c in a.chunks], "lazy": a.chunks is not None,
                  "mean_lazy": mean.chunks is not None, "mean": mean.values.tolist(),
                  "masked_filled": [None if v != v else v for v in m.values.tolist()],
                  "isinstance": isinstance(d, DaskArrayClass), "numpy_not": isinstance(np.zeros(2), DaskArrayClass),
                  "subclass": issubclass(type(d), DaskArrayClass)}))
""")
    assert out["same_object"] and out["lazy"] and out["mean_lazy"]
    assert out["chunks"] == [[1, 1, 1], [4]]
    assert out["mean"] == [1.5, 5.5, 9.5]
    assert out["masked_filled"] == [1.0, None, 3.0]  # xarray fills a masked dask array's mask with NaN
    assert out["isinstance"] and out["subclass"] and not out["numpy_not"]


def test_nothing_is_seeded_where_dask_array_was_imported_first():
    out = _child("""
import json
import dask.array, numpy as np, xarray as xr
import wbexplore.series
from xarray.namedarray.pycompat import _cached_duck_array_modules as cache, array_type
xr.DataArray(np.zeros(2), dims="x")
print(json.dumps({"type": array_type("dask")[0].__module__}))
""")
    assert out["type"].startswith("dask.array")  # xarray's own entry: nothing to save, nothing changed
