"""Views: the explorer's text panes (summary, warnings) and its plots, drawn by `wbexplore.plots`.

Nothing here computes a balance term: every function takes a `SelectionResult` (or the series)
and formats it. The plots are shared with the HTML report and live in `wbexplore.plots`; the
functions here hand them to a notebook cell as panel panes (a bare bokeh figure in a cell shows
its properties, not the plot): ``views.multi_basin(table)``.
"""

from __future__ import annotations

import numpy as np

from .. import plots
from ..balance.terms import SOURCE_COMPONENTS
from ..balance.uncertainty import band_text
from ..escape import html_text, md_text
from ..names import METRIC_NAMES, metric_name, option_label
from ..plots import COLORS, SEASON_COLORS, UNIT_LABEL

__all__ = ["COLORS", "SEASON_COLORS", "UNIT_LABEL", "balance_scatter", "basin_map", "component_bars",
           "multi_basin", "residual_series", "summary_html", "warnings_for", "warnings_markdown",
           "waterbody_summary_html", "waterbody_warnings_markdown"]

GRAVIMETRY_MIN_KM2 = 200_000  # rule of thumb for satellite-gravimetry storage (e.g. Longuevergne et al. 2010, WRR)


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


def warnings_markdown(result, series, *, notes=()) -> str:
    """`warnings_for` as a Markdown list, then ``notes`` (lines from the state, e.g. why no merged source is
    offered; empty ones left out), each escaped to literal text."""
    lines = [*warnings_for(result, series), *(n for n in notes if n)]
    return "\n".join(f"- {md_text(w)}" for w in lines) or "No warnings for this selection."


def warnings_for(result, series) -> list[str]:
    """Reader-facing warnings for a selection (size vs storage resolution, coverage, gaps). The uncertainty
    messages are left to the summary's one line on the band (`summary_html`)."""
    out = []
    if np.isfinite(result.area_km2) and result.area_km2 < GRAVIMETRY_MIN_KM2:
        out.append(f"Basin area {result.area_km2:,.0f} km2 is below the ~{GRAVIMETRY_MIN_KM2:,} km2 that satellite-"
                   "gravimetry storage resolves (rule of thumb, e.g. Longuevergne et al. 2010): treat dS with care.")
    f = result.frame
    for comp in SOURCE_COMPONENTS:
        vf = f[f"valid_fraction_{comp}"].replace(0, np.nan).mean()
        if np.isfinite(vf) and vf < 0.9:
            out.append(f"{comp} product covers only {vf:.0%} of the basin on average.")
    out.extend(m for m in result.messages if not m.startswith("uncertainty"))
    return out


def summary_html(result, *, metric: str = "rmse") -> str:
    """The selection's metrics as a small HTML table (every text from a file escaped)."""
    m = result.metrics
    sel = result.selection

    def fmt(v, spec):
        return "n/a" if v is None or not np.isfinite(v) else format(v, spec)

    # (metric key, css name kept for scripts and tests, number format); names and units from `wbexplore.names`
    shown = (("rel_imbalance", "relative-imbalance", ".1f"), ("bias", "mean-residual", ".2f"), ("rmse", "RMSE", ".2f"),
             ("kge", "KGE", ".3f"), ("nse", "NSE", ".3f"), ("pbias", "PBIAS", ".1f"))
    rows = [(metric_name(k), css, f"{fmt(m[k], spec)} {METRIC_NAMES[k].units}".strip(), METRIC_NAMES[k].help)
            for k, css, spec in shown]
    rows += [("Valid months", "valid-months", str(m["n_valid"]), METRIC_NAMES["n_valid"].help),
             ("Basin area", "basin-area", f"{result.area_km2:,.0f} km2", "area of the balance unit (ellipsoidal)")]
    cells = "".join(f"<tr title='{html_text(h)}'><td>{html_text(k)}</td><td style='text-align:right'>"
                    f"<b class='wbx-{c}'>{html_text(v)}</b></td></tr>" for k, c, v, h in rows)
    e = html_text  # names and ids come from input files: never markup
    band = (f"<div class='wbx-band'>{e(band_text(result.uncertainty, q_relative_error=result.q_relative_error))}</div>"
            if result.uncertainty else "")
    return (f"<div class='wbx-summary'><h4 style='margin:2px 0'>{e(result.basin_name)} ({e(sel.basin)})</h4>"
            f"<div>{e(sel.P)} / {e(sel.ET)} / {e(sel.TWSA)}, {e(option_label(sel.storage_change).lower())} difference"
            f"{', window-matched' if sel.matched else ''}</div><table>{cells}</table>{band}</div>")


def waterbody_warnings_markdown(result) -> str:
    """A water body's warnings (`plots.waterbody_messages`) as a Markdown list, each escaped to literal text."""
    return "\n".join(f"- {md_text(w)}" for w in plots.waterbody_messages(result)) or "No warnings for this selection."


def waterbody_summary_html(result, exchange) -> str:
    """A water body's selection: the unmeasured exchange (mean and standard error, m3/s and hm3/month; positive =
    unmeasured loss) and the closure's spread, as a small HTML table (every text from a file escaped)."""
    m, se, sel = exchange.mean, exchange.standard_error, result.selection

    def fmt(v, spec):
        return "n/a" if v is None or not np.isfinite(v) else format(v, spec)

    rows = [("unmeasured exchange", f"{fmt(m['m3/s'], '.2f')} ± {fmt(se['m3/s'], '.2f')} m3/s"),
            ("per month", f"{fmt(m['hm3'], '.2f')} ± {fmt(se['hm3'], '.2f')} hm3"),
            ("RMSE", f"{fmt(result.metrics['rmse'], '.2f')} mm/month"),
            ("valid months", str(result.metrics["n_valid"])), ("outline area", f"{result.area_km2:,.0f} km2")]
    cells = "".join(f"<tr><td>{k}</td><td style='text-align:right'><b class='wbx-{k.replace(' ', '-')}'>{v}</b></td></tr>"
                    for k, v in rows)
    e = html_text
    return (f"<div class='wbx-summary'><h4 style='margin:2px 0'>{e(result.basin_name)} ({e(sel.basin)}), water body</h4>"
            f"<div>P {e(sel.P)} / E {e(sel.ET)} / storage from levels</div><table>{cells}</table>"
            f"<div><i>{e(plots.EXCHANGE_LABEL)}; ± 1 standard error</i></div></div>")
