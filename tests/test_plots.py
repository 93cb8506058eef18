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
    # one bar per term of the term table (the demo's flows add bars even where they are 0), then the residual
    assert list(bars["term"]) == [t.name for t in ref.terms] + ["residual"] and bars["term"][:4] == ["P", "ET", "Q", "dS"]
    want = [ref.frame.loc[ok, k].mean() for k in bars["term"]]
    np.testing.assert_allclose(bars["value"], want, rtol=1e-12)
    assert other in figs["wbx-residual"].title.text
    pts = _source(figs["wbx-scatter"], "season").data
    np.testing.assert_array_equal(pts["Qhat"], ref.frame["Qhat"].values[ok])


def test_map_colours_the_engine_scores_and_outlines_the_basin(explorer):
    ex, page = explorer
    s = ex.state
    fig = _figure(page, "wbx-map").object
    src = _source(fig, "score").data
    scores = s.basin_scores()
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
