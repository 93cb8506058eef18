"""The HTML report of a water body (issue 15): no discharge words, the residual as unmeasured exchange, volumes.

References: pint for 1 hm3 = 1e6 m3; the demo reservoir's seepage (invented truth, `wbexplore.demo.SEEPAGE_M3S`)
for the sign and size of the exchange (consistency with the known truth, as in tests/test_demo_reservoir.py).
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


@pytest.fixture(scope="module")
def report_text(demo_dir, tmp_path_factory):
    from wbexplore.cli import main

    out = tmp_path_factory.mktemp("wbreport") / "r.html"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["report", str(demo_dir / "catalog.yaml"), "--basin", WID, "--out", str(out)]) == 0
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
    # a table row per exchange unit, and the ranking carries the exchange columns, not the outlet metrics
    assert "<td>m3/s (mean over the month)</td>" in text and "<th>exchange_hm3</th>" in text
    assert "<th>kge</th>" not in text and "<th>nse</th>" not in text


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
