"""The explorer with water bodies (issue 15), without a browser: the state switches to the water body's series,
the map outlines and picks it, the views show volumes, the unmeasured exchange and the level and volume.

References: the stdlib ``calendar`` (days of each month) for m3/s from hm3 per month; pint for 1 hm3 = 1e6 m3;
shapely for the point inside the reservoir's outline (the catalog's own geometry).
"""

from __future__ import annotations

import calendar
import warnings

import numpy as np
import pytest

WID = "TALV"


@pytest.fixture(scope="module")
def explorer(demo_dir):
    from wbexplore.explorer.app import Explorer, load_state

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # coverage notes of the demo's products
        st = load_state(demo_dir / "catalog.yaml")
        ex = Explorer(st)
        ex.page = ex.panel()
    return ex


def _pane(page, css):
    """The first pane of the page layout carrying ``css`` (panel objects, searched depth first)."""
    stack = [page]
    while stack:
        o = stack.pop(0)
        if css in (getattr(o, "css_classes", None) or []):
            return o
        stack.extend(getattr(o, "objects", []))
    raise LookupError(css)


def test_water_body_is_on_the_map_and_in_the_picker(explorer):
    s = explorer.state
    assert WID in s.param.basin.objects and s.basin != WID
    assert "TALV - Talvaren reservoir" in explorer.w_basin.options
    lake = explorer.wb_outlines
    assert lake is not None and set(lake.basin) == {WID}
    # a click inside the reservoir's outline picks it (it lies inside a basin: the smaller unit wins)
    pt = s.waterbodies.geometry.loc[WID].representative_point()
    assert s.waterbodies.geometry.loc[WID].contains(pt)
    s.basin = "VEL"
    assert s.pick_basin_at(pt.x, pt.y) == WID and s.basin == WID
    s.basin = "VEL"


def test_choosing_the_water_body_switches_series_sources_and_units(explorer):
    from wbexplore.balance import compute_selection

    s, ex = explorer.state, explorer
    s.basin = "VEL"
    s.unit_system = "mm"
    twsa_basin = s.TWSA
    s.basin = WID
    assert s.is_waterbody and s.unit_series() is s.waterbody_series
    assert s.TWSA == "levels" and s.param.TWSA.objects == ["levels"]
    assert ex.w_src["TWSA"].value == "levels" and list(ex.w_src["TWSA"].options.values()) == ["levels"]
    assert s.unit_system == "hm3" and ex.w_units.value == "hm3"  # volume units by default
    res = s.result()
    ref = compute_selection(s.waterbody_series, s.selection())
    np.testing.assert_array_equal(res.frame["residual"].values, ref.frame["residual"].values)
    # the water body's views show, the outlet's (scatter, residual against Q) do not
    assert _pane(ex.page, "wbx-exchange").visible and _pane(ex.page, "wbx-levels").visible
    assert not _pane(ex.page, "wbx-scatter").visible and not _pane(ex.page, "wbx-residual").visible
    # back to a basin: its storage product and mm/month again
    s.basin = "VEL"
    assert s.TWSA == twsa_basin and s.unit_system == "mm" and "levels" not in s.param.TWSA.objects
    assert _pane(ex.page, "wbx-scatter").visible and not _pane(ex.page, "wbx-exchange").visible


def test_water_body_views_volume_exchange_and_levels(explorer):
    import pint

    from wbexplore import plots
    from wbexplore.explorer import views

    s = explorer.state
    s.basin = WID
    ex = s.exchange()
    res = s.result()
    # unmeasured exchange = residual (DESIGN.md); m3/s from hm3 per month with the calendar's days (stdlib)
    months = ex.monthly.index
    days = np.array([calendar.monthrange(m.year, m.month)[1] for m in months])
    per_hm3 = pint.UnitRegistry()("1 hm**3").to("m**3").magnitude
    np.testing.assert_allclose(ex.monthly["m3/s"].values, ex.monthly["hm3"].values * per_hm3 / (days * 86400.0),
                               rtol=1e-12, equal_nan=True)
    np.testing.assert_array_equal(ex.monthly["residual_mm"].values, res.frame["residual"].values)
    # the exchange view draws it (hm3/month) and states the sign; the bars are in hm3/month
    p = plots.ExchangePlot()
    p.update(res, ex, s.unit_system)
    np.testing.assert_array_equal(p.src.data["residual"], ex.monthly["hm3"].values)
    assert "positive = unmeasured loss" in p.fig.title.text and "hm3/month" in p.fig.yaxis.axis_label
    bars = plots.BarsPlot()
    bars.update(res, s.unit_system)
    assert bars.fig.yaxis.axis_label == "mean over valid months (hm3/month)" and "Q" not in bars.src.data["term"]
    # the level and volume of the catalog's levels through the curve
    lv = s.levels()
    assert float(lv["level"].mean()) > 0 and lv["volume"].attrs["units"] == "m3"
    html = views.waterbody_summary_html(res, ex)
    assert "unmeasured exchange" in html and "m3/s" in html and "hm3" in html
    assert "KGE" not in html and "discharge" not in html
    assert "discharge" not in views.waterbody_warnings_markdown(res)
    data = s.view_data()
    assert data["exchange"] is ex and data["levels"] is not None and len(data["multi"])
    s.basin = "VEL"


def test_switch_through_a_rendered_page_keeps_the_water_body_sources(demo_dir):
    """On a rendered page (a bokeh document, as `serve` has) a Select resets a value it does not offer: the
    switch to the reservoir once left the basin's storage product in the state (bug found in the browser)."""
    from bokeh.document import Document

    from wbexplore.explorer.app import Explorer, load_state

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        st = load_state(demo_dir / "catalog.yaml")
    ex = Explorer(st)
    ex.panel().get_root(Document())
    ex.w_basin.value = WID
    assert st.TWSA == "levels" and ex.w_src["TWSA"].value == "levels" and ex.w_units.value == "hm3"
    assert st.result().selection.TWSA == "levels" and st.param.TWSA.objects == ["levels"]
    ex.w_basin.value = "VEL"
    assert st.TWSA != "levels" and st.TWSA in st.param.TWSA.objects and ex.w_units.value == "mm"


def test_ranking_table_of_the_water_body(explorer):
    from wbexplore.balance import rank

    s, ex = explorer.state, explorer
    s.basin = WID
    view = ex._rank_view()
    # the table follows with its columns, each escaped as plain text (tests/test_served.py)
    assert list(ex.table.value.columns) == list(view.columns)
    assert {c: f.get("type") for c, f in ex.table.formatters.items()} == {c: "plaintext" for c in view.columns}
    assert "TWSA" not in view and "kge" not in view and "exchange_m3s" in view
    ref = rank(s.waterbody_series, WID, s.options(), by=s.metric)
    assert list(view["P"]) == list(ref["P"]) and list(view["ET"]) == list(ref["ET"])
    ex.table.value = view
    ex._on_row(type("Click", (), {"row": 1})())  # a click on the second row selects its P and E
    assert (s.P, s.ET, s.TWSA) == (view["P"].iloc[1], view["ET"].iloc[1], "levels")
    s.basin = "VEL"


def test_outlet_views_show_again_after_a_water_body(demo_dir):
    """Basin -> water body -> basin with nothing else changed: the residual and Q scatter show again. panel's
    Bokeh pane, set back to visible (its default), read the figure's own visibility, which it had set to False
    itself, and stayed hidden (found while building the water body's views lazily)."""
    from wbexplore.explorer.app import Explorer, load_state

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        st = load_state(demo_dir / "catalog.yaml")
        ex = Explorer(st)
        page = ex.panel()
    st.basin = "VEL"
    st.basin = WID
    assert not _pane(page, "wbx-scatter").visible and _pane(page, "wbx-exchange").visible
    st.basin = "VEL"
    for css in ("wbx-scatter", "wbx-residual"):
        pane = _pane(page, css)
        assert pane.visible and pane.object.visible, css
    assert not _pane(page, "wbx-exchange").visible and not _pane(page, "wbx-levels").visible
