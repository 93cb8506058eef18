"""Views: the explorer's text panes (summary, warnings) and its plots, drawn by `wbexplore.plots`.

Each view of the page is a small class: a `PlotView` (which `plots` figure, which state parameters it follows,
``deps``, its CSS class and how it refills the figure from the state, ``draw``) or a `TextView` (``deps``, CSS
class, ``text``). Adding a view to the page is one class here and one line in `Explorer._build_layout`.

Nothing here computes a balance term. The texts (summary, warnings) are shared with the HTML report and
live in `wbexplore.texts`, the plots in `wbexplore.plots` (the report never imports the explorer); they
are re-exported here. The functions here hand the plots to a notebook cell as panel panes (a bare bokeh
figure in a cell shows its properties, not the plot): ``views.multi_basin(table)``.
"""

from __future__ import annotations

from .. import plots
from ..balance.cautions import GRAVIMETRY_MIN_KM2
from ..balance.terms import SOURCE_COMPONENTS
from ..plots import COLORS, SEASON_COLORS, UNIT_LABEL
from ..texts import (
    estimate_html,
    summary_html,
    warnings_for,
    warnings_markdown,
    waterbody_summary_html,
    waterbody_warnings_markdown,
)

__all__ = ["TextView", "SummaryView", "WarningsView", "WaterbodySummaryView", "WaterbodyWarningsView", "PlotView", "BarsView", "ResidualView", "ScatterView", "MultiBasinView", "MapView", "ExchangeView",
           "LevelsView", "EstimateView", "EstimateTextView", "ESTIMATE_DEPS", "DEPS", "SEL_DEPS", "MAP_DEPS", "MULTI_DEPS", "COLORS", "GRAVIMETRY_MIN_KM2", "SEASON_COLORS", "UNIT_LABEL", "balance_scatter", "basin_map", "component_bars",
           "multi_basin", "residual_series", "summary_html", "warnings_for", "warnings_markdown",
           "waterbody_summary_html", "waterbody_warnings_markdown"]


def _pane(fig):
    import panel as pn

    return pn.pane.Bokeh(fig, sizing_mode="stretch_width")


def component_bars(result, unit_system: str = "mm"):
    """`plots.BarsPlot` of one selection, as a panel pane."""
    return _pane(plots.component_bars(result, unit_system))


def residual_series(result, unit_system: str = "mm"):
    """`plots.ResidualPlot` of one selection, as a panel pane."""
    return _pane(plots.residual_series(result, unit_system))


def balance_scatter(result, unit_system: str = "mm"):
    """`plots.ScatterPlot` of one selection, as a panel pane."""
    return _pane(plots.balance_scatter(result, unit_system))


def basin_map(basins, scores, selected: str | None = None, metric: str = "rmse"):
    """`plots.MapPlot` of the basins coloured by their best `metric`, as a panel pane."""
    return _pane(plots.basin_map(basins, scores, selected, metric))


def multi_basin(table, unit: str = "mm/year"):
    """`plots.MultiBasinPlot` of a `long_term_all` table, as a panel pane."""
    return _pane(plots.multi_basin(table, unit))


# --------------------------------------------------------------------------- the page's plots, one class each
# what each kind of view follows (state parameters)
DEPS = ("basin", "unit", *SOURCE_COMPONENTS, "period", "storage_change", "matched", "unit_system", "metric",
        "merge_method")  # the merge variant: a merged source's numbers (a notebook cell may set it)
SEL_DEPS = tuple(d for d in DEPS if d != "metric")  # one selection's views
MAP_DEPS = ("basin", "period", "storage_change", "matched", "metric")  # the basins' best scores
MULTI_DEPS = (*SOURCE_COMPONENTS, "period", "storage_change", "matched", "merge_method")  # every basin, one combination
ESTIMATE_DEPS = (*SEL_DEPS, "estimate_term")  # one selection's estimate by difference


class PlotView:
    """One plot of the page: its `plots` figure is built once per session and `draw` refills its sources in
    place when one of ``deps`` changes (bokeh then sends the new columns, not a new figure).

    A subclass sets ``deps`` and ``css`` and defines ``make_plot`` and ``draw``; `pane` is what the layout holds.
    """

    deps: tuple = SEL_DEPS
    css: str = ""

    def __init__(self, explorer):
        self.explorer = explorer
        self.state = explorer.state
        self.plot = self.make_plot()

    def make_plot(self):
        raise NotImplementedError

    def draw(self) -> None:
        raise NotImplementedError

    def pane(self):
        import panel as pn

        self.plot.fig.css_classes = [self.css]
        self.draw()
        self.state.param.watch(lambda *events: self.draw(), list(self.deps))
        return pn.pane.Bokeh(self.plot.fig, sizing_mode="stretch_width", css_classes=[self.css])


class BarsView(PlotView):
    """Mean of each balance term over the period (`plots.BarsPlot`)."""

    css = "wbx-bars"

    def make_plot(self):
        return plots.BarsPlot()

    def draw(self):
        self.plot.update(self.state.result(), self.state.unit_system)


class ResidualView(BarsView):
    """The monthly residual with its band (`plots.ResidualPlot`)."""

    css = "wbx-residual"

    def make_plot(self):
        return plots.ResidualPlot()


class ScatterView(BarsView):
    """P - ET - dS against gauged Q (`plots.ScatterPlot`)."""

    css = "wbx-scatter"

    def make_plot(self):
        return plots.ScatterPlot()


class MultiBasinView(PlotView):
    """Every basin's long-term balance for the chosen combination (`plots.MultiBasinPlot`)."""

    deps, css = MULTI_DEPS, "wbx-multi"

    def make_plot(self):
        return plots.MultiBasinPlot()

    def draw(self):
        self.plot.update(self.state.multi_basin())


class MapView(PlotView):
    """The basins coloured by their best score (`plots.MapPlot`); a click on a basin selects it. The map's
    metric compares across basins: "Rank by" itself, or KGE explained on the map (`names.map_metric`)."""

    deps, css = MAP_DEPS, "wbx-map"

    def make_plot(self):
        from bokeh.events import Tap

        m = plots.MapPlot(self.explorer.outlines, waterbodies=self.explorer.wb_outlines)
        m.fig.on_event(Tap, lambda ev: self.state.pick_basin_at(ev.x, ev.y))
        return m

    def draw(self):
        from ..names import map_metric

        s = self.state
        shown = map_metric(s.metric)
        self.plot.update(s.basin_scores(shown), s.basin, shown, rank_by=s.metric)


class ExchangeView(PlotView):
    """A water body's residual as unmeasured exchange (`plots.ExchangePlot`); drawn for water bodies only."""

    css = "wbx-exchange"

    def make_plot(self):
        return plots.ExchangePlot()

    def draw(self):
        s = self.state
        if s.is_waterbody:
            self.plot.update(s.result(), s.exchange(), s.unit_system)


class LevelsView(PlotView):
    """A water body's level and volume (`plots.LevelVolumePlot`); drawn where the unit has levels."""

    deps, css = ("basin", "period"), "wbx-levels"

    def make_plot(self):
        return plots.LevelVolumePlot()

    def draw(self):
        s = self.state
        lv = s.levels()
        if lv is not None:
            self.plot.update(lv, start=s.start, end=s.end, name=s.names().get(s.basin, s.basin))


class EstimateView(PlotView):
    """The term chosen in ``estimate_term`` estimated by difference from the others, with its band, beside the
    chosen product or the gauge (`plots.EstimatePlot`); for a basin (a water body's residual is its exchange)."""

    deps, css = ESTIMATE_DEPS, "wbx-estimate-plot"

    def make_plot(self):
        return plots.EstimatePlot()

    def draw(self):
        s = self.state
        if not s.is_waterbody:
            self.plot.update(s.estimate(), s.unit_system, note=s.estimate_note())


# --------------------------------------------------------------------------- the page's texts, one class each
class TextView:
    """A text pane of the page: ``text()`` from the state, redrawn when one of ``deps`` changes (the pane is
    bound to those parameters: they are declared once, here). HTML unless ``markdown``; every text from a
    file is escaped by the functions of `wbexplore.texts` that make it."""

    deps: tuple = SEL_DEPS
    css: tuple = ("wbx-summary-pane",)
    markdown: bool = False
    width: int | None = 260  # px; None: the width of its container

    def __init__(self, explorer):
        self.explorer = explorer
        self.state = explorer.state

    def text(self) -> str:
        raise NotImplementedError

    def pane(self):
        import panel as pn

        bound = pn.bind(lambda *a: self.text(), *[self.state.param[d] for d in self.deps])
        kind = pn.pane.Markdown if self.markdown else pn.pane.HTML
        size = {"sizing_mode": "stretch_width"} if self.width is None else {"width": self.width}
        return kind(bound, css_classes=list(self.css), **size)


class SummaryView(TextView):
    """The summary card: the combination, its metrics (the "Rank by" one first), the uncertainty source."""

    deps = DEPS

    def text(self):
        return summary_html(self.state.result(), metric=self.state.metric)


class WarningsView(TextView):
    """What the analyst should know about this selection (`texts.warnings_for`) and why no merged source is
    offered where there is none."""

    css, markdown = ("wbx-warnings",), True

    def text(self):
        s = self.state
        return warnings_markdown(s.result(), s.unit_series(), notes=[s.merged_note()])


class WaterbodySummaryView(TextView):
    """A water body's summary card (the unmeasured exchange); empty for a basin."""

    css = ("wbx-summary-pane", "wbx-waterbody-summary")

    def text(self):
        s = self.state
        return waterbody_summary_html(s.result(), s.exchange()) if s.is_waterbody else ""


class WaterbodyWarningsView(TextView):
    """A water body's warnings; empty for a basin."""

    css, markdown = ("wbx-warnings",), True

    def text(self):
        s = self.state
        return waterbody_warnings_markdown(s.result()) if s.is_waterbody else ""


class EstimateTextView(TextView):
    """The estimate by difference in words: the long-term value (storage left out), the product or gauge beside
    it over the same years, the error sources and what the standard error leaves out (`texts.estimate_lines`)."""

    deps, css, width = ESTIMATE_DEPS, ("wbx-estimate-text",), None  # under the plot: it leaves the plot the width

    def text(self):
        s = self.state
        return "" if s.is_waterbody else estimate_html(s.estimate(), note=s.estimate_note())
