"""Consistency checks of the invented demo scenario (they complement the outside checks elsewhere)."""

import hashlib
import warnings

import numpy as np
import pytest
import xarray as xr

from wbexplore.demo import PRODUCTS, write_demo

DOCUMENTED = {p[0]: (p[2], p[3]) for p in PRODUCTS}
from wbexplore.io.catalog import open_catalog
from wbexplore.io.grids import open_source


def net_flows(t):
    """Sum of the truth's flows, inflows positive (attribute ``direction``): 0 where a basin has none."""
    net = xr.zeros_like(t["P"])
    for name, v in t.data_vars.items():
        if name.startswith("flow_"):
            net = net + (v if v.attrs["direction"] == "in" else -v)
    return net


def residual(t, *, flows=True):
    """residual = P - ET - Q - dS + in - out, from the truth variables (DESIGN.md signs)."""
    return t["P"] - t["ET"] - t["Q"] - t["dS"] + (net_flows(t) if flows else 0.0)


def test_truth_closes(demo_truth):
    r = residual(demo_truth)
    assert float(np.abs(r).max()) < 1e-9


def test_truth_twsa_is_monthly_mean_storage_anomaly(demo_truth):
    t = demo_truth
    # TWSA anomalies have zero long-term mean, and their central difference equals the
    # 1-2-1 filtered net flux exactly (piecewise-linear storage; DESIGN.md identity)
    np.testing.assert_allclose(t["TWSA"].mean("time"), 0.0, atol=1e-9)
    F = (t["P"] - t["ET"] - t["Q"] + net_flows(t)).values
    M = t["TWSA"].values
    lhs = (M[:, 2:] - M[:, :-2]) / 2
    rhs = (F[:, :-2] + 2 * F[:, 1:-1] + F[:, 2:]) / 4
    np.testing.assert_allclose(lhs, rhs, atol=1e-9)


def test_region_basins_and_sizes(demo_series, demo_dir):
    import geopandas as gpd

    area = demo_series["basin_area_km2"].to_series()
    assert len(area) >= 5
    assert area.min() < 8000 and area.max() > 250_000
    b = gpd.read_file(demo_dir / "basins.geojson").set_index("basin_id")
    # nested basin inside its parent; the region straddles the prime meridian (the longitude convention matters)
    assert b.loc["VEL", "geometry"].buffer(1e-9).contains(b.loc["VEU", "geometry"])
    minx, _, maxx, _ = b.total_bounds
    assert minx < 0 < maxx


def test_biased_product_ratio(demo_series, demo_truth):
    # kestrel: +15% south of 10 N by construction; basin Tiramo lies entirely south of 8 N
    r = float(demo_series["kestrel"].sel(basin="TIR").mean() / demo_truth["P"].sel(basin="TIR").mean())
    assert r == pytest.approx(1.15, rel=0.01)
    # fennel: 0.85 x truth everywhere
    r = float(demo_series["fennel"].sel(basin="VEL").mean() / demo_truth["ET"].sel(basin="VEL").mean())
    assert r == pytest.approx(0.85, rel=0.01)


def test_declared_errors_show(demo_series, demo_truth):
    s, t = demo_series, demo_truth
    # sedge: departures from the long-term mean halved
    dep = (s["sedge"] - s["sedge"].mean("time")).sel(basin="VEL").std()
    tdep = (t["ET"] - t["ET"].mean("time")).sel(basin="VEL").std()
    assert float(dep / tdep) == pytest.approx(0.5, rel=0.05)
    # cairn: an 11-month gap; tansy: one missing day makes one NaN month
    assert int(s["cairn"].sel(basin="VEL").isnull().sum()) == 11
    assert int(s["tansy"].sel(basin="VEL").isnull().sum()) == 1
    assert s["tansy"].attrs["incomplete_months"] == 1
    # fennel's extent cuts Zefron
    vf = float(s["valid_fraction_fennel"].sel(basin="ZEF").mean())
    assert 0.3 < vf < 0.95
    # discharge: a few missing months per gauge, gauge error of a few percent
    q = s["discharge"].sel(basin="VEL")
    assert int(q.isnull().sum()) == 5
    ratio = (q / t["Q"].sel(basin="VEL")).std()
    assert 0.01 < float(ratio) < 0.06


def test_catalog_validates_and_every_source_opens(demo_dir):
    cat = open_catalog(demo_dir / "catalog.yaml")
    comps = [s.component for s in cat.sources]
    assert comps.count("P") >= 3 and comps.count("ET") >= 3 and comps.count("TWSA") >= 2
    forms = set()
    for s in cat.sources:
        g = open_source(s)
        forms.add((s.format, g.native_step))
        # the error by construction is written into the catalog
        assert (s.label, s.description) == DOCUMENTED[s.id]
    assert ("geotiff", "month") in forms and ("netcdf", "day") in forms and ("zarr", "month") in forms
    units = {open_source(s).native_units for s in cat.sources}
    assert "kg m-2 s-1" in units


def _digest(folder):
    h = {}
    files = [*(folder / "grids").rglob("*"), *folder.glob("reservoir*"), folder / "truth_waterbody.nc"]
    for p in sorted(files):
        if p.is_file():
            h[str(p.relative_to(folder))] = hashlib.sha256(p.read_bytes()).hexdigest()
    assert len([k for k in h if not k.startswith("grids")]) == 5  # the reservoir's four files and its truth
    return h


def test_deterministic(demo_dir, tmp_path):
    again = write_demo(tmp_path / "again")
    assert _digest(again.folder) == _digest(demo_dir)
    assert again.n_bytes < 100e6


def test_best_combination_differs_between_basins(demo_series):
    from wbexplore.balance import rank

    best = {b: tuple(rank(demo_series, b).iloc[0][["P", "ET", "TWSA"]]) for b in ("VEL", "ULK")}
    assert best["VEL"] != best["ULK"]


def test_demo_data_record_matches_the_generator():
    import json
    from pathlib import Path

    from wbexplore import demo

    rec = json.loads((Path(__file__).resolve().parent.parent / "demo_data" / "scenario.json").read_text())
    assert rec["seed"] == demo.SEED and rec["region"] == demo.REGION
    assert [b["id"] for b in rec["basins"]] == [b[0] for b in demo.BASINS]
    assert [(p["id"], p["error"]) for p in rec["products"]] == [(p[0], p[3]) for p in demo.PRODUCTS]
    assert [(f["id"], f["basin"], f["direction"]) for f in rec["flows"]] == [f[:3] for f in demo.FLOWS]
    assert {b["id"]: b["drains_to"] for b in rec["basins"] if "drains_to" in b} == demo.DRAINS_TO
    r = rec["reservoir"]
    assert (r["id"], r["name"], tuple(r["bounds"])) == (demo.RESERVOIR["id"], demo.RESERVOIR["name"],
                                                         demo.RESERVOIR["bounds"])
    assert [(f["id"], f["basin"], f["direction"], f["station"], f["label"]) for f in r["flows"]] == demo.RESERVOIR_FLOWS


# --------------------------------------------------------------------------- flows and nested basins
def _window_matched_residual(t, *, flows=True):
    """Window-matched closure (DESIGN.md conventions): the 1-2-1 filtered net flux minus the central
    difference of the mean storage, ``(F[i-1] + 2 F[i] + F[i+1]) / 4 - (M[i+1] - M[i-1]) / 2``."""
    F = (t["P"] - t["ET"] - t["Q"] + (net_flows(t) if flows else 0.0)).values
    M = t["TWSA"].values
    return (F[:, :-2] + 2 * F[:, 1:-1] + F[:, 2:]) / 4 - (M[:, 2:] - M[:, :-2]) / 2


@pytest.fixture(scope="module")
def demo_truth_incremental(demo_dir):
    with xr.open_dataset(demo_dir / "truth_incremental.nc") as t:
        return t.load()


@pytest.mark.parametrize("which", ["whole", "incremental"])
def test_truth_closes_window_matched_with_flows(which, demo_truth, demo_truth_incremental):
    t = demo_truth if which == "whole" else demo_truth_incremental
    net = net_flows(t)
    flowing = [b for b in t.basin.values if float(np.abs(net.sel(basin=b)).max()) > 0]
    assert "SAR" in flowing and (which == "whole" or "VEL" in flowing)
    r = _window_matched_residual(t)
    assert float(np.abs(r).max()) < 1e-6
    # a sign test: leaving the flows out shifts each mean residual by exactly their (window-matched) net mean
    r0 = _window_matched_residual(t, flows=False)
    n = net.values
    wnet = (n[:, :-2] + 2 * n[:, 1:-1] + n[:, 2:]) / 4
    np.testing.assert_allclose(r0.mean(axis=1) - r.mean(axis=1), -wnet.mean(axis=1), atol=1e-9)
    for b in flowing:
        assert abs(wnet[list(t.basin.values).index(b)].mean()) > 1e-3  # the shift is there, not zero


def test_nested_pairs_and_flows_in_the_catalog(demo_dir, demo_truth, demo_truth_incremental):
    from wbexplore.demo import DRAINS_TO, FLOWS, RESERVOIR_FLOWS
    from wbexplore.io.basins import incremental_basins, read_basins

    cat = open_catalog(demo_dir / "catalog.yaml")
    assert cat.raw["catalog_version"] == 2 and cat.basins.downstream_field == "drains_to"
    # the basins' flows and the reservoir's (whose `basin` is the water-body id)
    assert {(f.id, f.basin, f.direction) for f in cat.flows} == {(f[0], f[1], f[2]) for f in FLOWS + RESERVOIR_FLOWS}
    b = read_basins(cat.basins)
    assert {u: d for u, d in b["drains_to"].items() if d is not None} == DRAINS_TO
    assert (b["outside_km2"] == 0).all()  # the upstream basins are unions of their parent's cells
    inc = incremental_basins(cat.basins)
    assert list(inc.index) == list(demo_truth_incremental.basin.values)
    # the polygons' geodesic areas against the truth's areas (sums of pyproj.Geod cell areas)
    np.testing.assert_allclose(inc["area_km2"].values, demo_truth_incremental["basin_area_km2"].values, rtol=1e-6)
    np.testing.assert_allclose(b.loc[list(demo_truth.basin.values), "area_km2"].values,
                               demo_truth["basin_area_km2"].values, rtol=1e-6)


def test_demo_series_carry_the_flows_and_incremental_units(demo_dir, demo_series, demo_truth,
                                                           demo_truth_incremental):
    from wbexplore.pipeline import CoverageWarning, extract

    for name in ("flow_irrigation", "flow_transfer"):
        # the tables hold the truth to their written digits (m3/s to 1e-6, l/s to 1e-3)
        np.testing.assert_allclose(demo_series[name].values, demo_truth[name].values, rtol=1e-6, atol=1e-9)
        assert demo_series[name].attrs["direction"] == demo_truth[name].attrs["direction"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        inc = extract(demo_dir / "catalog.yaml", incremental=True)
    t = demo_truth_incremental
    assert list(inc.basin.values) == list(t.basin.values) and inc.attrs["unit"] == "incremental"
    for name in ("flow_upstream_VEU", "flow_upstream_SAU", "flow_irrigation", "flow_transfer"):
        assert inc[name].attrs["role"] == "flow" and inc[name].attrs["direction"] == t[name].attrs["direction"]
    for name in ("flow_irrigation", "flow_transfer"):
        np.testing.assert_allclose(inc[name].values, t[name].values, rtol=1e-6, atol=1e-9)
    # the gauged upstream outflow (3% gauge error) against its truth
    ratio = (inc["flow_upstream_SAU"].sel(basin="SAR") / t["flow_upstream_SAU"].sel(basin="SAR")).dropna("time")
    assert 0.01 < float(ratio.std()) < 0.06 and abs(float(ratio.mean()) - 1) < 0.01


def test_first_six_basins_bitwise_as_before(demo_dir, demo_series, demo_truth):
    """The Sarnelle basins and the flows were added after the first six basins: every product file, and
    the truth, discharge and extracted series of the first six basins are bitwise what the code before
    wrote (``tests/data/demo_first_six.json``: SHA-256 digests written by that code)."""
    import json
    from pathlib import Path

    ref = json.loads((Path(__file__).parent / "data" / "demo_first_six.json").read_text())

    def digest(a):
        return hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()

    got = {p.relative_to(demo_dir).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
           for p in sorted((demo_dir / "grids").rglob("*")) if p.is_file()}
    assert got == ref["files"]
    for key, d in ref["truth"].items():
        var, b = key.split("/")
        assert digest(demo_truth[var].sel(basin=b).values) == d, key
    for key, d in ref["series"].items():
        var, b = key.split("/")
        assert digest(demo_series[var].sel(basin=b).values.astype("float64")) == d, key
    rows = sorted((demo_dir / "discharge.csv").read_text().splitlines()[1:])
    first = [r for r in rows if r.split(",")[1] in {k.split("/")[1] for k in ref["truth"]}]
    assert hashlib.sha256("\n".join(first).encode()).hexdigest() == ref["discharge_rows"]
