"""The numpy and the numba forms of the streaming accumulations give the same sums, bit for bit.

A command runs the numpy forms below `_kernel.JIT_MIN_VALUES` values read (numba's start-up would cost it
more than it saves), the numba ones above; a basin's numbers must not depend on which one ran, nor on the
scheduler that ran the tasks (`BlockPlan.compute` in local threads, or dask). The references outside the
project: numpy's masked weighted sums (basin means) and xarray's own reduction of the decoded grid.
"""

import sys

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
import xarray as xr
from utils import box_basins, lonlat_grid, write_catalog, write_nc

from wbexplore.spatial import _kernel as K


def _case(seed: int, integer: bool):
    rng = np.random.default_rng(seed)
    t, nc, nb = (5, 33, 70, 100)[seed % 4], 1500, 5
    if integer:  # packed integers with a fill value
        X = rng.integers(0, 500, (t, nc)).astype(np.int16)
        nodata = 499.0
    else:  # values over many orders of magnitude, both signs, 10% NaN: no sum is exact
        X = (rng.lognormal(0, 2, (t, nc)) * rng.choice([1, -1], (t, nc))).astype(np.float32)
        X[rng.random((t, nc)) < 0.1] = np.nan
        nodata = np.nan
    cells = np.sort(rng.choice(nc, 1000, replace=False))
    W = sp.random(cells.size, nb, density=0.3, random_state=seed, format="csr")
    W.data = rng.lognormal(10, 3, W.data.size)  # cell areas over six orders of magnitude
    return rng, X, nodata, cells, W


MASKS = [{}, {"valid_min": -50.0, "valid_max": 400.0, "codes": (7.0, 65.0)},
         # bounds float32 cannot hold (0.3, 0.7) and a NaN among the codes: compared as float64 in both forms
         {"valid_min": -0.7, "valid_max": 0.3, "codes": (np.nan, 3.0)}]


def test_fill_and_bounds_are_compared_as_float64_in_both_forms():
    """A float32 file whose fill value float32 cannot hold (a GeoTIFF tag of -3.4e+38, or 0.1): the value stored is
    float32(fill), which is not the fill as float64, so it counts as data in both forms (numba compares in float64;
    numpy had compared in float32, found by review). Same for a valid range bound of 0.3."""
    X = np.array([[np.float32(0.1), np.float32(0.3), np.float32(-3.4e38), 1.0]], np.float32)
    cells = np.arange(4)
    W = sp.csr_matrix(np.ones((4, 1)))
    args = K.kernel_args(cells, W)
    for nodata, mask in ((0.1, {}), (-3.4e38, {}), (np.nan, {"valid_max": 0.3})):
        out = [K.accumulate(X, None, None, nodata, args=args, jit=j, **mask) for j in (True, False)]
        assert out[0].tobytes() == out[1].tobytes(), (nodata, mask)
        kept = out[1][0, 0, 1]
        # as float64 (numpy's float64 comparison, common practice): which of the four values are data
        x = X[0].astype(np.float64)
        ok = (x != nodata) & (x <= mask.get("valid_max", np.inf))
        assert kept == ok.sum()
    # a NaN among the codes (NaN is missing anyway) leaves the other codes in force in both forms
    Y = np.array([[3.0, 4.0, 5.0]], np.float32)
    args3 = K.kernel_args(np.arange(3), sp.csr_matrix(np.ones((3, 1))))
    out = [K.accumulate(Y, None, None, np.nan, args=args3, codes=(np.nan, 4.0), jit=j) for j in (True, False)]
    assert out[0].tobytes() == out[1].tobytes() and out[1][0, 0, 1] == 2.0


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("integer", [False, True])
@pytest.mark.parametrize("mask", MASKS)
def test_numpy_and_numba_forms_are_bitwise_equal(seed, integer, mask):
    rng, X, nodata, cells, W = _case(seed, integer)
    args = K.kernel_args(cells, W)
    t = X.shape[0]
    a = K.accumulate(X, None, None, nodata, args=args, jit=True, **mask)
    b = K.accumulate(X, None, None, nodata, args=args, jit=False, **mask)
    assert a.tobytes() == b.tobytes()
    f = rng.uniform(28, 31, t)
    (oa, ca), (ob, cb) = (K.accumulate_with_cells(X, args, f, nodata, jit=j, **mask) for j in (True, False))
    assert oa.tobytes() == ob.tobytes() and ca.tobytes() == cb.tobytes()
    # periods onto months with fractional weights (composites), each month over its own span of steps
    s0 = np.array([0, t // 3, t // 2])
    s1 = np.minimum(np.array([t // 3 + 1, t // 2 + 2, t]), t)
    w = rng.random((3, t))
    fm = rng.uniform(1, 2, 3)
    cells_a, cells_b = np.zeros((cells.size, 3)), np.zeros((cells.size, 3))
    ma = K.accumulate_months(X, args, w, s0, s1, nodata, jit=True, cell=cells_a, factor=fm, **mask)
    mb = K.accumulate_months(X, args, w, s0, s1, nodata, jit=False, cell=cells_b, factor=fm, **mask)
    assert ma.tobytes() == mb.tobytes() and cells_a.tobytes() == cells_b.tobytes()


@pytest.mark.parametrize("integer", [False, True])
@pytest.mark.parametrize("mask", MASKS)
def test_numpy_form_equals_a_masked_weighted_sum(mask, integer):
    """Outside reference: numpy's own masked sums (common practice) give the same basin sums to 1e-12."""
    _, X, nodata, cells, W = _case(1, integer)
    out = K.accumulate(X, None, None, nodata, args=K.kernel_args(cells, W), jit=False, **mask)
    Xu = X[:, cells].astype(float)
    bad = np.isnan(Xu) | (Xu == nodata) | (Xu < mask.get("valid_min", -np.inf)) | (Xu > mask.get("valid_max", np.inf))
    bad |= np.isin(Xu, mask.get("codes", ()))
    dense = W.toarray()
    np.testing.assert_allclose(out[:, :, 0], np.where(bad, 0, Xu) @ dense, rtol=1e-9, atol=1e-6)
    np.testing.assert_allclose(out[:, :, 1], (~bad).astype(float) @ dense, rtol=1e-12)


@pytest.fixture(scope="module")
def catalog(tmp_path_factory):
    d = tmp_path_factory.mktemp("kernel")
    lon, lat = lonlat_grid(0, 4, 0, 3, 0.1)
    rng = np.random.default_rng(5)
    days = pd.date_range("2020-01-01", "2020-12-31", freq="D")
    v = rng.gamma(2.0, 1.5, (len(days), lat.size, lon.size))
    v[:, 3, 4] = np.nan  # a cell with no data
    v[40, 10, 10] = np.nan  # one missing day: its month empties for that cell
    write_nc(d / "daily.nc", v, lon, lat, days, units="mm/day")
    m = rng.gamma(3.0, 20.0, (24, lat.size, lon.size))
    write_nc(d / "monthly.nc", m, lon, lat, pd.date_range("2020-01-01", periods=24, freq="MS"), units="mm/month")
    box_basins(d / "basins.geojson", [(0.05, 0.05, 2.03, 1.97), (1.5, 1.0, 3.9, 2.9)])
    return write_catalog(d, [{"id": "pd", "component": "P", "path": "daily.nc"},
                             {"id": "pm", "component": "ET", "path": "monthly.nc"}])


def _extract(cat, cache):
    from wbexplore.pipeline import extract

    return extract(cat, cache_dir=cache, use_cache=False, cell_means=True)


def test_a_command_gives_the_same_numbers_with_either_form(catalog, tmp_path, monkeypatch):
    """The whole extraction, basin series and cell means, forced onto the numba forms and onto the numpy
    ones (`_kernel.use_jit`): identical bytes."""
    chosen = []
    monkeypatch.setattr(K, "use_jit", lambda values: chosen.append(True) or True)
    jit_ds, jit_cells = _extract(catalog, tmp_path / "a")
    monkeypatch.setattr(K, "use_jit", lambda values: chosen.append(False) or False)
    np_ds, np_cells = _extract(catalog, tmp_path / "b")
    assert chosen == [True, True, False, False]  # each source asked once per run
    for v in jit_ds.data_vars:
        assert np.asarray(jit_ds[v].values).tobytes() == np.asarray(np_ds[v].values).tobytes(), v
    for b in jit_cells:
        for sid, cm in jit_cells[b].items():
            other = np_cells[b][sid]
            assert cm.mean.tobytes() == other.mean.tobytes() and cm.months.tobytes() == other.months.tobytes()


def test_block_plan_runs_alike_in_local_threads_and_in_dask(catalog):
    """`BlockPlan.compute` (the local pool, no dask) and dask's compute of `to_dataset()` give the same bytes;
    both agree with xarray's own weighted mean of the decoded grid (outside reference, 1e-12)."""
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source
    from wbexplore.pipeline import load_basins, weights_for
    from wbexplore.spatial.zonal import plan_zonal_blocks

    cat = open_catalog(catalog)
    src = open_source(cat.source("pm"))
    w = weights_for(src, load_basins(cat), cache_dir=None, use_cache=False)
    plan = plan_zonal_blocks(src.blocks, w, src.months.values, task_bytes=4000, read_bytes=2000)  # many tasks
    assert plan.n_tasks > 4
    seen = []
    local = plan.compute(workers=2, progress=seen.append)
    assert len(seen) == plan.n_tasks
    lazy = plan.to_dataset()
    assert lazy["mean"].chunks is not None  # dask-backed
    via_dask = lazy.compute()
    for v in ("mean", "valid_fraction"):
        assert local[v].values.tobytes() == via_dask[v].values.tobytes()
    grid = src.data.values.reshape(len(src.months), -1)  # the decoded grid, through xarray
    dense = w.matrix.toarray()
    ok = ~np.isnan(grid)
    ref = (np.where(ok, grid, 0) @ dense.T) / (ok.astype(float) @ dense.T)
    np.testing.assert_allclose(local["mean"].values, ref.T, rtol=1e-12)


def test_a_failing_task_names_its_cause(catalog, monkeypatch):
    """An error inside a streaming task reaches the caller as itself (not a scheduler's wrapper), and no task
    starts after it."""
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source
    from wbexplore.pipeline import load_basins, weights_for
    from wbexplore.spatial.zonal import plan_zonal_blocks

    cat = open_catalog(catalog)
    src = open_source(cat.source("pm"))
    w = weights_for(src, load_basins(cat), cache_dir=None, use_cache=False)
    plan = plan_zonal_blocks(src.blocks, w, src.months.values, task_bytes=4000, read_bytes=2000)
    calls = []
    real = type(src.blocks).read

    def flaky(self, t0, *a):
        calls.append(t0)
        if t0 >= 6:
            raise OSError("disk went away at step 6")
        return real(self, t0, *a)

    monkeypatch.setattr(type(src.blocks), "read", flaky)
    with pytest.raises(OSError, match="disk went away"):
        plan.compute(workers=1)
    assert max(calls) < 12  # one worker: the failure stops the run, later tasks never start


def test_a_streamed_source_builds_no_dask_array_until_asked(catalog):
    """`open_source` keeps the (dask) array of a block-read source unbuilt; asked for, it is the same array
    as the xarray path's (values equal to the file's, read with xarray)."""
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source

    cat = open_catalog(catalog)
    src = open_source(cat.source("pd"))
    assert src.blocks is not None and src._data is None
    assert len(src.months) == 12 and src.x.size == 40 and src.y.size == 30
    data = src.data
    assert data.chunks is not None and list(pd.DatetimeIndex(data["time"].values)) == list(src.months)
    with xr.open_dataset(cat.source("pd").paths[0]) as ds:
        daily = ds[next(iter(ds.data_vars))]
        ref = daily.astype(float).resample(time="MS").sum(skipna=False)  # outside reference: xarray's resample
        np.testing.assert_allclose(data.values, ref.transpose("time", "lat", "lon").values, rtol=1e-12)


def test_the_numba_forms_run_above_the_threshold_or_once_loaded():
    """In a fresh process: small work runs numpy, large work numba; once numba is loaded, small work runs it too."""
    import subprocess

    code = ("import sys; from wbexplore.spatial import _kernel as K; a = K.use_jit(1); b = K.use_jit(K.JIT_MIN_VALUES); "
            "import wbexplore.spatial._jit; print(a, b, K.use_jit(1))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=False)
    assert r.returncode == 0, r.stderr
    assert r.stdout.split() == ["False", "True", "True"]


def test_empty_blocks_and_spare_tiles():
    """No steps, and a task's cell array with more tiles than the read: the same (empty) sums in both forms."""
    _, X, nodata, cells, W = _case(2, False)
    args = K.kernel_args(cells, W)
    for Xb in (X[:0], X[:5]):
        f = np.full(Xb.shape[0], 30.0)
        res = [K.accumulate_with_cells(Xb, args, f, nodata, cell=np.zeros((3, cells.size, 3)), jit=j) for j in (1, 0)]
        assert res[0][0].tobytes() == res[1][0].tobytes() and res[0][1].tobytes() == res[1][1].tobytes()
        assert res[1][1][1:].sum() == 0  # one tile of steps at most: the spare tiles are untouched


def test_small_sources_do_not_import_numba(catalog, tmp_path):
    """A command whose sources are small runs the numpy forms: numba (0.65 s of start-up) is not imported."""
    import subprocess

    code = ("import sys, warnings; warnings.simplefilter('ignore'); from wbexplore.pipeline import extract; "
            f"extract({str(catalog)!r}, cache_dir={str(tmp_path)!r}); print('numba' in sys.modules)")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=False)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip().splitlines()[-1] == "False"


def test_declared_bounds_and_codes_mean_the_stored_type(tmp_path):
    """CF: valid_range and no-data values are in the variable's own type. A float32 file and a catalog that says
    ``valid_range: [0, 0.3]`` and ``nodata: [0.1]``: the stored float32(0.3) is valid and float32(0.1) missing, on the
    streamed path as on the xarray path (which compares in the stored type). As float64 the streamed path had
    dropped 0.3 and kept 0.1: another basin mean, with no warning."""
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source
    from wbexplore.pipeline import extract

    lon, lat = lonlat_grid(0, 3, 0, 2, 1.0)
    v = np.empty((2, lat.size, lon.size))
    v[:, :, 0], v[:, :, 1], v[:, :, 2] = np.float32(0.3), np.float32(0.1), 0.2
    write_nc(tmp_path / "p.nc", v, lon, lat, pd.date_range("2020-01-01", periods=2, freq="MS"), units="mm/month")
    box_basins(tmp_path / "basins.geojson", [(0, 0, 3, 2)])
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "valid_range": [0, 0.3],
                                    "nodata": [0.1]}])
    src = open_source(open_catalog(cat).sources[0])
    assert src.blocks is not None
    grid = src.data.values  # the xarray path's decoding
    assert np.isnan(grid[:, :, 1]).all() and not np.isnan(grid[:, :, [0, 2]]).any()
    ds = extract(cat, cache_dir=tmp_path / "cache")
    ref = np.nanmean(grid.reshape(2, -1) * 1.0, axis=1)  # equal cells: the plain mean of the valid ones
    np.testing.assert_allclose(ds["p"].values[0], ref, rtol=1e-6)
    np.testing.assert_allclose(ds["valid_fraction_p"].values[0], 2 / 3, rtol=1e-6)
