"""Each command imports only what it needs (checked in a child process by inspecting ``sys.modules``).

Start-up counts in a whole-process run (benchmarks/products.py): the display stack (panel, bokeh,
holoviews), dask.distributed and, for a catalog of netCDF files, the GeoTIFF stack (rasterio,
rioxarray) cost seconds of imports that `check` and a local `extract` never use.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from utils import box_basins, lonlat_grid, write_catalog, write_nc

ROOT = Path(__file__).resolve().parents[1]
DISPLAY = ("panel", "bokeh", "holoviews", "hvplot", "ipywidgets")
NOT_FOR_NETCDF = DISPLAY + ("distributed", "rasterio", "rioxarray")

CHILD = """
import json, sys, warnings
warnings.simplefilter("ignore")
from wbexplore.cli import main
try:
    rc = main(sys.argv[1:])
except SystemExit as exc:  # --help
    rc = exc.code
units = sys.modules.get("wbexplore.units")
print(json.dumps({"rc": rc, "modules": sorted(m.split(".")[0] for m in sys.modules if sys.modules[m] is not None),
                  "unit_registry_built": bool(units and units._ureg.cache_info().currsize),
                  "dask_array": "dask.array" in sys.modules}))
"""


def _run(argv, cwd):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-c", CHILD, *map(str, argv)], capture_output=True, text=True, cwd=cwd,
                       env=env, timeout=300)
    last = r.stdout.strip().splitlines()[-1]
    return json.loads(last), r


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    d = tmp_path_factory.mktemp("startup")
    lon, lat = lonlat_grid(-1, 1, 0, 1, 0.25)
    write_nc(d / "p.nc", np.ones((12, lat.size, lon.size)), lon, lat,
             pd.date_range("2020-01-01", periods=12, freq="MS"), units="mm/month")
    days = pd.date_range("2020-01-01", "2020-03-31", freq="D")  # a daily source: months formed while streaming
    write_nc(d / "e.nc", np.ones((len(days), lat.size, lon.size)), lon, lat, days, units="mm/day")
    box_basins(d / "basins.geojson", [(-1, 0, 1, 1)])
    return write_catalog(d, [{"id": "p", "component": "P", "path": "p.nc"},
                             {"id": "e", "component": "ET", "path": "e.nc"}])


def test_check_imports_no_display_distributed_or_geotiff_stack(tiny):
    out, r = _run(["check", tiny], tiny.parent)
    assert out["rc"] == 0, r.stderr
    assert [m for m in NOT_FOR_NETCDF if m in out["modules"]] == []
    assert "xarray" in out["modules"]  # the child did read the catalog's product


def test_local_extract_imports_no_display_distributed_or_geotiff_stack(tiny):
    out, r = _run(["extract", tiny, "--out", tiny.parent / "o.nc", "--quiet", "--force",
                   "--cache-dir", tiny.parent / "cache"], tiny.parent)
    assert out["rc"] == 0, r.stderr
    assert (tiny.parent / "o.nc").exists()
    assert [m for m in NOT_FOR_NETCDF if m in out["modules"]] == []
    # units the catalog commonly spells (mm/month, mm/day) come from wbexplore.units' table, checked against
    # pint in tests/test_units.py: pint's registry (0.35 to 1.3 s) is not built on this path (xarray still
    # imports the pint module, 0.13 to 0.26 s, to ask whether the time values are pint arrays)
    assert out["unit_registry_built"] is False


def test_local_extract_and_check_never_import_dask_array(tiny):
    """Nothing on the local streamed path builds a dask array, so ``dask.array`` (0.3 to 0.6 s with the
    scipy and numpy modules it brings) is not imported: xarray's "is this a dask array?" is answered by
    `wbexplore._lazydask` without the import (tests/test_lazydask.py checks that answer). Failed before."""
    for argv in (["extract", tiny, "--out", tiny.parent / "o2.nc", "--quiet", "--force",
                  "--cache-dir", tiny.parent / "cache2"], ["check", tiny]):
        out, r = _run(argv, tiny.parent)
        assert out["rc"] == 0, r.stderr
        assert "xarray" in out["modules"] and "dask" in out["modules"]  # xarray ran and asked about dask
        assert out["dask_array"] is False, argv[0]


def test_help_imports_neither_pandas_nor_pint(tiny):
    out, r = _run(["--help"], tiny.parent)
    assert out["rc"] == 0 and "extract" in r.stdout
    assert [m for m in ("pandas", "pint", "xarray", "numpy") if m in out["modules"]] == []


def test_rank_from_a_warm_cache_imports_no_geotiff_stack(tmp_path):
    """rank reads the series cache only: even for a catalog with a GeoTIFF product, neither rasterio nor
    rioxarray is imported (xarray imports every backend when it has to guess the engine: ~0.6 s)."""
    from utils import v1_study

    cat = v1_study(tmp_path)
    argv = ["rank", cat, "--basin", "A", "--min-valid", "6", "--format", "csv", "--cache-dir", tmp_path / "cache"]
    first, r = _run(argv, tmp_path)  # builds the cache (reads the GeoTIFF)
    assert first["rc"] == 0, r.stderr
    assert "rasterio" in first["modules"]  # the test can see the GeoTIFF stack when it is there
    out, r = _run(argv, tmp_path)
    assert out["rc"] == 0, r.stderr
    assert [m for m in NOT_FOR_NETCDF if m in out["modules"]] == []


def test_rank_all_from_a_warm_cache_imports_no_dask_pint_scipy_or_shapely(tmp_path):
    """A warm ``rank --all`` reads the series cache and ranks: xarray's CF decoding of the basin ids
    (variable-length strings) and of the month stamps asks whether they are dask or pint arrays, importing
    dask.array (with scipy.fft) and pint, and pipeline's weights imported scipy.sparse and shapely: together
    0.9 to 1.4 s of a 2.3 to 2.6 s run (benchmarks/balance.py --cli, 100 basins). Failed before."""
    from utils import v1_study

    cat = v1_study(tmp_path)
    argv = ["rank", cat, "--all", "--min-valid", "6", "--format", "csv", "--cache-dir", tmp_path / "cache"]
    first, r = _run(argv, tmp_path)  # builds the cache
    heavy = ("dask", "pint", "scipy", "shapely")
    assert first["rc"] == 0, r.stderr
    assert set(heavy) <= set(first["modules"])  # the extraction uses them all: the test can see them
    out, r = _run(argv, tmp_path)
    assert out["rc"] == 0, r.stderr
    assert [m for m in heavy + NOT_FOR_NETCDF if m in out["modules"]] == []
