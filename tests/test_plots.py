"""The explorer's figures (`wbexplore.plots`): built once per session, refilled in place with the engine's numbers.

Reference: `wbexplore.balance.compute_selection` (the engine every number on screen must come from) and
bokeh's own escaping rule for hover fields (values are HTML-escaped unless the ``{safe}`` format is used).
"""

import numpy as np
import pytest


@pytest.fixture
def explorer(demo_series, demo_dir):
    from wbexplore.explorer.app import Explorer
    from wbexplore.explorer.state import ClosureState
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    state = ClosureState(demo_series, basins=load_basins(open_catalog(demo_dir / "catalog.yaml")),
                         catalog_path=str(demo_dir / "catalog.yaml"))
    ex = Explorer(state)
    return ex, ex.panel()


def _figure(layout, css):
    from bokeh.models import Plot

    stack = [layout]
    while stack:
        o = stack.pop()
        if css in (getattr(o, "css_classes", None) or []) and isinstance(getattr(o, "object", None), Plot):
            return o
        stack.extend(getattr(o, "objects", []))
    raise LookupError(css)


def _source(fig, column):
    return next(r.data_source for r in fig.renderers if column in r.data_source.data)


def test_a_change_refills_the_same_figures_with_engine_values(explorer):
    from wbexplore.balance import compute_selection

    ex, page = explorer
    s = ex.state
    panes = {css: _figure(page, css) for css in ("wbx-map", "wbx-bars", "wbx-residual", "wbx-scatter", "wbx-multi")}
    figs = {css: p.object for css, p in panes.items()}
    first, et0 = s.basin, s.ET
    other = next(e for e in s.param.ET.objects if e != s.ET)
    s.ET = other
    assert {css: p.object for css, p in panes.items()} == figs  # same figures: only their data was sent
    ref = compute_selection(s.series, s.selection())
    res = _source(figs["wbx-residual"], "residual").data
    np.testing.assert_array_equal(res["residual"], ref.frame["residual"].values)
    sigma = ref.frame["sigma_residual"].values
    np.testing.assert_allclose(res["hi"] - res["lo"], 4 * sigma, rtol=1e-12)
    bars = _source(figs["wbx-bars"], "value").data
    ok = ref.frame["valid"].values
    # the demo's first basin receives no flow: its bars are the four base terms and the residual
    assert s.basin not in ("SAR", "SAU") and list(bars["term"]) == ["P", "ET", "Q", "dS", "residual"]
    assert figs["wbx-residual"].yaxis[0].axis_label.startswith("P - ET - Q - dS (")  # no flow enters it
    want = [ref.frame.loc[ok, k].mean() for k in ("P", "ET", "Q", "dS", "residual")]
    np.testing.assert_allclose(bars["value"], want, rtol=1e-12)
    # a basin with flows shows them as bars (in: P's side, out: the losses), values from the engine
    s.basin = "SAR"
    ref = compute_selection(s.series, s.selection())
    bars = _source(figs["wbx-bars"], "value").data
    flows = [t for t in bars["term"] if t.startswith("flow_")]
    assert flows and all(t in ref.frame for t in flows)
    ok = ref.frame["valid"].values
    np.testing.assert_allclose(bars["value"], [ref.frame.loc[ok, k].mean() for k in bars["term"]], rtol=1e-12)
    label = figs["wbx-residual"].yaxis[0].axis_label
    assert all(f in label for f in flows)  # the residual's formula names the flows with their signs
    assert other in figs["wbx-residual"].title.text
    pts = _source(figs["wbx-scatter"], "season").data
    np.testing.assert_array_equal(pts["Qhat"], ref.frame["Qhat"].values[ok])
    s.basin, s.ET = first, et0  # the page is shared by the module's tests


def test_map_colours_the_engine_scores_and_outlines_the_basin(explorer):
    """The map shows `names.map_metric` of "Rank by" (KGE for the default RMSE: depths do not compare between
    basins), each basin's value being the engine's best (`balance.combos.best_scores`, called directly)."""
    from wbexplore.balance.combos import best_scores
    from wbexplore.names import map_metric

    ex, page = explorer
    s = ex.state
    fig = _figure(page, "wbx-map").object
    src = _source(fig, "score").data
    assert s.metric == "rmse" and map_metric(s.metric) == "kge"
    scores = best_scores(s.series, s.options(), by="kge")
    np.testing.assert_array_equal(src["score"], [float(scores[b]) for b in src["basin"]])  # NaN: unscored
    s.basin = next(b for b in s.param.basin.objects if b != s.basin)
    src = _source(fig, "score").data
    assert {b for b, w in zip(src["basin"], src["lw"]) if w > 1} == {s.basin}


def test_no_tooltip_renders_markup(explorer):
    from bokeh.models import HoverTool

    _, page = explorer
    for css in ("wbx-map", "wbx-bars", "wbx-residual", "wbx-scatter", "wbx-multi"):
        for tool in _figure(page, css).object.select(type=HoverTool):
            assert "{safe}" not in str(tool.tooltips) and isinstance(tool.tooltips, list)
