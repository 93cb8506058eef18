"""Lakes and reservoirs: outlines, levels, storage curves and storage change from levels (issue 15).

Outside references, named beside each check:
- the frustum volume between two level slices, V = h/3 (A1 + A2 + sqrt(A1 A2)) (school solid geometry, cited
  from memory; exact for a cone, whose slices are similar circles);
- scipy.interpolate (PchipInterpolator's documented shape preservation; CubicSpline and numpy.interp as the
  methods it is compared with);
- pint and plain arithmetic for 1 hm3 per 30-day month = 0.38580 m3/s;
- stdlib calendar and datetime for an independent daily-levels-to-monthly-storage-change loop; xarray's own
  resample for monthly-mean levels.
"""

from __future__ import annotations

import calendar
import datetime
import math
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml
from utils import box_basins, lonlat_grid, one_line_error, run_cli, write_nc

from wbexplore.balance.storage import (
    KERNELS,
    level_volumes,
    match_volume_window,
    storage_change,
    volume_storage_change,
)
from wbexplore.errors import InputError, LevelOutsideCurveWarning
from wbexplore.io.catalog import open_catalog
from wbexplore.io.waterbodies import StorageCurve, read_storage_curves, read_waterbodies
from wbexplore.units import m3_per_month_to_flow_m3s

# an inverted cone: radius K * depth above the bottom; A(h) = pi K^2 h^2, V(h) = pi K^2 h^3 / 3
K = 150.0  # m of radius per m of depth
DEPTHS = np.arange(0.0, 42.0, 2.0)  # curve points every 2 m; the cone is 40 m deep
BOTTOM = 100.0  # m above datum
DAYS = pd.date_range("2010-01-01", "2011-06-30", freq="D")


def _cone_area(h):
    return math.pi * K * K * np.asarray(h, float) ** 2


def _frustum(h1, h2):
    """Volume between two level slices of the cone from their areas: V = h/3 (A1 + A2 + sqrt(A1 A2))."""
    a1, a2 = _cone_area(h1), _cone_area(h2)
    return (h2 - h1) / 3.0 * (a1 + a2 + np.sqrt(a1 * a2))


def _cone_curve_rows(wb="RES1"):
    """Curve rows (level in m, area in km2, volume in hm3), volumes accumulated slice by slice (frustum)."""
    vols = np.concatenate([[0.0], np.cumsum(_frustum(DEPTHS[:-1], DEPTHS[1:]))])
    return pd.DataFrame({"wb_id": wb, "level": BOTTOM + DEPTHS, "area": _cone_area(DEPTHS) / 1e6,
                         "volume": vols / 1e6})


def _daily_levels():
    """Daily levels (m) of two water bodies: a seasonal swing round mid-depth, and a prism lake."""
    doy = np.arange(DAYS.size)
    res1 = BOTTOM + 25 + 6 * np.sin(2 * np.pi * doy / 365.25) + 0.002 * doy
    res2 = 50 + 1.5 * np.cos(2 * np.pi * doy / 365.25)
    return pd.DataFrame({"date": DAYS.strftime("%Y-%m-%d"), "RES1": res1.round(4), "RES2": res2.round(4)})


@pytest.fixture
def study(tmp_path):
    d = tmp_path
    lon, lat = lonlat_grid(10.0, 12.0, 40.0, 42.0, 0.5)
    months = pd.date_range("2010-01-01", periods=18, freq="MS")
    vals = np.ones((months.size, lat.size, lon.size))
    write_nc(d / "p.nc", vals, lon, lat, months, var="pr", units="mm/day")
    write_nc(d / "e.nc", vals, lon, lat, months, var="et", units="mm/day")
    box_basins(d / "basins.geojson", [(10.0, 40.0, 12.0, 42.0)], ids=["B0"])
    # outlines in a projected CRS (metres), as a reservoir agency might draw them
    import geopandas as gpd
    import shapely

    gpd.GeoDataFrame({"wb_id": ["RES1", "RES2"], "name": ["Upper lake", "Lower lake"]},
                     geometry=[shapely.Point(500000, 4500000).buffer(6000), shapely.box(510000, 4490000, 512000,
                                                                                         4491000)],
                     crs="EPSG:32632").to_file(d / "lakes.gpkg", driver="GPKG")
    _daily_levels().to_csv(d / "levels.csv", index=False)
    prism = pd.DataFrame({"wb_id": "RES2", "level": [40.0, 60.0], "area": [2.0, 2.0], "volume": [0.0, 40.0]})
    pd.concat([_cone_curve_rows(), prism]).to_csv(d / "curves.csv", index=False)
    cat = {"catalog_version": 2, "title": "lakes",
           "basins": {"path": "basins.geojson", "id_field": "basin_id", "name_field": "name"},
           "sources": [{"id": "rain_a", "component": "P", "path": "p.nc", "variable": "pr"},
                       {"id": "e_lake", "component": "ET", "path": "e.nc", "variable": "et"}],
           "waterbodies": {"path": "lakes.gpkg", "id_field": "wb_id", "name_field": "name",
                           "level": {"path": "levels.csv", "layout": "wide", "time_field": "date", "units": "m"},
                           "storage_curve": {"path": "curves.csv", "id_field": "wb_id", "level_field": "level",
                                             "area_field": "area", "volume_field": "volume", "area_units": "km2",
                                             "volume_units": "hm3"},
                           "evaporation_source": "e_lake"}}
    return d, cat


def _write(d, cat, name="catalog.yaml"):
    p = d / name
    p.write_text(yaml.safe_dump(cat, sort_keys=False))
    return p


# ---- storage curve: interpolation ---------------------------------------------------------------

def test_curve_matches_the_frustum_between_slices_better_than_linear(tmp_path):
    """Cone: between two curve points, V(h) - V(h1) is the frustum from A(h1) and A(h) (exact for a cone)."""
    rows = _cone_curve_rows()
    rows.to_csv(tmp_path / "c.csv", index=False)
    from wbexplore.io.catalog import StorageCurveSpec

    spec = StorageCurveSpec(path=tmp_path / "c.csv", id_field="wb_id", level_field="level", area_field="area",
                            volume_field="volume", area_units="km2", volume_units="hm3", level_units="m")
    curve = read_storage_curves(spec)["RES1"]
    # the points come back in m2 and m3 (pint: 1 km2 = 1e6 m2, 1 hm3 = 1e6 m3)
    np.testing.assert_allclose(curve.area_m2, _cone_area(DEPTHS), rtol=1e-12)
    h = np.linspace(5.0, 39.0, 200)  # levels between the points (depth above the bottom)
    h1 = np.floor(h / 2.0) * 2.0  # the slice below each level
    expected = _frustum(h1, h)  # frustum between the slice below and the level itself
    got = curve.volume(BOTTOM + h) - curve.volume(BOTTOM + h1)
    lin = np.interp(BOTTOM + h, curve.level_m, curve.volume_m3) - np.interp(BOTTOM + h1, curve.level_m,
                                                                             curve.volume_m3)
    err_pchip = np.abs(got - expected).max() / expected.max()
    err_lin = np.abs(lin - expected).max() / expected.max()
    assert err_pchip < 1e-3  # within 0.1% of the largest slice volume (measured: 2e-4)
    assert err_pchip < err_lin / 20  # linear interpolation (numpy.interp) is far worse (measured: 1.4e-2)
    # the surface area between points follows the cone too
    np.testing.assert_allclose(curve.area(BOTTOM + h), _cone_area(h), rtol=0.02)


def test_curve_is_monotone_without_overshoot_where_a_cubic_spline_is_not():
    """scipy: PchipInterpolator preserves monotonicity; CubicSpline through the same points overshoots."""
    from scipy.interpolate import CubicSpline

    level = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 5.0])
    vol = np.array([0.0, 0.1, 0.2, 10.0, 10.1, 10.2])  # a shelf that floods at 2 to 3 m
    curve = StorageCurve("X", level, vol, vol)
    fine = np.linspace(0.0, 5.0, 1001)
    v = curve.volume(fine)
    assert np.all(np.diff(v) >= 0)
    assert v.min() >= 0.0 and v.max() <= 10.2
    cs = CubicSpline(level, vol)(fine)
    assert np.any(np.diff(cs) < 0)  # the spline falls somewhere: the reason not to use it


def test_curve_gives_nan_outside_never_extrapolates():
    curve = StorageCurve("X", np.array([1.0, 2.0]), np.array([1.0, 2.0]), np.array([0.0, 1.5]))
    v = curve.volume([0.99, 1.0, 2.0, 2.01, np.nan])
    assert np.isnan(v[0]) and np.isnan(v[3]) and np.isnan(v[4])
    assert v[1] == 0.0 and v[2] == 1.5


# ---- storage curve: refusals --------------------------------------------------------------------

@pytest.mark.parametrize("edit, words", [
    (lambda df: df.assign(level=df["level"].where(df.index != 5, df["level"].iloc[4])), "repeats the level"),
    (lambda df: df.assign(volume=df["volume"].where(df.index != 7, df["volume"].iloc[6] - 0.5)), "'volume' decreases"),
    (lambda df: df.assign(area=df["area"].where(df.index != 3, 0.0)), "'area' decreases"),
    (lambda df: df.assign(volume=df["volume"].astype(object).where(df.index != 2, "n/a")), "is not a number"),
])
def test_bad_curve_is_refused_naming_file_and_line(study, edit, words):
    d, cat = study
    rows = edit(_cone_curve_rows())
    rows.to_csv(d / "curves.csv", index=False)
    with pytest.raises(InputError) as exc:
        read_waterbodies(open_catalog(_write(d, cat)))
    msg = str(exc.value)
    assert "curves.csv" in msg and "line " in msg and "RES1" in msg and words in msg, msg
    assert "\n" not in msg


def test_curve_line_numbers_are_file_lines(study):
    d, cat = study
    rows = _cone_curve_rows()
    rows.loc[5, "level"] = rows.loc[4, "level"]  # data row index 5 is line 7 (header is line 1)
    rows.to_csv(d / "curves.csv", index=False)
    with pytest.raises(InputError, match=r"line 7, water body 'RES1'.* of line 6"):
        read_waterbodies(open_catalog(_write(d, cat)))


# ---- catalog and cross-checks -------------------------------------------------------------------

def test_catalog_reads_waterbodies(study, capsys):
    d, cat = study
    p = _write(d, cat)
    c = open_catalog(p)
    assert c.waterbodies.evaporation_source == "e_lake"
    assert c.waterbodies.storage_curve.level_units == "m"  # default: the level series' units
    assert {d / "lakes.gpkg", d / "levels.csv", d / "curves.csv"} <= set(c.input_paths())
    rc, out, err = run_cli(["check", p], capsys)
    assert rc == 0, err
    # `check` lists both water bodies: level period of the daily file, curve ranges as written in curves.csv
    assert "water bodies: 2 in lakes.gpkg" in out
    vmax = float(_cone_curve_rows()["volume"].iloc[-1])  # hm3
    lines = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith("  RES")}
    assert "levels 2010-01 to 2011-06 (daily); curve 100 to 140 m, 0 to " in lines["RES1"]
    assert lines["RES1"].endswith(f" to {vmax:g} hm3") and lines["RES2"].endswith("curve 40 to 60 m, 0 to 40 hm3")


@pytest.mark.parametrize("change, words", [
    (lambda w: w.update(evaporation_source="e_pond"), "'evaporation_source': 'e_pond' is not a product id"),
    (lambda w: w.update(evaporation_source="rain_a"), "product 'rain_a' is P, not ET"),
    (lambda w: w["storage_curve"].update(volume_units="km2"), "'volume_units'"),
    (lambda w: w["storage_curve"].update(volume_units="Mm3"), "hm3"),
    (lambda w: w["storage_curve"].update(area_units="hm3"), "'area_units'"),
    (lambda w: w["level"].update(units="m3/s"), "'units'"),
    (lambda w: w["storage_curve"].update(colour="blue"), "'colour' is not a known field"),
])
def test_bad_waterbodies_block_exits_2_in_one_line(study, capsys, change, words):
    d, cat = study
    change(cat["waterbodies"])
    rc, _out, err = run_cli(["check", _write(d, cat)], capsys)
    line = one_line_error(rc, err)
    assert "waterbodies: " in line and words in line, line


def test_level_series_for_an_unknown_waterbody_is_refused(study):
    d, cat = study
    lv = _daily_levels().rename(columns={"RES2": "RES9"})
    lv.to_csv(d / "levels.csv", index=False)
    with pytest.raises(InputError, match=r"levels.csv: station 'RES9', which is not a water body of lakes.gpkg"):
        read_waterbodies(open_catalog(_write(d, cat)))
    cat["waterbodies"]["level"]["stations"] = {"RES1": "RES1", "RES9": "RES7"}
    with pytest.raises(InputError, match=r"station 'RES9' maps to water body 'RES7'"):
        read_waterbodies(open_catalog(_write(d, cat)))


def test_waterbody_id_that_is_a_basin_id_is_refused(study):
    d, cat = study
    box_basins(d / "basins.geojson", [(10.0, 40.0, 12.0, 42.0)], ids=["RES2"])
    with pytest.raises(InputError, match=r"lakes.gpkg: water body 'RES2' has the id of a basin"):
        read_waterbodies(open_catalog(_write(d, cat)))


def test_waterbody_without_a_curve_and_curve_without_a_waterbody(study):
    d, cat = study
    _cone_curve_rows().to_csv(d / "curves.csv", index=False)
    with pytest.raises(InputError, match=r"curves.csv: water body 'RES2' has no storage curve"):
        read_waterbodies(open_catalog(_write(d, cat)))
    pd.concat([_cone_curve_rows(), _cone_curve_rows("RES2"), _cone_curve_rows("RES5")]).to_csv(
        d / "curves.csv", index=False)
    with pytest.raises(InputError, match=r"water body 'RES5' is not in lakes.gpkg"):
        read_waterbodies(open_catalog(_write(d, cat)))


def test_outlines_any_crs_and_levels_in_cm(study):
    d, cat = study
    lv = _daily_levels()
    lv[["RES1", "RES2"]] = (lv[["RES1", "RES2"]] * 100).round(2)
    lv.to_csv(d / "levels_cm.csv", index=False)
    cat["waterbodies"]["level"].update(path="levels_cm.csv", units="cm")
    cat["waterbodies"]["storage_curve"]["level_units"] = "m"
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    # a 6 km buffer round a point on the zone's central meridian of a transverse Mercator CRS: the planar
    # area of the n-gon, n/2 r^2 sin(2 pi / n), divided by the square of the UTM scale factor 0.9996 there
    # (the projection's definition); the reader's geodesic area (pyproj.Geod) must agree to 1e-4
    n = 64  # shapely 2's buffer: 16 segments per quarter circle
    planar = n / 2 * 6.0**2 * math.sin(2 * math.pi / n)
    assert wb.outlines.loc["RES1", "area_km2"] == pytest.approx(planar / 0.9996**2, rel=1e-4)
    assert wb.outlines.index.name == "waterbody"
    ref = _daily_levels().set_index(pd.DatetimeIndex(DAYS))["RES1"]
    got = wb.level_mean.sel(waterbody="RES1").to_series()
    exp = ref.resample("MS").mean()  # xarray/pandas' own resample
    np.testing.assert_allclose(got.to_numpy(), exp.to_numpy(), rtol=1e-12)


# ---- storage change from levels -----------------------------------------------------------------

def _independent_end_of_month_dS(levels: pd.Series, volume_of) -> dict:
    """Loop with calendar/datetime: the end state of month m is the mean level of its last day and the next
    month's first day; dS(m) = V(end m) - V(end m-1)."""
    lv = {ts.date(): v for ts, v in levels.items()}
    end = {}
    y, m = DAYS[0].year, DAYS[0].month
    while (y, m) <= (DAYS[-1].year, DAYS[-1].month):
        last = datetime.date(y, m, calendar.monthrange(y, m)[1])
        nxt = last + datetime.timedelta(days=1)
        if last in lv and nxt in lv:
            end[(y, m)] = float(volume_of(0.5 * (lv[last] + lv[nxt])))
        y, m = (y + 1, 1) if m == 12 else (y, m + 1)
    keys = sorted(end)
    return {k: end[k] - end[p] for p, k in zip(keys, keys[1:]) if (p[0] * 12 + p[1]) + 1 == k[0] * 12 + k[1]}


def test_daily_levels_give_end_of_month_storage_change(study):
    d, cat = study
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    vol = level_volumes(wb.level_end, wb.curve_callables())
    ds = volume_storage_change(vol)
    assert ds.attrs["units"] == "m3/month" and ds.attrs["storage_change"] == "end_of_month"
    levels = _daily_levels().set_index(pd.DatetimeIndex(DAYS))
    # RES2 is a prism (constant 2 km2 area, volume linear in level): V = 2e6 m2 * (h - 40 m)
    for name, volume_of in (("RES2", lambda h: 2e6 * (h - 40.0)), ("RES1", wb.curves["RES1"].volume)):
        exp = _independent_end_of_month_dS(levels[name], volume_of)
        got = ds.sel(waterbody=name).to_series()
        assert len(exp) == 16  # January 2010 has no earlier end state; June 2011 has no next day
        for (y, m), v in exp.items():
            assert got[pd.Timestamp(y, m, 1)] == pytest.approx(v, rel=1e-9, abs=1e-3)
        assert np.isnan(got.iloc[0]) and np.isnan(got.iloc[-1])
    # end-of-month storage changes are matched by the month's own fluxes
    f = xr.DataArray(np.arange(18.0), dims="time", coords={"time": ds["time"]})
    np.testing.assert_array_equal(match_volume_window(f, state="end_of_month").values, f.values)


def test_monthly_mean_levels_use_the_twsa_kernels(study):
    d, cat = study
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    vol = level_volumes(wb.level_mean, wb.curve_callables())
    for method in KERNELS:
        ds = volume_storage_change(vol, method=method)
        np.testing.assert_array_equal(ds.values, storage_change(vol.values, method))
        f = xr.DataArray(np.arange(18.0) ** 2, dims="time", coords={"time": ds["time"]})
        w = KERNELS[method]
        exp = w[0] * np.roll(f.values, 1) + w[1] * f.values + w[2] * np.roll(f.values, -1)
        got = match_volume_window(f, state="monthly_mean", method=method).values
        np.testing.assert_allclose(got[1:-1], exp[1:-1])


def test_level_outside_curve_warns_and_leaves_the_months_empty(study):
    d, cat = study
    lv = _daily_levels()
    # RES2's curve ends at 60 m: the last day of March and first of April 2011 are above it
    lv.loc[lv["date"].isin(["2011-03-31", "2011-04-01"]), "RES2"] = 61.0
    lv.to_csv(d / "levels.csv", index=False)
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    with pytest.warns(LevelOutsideCurveWarning, match=r"water body 'RES2': level outside the storage curve in "
                                                      r"2011-03 \(end-of-month level\)") as rec:
        vol = level_volumes(wb.level_end, wb.curve_callables())
    assert len(rec) == 1
    v = vol.sel(waterbody="RES2").to_series()
    assert np.isnan(v["2011-03-01"]) and np.isfinite(v["2011-02-01"]) and np.isfinite(v["2011-04-01"])
    ds = volume_storage_change(vol).sel(waterbody="RES2").to_series()
    assert np.isnan(ds["2011-03-01"]) and np.isnan(ds["2011-04-01"]) and np.isfinite(ds["2011-05-01"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        level_volumes(wb.level_end.sel(waterbody=["RES1"]), wb.curve_callables())  # no warning for RES1


# ---- units --------------------------------------------------------------------------------------

def test_one_hm3_per_30_day_month_in_m3s():
    """1 hm3 / (30 x 86400 s) = 0.385802 m3/s (arithmetic), the same through pint."""
    import pint

    ureg = pint.UnitRegistry()
    via_pint = (1 * ureg("hm^3") / (30 * ureg.day)).to("m^3/s").magnitude
    got = m3_per_month_to_flow_m3s([1e6], pd.DatetimeIndex(["2011-04-01"]))[0]  # April: 30 days
    assert got == pytest.approx(0.38580, abs=5e-6)
    assert got == pytest.approx(via_pint, rel=1e-12)
    assert got == pytest.approx(1e6 / (30 * 86400), rel=1e-15)


# ---- P and E over the water surface, pan evaporation, unit views ---------------------------------

def _months(n=4, start="2011-01-01"):
    return pd.date_range(start, periods=n, freq="MS")


def test_depth_over_outline_and_over_surface_at_level(study):
    """mm/month x m2 / 1000 = m3/month (pint: mm * km2 to m3); the level option uses the curve's area."""
    import pint

    from wbexplore.balance.waterbody import surface_area_at_level, surface_volume

    d, cat = study
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    t = wb.level_mean["time"]
    depth = xr.DataArray(np.full((2, t.size), 30.0), dims=("waterbody", "time"),
                         coords={"waterbody": ["RES1", "RES2"], "time": t}, attrs={"units": "mm/month"})
    outline = xr.DataArray(wb.outlines["area_km2"].to_numpy() * 1e6, dims="waterbody",
                           coords={"waterbody": list(wb.outlines.index)}, attrs={"units": "m2"})
    v = surface_volume(depth, outline_area_m2=outline)
    ureg = pint.UnitRegistry()
    exp = (30 * ureg.mm * (wb.outlines.loc["RES1", "area_km2"] * ureg.km**2)).to("m^3").magnitude
    assert v.attrs["units"] == "m3/month" and v.sel(waterbody="RES1").values[0] == pytest.approx(exp, rel=1e-12)
    area = surface_area_at_level(wb.level_mean, {w: c.area for w, c in wb.curves.items()})
    v2 = surface_volume(depth, outline_area_m2=outline, surface_area_m2=area, area="level")
    # RES2 is a prism of 2 km2 at every level; RES1 a cone: A = pi K^2 (h - bottom)^2 at the month's mean level
    np.testing.assert_allclose(v2.sel(waterbody="RES2").values, 30e-3 * 2e6, rtol=1e-12)
    h = wb.level_mean.sel(waterbody="RES1").values - BOTTOM
    np.testing.assert_allclose(v2.sel(waterbody="RES1").values, 30e-3 * _cone_area(h), rtol=2e-3)
    with pytest.raises(InputError, match="area='level' needs"):
        surface_volume(depth, outline_area_m2=outline, area="level")
    with pytest.raises(InputError, match="units 'mm', expected 'mm/month'"):
        surface_volume(depth.assign_attrs(units="mm"), outline_area_m2=outline)


def test_pan_coefficient_common_practice():
    from wbexplore.balance.waterbody import PAN_COEFFICIENT, pan_to_lake_evaporation

    pan = xr.DataArray([100.0, 150.0], dims="time", coords={"time": _months(2)}, attrs={"units": "mm/month"})
    assert PAN_COEFFICIENT == 0.7  # common practice
    np.testing.assert_allclose(pan_to_lake_evaporation(pan).values, [70.0, 105.0])
    np.testing.assert_allclose(pan_to_lake_evaporation(pan, coefficient=0.8).values, [80.0, 120.0])
    with pytest.raises(InputError, match="outside"):
        pan_to_lake_evaporation(pan, coefficient=7)


def test_volumes_in_hm3_m3s_and_mm():
    """One hm3 in each of February 2011 (28 days), April (30) and May (31): m3/s with the real days
    (stdlib calendar), and as mm over 2 km2 (1e6 m3 / 2e6 m2 = 0.5 m)."""
    from wbexplore.balance.waterbody import express_volume

    t = pd.DatetimeIndex(["2011-02-01", "2011-04-01", "2011-05-01"])
    v = xr.DataArray(np.full(3, 1e6), dims="time", coords={"time": t}, attrs={"units": "m3/month"})
    q = express_volume(v, "m3/s")
    days = [calendar.monthrange(ts.year, ts.month)[1] for ts in t]
    np.testing.assert_allclose(q.values, [1e6 / (n * 86400) for n in days], rtol=1e-15)
    assert q.values[1] == pytest.approx(0.38580, abs=5e-6) and q.attrs["units"] == "m3/s"
    np.testing.assert_allclose(express_volume(v, "hm3/month").values, 1.0)
    area = xr.DataArray(2e6, attrs={"units": "m2"})
    np.testing.assert_allclose(express_volume(v, "mm/month", area_m2=area).values, 500.0)
    with pytest.raises(InputError, match="needs the area"):
        express_volume(v, "mm/month")


def test_waterbody_without_levels_is_refused(study):
    d, cat = study
    _daily_levels().drop(columns="RES2").to_csv(d / "levels.csv", index=False)
    with pytest.raises(InputError, match=r"levels.csv: water body 'RES2' of lakes.gpkg has no level series"):
        read_waterbodies(open_catalog(_write(d, cat)))


def test_levels_by_state_daily_and_monthly_stations(study):
    """A long table with one daily station (RES1) and one monthly station (RES2)."""
    d, cat = study
    lv = _daily_levels()
    daily = pd.DataFrame({"wb": "RES1", "date": lv["date"], "h": lv["RES1"]})
    mon = lv.assign(m=pd.DatetimeIndex(DAYS).to_period("M")).groupby("m")["RES2"].mean()
    monthly = pd.DataFrame({"wb": "RES2", "date": [str(p.start_time.date()) for p in mon.index], "h": mon.values})
    pd.concat([daily, monthly]).to_csv(d / "levels.csv", index=False)
    cat["waterbodies"]["level"] = {"path": "levels.csv", "time_field": "date", "station_field": "wb",
                                   "value_field": "h", "units": "m"}
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    by = wb.levels_by_state()
    assert list(by["end_of_month"]["waterbody"].values) == ["RES1"]
    assert list(by["monthly_mean"]["waterbody"].values) == ["RES2"]
    np.testing.assert_allclose(by["monthly_mean"].sel(waterbody="RES2").values, mon.values, rtol=1e-12)
    for state, lv_da in by.items():
        ds = volume_storage_change(level_volumes(lv_da, wb.curve_callables()))
        assert ds.attrs["state"] == state and np.isfinite(ds.values).sum() >= 15


def test_summary_lines_for_check(study):
    d, cat = study
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    lines = wb.summary()
    vmax = float(_cone_curve_rows()["volume"].iloc[-1])  # hm3, as written in the curve file
    assert lines[0].startswith("RES1 (Upper lake): outline ")
    assert "levels 2010-01 to 2011-06 (daily); curve 100 to 140 m, 0 to " in lines[0]
    assert lines[0].endswith(f" to {vmax:g} hm3")
    assert lines[1].endswith("curve 40 to 60 m, 0 to 40 hm3")


def test_surface_area_at_a_level_outside_the_curve_warns(study):
    from wbexplore.balance.waterbody import surface_area_at_level

    d, cat = study
    wb = read_waterbodies(open_catalog(_write(d, cat)))
    lv = wb.level_mean.copy()
    lv.loc[{"waterbody": "RES2", "time": "2010-05-01"}] = 39.0  # below the curve's 40 m
    with pytest.warns(LevelOutsideCurveWarning, match=r"'RES2': level outside the storage curve in 2010-05 "
                                                      r"\(monthly mean level, surface area\)"):
        area = surface_area_at_level(lv, {w: c.area for w, c in wb.curves.items()})
    assert np.isnan(area.sel(waterbody="RES2", time="2010-05-01")) and area.attrs["units"] == "m2"
    assert np.isfinite(area.sel(waterbody="RES2", time="2010-06-01"))


def test_end_of_month_state_needs_both_days_round_the_boundary():
    """The state at 00:00 on the 1st is the mean of the days either side (datetime arithmetic); a missing day
    on either side empties that month's end state, never borrowed from another day."""
    from wbexplore.temporal import station_month_end_states

    days = pd.date_range("2012-01-25", "2012-04-05", freq="D")  # 2012: a leap year (February has 29 days)
    v = pd.Series(np.arange(days.size, dtype=float), index=days)
    keep = v.index != pd.Timestamp("2012-03-01")  # the first day of March is missing
    s = station_month_end_states(pd.DataFrame({"station": "L", "t": days[keep], "v": v[keep].to_numpy()}))["state"]
    jan_end = 0.5 * (v[pd.Timestamp(datetime.date(2012, 1, 31))] + v[pd.Timestamp(datetime.date(2012, 2, 1))])
    assert s[("L", pd.Timestamp("2012-01-01"))] == jan_end
    assert np.isnan(s[("L", pd.Timestamp("2012-02-01"))])  # 29 February present, 1 March not
    assert s[("L", pd.Timestamp("2012-03-01"))] == 0.5 * (v["2012-03-31"] + v["2012-04-01"])
    assert np.isnan(s[("L", pd.Timestamp("2012-04-01"))])  # the record ends before 1 May


# ---- pipeline.waterbody_series --------------------------------------------------------------------

def test_waterbody_series_against_a_hand_computation(study):
    """Two prism lakes (constant area, so V = A (h - 10 m)): RES1 with monthly-mean levels (central
    difference, (V[m+1] - V[m-1]) / 2), RES2 with daily levels rising 1 cm a day (end-of-month state = mean
    of the month's last day and the next month's first day, so dS = days in the month (stdlib calendar) x
    0.01 m x area). Worked by hand below, not through the package."""
    from wbexplore.pipeline import waterbody_series

    d, cat = study
    pd.DataFrame({"wb_id": ["RES1"] * 3 + ["RES2"] * 3, "level": [10.0, 20.0, 30.0] * 2,
                  "area": [2.0, 2.0, 2.0, 1.0, 1.0, 1.0], "volume": [0.0, 20.0, 40.0, 0.0, 10.0, 20.0]}
                 ).to_csv(d / "curves.csv", index=False)  # km2, hm3: 2e6 and 1e6 m3 per m of level
    days = pd.date_range("2001-01-01", "2001-04-30", freq="D")
    res1 = pd.DataFrame({"wb": "RES1", "date": ["2001-01-01", "2001-02-01", "2001-03-01", "2001-04-01"],
                         "h": [12.0, 13.0, 15.0, 18.0]})
    res2 = pd.DataFrame({"wb": "RES2", "date": days.strftime("%Y-%m-%d"), "h": 10.0 + 0.01 * np.arange(days.size)})
    pd.concat([res1, res2]).to_csv(d / "levels.csv", index=False)
    cat["waterbodies"]["level"] = {"path": "levels.csv", "time_field": "date", "station_field": "wb",
                                   "value_field": "h", "units": "m"}
    ds = waterbody_series(_write(d, cat))
    assert ds["level"].dims == ("waterbody", "time") and list(ds["waterbody"].values) == ["RES1", "RES2"]
    assert list(pd.DatetimeIndex(ds["time"].values).strftime("%Y-%m")) == ["2001-01", "2001-02", "2001-03",
                                                                            "2001-04"]
    assert (ds["level"].attrs["units"], ds["volume"].attrs["units"], ds["storage_change"].attrs["units"]) == (
        "m", "m3", "m3/month")
    assert list(ds["state"].values) == ["monthly_mean", "end_of_month"]
    assert list(ds["storage_change_method"].values) == ["central", "end_of_month"]
    assert ds["storage_change"].attrs["storage_change"] == "per water body"
    nan = np.nan
    # RES1: V = 2e6 (h - 10): 4e6, 6e6, 10e6, 16e6 m3; central: (10e6 - 4e6) / 2, (16e6 - 6e6) / 2
    np.testing.assert_allclose(ds["volume"].sel(waterbody="RES1").values, [4e6, 6e6, 10e6, 16e6], rtol=1e-12)
    np.testing.assert_allclose(ds["storage_change"].sel(waterbody="RES1").values, [nan, 3e6, 5e6, nan], rtol=1e-12)
    # RES2: end of January = mean of days 30 and 31 (0-based) = 10.305 m; no end state for April (no 1 May)
    np.testing.assert_allclose(ds["level"].sel(waterbody="RES2").values, [10.305, 10.585, 10.895, nan], rtol=1e-12)
    exp = [nan] + [calendar.monthrange(2001, m)[1] * 0.01 * 1e6 for m in (2, 3)] + [nan]  # 280000, 310000 m3
    np.testing.assert_allclose(ds["storage_change"].sel(waterbody="RES2").values, exp, rtol=1e-9)
    # the same catalog with only monthly levels: one state, the chosen method in the attributes
    lv = pd.concat([res1, res1.assign(wb="RES2")])
    lv.to_csv(d / "levels.csv", index=False)
    back = waterbody_series(_write(d, cat), method="backward")
    assert back["storage_change"].attrs["storage_change"] == "backward"
    assert back["storage_change"].attrs["state"] == "monthly_mean"
    np.testing.assert_allclose(back["storage_change"].sel(waterbody="RES2").values, [nan, 1e6, 2e6, 3e6], rtol=1e-12)
    with pytest.raises(InputError, match="'sideways'"):
        waterbody_series(_write(d, cat), method="sideways")



def test_flow_into_a_waterbody_is_not_a_basin_flow(study, capsys):
    # DESIGN.md: inflows and outflows of a water body are `flows` entries whose `basin` is its id. Such a flow
    # enters the water body's balance only: `check` lists it, and the basin series do not carry it.
    d, cat = study
    pd.DataFrame({"date": DAYS.strftime("%Y-%m-%d"), "IN-1": 2.0}).to_csv(d / "inflow.csv", index=False)
    cat["flows"] = [{"id": "feeder", "basin": "RES1", "direction": "in", "path": "inflow.csv", "layout": "wide",
                     "time_field": "date", "station": "IN-1", "units": "m3/s", "label": "Feeder stream"}]
    p = _write(d, cat)
    rc, out, err = run_cli(["check", p], capsys)
    assert rc == 0, err
    row = [ln for ln in out.splitlines() if ln.strip().startswith("feeder")]
    assert row and "RES1" in row[0] and "in" in row[0].split()
    from wbexplore.pipeline import extract, split_flows

    to_basins, to_waterbodies = split_flows(open_catalog(p))
    assert (to_basins, [f.id for f in to_waterbodies]) == ((), ["feeder"])
    ds = extract(p, use_cache=False)
    assert not [v for v in ds.data_vars if v.startswith("flow_")]
    # a flow naming neither a basin nor a water body is still refused, naming the id
    cat["flows"][0]["basin"] = "RES9"
    rc, out, err = run_cli(["check", _write(d, cat)], capsys)
    assert rc == 2 and "RES9" in err and len(err.strip().splitlines()) == 1
