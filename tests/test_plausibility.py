"""Implausible values are named, finite metrics or a reason, true areas at the antimeridian and the poles,
and long GeoTIFF globs under a low open-file limit."""

import subprocess
import sys
import textwrap
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
from wbexplore.balance.plausibility import BOUNDS, ImplausibleValueWarning
from wbexplore.pipeline import extract

LON, LAT = lonlat_grid(-3, 3, 10, 14, 0.5)
NT = 12


def _implausible_study(tmp_path):
    """P (mm per month) with, in basin B0 only: one negative month, one of 50,000 mm and one infinite;
    ET with one month of -5 mm in B1 and one of -0.3 mm (dew: within tolerance) in B0."""
    times = monthly("2001-01", NT)
    p = np.full((NT, LAT.size, LON.size), 80.0)
    west = LON < 0
    p[2][:, west] = -20.0
    p[5][:, west] = 50_000.0
    p[7][:, west] = np.inf
    et = np.full((NT, LAT.size, LON.size), 40.0)
    et[3][:, ~west] = -5.0
    et[4][:, west] = -0.3
    write_nc(tmp_path / "p.nc", p, LON, LAT, times, var="p", units="mm")
    write_nc(tmp_path / "et.nc", et, LON, LAT, times, var="et", units="mm")
    box_basins(tmp_path / "basins.geojson", [(-2.5, 10.5, -0.5, 13.5), (0.5, 10.5, 2.5, 13.5)])
    return write_catalog(tmp_path, [{"id": "rain", "component": "P", "path": "p.nc", "variable": "p"},
                                    {"id": "evap", "component": "ET", "path": "et.nc", "variable": "et"}])


def test_implausible_values_one_warning_per_source_naming_basin_and_count(tmp_path):
    cat = _implausible_study(tmp_path)
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        ds = extract(cat, cache_dir=tmp_path / "cache")
    msgs = [str(w.message) for w in rec if issubclass(w.category, ImplausibleValueWarning)]
    assert len(msgs) == 2, msgs  # one per source, not one per value
    rain = next(m for m in msgs if "'rain'" in m)
    evap = next(m for m in msgs if "'evap'" in m)
    # basin and month count for each kind, and the decision (masked) stated
    assert "3 implausible basin-month values masked as missing" in rain
    assert f"below {BOUNDS['P'][0]:g} mm/month in basin 'B0' 1 month" in rain
    assert f"above {BOUNDS['P'][1]:g} mm/month in basin 'B0' 1 month" in rain
    assert "non-finite in basin 'B0' 1 month" in rain
    assert "'B1'" not in rain
    assert "below -0.5 mm/month in basin 'B1' 1 month" in evap and "'B0'" not in evap
    # masked months are missing, the rest untouched, dew kept
    r = ds["rain"].sel(basin="B0").values
    assert np.isnan(r[[2, 5, 7]]).all() and np.isfinite(np.delete(r, [2, 5, 7])).all()
    assert np.isfinite(ds["rain"].sel(basin="B1").values).all()
    assert ds["evap"].sel(basin="B0").values[4] == pytest.approx(-0.3, abs=1e-6)
    assert np.isnan(ds["evap"].sel(basin="B1").values[3])
    assert ds["rain"].attrs["implausible_masked"] == 3


def test_cached_series_warn_again_and_cli_prints_one_line_per_source(tmp_path):
    from wbexplore.pipeline import load_series

    cat = _implausible_study(tmp_path)
    for _ in range(2):  # the second load comes from the series cache: the note travels with it
        with pytest.warns(ImplausibleValueWarning) as rec:
            ds = load_series(cat, cache_dir=tmp_path / "cache")
        assert len(rec) == 2 and np.isnan(ds["rain"].sel(basin="B0").values[5])
    # the command line as a user runs it (pytest would otherwise collect the warnings itself)
    res = subprocess.run([sys.executable, "-m", "wbexplore.cli", "extract", str(cat), "--out", str(tmp_path / "o.nc"),
                          "--quiet", "--cache-dir", str(tmp_path / "c2")], capture_output=True, text=True, timeout=300)
    err = [line for line in res.stderr.splitlines() if line.strip()]
    assert res.returncode == 0 and (tmp_path / "o.nc").exists(), res.stderr
    assert len(err) == 2 and all(line.startswith("wbexplore: warning: source '") for line in err), err
    assert any("'rain' (P): 3 implausible" in line for line in err)


def test_clean_series_raise_no_plausibility_warning(tmp_path):
    times = monthly("2001-01", NT)
    write_nc(tmp_path / "p.nc", np.full((NT, LAT.size, LON.size), 9000.0), LON, LAT, times, var="p", units="mm")
    box_basins(tmp_path / "basins.geojson", [(-2.5, 10.5, -0.5, 13.5)])
    cat = write_catalog(tmp_path, [{"id": "rain", "component": "P", "path": "p.nc", "variable": "p"}])
    with warnings.catch_warnings():
        warnings.simplefilter("error", ImplausibleValueWarning)
        ds = extract(cat, cache_dir=tmp_path / "cache")
    assert np.isfinite(ds["rain"].values).all()


# --------------------------------------------------------------------------- many files, few descriptors
_MANY_FILES = textwrap.dedent("""
    import resource, sys, warnings
    from pathlib import Path
    import numpy as np, pandas as pd
    sys.path.insert(0, sys.argv[2])
    from utils import box_basins, lonlat_grid, write_catalog, write_tif
    tmp, n = Path(sys.argv[1]), int(sys.argv[3])
    (tmp / "tifs").mkdir()
    lon, lat = lonlat_grid(10, 12, 40, 42, 0.5)
    months = pd.date_range("1950-01", periods=n, freq="MS")
    for i, m in enumerate(months):
        write_tif(tmp / "tifs" / f"r_{m:%Y%m}.tif", np.full((lat.size, lon.size), float(i)), lon, lat)
    box_basins(tmp / "basins.geojson", [(10.2, 40.2, 11.8, 41.8)])
    cat = write_catalog(tmp, [{"id": "r", "component": "P", "path": "tifs/r_*.tif", "units": "mm",
                               "date_format": "%Y%m"}])
    resource.setrlimit(resource.RLIMIT_NOFILE, (256, 256))
    from wbexplore.pipeline import extract
    ds = extract(cat, cache_dir=tmp / "cache")
    v = ds["r"].sel(basin="B0").values
    assert v.shape == (n,) and np.allclose(v, np.arange(n), rtol=1e-6, atol=1e-9), v
    print("ok", n)
""")


def test_long_geotiff_glob_under_low_open_file_limit(tmp_path):
    # 400 single-band files with at most 256 descriptors (before the fix the 249th file failed to open and
    # was blamed as "not a GeoTIFF"); long archives of one file per month are common practice
    n = 400
    res = subprocess.run([sys.executable, "-c", _MANY_FILES, str(tmp_path), str(Path(__file__).parent), str(n)],
                         capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr[-2000:]
    assert f"ok {n}" in res.stdout


def test_out_of_descriptors_is_named_as_such(tmp_path, monkeypatch):
    import errno

    import rioxarray

    from utils import write_tif
    from wbexplore.errors import InputError
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.grids import open_source

    (tmp_path / "tifs").mkdir()
    for m in monthly("2001-01", 3):
        write_tif(tmp_path / "tifs" / f"r_{m:%Y%m}.tif", np.ones((LAT.size, LON.size)), LON, LAT)
    box_basins(tmp_path / "basins.geojson", [(-2, 11, 2, 13)])
    cat = open_catalog(write_catalog(tmp_path, [{"id": "r", "component": "P", "path": "tifs/r_*.tif",
                                                 "units": "mm", "date_format": "%Y%m"}]))
    real = rioxarray.open_rasterio
    calls = []

    def opener(path, *a, **k):
        calls.append(path)
        if len(calls) == 2:
            raise OSError(errno.EMFILE, "Too many open files")
        return real(path, *a, **k)

    monkeypatch.setattr(rioxarray, "open_rasterio", opener)
    # the per-file path (files whose profiles differ); test_streaming covers the one-profile opening
    monkeypatch.setattr("wbexplore.io.grids._uniform_series", lambda *a, **k: None)
    with pytest.raises(InputError) as ei:
        open_source(cat.sources[0])
    msg = str(ei.value)
    assert "file descriptors" in msg and "file 2 of 3" in msg and "ulimit -n" in msg
    assert "cannot be opened as GeoTIFF" not in msg and "\n" not in msg


# --------------------------------------------------------------------------- metrics: finite or a reason
T = 36
MOY = np.tile(np.arange(1, 13), T // 12)
_RNG = np.random.default_rng(11)
P0 = 100 + 30 * np.sin(np.arange(T) / 12 * 2 * np.pi) + _RNG.normal(0, 5, T)
ET0 = 40 + _RNG.normal(0, 4, T)
DS0 = _RNG.normal(0, 3, T)
Q0 = P0 - ET0 - DS0 + _RNG.normal(0, 6, T)


def _he(fn, sim, obs):
    he = pytest.importorskip("hydroeval")
    with np.errstate(all="ignore"):
        return np.asarray(he.evaluator(fn, np.asarray(sim, float), np.asarray(obs, float))).ravel()


def test_metrics_equal_hydroeval_and_need_no_reason_on_ordinary_data():
    from wbexplore.balance.metrics import compute_metrics

    m = compute_metrics(P0, ET0, Q0, DS0, month_of_year=MOY, explain=True)
    import hydroeval as he

    qhat = P0 - ET0 - DS0
    # hydroeval (Hallouin 2021) as the outside reference for NSE and KGE (Gupta et al. 2009)
    assert float(m["nse"]) == pytest.approx(_he(he.nse, qhat, Q0)[0], rel=1e-10)
    assert float(m["kge"]) == pytest.approx(_he(he.kge, qhat, Q0)[0], rel=1e-10)
    assert m["undefined"] == ""


@pytest.mark.parametrize("case, metrics, reason", [
    ("constant Q", ["nse", "nse_cyclo", "kge", "kge_prime", "r"], "observed discharge has no variance"),
    ("zero Q", ["kge", "kge_prime", "pbias"], "observed discharge has zero mean"),
    ("zero P", ["rel_imbalance"], "mean P is zero"),
    ("one year", ["nse_cyclo"], "monthly climatology"),
])
def test_metrics_are_finite_or_name_why_on_degenerate_data(case, metrics, reason):
    import hydroeval as he

    from wbexplore.balance.metrics import compute_metrics

    P, ET, Q, dS, moy = P0, ET0, Q0, DS0, MOY
    if case == "constant Q":
        Q = np.full(T, 55.0)
        # the published formula divides by zero here: hydroeval returns -inf (NSE) and inf (KGE's alpha)
        assert not np.isfinite(_he(he.nse, P - ET - dS, Q)[0])
    elif case == "zero Q":
        Q = np.zeros(T)
        assert not np.isfinite(_he(he.pbias, P - ET - dS, Q)[0])
    elif case == "zero P":
        P = np.zeros(T)
        ET = -(Q0 + _RNG.normal(0, 3, T))
    else:
        P, ET, Q, dS, moy = P0[:12], ET0[:12], Q0[:12], DS0[:12], MOY[:12]
    m = compute_metrics(P, ET, Q, dS, month_of_year=moy, explain=True)
    for k, v in m.items():
        if k != "undefined":
            assert not np.isinf(np.asarray(v, float)).any(), (k, v)  # never +-inf
    for k in metrics:
        assert np.isnan(m[k]), (k, m[k])
        assert k in str(m["undefined"])
    assert reason in str(m["undefined"])
    assert np.isfinite(m["rmse"]) and np.isfinite(m["bias"])


def _canonical(Q):
    import xarray as xr

    times = pd.date_range("2001-01", periods=T, freq="MS")
    ds = xr.Dataset(coords={"basin": ["B0"], "time": times})
    for name, comp, v in (("p1", "P", P0), ("e1", "ET", ET0), ("s1", "TWSA", np.cumsum(DS0))):
        ds[name] = (("basin", "time"), v[None])
        ds[name].attrs = {"role": "source", "component": comp, "units": "mm" if comp == "TWSA" else "mm/month"}
    ds["discharge"] = (("basin", "time"), Q[None])
    ds["discharge"].attrs = {"component": "Q", "units": "mm/month", "role": "discharge"}
    return ds


def test_rank_row_and_selection_say_why_a_metric_is_missing():
    from wbexplore.balance import Selection, compute_selection, rank

    ds = _canonical(np.full(T, 55.0))
    r = rank(ds, "B0", min_valid=12)
    assert np.isnan(r.loc[0, "nse"]) and not np.isinf(r[["nse", "kge", "r"]].values).any()
    assert "observed discharge has no variance" in r.loc[0, "undefined"]
    res = compute_selection(ds, Selection(basin="B0", P="p1", ET="e1", TWSA="s1"), min_valid=12)
    assert any("observed discharge has no variance" in m for m in res.messages)
    ok = rank(_canonical(Q0), "B0", min_valid=12)
    assert (ok["undefined"] == "").all() and np.isfinite(ok.loc[0, "nse"])


def test_time_first_variables_are_screened_too():
    """A (time, basin) variable was skipped without a word (seen in review); now screened like any other."""
    import numpy as np
    import pandas as pd
    import xarray as xr

    from wbexplore.balance.plausibility import screen_implausible

    t = pd.date_range("2001-01-01", periods=4, freq="MS")
    v = np.array([[10.0, 20.0], [-50.0, 20.0], [10.0, 20.0], [10.0, 20.0]])  # -50 mm P: implausible
    ds = xr.Dataset({"p": (("time", "basin"), v, {"component": "P", "units": "mm/month"})},
                    coords={"time": t, "basin": ["A", "B"]})
    out, recs = screen_implausible(ds)
    assert len(recs) == 1 and recs[0].counts["below"] == {"A": 1}
    assert np.isnan(out["p"].sel(basin="A").values[1]) and int(out["p"].notnull().sum()) == 7
