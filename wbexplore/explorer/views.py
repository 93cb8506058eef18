"""Views: the explorer's text panes (summary, warnings) and its plots, drawn by `wbexplore.plots`.

Nothing here computes a balance term. The texts (summary, warnings) are shared with the HTML report and
live in `wbexplore.texts`, the plots in `wbexplore.plots` (the report never imports the explorer); they
are re-exported here. The functions here hand the plots to a notebook cell as panel panes (a bare bokeh
figure in a cell shows its properties, not the plot): ``views.multi_basin(table)``.
"""

from __future__ import annotations

from .. import plots
from ..balance.cautions import GRAVIMETRY_MIN_KM2
from ..plots import COLORS, SEASON_COLORS, UNIT_LABEL
from ..texts import (
    summary_html,
    warnings_for,
    warnings_markdown,
    waterbody_summary_html,
    waterbody_warnings_markdown,
)

__all__ = ["COLORS", "GRAVIMETRY_MIN_KM2", "SEASON_COLORS", "UNIT_LABEL", "balance_scatter", "basin_map", "component_bars",
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
