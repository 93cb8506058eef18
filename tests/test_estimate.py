"""Estimates by difference (issue 16, item 3): ET = P - Q - dS, Q = P - ET - dS, dS = P - ET - Q, monthly,
per water year and long-term, with propagated standard errors; and ``wbexplore estimate``.

Outside references: the exact identity of DESIGN.md (a truth built with constant rates within each month
closes the window-matched balance exactly), hand arithmetic with pandas group sums for the water-year and
long-term figures, Monte Carlo (20,000 draws pushed through the engine's own terms) for the standard
errors, the demo's truth.nc, and the CF checker of the ``compliance-checker`` package for the netCDF file.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
from wbexplore.balance import ClosureOptions, Selection
from wbexplore.balance.engine import closure_arrays
from wbexplore.balance.estimate import estimate_by_difference, formula
from wbexplore.balance.storage import match_window, storage_change
from wbexplore.cli import main
from wbexplore.errors import InputError
from wbexplore.io.writers import CAUTION

DRAWS = 20_000


def _truth(months=60, *, seed=2):
    """Monthly totals with constant rates within each month and the monthly means of the storage they
    build (DESIGN.md: M[i] = (S[i-1] + S[i]) / 2, S[i] = S[i-1] + P - ET - Q)."""
    rng = np.random.default_rng(seed)
    m = np.arange(months)
    P = 80 + 60 * np.sin(2 * np.pi * m / 12) + rng.gamma(2.0, 8.0, months)
    ET = 50 + 30 * np.sin(2 * np.pi * (m - 2) / 12) + rng.normal(0, 3, months)
    Q = 15 + 10 * np.sin(2 * np.pi * (m - 1) / 12) + rng.gamma(2.0, 2.0, months)
    S = 200 + np.cumsum(P - ET - Q)
    Sprev = np.concatenate([[200.0], S[:-1]])
    M = 0.5 * (Sprev + S)
    return {"P": P, "ET": ET, "Q": Q, "TWSA": M - M.mean()}


def _series(tr, *, n_basins=1, perturb=None, stated=True):
    time = pd.date_range("2001-01-01", periods=tr["P"].size, freq="MS")
    basins = [f"B{i}" for i in range(n_basins)]

    def var(x):
        return (("basin", "time"), np.broadcast_to(x, (n_basins, x.size)).copy())

    ds = xr.Dataset(coords={"basin": basins, "time": time, "basin_area_km2": ("basin", np.full(n_basins, 1000.0))})
    for c, sid in (("P", "rain"), ("ET", "evap"), ("TWSA", "store")):
        ds[sid] = var(tr[c])
        ds[sid].attrs = {"role": "source", "component": c, "units": "mm" if c == "TWSA" else "mm/month"}
    ds["discharge"] = var(tr["Q"])
    ds["discharge"].attrs = {"role": "discharge", "units": "mm/month"}
    if stated:
        ds["rain"].attrs["absolute_error_mm"] = 4.0
        ds["evap"].attrs["relative_error"] = 0.1
        ds["store"].attrs["absolute_error_mm"] = 10.0
    if perturb is not None:
        for name, noise in perturb.items():
            ds[name].values[:] = ds[name].values + noise
    return ds


SEL = Selection("B0", "rain", "evap", "store")


@pytest.mark.parametrize("method", ["central", "backward", "forward"])
def test_exact_on_a_consistent_truth(method):
    """Each term by difference is the window-matched truth of that term to round-off (DESIGN.md identity)."""
    tr = _truth()
    ds = _series(tr)
    sel = SEL.replace(storage_change=method)
    et = estimate_by_difference(ds, sel.replace(ET=None), "ET")
    want = match_window(tr["ET"], method)
    ok = np.isfinite(et.monthly["estimate"].to_numpy())
    assert ok.sum() >= 58
    np.testing.assert_allclose(et.monthly["estimate"].to_numpy()[ok], want[ok], atol=1e-9)
    assert et.monthly["product"].isna().all()  # no ET product chosen: nothing to show beside it
    q = estimate_by_difference(ds, sel, "Q")
    np.testing.assert_allclose(q.monthly["estimate"].to_numpy()[ok], match_window(tr["Q"], method)[ok], atol=1e-9)
    np.testing.assert_allclose(q.monthly["product"].to_numpy()[ok], match_window(tr["Q"], method)[ok], atol=1e-12)
    d = estimate_by_difference(ds, sel.replace(TWSA=None), "dS")
    np.testing.assert_allclose(d.monthly["estimate"].to_numpy()[ok], storage_change(tr["TWSA"], method)[ok], atol=1e-9)
    assert (et.formula, q.formula, d.formula) == ("ET = P - Q - dS", "Q = P - ET - dS", "dS = P - ET - Q")


def test_water_years_and_long_term_by_hand():
    """Water years from October (named by the year they end): 60 months from 2001-01 hold WY2002..WY2005
    whole. Annual ET = sum of the monthly estimates; long-term ET = mean over those years of sum(P - Q)
    (storage left out), with the left-out storage change beside it: pandas group sums, by hand."""
    tr = _truth()
    ds = _series(tr)
    est = estimate_by_difference(ds, SEL.replace(ET=None, water_year_start=10), "ET")
    assert list(est.annual.index) == [2002, 2003, 2004, 2005]
    months = pd.date_range("2001-01-01", periods=60, freq="MS")
    wy = pd.Series(months.year + (months.month >= 10), index=months)
    m = est.monthly["estimate"]
    by_hand = m.groupby(wy.to_numpy()).sum()
    np.testing.assert_allclose(est.annual["estimate"], by_hand.loc[[2002, 2003, 2004, 2005]], rtol=1e-12)
    keep = wy.isin([2002, 2003, 2004, 2005]).to_numpy()
    lt = est.long_term
    assert lt["water_years"] == 4 and (lt["first"], lt["last"]) == (2002, 2005)
    assert lt["estimate"] == pytest.approx((tr["P"][keep] - tr["Q"][keep]).sum() / 4, rel=1e-12)
    ds_total = storage_change(tr["TWSA"], "central")[keep].sum() / 4
    assert lt["storage_change"] == pytest.approx(ds_total, rel=1e-9)
    # long-term ET + storage change = the window-matched truth's mean over the same years (within the
    # half-months the window reaches outside them)
    assert lt["estimate"] - lt["storage_change"] == pytest.approx(tr["ET"][keep].sum() / 4, rel=0.02)


@pytest.mark.parametrize("term", ["ET", "Q", "dS"])
def test_standard_errors_match_monte_carlo(term):
    """20,000 draws of the inputs' errors (the stated ones, and 5% of Q), as 20,000 basins through the
    engine's own terms (`closure_arrays`): the variance of each monthly, water-year and long-term estimate
    within 3% of the propagated one (sampling error of a variance from 20,000 draws: 1%)."""
    tr = _truth(48)
    rng = np.random.default_rng(7)
    sd = {"rain": 4.0, "evap": 0.1 * np.abs(tr["ET"]), "store": 10.0, "discharge": 0.05 * np.abs(tr["Q"])}
    own = {"ET": "evap", "dS": "store", "Q": "discharge"}[term]
    noise = {k: rng.standard_normal((DRAWS, tr["P"].size)) * v for k, v in sd.items() if k != own}
    big = _series(tr, n_basins=DRAWS, perturb=noise)
    a = closure_arrays(big, ClosureOptions())
    est = {"ET": a["P"][:, 0] - a["Q"] - a["dS"][:, 0], "Q": a["P"][:, 0] - a["ET"][:, 0] - a["dS"][:, 0],
           "dS": a["P"][:, 0] - a["ET"][:, 0] - a["Q"]}[term]
    e = estimate_by_difference(_series(tr), SEL, term)
    ok = np.isfinite(e.monthly["standard_error"].to_numpy())
    np.testing.assert_allclose(e.monthly["standard_error"].to_numpy()[ok] ** 2, np.var(est, axis=0)[ok], rtol=0.03)
    months = pd.date_range("2001-01-01", periods=48, freq="MS")
    for y, row in e.annual.iterrows():
        mc = np.var(est[:, months.year == y].sum(axis=1))
        assert row["standard_error"] ** 2 == pytest.approx(mc, rel=0.03), y
    raw = {"ET": a["P_raw"][:, 0] - a["Q_raw"], "Q": a["P_raw"][:, 0] - a["ET_raw"][:, 0],
           "dS": a["P_raw"][:, 0] - a["ET_raw"][:, 0] - a["Q_raw"]}[term]
    years = np.isin(months.year, list(range(e.long_term["first"], e.long_term["last"] + 1)))
    mc = np.var(raw[:, years].sum(axis=1) / e.long_term["water_years"])
    assert e.long_term["standard_error"] ** 2 == pytest.approx(mc, rel=0.03)
    assert e.uncertainty_source == {**{c: "stated" for c in ("P", "ET", "TWSA") if c != {"ET": "ET", "dS": "TWSA"}.get(term)},
                                    **({"Q": "gauge"} if term != "Q" else {})}


def test_ungauged_basin_and_bad_term():
    """Q by difference where the series hold no discharge at all (an ungauged basin)."""
    tr = _truth()
    ds = _series(tr).drop_vars("discharge")
    q = estimate_by_difference(ds, SEL, "Q")
    ok = np.isfinite(q.monthly["estimate"].to_numpy())
    np.testing.assert_allclose(q.monthly["estimate"].to_numpy()[ok], match_window(tr["Q"], "central")[ok], atol=1e-9)
    assert q.monthly["product"].isna().all()
    with pytest.raises(InputError, match="--term 'P' is not one of ET, Q, dS"):
        estimate_by_difference(ds, SEL, "P")
    with pytest.raises(InputError, match="--term 'x'"):
        formula("x")
    with pytest.raises(InputError, match="needs a P source"):
        estimate_by_difference(_series(tr), SEL.replace(P=None), "ET")


def test_demo_long_term_et_near_the_truth(demo_series, demo_truth):
    """The demo's Velumbe with unbiased-on-average products (heron, quarry): long-term ET = P - Q within 5%
    of the true mean over the same water years (the products' own errors and the gauge's 3% noise stay)."""
    est = estimate_by_difference(demo_series, Selection("VEL", "heron", None, "quarry"), "ET")
    lt = est.long_term
    assert lt["water_years"] >= 12
    t = demo_truth["ET"].sel(basin="VEL").to_series()
    inside = t.index.year.isin(lt["years"])  # water years are calendar years here
    true = t[inside].groupby(t.index.year[inside]).sum()
    assert lt["estimate"] == pytest.approx(true.mean(), rel=0.05)
    assert est.uncertainty_source["P"] == "collocation" and est.uncertainty_source["TWSA"] == "spread"


# --------------------------------------------------------------------------- the command
@pytest.fixture(scope="module")
def study(tmp_path_factory):
    d = tmp_path_factory.mktemp("estimate")
    lon, lat = lonlat_grid(-2, 2, 0, 4, 0.5)
    t = monthly("2001-01", 48)
    rng = np.random.default_rng(3)
    shape = (t.size, lat.size, lon.size)
    base = 3 + 2 * np.sin(2 * np.pi * np.arange(t.size) / 12)[:, None, None]
    for i in range(3):
        write_nc(d / f"p{i}.nc", base * (1 + 0.1 * i) + 0.3 * rng.standard_normal(shape), lon, lat, t, var="pr",
                 units="mm/day")
    write_nc(d / "et.nc", 1 + rng.random(shape), lon, lat, t, var="et", units="mm/day")
    write_nc(d / "tws.nc", 10 * rng.standard_normal(shape), lon, lat, t, var="lwe", units="mm")
    box_basins(d / "basins.geojson", [(-1, 1, 1, 3)], ids=["B1"])
    q = pd.DataFrame({"date": [f"{m:%Y-%m-%d}" for m in t], "basin_id": "B1", "q": 50 + 10 * rng.random(t.size)})
    q.to_csv(d / "q.csv", index=False)
    write_catalog(d, [
        *({"id": f"p{i}", "component": "P", "path": f"p{i}.nc", "variable": "pr", "units": "mm/day"} for i in range(3)),
        {"id": "e1", "component": "ET", "path": "et.nc", "variable": "et", "units": "mm/day", "relative_error": 0.1},
        {"id": "t1", "component": "TWSA", "path": "tws.nc", "variable": "lwe", "units": "mm",
         "absolute_error_mm": 15.0},
    ], discharge={"path": "q.csv", "time_field": "date", "basin_field": "basin_id", "value_field": "q",
                  "units": "m3/s"})
    return d


def _run(argv, capsys):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(argv)
    return rc, capsys.readouterr()


def test_cli_csv(study, capsys):
    out = study / "et.csv"
    rc, cap = _run(["estimate", str(study / "catalog.yaml"), "--basin", "B1", "--term", "ET", "--P", "p1",
                    "--TWSA", "t1", "--out", str(out)], capsys)
    assert rc == 0, cap.err
    head = [line for line in out.read_text().splitlines() if line.startswith("#")]
    text = "\n".join(head)
    assert "ET = P - Q - dS" in text and CAUTION in text
    assert "uncertainty_source: P collocation (triple collocation with p0, p2 over 48 months); TWSA stated" in text
    assert "systematic product errors (bias) are not in them" in text
    df = pd.read_csv(out, comment="#")
    assert {"ET_mm", "ET_standard_error_mm", "ET_product_mm", "storage_change_mm"} <= set(df.columns)
    assert list(df["scale"].unique()) == ["month", "water_year", "long_term"]
    assert (df.loc[df["scale"] == "water_year", "months"] == 12).all()
    assert df.loc[df["scale"] == "month", "ET_standard_error_mm"].dropna().gt(0).all()
    # the same again refuses to overwrite, and keeps the file
    before = out.read_bytes()
    rc, cap = _run(["estimate", str(study / "catalog.yaml"), "--basin", "B1", "--term", "ET", "--P", "p1",
                    "--TWSA", "t1", "--out", str(out)], capsys)
    assert rc == 2 and "exists" in cap.err and out.read_bytes() == before


def test_cli_netcdf_cf(study, capsys):
    out = study / "q.nc"
    rc, cap = _run(["estimate", str(study / "catalog.yaml"), "--basin", "B1", "--term", "Q", "--P", "p0",
                    "--ET", "e1", "--TWSA", "t1", "--out", str(out)], capsys)
    assert rc == 0, cap.err
    with xr.open_dataset(out) as ds:
        assert ds["Q"].attrs["ancillary_variables"] == "Q_standard_error"
        assert ds["Q_water_year"].attrs["ancillary_variables"] == "Q_water_year_standard_error"
        assert ds["Q_standard_error"].attrs["units"] == "mm"
        assert ds.attrs["uncertainty_source"] == '{"ET": "stated", "P": "collocation", "TWSA": "stated"}'
        assert np.isfinite(ds["Q_long_term_standard_error"].values)
        assert CAUTION in ds.attrs["comment"]
    from compliance_checker.runner import CheckSuite, ComplianceChecker

    CheckSuite.load_all_available_checkers()
    report = study / "cf.json"
    ok, errors = ComplianceChecker.run_checker(str(out), ["cf:1.8"], 0, "normal", output_filename=str(report),
                                               output_format="json")
    assert ok and not errors, report.read_text()[:2000]
