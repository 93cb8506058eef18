"""The explorer's shared state without a browser: views' data equal what balance/ computes."""

import warnings

import pandas as pd
import pytest

from wbexplore.balance import Selection, compute_selection, long_term_all, rank
from wbexplore.explorer.state import ClosureState


@pytest.fixture
def state(demo_series, demo_dir):
    from wbexplore.pipeline import load_basins
    from wbexplore.io.catalog import open_catalog

    return ClosureState(demo_series, basins=load_basins(open_catalog(demo_dir / "catalog.yaml")),
                        catalog_path=str(demo_dir / "catalog.yaml"))


def test_initial_selection_is_the_best_combination(state, demo_series):
    r = rank(demo_series, state.basin)
    assert (state.P, state.ET, state.TWSA) == tuple(r.iloc[0][["P", "ET", "TWSA"]])


def test_state_changes_drive_views_data(state, demo_series):
    state.param.update(basin="ZEF", P="plover", ET="sedge", TWSA="cairn", storage_change="backward")
    state.period = ("2003-01", "2017-09")  # months 24 and 200 of the demo
    d = state.view_data()
    sel = Selection("ZEF", "plover", "sedge", "cairn", start="2003-01", end="2017-09", storage_change="backward")
    ref = compute_selection(demo_series, sel)
    pd.testing.assert_frame_equal(d["result"].frame, ref.frame)
    assert d["result"].metrics == ref.metrics
    rr = rank(demo_series, "ZEF", start="2003-01", end="2017-09", storage_change="backward")
    pd.testing.assert_frame_equal(d["ranking"].reset_index(drop=True), rr)
    mb = long_term_all(demo_series, sel)
    pd.testing.assert_frame_equal(d["multi"], mb)
    # map colours: best score per basin under the same options
    assert d["scores"]["ZEF"] == pytest.approx(rr.iloc[0]["rmse"])


def test_switching_sources_never_rereads(state, monkeypatch):
    import wbexplore.io.grids as grids

    def boom(*a, **k):
        raise AssertionError("grid re-read")

    monkeypatch.setattr(grids, "open_source", boom)
    for et in state.param.ET.objects:
        state.ET = et
        state.view_data()


def test_nested_basin_is_clickable(state, demo_dir):
    import geopandas as gpd

    b = gpd.read_file(demo_dir / "basins.geojson").set_index("basin_id")
    pt = b.loc["VEU", "geometry"].representative_point()
    assert state.pick_basin_at(pt.x, pt.y) == "VEU" and state.basin == "VEU"
    outer = b.loc["VEL", "geometry"].difference(b.loc["VEU", "geometry"]).representative_point()
    assert state.pick_basin_at(outer.x, outer.y) == "VEL"
    assert state.pick_basin_at(-50.0, 0.0) is None


def test_no_valid_months_explained(state):
    state.param.update(TWSA="cairn")
    i0 = list(state.months).index(pd.Timestamp("2012-07-01"))
    state.period = (f"{state.months[i0]:%Y-%m}", f"{state.months[i0 + 6]:%Y-%m}")  # inside the cairn gap
    res = state.result()
    assert res.n_valid == 0 and "no month" in res.messages[0]
    from wbexplore.explorer import views

    for fn in (views.component_bars, views.residual_series, views.balance_scatter):
        el = fn(res).object  # same figure as with data, the explanation in the title
        title = el.title.text
        assert title.startswith("No valid month") and "no month" in title
    r = state.ranking()
    assert (~r[r["TWSA"] == "cairn"]["scored"]).all()


def test_bad_catalog_shows_message(tmp_path):
    from wbexplore.explorer.app import explore

    p = tmp_path / "c.yaml"
    p.write_text("catalog_version: 3\nbasins: {path: x, id_field: id}\nsources: []\n")
    page = explore(p)
    text = str(page.objects[1].object)
    assert "version 3" in text and "could not be opened" in text


def test_app_builds_and_row_click_selects(state):
    from wbexplore.explorer.app import Explorer

    ex = Explorer(state)
    ex.panel()
    row = 3
    target = ex.table.value.iloc[row]

    class E:  # the Tabulator click event carries the row index
        pass

    ev = E()
    ev.row = row
    ex._on_row(ev)
    assert (state.P, state.ET, state.TWSA) == (target["P"], target["ET"], target["TWSA"])
    assert ex.w_src["ET"].value == target["ET"]


def test_export_and_report_buttons_write_files(state, tmp_path):
    from wbexplore.explorer.app import Explorer
    from wbexplore.selection import replay

    ex = Explorer(state, export_dir=tmp_path / "out")
    ex._on_export(None)
    ex._on_report(None)
    sel = list((tmp_path / "out").glob("selection_*.yaml"))
    rep = list((tmp_path / "out").glob("report_*.html"))
    assert len(sel) == 1 and len(rep) == 1 and "Wrote" in ex.export_msg.object
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert replay(sel[0])["n_metrics"] > 10
    assert "Screening-level" in rep[0].read_text()


# --------------------------------------------------------------------------- whole | incremental
@pytest.fixture(scope="module")
def demo_incremental(demo_dir):
    from wbexplore.pipeline import CoverageWarning, extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        return extract(demo_dir / "catalog.yaml", incremental=True)


@pytest.fixture
def nested_state(demo_series, demo_incremental, demo_dir):
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    return ClosureState(demo_series, basins=load_basins(open_catalog(demo_dir / "catalog.yaml")),
                        incremental_series=demo_incremental, catalog_path=str(demo_dir / "catalog.yaml"),
                        basin="VEL")


def test_switching_to_the_incremental_unit(nested_state, demo_series, demo_incremental, demo_dir):
    """The switch changes the area and the residual to what `balance` computes over the incremental unit
    (areas: `incremental_basins`, checked against pyproj.Geod in tests/test_demo.py)."""
    from wbexplore.io.basins import incremental_basins
    from wbexplore.io.catalog import open_catalog

    s = nested_state
    assert s.has_incremental and s.upstream_of() == ["VEU"]
    s.param.update(P="heron", ET="tansy", TWSA="quarry")
    whole = s.result()
    s.unit = "incremental"
    inc = s.result()
    units = incremental_basins(open_catalog(demo_dir / "catalog.yaml").basins)
    assert inc.area_km2 == pytest.approx(units.loc["VEL", "area_km2"], rel=1e-9)
    assert whole.area_km2 == pytest.approx(units.loc["VEL", "whole_area_km2"], rel=1e-9)
    ref = compute_selection(demo_incremental, s.selection())
    pd.testing.assert_series_equal(inc.frame["residual"], ref.frame["residual"])
    assert not inc.frame["residual"].equals(whole.frame["residual"])
    pd.testing.assert_frame_equal(s.ranking().reset_index(drop=True), rank(demo_incremental, "VEL", s.options()))
    s.unit = "whole"  # and back: the whole basin's numbers again
    pd.testing.assert_series_equal(s.result().frame["residual"],
                                   compute_selection(demo_series, s.selection()).frame["residual"])


def test_incremental_only_for_basins_with_upstream_basins(nested_state):
    from wbexplore.errors import InputError
    from wbexplore.explorer.app import Explorer

    s = nested_state
    ex = Explorer(s)
    ex.panel()
    assert not ex.w_unit.disabled
    ex.w_unit.value = "incremental"  # the widget writes the state
    assert s.unit == "incremental" and s.unit_series() is s.incremental_series
    s.basin = "VEU"  # innermost: no incremental unit; the switch falls back and is disabled
    assert s.unit == "whole" and ex.w_unit.value == "whole" and ex.w_unit.disabled
    with pytest.raises(InputError, match="'VEU' has no upstream basin"):  # a script is told, not given whole
        s.unit = "incremental"
    assert s.unit == "whole" and s.unit_series() is s.series
    s.basin = "SAR"
    assert not ex.w_unit.disabled
    with pytest.raises(InputError, match="'TIR' has no upstream basin"):
        ClosureState(s.series, incremental_series=s.incremental_series, basin="TIR", unit="incremental")


def test_map_shows_the_nesting(nested_state):
    from wbexplore import plots

    o = plots.basin_outlines(nested_state.basins)
    m = plots.MapPlot(o)
    data = m.src.data
    down = dict(zip(data["basin"], data["drains_to"]))
    dash = dict(zip(data["basin"], data["dash"]))
    assert down["VEU"] == "VEL" and down["SAU"] == "SAR" and down["TIR"] == "-"  # demo.DRAINS_TO
    assert dash["VEU"] == "dashed" and dash["VEL"] == "solid"
    tips = dict(m.fig.select_one({"type": __import__("bokeh.models", fromlist=["HoverTool"]).HoverTool}).tooltips)
    assert tips["drains to"] == "@drains_to"


# --------------------------------------------------------------------------- the notebook's handle (issue 17, item 7)
def test_explore_returns_a_handle_a_next_cell_can_read(demo_dir):
    """`explore()` gives the notebook what is on screen; checked against the plain-script path (`balance/`
    called directly on the same series: common practice, there is no outside reference for a handle)."""
    from wbexplore.explorer.app import Explorer, explore
    from wbexplore.pipeline import load_series

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        app = explore(demo_dir / "catalog.yaml")
        series = load_series(demo_dir / "catalog.yaml")
    assert isinstance(app, Explorer)
    app.state.param.update(basin="ZEF", P="plover", ET="sedge", TWSA="cairn", storage_change="backward")
    app.w_metric.value = "kge"  # a widget of the page, as a click would
    sel = app.selection
    assert (sel.basin, sel.P, sel.ET, sel.TWSA, sel.storage_change) == ("ZEF", "plover", "sedge", "cairn", "backward")
    ref = compute_selection(series, sel)
    pd.testing.assert_frame_equal(app.result, ref.frame)
    want = rank(series, "ZEF", sel.options(), by="kge")
    pd.testing.assert_frame_equal(app.ranking.reset_index(drop=True), want.reset_index(drop=True))
    mine = app.result
    mine["P"] = -1.0  # a copy: the next cell cannot change what the page shows
    assert (app.result["P"] != -1.0).all()


def test_a_new_view_is_one_class_and_follows_only_its_parameters(state):
    """Issue 17 item 2: a plot on the page is a `views.PlotView` subclass; the page redraws it when one of its
    ``deps`` changes and only then, with the state's numbers (the residual plot's columns are the selection's
    residual as `compute_selection` gives it)."""
    import numpy as np

    from wbexplore import plots
    from wbexplore.explorer import views
    from wbexplore.explorer.app import Explorer

    drawn, made = [], []

    class ResidualOnBasin(views.PlotView):
        deps, css = ("basin",), "wbx-test-view"

        def make_plot(self):
            made.append(plots.ResidualPlot())
            return made[-1]

        def draw(self):
            drawn.append(self.state.basin)
            self.plot.update(self.state.result(), self.state.unit_system)

    ex = Explorer(state)
    pane = ex._view(ResidualOnBasin)
    assert pane.css_classes == ["wbx-test-view"] and drawn == [state.basin]
    state.metric = "kge"  # not one of its parameters: no redraw
    assert len(drawn) == 1
    other = next(b for b in state.param.basin.objects if b != state.basin)
    state.basin = other
    assert drawn == [drawn[0], other]
    want = compute_selection(state.unit_series(), state.selection()).frame["residual"].to_numpy()
    assert len(made) == 1 and pane.object is made[0].fig  # one figure, refilled in place
    np.testing.assert_allclose(made[0].src.data["residual"], want)


def test_controls_are_generated_from_the_state_parameters(state):
    """Issue 17 item 2: every parameter of the state shown on the page (precedence >= 0) has a control generated from
    it: its label as the widget's name, its objects as the options (shown under plain names), its value; a widget
    change writes the state and a state change moves the widget (the period as month numbers)."""
    import param

    from wbexplore.explorer.app import CONTROLS, Explorer
    from wbexplore.names import OPTIONS

    shown = [n for n, p in state.param.objects("existing").items()
             if n != "name" and (p.precedence is None or p.precedence >= 0)]
    assert sorted(shown) == sorted(CONTROLS)
    ex = Explorer(state)
    for name in shown:
        p, w = state.param[name], ex.controls[name]
        assert w.name == p.label and f"wbx-{name.replace('_', '-')}" in w.css_classes, name
        if isinstance(p, param.Selector):
            assert list(w.options.values()) == list(p.objects) and w.value == getattr(state, name), name
            if all(v in OPTIONS for v in p.objects):  # the plain names of `names.OPTIONS` ("Central", "mm/month")
                assert list(w.options) == [OPTIONS[v].name for v in p.objects], name
            else:  # ids with names or labels, metric names with units, formulas: never the bare key
                assert all(k != v for k, v in w.options.items()), name
    # both ways, for a selector, the checkbox and the period
    ex.controls["storage_change"].value = "backward"
    assert state.storage_change == "backward"
    state.storage_change = "forward"
    assert ex.controls["storage_change"].value == "forward"
    ex.controls["matched"].value = False
    assert state.matched is False
    state.estimate_term = "dS"
    assert ex.controls["estimate_term"].value == "dS" and "dS = P - ET - Q" in ex.controls["estimate_term"].options
    state.period = ("2005-03", "2010-11")
    assert ex.controls["period"].value == (2005 * 12 + 2, 2010 * 12 + 10)
    with param.edit_constant(ex.controls["period"]):  # as the page sends it when a drag ends
        ex.controls["period"].param.update(value=(2004 * 12, 2006 * 12 + 11),
                                           value_throttled=(2004 * 12, 2006 * 12 + 11))
    assert state.period == ("2004-01", "2006-12")
    # the help: each option's plain help, the chosen metric's (it follows the metric)
    assert "Central: dS = (M[i+1] - M[i-1]) / 2" in ex.controls["storage_change"].description
    state.metric = "kge"
    from wbexplore.names import METRIC_NAMES

    assert ex.controls["metric"].description == METRIC_NAMES["kge"].help
