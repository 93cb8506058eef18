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


def test_truth_closes(demo_truth):
    t = demo_truth
    r = t["P"] - t["ET"] - t["Q"] - t["dS"]
    assert float(np.abs(r).max()) < 1e-9


def test_truth_twsa_is_monthly_mean_storage_anomaly(demo_truth):
    t = demo_truth
    # TWSA anomalies have zero long-term mean, and their central difference equals the
    # 1-2-1 filtered net flux exactly (piecewise-linear storage; DESIGN.md identity)
    np.testing.assert_allclose(t["TWSA"].mean("time"), 0.0, atol=1e-9)
    F = (t["P"] - t["ET"] - t["Q"]).values
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
    for p in sorted((folder / "grids").rglob("*")):
        if p.is_file():
            h[str(p.relative_to(folder))] = hashlib.sha256(p.read_bytes()).hexdigest()
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
