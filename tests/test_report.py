"""The HTML report: a water body's (issue 15: no discharge words, the residual as unmeasured exchange, volumes)
and the hand-over page (issue 17: verdict, product labels and resolutions, metrics with units, water-year table,
static plots, date and version, notes, one printed page).

References: pint for 1 hm3 = 1e6 m3; the demo reservoir's seepage (invented truth, `wbexplore.demo.SEEPAGE_M3S`)
for the sign and size of the exchange (consistency with the known truth, as in tests/test_demo_reservoir.py);
`wbexplore.balance.rank` for the verdict's figures; pandas' anchored annual periods (``Y-SEP``) for the
water-year table; the product files' own coordinates (xarray) for the grid spacings; chromium's print-to-PDF
for the page count.
"""

from __future__ import annotations

import html
import re
import warnings

import numpy as np
import pytest

WID = "TALV"


@pytest.fixture(scope="module")
def wb_series(demo_dir):
    from wbexplore.pipeline import load_series

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # coverage notes of the demo's products
        return load_series(demo_dir / "catalog.yaml", waterbodies=True)


def _write_report(demo_dir, out, basin):
    """``wbexplore report`` of the demo for ``basin`` into ``out`` (exit 0 asserted); returns ``out``."""
    from wbexplore.cli import main

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["report", str(demo_dir / "catalog.yaml"), "--basin", basin, "--out", str(out)]) == 0
    return out


@pytest.fixture(scope="module")
def report_text(demo_dir, tmp_path_factory):
    out = _write_report(demo_dir, tmp_path_factory.mktemp("wbreport") / "r.html", WID)
    raw = out.read_text(encoding="utf-8")
    return raw, html.unescape(html.unescape(raw))


def test_waterbody_report_speaks_of_exchange_not_discharge(report_text):
    raw, text = report_text
    # no word of a gauged outlet: a water body has none
    for word in ("discharge", "gauged Q", "Qhat", "Q from the balance", "KGE", "PBIAS", "Basin area"):
        assert word not in text, word
    assert "Unmeasured exchange</b> (= residual, the net unmeasured outflow; positive = unmeasured loss)" in text
    assert "storage from water levels" in text and "Outline area" in text
    assert "<title>wbexplore report TALV (water body)</title>" in raw
    # the bars in volume units by default, the level-and-volume plot
    assert '"axis_label":"mean over valid months (hm3/month)"' in raw
    assert '"axis_label":"level (m)"' in raw and '"axis_label":"volume (hm3)"' in raw
    assert '"axis_label":"unmeasured exchange (hm3/month)"' in raw
    assert "Unmeasured exchange (= residual; positive = unmeasured loss): mean" in raw  # the exchange plot's title


def test_waterbody_report_exchange_matches_the_known_seepage(report_text, wb_series):
    from wbexplore import demo
    from wbexplore.balance import ClosureOptions, best_selection, compute_selection
    from wbexplore.balance.waterbody import unmeasured_exchange

    _, text = report_text
    m = re.search(r"mean (-?[\d.]+) ± ([\d.]+) m3/s = (-?[\d.]+) ± ([\d.]+) hm3/month", text)
    assert m, "exchange line missing"
    mean_m3s, se_m3s, mean_hm3, se_hm3 = map(float, m.groups())
    # the demo's seepage is a loss: positive exchange (= residual, DESIGN.md), within two standard errors of the truth
    assert mean_m3s > 0 and "an unmeasured loss" in text
    assert abs(mean_m3s - demo.SEEPAGE_M3S) <= 2 * se_m3s
    # the same numbers as balance.waterbody gives for the report's selection (best-ranked combination)
    sel = best_selection(wb_series, WID, ClosureOptions(), by="rmse")
    res = compute_selection(wb_series, sel)
    ex = unmeasured_exchange(res, surface_area_km2=wb_series["surface_area_km2"].sel(basin=WID))
    assert mean_m3s == pytest.approx(ex.mean["m3/s"], abs=0.006)
    assert mean_hm3 == pytest.approx(ex.mean["hm3"], abs=0.006)
    assert se_hm3 == pytest.approx(ex.standard_error["hm3"], abs=0.006)
    # a table row per exchange unit, and the ranking carries the exchange (plain name, units), not the outlet metrics
    assert "<td>m3/s (mean over the month)</td>" in text and "Unmeasured exchange (m3/s)</th>" in text
    assert "<th>kge</th>" not in text and "<th>nse</th>" not in text and "Kling-Gupta" not in text


def test_hm3_unit_system_against_pint(wb_series):
    """`to_unit_system(..., "hm3")` is the m3 frame / (hm3 in m3 by pint)."""
    import pint

    from wbexplore.balance import Selection, compute_selection, to_unit_system

    per_hm3 = pint.UnitRegistry()("1 hm**3").to("m**3").magnitude
    res = compute_selection(wb_series, Selection(WID, "kestrel", "tansy", "levels"))
    m3 = to_unit_system(res.frame, res.area_km2, "m3")
    hm3 = to_unit_system(res.frame, res.area_km2, "hm3")
    for c in ("P", "ET", "dS", "residual", "sigma_residual", "flow_ombrel"):
        np.testing.assert_allclose(hm3[c].values, m3[c].values / per_hm3, rtol=1e-12, equal_nan=True)


def test_level_volume_plot_draws_the_curve_volumes_in_hm3(demo_dir):
    import pint

    from wbexplore import plots
    from wbexplore.pipeline import waterbody_series

    lv = waterbody_series(demo_dir / "catalog.yaml").sel(waterbody=WID)
    p = plots.LevelVolumePlot()
    p.update(lv, start="2005-01", end="2010-12", name="Talvaren")
    per_hm3 = pint.UnitRegistry()("1 hm**3").to("m**3").magnitude
    np.testing.assert_allclose(p.src.data["volume"], lv["volume"].values / per_hm3, rtol=1e-12, equal_nan=True)
    np.testing.assert_array_equal(p.src.data["level"], lv["level"].values)
    assert len(p.out.data["x0"]) == 2  # shaded before 2005-01 and after 2010-12
    assert p.fig.yaxis[0].axis_label == "level (m)" and p.fig.yaxis[1].axis_label == "volume (hm3)"


def test_report_after_a_rendered_explorer_makes_no_outside_request(demo_dir, wb_series):
    """Once a page with a Tabulator has been rendered in the process (the explorer's report button, a notebook),
    panel registers a stylesheet on its CDN: the report, a standalone file, must not link it (bug found by the
    browser test of the water-body report)."""
    from bokeh.document import Document

    from wbexplore.balance import Selection
    from wbexplore.explorer.app import Explorer, load_state
    from wbexplore.io.catalog import open_catalog
    from wbexplore.report import report_html

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        st = load_state(demo_dir / "catalog.yaml")
    Explorer(st).panel().get_root(Document())
    cat = open_catalog(demo_dir / "catalog.yaml")
    for ds, sel in ((st.series, Selection("VEL", "heron", "tansy", "quarry")),
                    (wb_series, Selection(WID, "heron", "tansy", "levels"))):
        text = report_html(cat, ds, sel)
        links = re.findall(r'<(?:link|script)[^>]*(?:href|src)="(https?:[^"]*)"', text)
        assert links == [], (sel.basin, links)


# --- the hand-over page (issue 17, item 6) -------------------------------------------------------------------

BASIN = "VEL"


@pytest.fixture(scope="module")
def basin_report(demo_dir, tmp_path_factory):
    out = _write_report(demo_dir, tmp_path_factory.mktemp("report") / "r.html", BASIN)
    raw = out.read_text(encoding="utf-8")
    return out, raw, html.unescape(raw)


def _verdict(text: str) -> str:
    m = re.search(r"<b>Verdict\.</b> (.*?)</p>", text, re.S)
    assert m, "no verdict"
    return m.group(1)


def test_report_does_not_import_the_explorer():
    """The report draws with `wbexplore.plots` and words with `wbexplore.texts`, never through the explorer."""
    import subprocess
    import sys

    code = ("import sys, wbexplore.report, wbexplore.texts; "
            "print(sorted(m for m in sys.modules if m.startswith('wbexplore.explorer') or m.split('.')[0] in "
            "('panel', 'holoviews', 'hvplot', 'ipywidgets')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stdout


def test_gravimetry_rule_lives_in_balance():
    """One rule (balance.cautions), re-exported by the explorer's views; threshold from the rule of thumb
    (about 200,000 km2, e.g. Longuevergne et al. 2010)."""
    from types import SimpleNamespace

    import pandas as pd

    from wbexplore.balance.cautions import GRAVIMETRY_MIN_KM2, storage_resolution_warning
    from wbexplore.explorer import views
    from wbexplore.texts import warnings_for

    assert views.GRAVIMETRY_MIN_KM2 == GRAVIMETRY_MIN_KM2 == 200_000
    small = storage_resolution_warning(5_619.4)
    assert small.startswith("Basin area 5,619 km2 is below the ~200,000 km2")
    assert storage_resolution_warning(200_000) is None and storage_resolution_warning(float("nan")) is None
    frame = pd.DataFrame({f"valid_fraction_{c}": [1.0] for c in ("P", "ET", "TWSA")})
    res = SimpleNamespace(area_km2=5_619.4, frame=frame, messages=[])
    assert warnings_for(res, None) == [small]
    assert warnings_for(SimpleNamespace(area_km2=338_513.0, frame=frame, messages=[]), None) == []


def test_annual_table_against_a_pandas_groupby(demo_series):
    """`balance.annual.annual_closure` against pandas' own water years: a groupby of the engine's monthly frame
    on ``Y-SEP`` periods (October to September, named by the year they end), complete years only."""
    from wbexplore.balance import Selection, compute_selection
    from wbexplore.balance.annual import annual_closure

    res = compute_selection(demo_series, Selection("SAR", "heron", "tansy", "quarry", water_year_start=10))
    a = annual_closure(res)
    f = res.frame
    years = f.index.to_period("Y-SEP")
    n = f["valid"].groupby(years).sum()
    size = f["valid"].groupby(years).size()
    complete = (n == 12) & (size == 12)
    # SAR has both flows: they enter its balance and its table (irrigation out, transfer in)
    assert a.terms == ("P", "ET", "Q", "dS", "flow_irrigation", "flow_transfer", "residual")
    assert list(a.table.index) == [p.year for p in n.index]
    np.testing.assert_array_equal(a.table["n_valid"].values, n.values)
    np.testing.assert_array_equal(a.table["complete"].values, complete.values)
    for k in a.terms:
        ref = f[k].groupby(years).sum()[complete.values]
        np.testing.assert_allclose(a.complete[k].values, ref.values, rtol=1e-12, atol=1e-9)
    assert a.table.loc[~a.table["complete"], "residual"].isna().all()  # a partial year is never scaled up
    assert 3 <= complete.sum() < len(complete)  # the demo's discharge gaps leave both kinds of years
    # each complete year closes: residual = P - ET - Q - dS - irrigation + transfer (DESIGN.md signs)
    c = a.complete
    np.testing.assert_allclose(c["residual"], c["P"] - c["ET"] - c["Q"] - c["dS"] - c["flow_irrigation"]
                               + c["flow_transfer"], rtol=1e-9, atol=1e-9)
    # and its mean is the engine's annual_bias metric (same rule: complete water years)
    assert float(c["residual"].mean()) == pytest.approx(res.metrics["annual_bias"], rel=1e-12)


def test_verdict_figures_are_the_ranking(basin_report, demo_series):
    """The verdict names the best combination and the runner-up with their figures, as `balance.rank` gives them."""
    from wbexplore.balance import ClosureOptions, rank

    _, raw, text = basin_report
    v = _verdict(raw)
    r = rank(demo_series, BASIN, ClosureOptions(), by="rmse")
    best, run = r.iloc[0], r.iloc[1]
    assert v.startswith("Velumbe (VEL), 2001-01 to 2020-12: the combination that closes best is ")
    assert (f"P Heron reanalysis rain (0.25 deg) [{best['P']}]" in v and f"[{best['ET']}]" in v
            and f"[{best['TWSA']}]" in v)
    m = re.search(r"\(Residual RMSE ([\d.]+) mm/month\); the runner-up, (.*?), gives Residual RMSE ([\d.]+) "
                  r"mm/month, ([\d.]+) mm/month worse \(ranked by Residual RMSE over (\d+) combinations\)\.$", v)
    assert m, v
    b, combo, second, diff, count = m.groups()
    assert float(b) == pytest.approx(best["rmse"], abs=0.005)
    assert float(second) == pytest.approx(run["rmse"], abs=0.005)
    assert float(diff) == pytest.approx(run["rmse"] - best["rmse"], abs=0.005)
    assert int(count) == int(r["scored"].sum())
    assert all(f"[{run[c]}]" in combo for c in ("P", "ET", "TWSA"))


def test_water_year_table_names_the_flows_by_catalog_id_with_their_labels(report_text, demo_dir):
    """The flows of the water-year table and of the residual line are the catalog's ids (never the series' internal
    ``flow_<id>`` names), and the caption gives each one's catalog label and direction (read here from the catalog
    YAML itself, the user's own words)."""
    import yaml

    raw, text = report_text
    flows = [f for f in yaml.safe_load((demo_dir / "catalog.yaml").read_text())["flows"] if f["basin"] == WID]
    assert len(flows) == 3
    assert "flow_" not in re.sub(r"<script.*?</script>", "", raw, flags=re.S)  # the plots' data may keep the names
    cap = re.search(r"Totals per water year in hm3/year \(1 mm over .*? hm3\) \((.*?)\); water year", text).group(1)
    line = "P - ET - dS " + " ".join(("+ " if f["direction"] == "in" else "- ") + f["id"] for f in flows)
    assert cap.startswith(line + " = residual"), cap
    for f in flows:
        assert f"; {f['id']}: {f['label']} ({'inflow' if f['direction'] == 'in' else 'outflow'})" in cap
        assert f"<th>{f['id']}</th>" in raw
    assert f"Residual r = {line} (mm/month)." in text


def test_waterbody_water_year_table_in_hm3_against_pint(report_text, wb_series):
    """A water body's water-year table is in hm3/year, as its other views (the explorer's default for a water
    body): each total is the engine's mm/year over the outline times the outline's area, converted by pint."""
    import pint

    from wbexplore import report
    from wbexplore.balance import ClosureOptions, Selection, compute_selection, rank
    from wbexplore.balance.annual import annual_closure

    _, text = report_text
    assert "Totals per water year in hm3/year (1 mm over the outline's" in text
    best = rank(wb_series, WID, ClosureOptions(), by="rmse").iloc[0]
    res = compute_selection(wb_series, Selection(WID, best["P"], best["ET"], "levels"))
    ureg = pint.UnitRegistry()
    factor = (1 * ureg.mm * (res.area_km2 * ureg.km**2)).to("hm**3").magnitude
    html_table = report._annual_table(None, res, volumes=True)
    a = annual_closure(res)
    rows = re.findall(r"<tr><td class='n'>(\d{4})</td>(.*?)</tr>", html_table)
    assert len(rows) == len(a.complete)
    for (year, cells), (y, mm) in zip(rows, a.complete.iterrows()):
        got = [float(v) for v in re.findall(r"<td class='n'>(-?[\d.]+)</td>", cells)]
        assert int(year) == y and len(got) == len(a.terms)
        np.testing.assert_allclose(got, [mm[k] * factor for k in a.terms], atol=0.5 + 1e-9)
    assert f"= {factor:.4g} hm3)" in html_table


def test_waterbody_verdict_gives_the_exchange(report_text, wb_series):
    from wbexplore.balance import ClosureOptions, rank

    raw, _ = report_text
    v = _verdict(raw)
    r = rank(wb_series, WID, ClosureOptions(), by="rmse")
    best, run = r.iloc[0], r.iloc[1]
    assert "the pair of P and E products that closes best is P " in v and "TWSA" not in v
    nums = re.findall(r"Residual RMSE ([\d.]+) mm/month, unmeasured exchange (-?[\d.]+) ± ([\d.]+) m3/s", v)
    assert len(nums) == 2, v
    for (rm, mean, se), row in zip(nums, (best, run)):
        assert float(rm) == pytest.approx(row["rmse"], abs=0.005)
        assert float(mean) == pytest.approx(row["exchange_m3s"], abs=0.005)
        assert float(se) == pytest.approx(row["exchange_m3s_se"], abs=0.005)


def test_report_page_parts(basin_report, demo_dir, demo_series):
    """Labels with ids and grid spacings (against the files' own coordinates), metrics with units, the water-year
    table, static plots, date and version, method notes."""
    import datetime

    import xarray as xr

    from wbexplore import __version__

    _, raw, text = basin_report
    # grid spacing against the product file's own coordinates (xarray, numpy diff)
    with xr.open_dataset(demo_dir / "grids/heron_p_0p25.nc") as g:
        step = float(np.median(np.diff(g["lon"].values)))
    assert (f"Heron reanalysis rain (0.25 deg) [heron]</td><td class='n'>{step:.4g} deg</td><td>month</td>"
            in raw)
    assert "Tansy daily ET (0.25 deg) [tansy]</td><td class='n'>0.25 deg</td><td>day</td>" in raw
    # metrics with plain names and units (wbexplore.names), the selection beside the runner-up
    for label in ("Residual RMSE (mm/month)", "Relative imbalance (%)", "Mean annual residual (mm/year)",
                  "Kling-Gupta efficiency"):
        assert f"<td>{label}</td>" in raw, label
    assert "<td>rel_imbalance</td>" not in raw and "<td>kge</td>" not in raw
    assert "<th>Selection</th><th>Runner-up</th>" in raw
    # the water-year table, in mm/year, flows that do not enter VEL left out
    assert "<h2>Water-year closure</h2>" in raw and "Totals per water year in mm/year" in raw
    assert "<th>Water year</th><th>P</th><th>ET</th><th>Q</th><th>dS</th><th>Residual</th>" in raw
    # static plots: no toolbar anywhere, four figures
    assert raw.count('"toolbar_location":null') >= 4 and '"toolbar_location":"right"' not in raw
    # date and version, method notes, caution
    today = datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%d")
    assert f"Written {today}" in raw and f"by wbexplore {__version__}" in raw
    assert "Storage change: central difference" in text and "Window-matched fluxes:" in text
    assert "Uncertainty (stated error, else collocation, else product spread" in text and "Used here: P " in text
    assert "<b>Caution.</b>" in raw


@pytest.mark.browser
def test_report_prints_on_one_page(basin_report, report_text, demo_dir, tmp_path, artifacts):
    """Chromium's print-to-PDF (A4) of the basin and the water-body report: one page each, nothing requested
    from outside the file; the pages are also rendered with print media as PNG in artifacts/."""
    import shutil

    from playwright.sync_api import sync_playwright

    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    assert chromium, "Debian's chromium is required (.ci/run installs it)"
    wb = tmp_path / "wb.html"
    wb.write_text(report_text[0], encoding="utf-8")
    # the demo's fullest basin pages: TIR (long verdict and notes) and SAR (two flows: wider tables, longer lines)
    fuller = [(f"report_print_{b}", _write_report(demo_dir, tmp_path / f"{b}.html", b)) for b in ("TIR", "SAR")]
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=chromium, args=["--no-sandbox", "--disable-gpu"])
        try:
            for name, path in (("report_print", basin_report[0]), ("report_print_waterbody", wb), *fuller):
                pg = b.new_page(viewport={"width": 794, "height": 1123})
                requests, errors = [], []
                pg.on("request", lambda r, req=requests: req.append(r.url))
                pg.on("pageerror", lambda e, err=errors: err.append(str(e)))
                pg.goto(path.as_uri())
                pg.wait_for_selector("canvas", timeout=30_000)
                pg.emulate_media(media="print")
                pg.wait_for_timeout(1500)
                pg.screenshot(path=str(artifacts / f"{name}.png"), full_page=True)
                pdf = pg.pdf(format="A4")
                (artifacts / f"{name}.pdf").write_bytes(pdf)
                pages = len(re.findall(rb"/Type\s*/Page(?![a-zA-Z])", pdf))
                assert pages == 1, (name, pages)
                assert [r for r in requests if r != path.as_uri()] == [] and errors == []
                assert pg.locator("canvas").count() >= 4
                pg.close()
        finally:
            b.close()


def test_report_map_colours_by_a_metric_that_compares_across_basins(basin_report):
    """Ranked by RMSE (the default), the report's map colours by KGE like the explorer's (`names.map_metric`; an
    absolute RMSE makes the basins with the smallest flows look best) and says so (`names.map_note`); found by
    review: the report's map kept the best RMSE."""
    from wbexplore.names import map_metric, map_note, metric_name

    _, raw, text = basin_report
    assert map_metric("rmse") == "kge"
    assert f"Basins by best {metric_name('kge')}" in text
    assert f"Basins by best {metric_name('rmse')}" not in text
    assert map_note("rmse").splitlines()[0] in text
