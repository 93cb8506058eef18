"""Drawing shared by the explorer and the HTML report: bokeh figures of numbers computed in `balance/`.

Nothing here computes a balance term or holds state: each plot takes a `SelectionResult`, a
per-basin table or basin outlines and draws them. Every plot is a small class that builds its
bokeh figure once, with empty sources, and `update` replaces the sources' data, the title and the
axis labels in place: the explorer keeps one figure per view and session and only sends new
data when the selection changes; the report builds a figure and updates it once.

Drawn with bokeh directly (not through holoviews): opening a served page builds five of these per
visitor, and measured on the demo (median of 5, one session) the holoviews versions cost 0.11 to
0.21 s each against a few milliseconds here (see benchmarks/serve.py).

Colours: the Okabe-Ito colour-blind-safe palette, one fixed colour per component throughout.
Text from files (basin ids and names, source ids) reaches the page only as canvas text, titles
and hover fields, which bokeh escapes; no tooltip uses the ``{safe}`` format.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from .balance.closure import to_unit_system

if TYPE_CHECKING:  # pragma: no cover
    from bokeh.plotting import figure

__all__ = [
    "COLORS",
    "SEASON_COLORS",
    "UNIT_LABEL",
    "BarsPlot",
    "MapPlot",
    "MultiBasinPlot",
    "Outlines",
    "ResidualPlot",
    "ScatterPlot",
    "balance_scatter",
    "basin_map",
    "basin_outlines",
    "component_bars",
    "multi_basin",
    "residual_series",
]

COLORS = {"P": "#0072B2", "ET": "#009E73", "Q": "#56B4E9", "dS": "#CC79A7", "residual": "#D55E00",
          "band": "#E69F00", "gap": "#BBBBBB", "flow": "#999933"}
SEASON_COLORS = {"DJF": "#0072B2", "MAM": "#009E73", "JJA": "#E69F00", "SON": "#CC79A7"}
UNIT_LABEL = {"mm": "mm/month", "m3": "m3/month", "m3/s": "m3/s"}
ERROR_METRICS = ("rmse", "mae", "annual_rmse")  # smaller is better: the map's colours are reversed for them


def _terms(result):
    """The balance terms of a selection result that enter its basin, in the term table's order (older
    results: the base four). A flow that does not enter the basin is 0.0 in every month by the series
    schema (`series.py`): it gets no bar and no place in the axis labels."""
    from .balance.terms import BASE_TERMS

    rows = getattr(result, "terms", None) or BASE_TERMS
    base = {t.name for t in BASE_TERMS}
    f = result.frame
    return tuple(t for t in rows if t.name in base or t.name not in f or f[t.name].fillna(0.0).ne(0.0).any())


def _bar_columns(rows) -> dict:
    """Name, colour and role of one bar per term (in the term table's order), then the residual's."""
    terms = [t.name for t in rows] + ["residual"]
    return {"term": terms, "color": [COLORS.get(k, COLORS["flow"]) for k in terms],
            "role": ["storage" if t.storage else ("inflow" if t.sign > 0 else "outflow") for t in rows]
            + ["imbalance"]}


def _balance_label(result, *, without_q: bool = False) -> str:
    """"P - ET - Q - dS" (+ each flow with its sign), from the term table; without Q for Qhat."""
    from .balance.terms import balance_text

    return balance_text(tuple(t for t in _terms(result) if not (without_q and t.name == "Q")))


def _short(message: str, n: int = 110) -> str:
    return message if len(message) <= n else message[: n - 3] + "..."


def _nodata(result) -> str | None:
    if result.frame["valid"].any():
        return None
    return "No valid month: " + _short(result.messages[0] if result.messages else "nothing to compare")


def _figure(*, width: int | None, height: int, **kw) -> figure:
    """A figure that fills the width of its container (``width=None``) or has a fixed width in pixels.

    Tools are added as instances: with a tool string, bokeh compares every pair of tools property by
    property to drop repeats, which was a third of a figure's cost here (cProfile, the demo page).
    """
    from bokeh.models import BoxZoomTool, PanTool, ResetTool, SaveTool, WheelZoomTool
    from bokeh.plotting import figure

    size = {"sizing_mode": "stretch_width"} if width is None else {"width": width}
    fig = figure(height=height, toolbar_location="right", tools="", **size, **kw)
    fig.add_tools(PanTool(), WheelZoomTool(), BoxZoomTool(), ResetTool(), SaveTool())
    fig.toolbar.logo = None
    return fig


def _add(fig, glyph, source, *, legend=None):
    """Draw `glyph` from `source` (one renderer, returned); `legend`: its entry (text, or ``{"field": name}``).

    Unlike the figure's glyph methods, the renderer's selection, non-selection and muted looks are left
    to bokehjs ("auto") instead of being built as three more glyph models per renderer.
    """
    from bokeh.models import GlyphRenderer, Legend, LegendItem

    r = GlyphRenderer(glyph=glyph, data_source=source)
    fig.renderers.append(r)
    if legend is not None:
        if not fig.legend:
            fig.add_layout(Legend())
        fig.legend[0].items.append(LegendItem(label=legend, renderers=[r]))
    return r


def _zero_line(fig) -> None:
    from bokeh.models import Span

    fig.add_layout(Span(location=0, dimension="width", line_color="black", line_width=1))


class _Plot:
    """One bokeh figure and the sources `update` refills (subclasses build both in `__init__`)."""

    fig: figure

    def __init__(self, *, width: int | None = None, css: str | None = None):
        self._build(width)
        if css:
            self.fig.css_classes = [css]

    def _build(self, width):  # pragma: no cover - abstract
        raise NotImplementedError


class BarsPlot(_Plot):
    """Period means of every balance term (P and inflows in; ET, Q, outflows, dS out) and the residual."""

    def _build(self, width):
        from bokeh.models import ColumnDataSource, HoverTool, VBar

        from .balance.terms import BASE_TERMS

        cols = _bar_columns(BASE_TERMS)
        self.src = ColumnDataSource({**cols, "value": [0.0] * len(cols["term"])})
        self.fig = fig = _figure(width=width, height=280, x_range=list(cols["term"]))
        _add(fig, VBar(x="term", top="value", width=0.8, fill_color={"field": "color"}, line_color=None), self.src)
        _zero_line(fig)
        fig.add_tools(HoverTool(tooltips=[("term", "@term"), ("value", "@value{0.00}"), ("role", "@role")]))
        fig.xgrid.grid_line_color = None

    def update(self, result, unit_system: str = "mm") -> None:
        f = to_unit_system(result.frame, result.area_km2, unit_system)
        ok = result.frame["valid"].values
        cols = _bar_columns(_terms(result))
        terms = cols["term"]
        if list(self.fig.x_range.factors) != terms:  # flows add bars (P and inflows in; ET, Q, outflows out)
            self.fig.x_range.factors = terms
        self.src.data = {**cols, "value": [float(f.loc[ok, k].mean()) if ok.any() else 0.0 for k in terms]}
        self.fig.yaxis.axis_label = f"mean over valid months ({UNIT_LABEL[unit_system]})"
        self.fig.title.text = _nodata(result) or f"Component means, {result.n_valid} valid months"


def _runs(mask: np.ndarray):
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return []
    splits = np.flatnonzero(np.diff(idx) > 1) + 1
    return [(r[0], r[-1]) for r in np.split(idx, splits)]


class ResidualPlot(_Plot):
    """Residual per month with a +/- 2 sigma band, gaps shaded, months beyond 2 sigma marked."""

    def _build(self, width):
        from bokeh.models import (
            ColumnDataSource,
            HoverTool,
            Line,
            Scatter,
            VArea,
            VStrip,
        )

        empty_t = np.array([], dtype="datetime64[ns]")
        self.src = ColumnDataSource({"month": empty_t, "residual": [], "lo": [], "hi": []})
        self.flag = ColumnDataSource({"month": empty_t, "residual": []})
        self.gaps = ColumnDataSource({"x0": empty_t, "x1": empty_t})
        self.fig = fig = _figure(width=width, height=300, x_axis_type="datetime")
        _add(fig, VStrip(x0="x0", x1="x1", fill_color=COLORS["gap"], fill_alpha=0.45, line_width=0), self.gaps)
        _add(fig, VArea(x="month", y1="lo", y2="hi", fill_color=COLORS["band"], fill_alpha=0.3), self.src,
             legend="± 2 sigma")
        line = _add(fig, Line(x="month", y="residual", line_color=COLORS["residual"], line_width=2), self.src,
                    legend="residual")
        _add(fig, Scatter(x="month", y="residual", marker="x", size=9, line_width=2, line_color="black"),
             self.flag, legend="beyond 2 sigma")
        _zero_line(fig)
        fig.add_tools(HoverTool(renderers=[line], tooltips=[("month", "@month{%Y-%m}"), ("residual", "@residual{0.00}")],
                                formatters={"@month": "datetime"}))
        fig.xaxis.axis_label = "month"
        fig.legend.location = "top_left"

    def update(self, result, unit_system: str = "mm") -> None:
        f = to_unit_system(result.frame, result.area_km2, unit_system)
        t = pd.DatetimeIndex(f.index).values
        r = f["residual"].values
        s = f["sigma_residual"].values
        self.src.data = {"month": t, "residual": r, "lo": r - 2 * s, "hi": r + 2 * s}
        flag = result.frame["beyond_2sigma"].values.astype(bool)
        self.flag.data = {"month": t[flag], "residual": r[flag]}
        half = np.timedelta64(15, "D")
        runs = _runs(~result.frame["valid"].values)
        self.gaps.data = {"x0": np.array([t[a] - half for a, _ in runs], dtype="datetime64[ns]"),
                          "x1": np.array([t[b] + half for _, b in runs], dtype="datetime64[ns]")}
        sel = result.selection
        self.fig.yaxis.axis_label = f"{_balance_label(result)} ({UNIT_LABEL[unit_system]})"
        self.fig.title.text = _nodata(result) or f"Residual, {sel.P} / {sel.ET} / {sel.TWSA} (grey: gaps)"


def _season(month: np.ndarray) -> np.ndarray:
    return np.array(["DJF", "DJF", "MAM", "MAM", "MAM", "JJA", "JJA", "JJA", "SON", "SON", "SON", "DJF"])[month - 1]


class ScatterPlot(_Plot):
    """P - ET - dS against gauged Q: months coloured by season, complete years as large marks, 1:1 line."""

    def _build(self, width):
        from bokeh.models import ColumnDataSource, HoverTool, Line, Scatter
        from bokeh.transform import factor_cmap

        self.pts = ColumnDataSource({"Q": [], "Qhat": [], "season": [], "month": []})
        self.years = ColumnDataSource({"Q": [], "Qhat": [], "year": []})
        self.line = ColumnDataSource({"x": [0.0, 1.0], "y": [0.0, 1.0]})
        self.fig = fig = _figure(width=width, height=320)
        seasons = list(SEASON_COLORS)
        by_season = factor_cmap("season", [SEASON_COLORS[k] for k in seasons], seasons)
        pts = _add(fig, Scatter(x="Q", y="Qhat", size=5, fill_color=by_season, line_color=by_season, fill_alpha=0.8,
                                line_alpha=0.8), self.pts, legend={"field": "season"})
        yrs = _add(fig, Scatter(x="Q", y="Qhat", marker="square", size=11, line_color="black", fill_color="black",
                                fill_alpha=0.15, line_width=1.5), self.years, legend="year (mean month)")
        _add(fig, Line(x="x", y="y", line_color="grey", line_dash="dashed"), self.line, legend="1:1")
        fig.add_tools(HoverTool(renderers=[pts], tooltips=[("month", "@month"), ("season", "@season"),
                                                           ("Q", "@Q{0.00}"), ("Q from the balance", "@Qhat{0.00}")]),
                      HoverTool(renderers=[yrs], tooltips=[("year", "@year"), ("Q", "@Q{0.00}"),
                                                           ("Q from the balance", "@Qhat{0.00}")]))
        fig.legend.location = "bottom_right"

    def update(self, result, unit_system: str = "mm") -> None:
        fr = result.frame
        f = to_unit_system(fr, result.area_km2, unit_system)
        ok = fr["valid"].values
        t = pd.DatetimeIndex(f.index)
        q, qhat = f["Q"].values, f["Qhat"].values
        self.pts.data = {"Q": q[ok], "Qhat": qhat[ok], "season": list(_season(t.month.values)[ok]),
                         "month": [f"{m:%Y-%m}" for m in t[ok]]}
        years = t.year.values
        ann = [(int(y), q[m].mean(), qhat[m].mean()) for y in np.unique(years)
               for m in [years == y] if m.sum() == 12 and ok[m].all()]  # annual totals drawn as their monthly mean
        self.years.data = {"Q": [a[1] for a in ann], "Qhat": [a[2] for a in ann], "year": [str(a[0]) for a in ann]}
        lim = [float(np.nanmin(np.r_[q[ok], qhat[ok]])), float(np.nanmax(np.r_[q[ok], qhat[ok]]))] if ok.any() \
            else [0.0, 1.0]
        self.line.data = {"x": lim, "y": lim}
        unit = UNIT_LABEL[unit_system]
        self.fig.xaxis.axis_label = f"gauged Q ({unit})"
        self.fig.yaxis.axis_label = f"{_balance_label(result, without_q=True)} ({unit})"
        m = result.metrics
        self.fig.title.text = _nodata(result) or (
            f"KGE {m['kge']:.2f}  NSE {m['nse']:.2f}  r {m['r']:.2f}  PBIAS {m['pbias']:.1f}%")


@dataclass(frozen=True)
class Outlines:
    """Basin outlines as coordinate lists, one entry per polygon part (computed once per server).

    xs, ys : exterior ring coordinates in degrees east / north (EPSG:4326), largest basins first so
    that small (nested) ones are drawn on top; basin, name : text of each part's basin;
    area_km2 : the basin's area; drains_to : the id of the basin it is nested in ("" for none).
    """

    xs: tuple
    ys: tuple
    basin: tuple
    name: tuple
    area_km2: tuple
    drains_to: tuple = ()


def basin_outlines(basins) -> Outlines:
    """`Outlines` of a basin GeoDataFrame (EPSG:4326, indexed by basin id, with ``name`` and ``area_km2``,
    and ``drains_to`` where the catalog nests basins); none for ``None`` (series opened without their outlines)."""
    xs, ys, ids, names, areas, down = [], [], [], [], [], []
    if basins is None:
        return Outlines((), (), (), (), (), ())
    for bid, row in basins.sort_values("area_km2", ascending=False).iterrows():
        for g in getattr(row.geometry, "geoms", [row.geometry]):
            x, y = g.exterior.coords.xy
            xs.append(np.asarray(x))
            ys.append(np.asarray(y))
            ids.append(str(bid))
            names.append(str(row["name"]))
            areas.append(float(row["area_km2"]))
            d = row["drains_to"] if "drains_to" in basins.columns else None
            down.append("" if d is None or (isinstance(d, float) and np.isnan(d)) else str(d))
    return Outlines(tuple(xs), tuple(ys), tuple(ids), tuple(names), tuple(areas), tuple(down))


def _best_title(metric: str) -> str:
    """The map legend's title: the plain name of the ranking metric with its units (`wbexplore.names`)."""
    from .names import metric_label

    return f"best {metric_label(metric)}"


class MapPlot(_Plot):
    """Basin outlines on lon/lat axes (no tiles) coloured by their best closure score; the selected one outlined.

    Nesting: a basin that drains into another is outlined dashed, and its hover names the basin it drains to.

    `on_tap(lon, lat)` (explorer) is called with the clicked point in degrees.
    """

    def __init__(self, outlines: Outlines, *, width: int | None = None, css: str | None = None):
        self.outlines = outlines
        super().__init__(width=width, css=css)

    def _build(self, width):
        from bokeh.models import (
            ColorBar,
            ColumnDataSource,
            HoverTool,
            LinearColorMapper,
            Patches,
            TapTool,
        )
        from bokeh.palettes import Viridis256

        o = self.outlines
        down = list(o.drains_to) if len(o.drains_to) == len(o.basin) else [""] * len(o.basin)
        self.src = ColumnDataSource({"xs": list(o.xs), "ys": list(o.ys), "basin": list(o.basin),
                                     "name": list(o.name), "area_km2": list(o.area_km2),
                                     "drains_to": [d or "-" for d in down],
                                     "dash": ["dashed" if d else "solid" for d in down],
                                     "score": [np.nan] * len(o.basin), "lw": [0.8] * len(o.basin)})
        self.mapper = LinearColorMapper(palette=Viridis256, nan_color="#d9d9d9")
        self.fig = fig = _figure(width=width, height=360, match_aspect=True, title="Basins (click to select)")
        outline = Patches(xs="xs", ys="ys", fill_color={"field": "score", "transform": self.mapper},
                          line_color="black", line_width={"field": "lw"}, line_dash={"field": "dash"},
                          fill_alpha=0.85)
        _add(fig, outline, self.src).nonselection_glyph = outline  # a tapped basin does not fade the others
        self.colorbar = ColorBar(color_mapper=self.mapper, title=_best_title("rmse"))
        fig.add_layout(self.colorbar, "right")
        self.hover = HoverTool(tooltips=self._tooltips("rmse"))
        fig.add_tools(self.hover, TapTool())
        fig.xaxis.axis_label = "longitude (deg E)"
        fig.yaxis.axis_label = "latitude (deg N)"

    @staticmethod
    def _tooltips(metric: str) -> list:
        from .names import metric_label

        return [("basin", "@basin"), ("name", "@name"), (f"best {metric_label(metric)}", "@score{0.000}"),
                ("area (km2)", "@area_km2{0,0}"), ("drains to", "@drains_to")]

    def update(self, scores: pd.Series, selected: str | None = None, metric: str = "rmse") -> None:
        from bokeh.palettes import Viridis256

        score = np.array([float(scores.get(b, np.nan)) for b in self.outlines.basin])
        self.src.data = dict(self.src.data, score=score,
                             lw=[3.0 if b == selected else 0.8 for b in self.outlines.basin])
        finite = score[np.isfinite(score)]
        lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
        self.mapper.update(low=lo, high=hi if hi > lo else lo + 1.0,
                           palette=Viridis256[::-1] if metric in ERROR_METRICS else Viridis256)
        self.colorbar.title = _best_title(metric)
        self.hover.tooltips = self._tooltips(metric)


class MultiBasinPlot(_Plot):
    """Long-term P - ET against Q for every basin with the chosen combination (mm/year)."""

    def _build(self, width):
        from bokeh.models import ColumnDataSource, HoverTool, LabelSet, Line, Scatter

        self.src = ColumnDataSource({"Q": [], "P_minus_ET": [], "basin": [], "name": [], "years": []})
        self.line = ColumnDataSource({"x": [0.0, 1.0], "y": [0.0, 1.0]})
        self.fig = fig = _figure(width=width, height=300)
        pts = _add(fig, Scatter(x="Q", y="P_minus_ET", size=10, fill_color=COLORS["P"], line_color=COLORS["P"]),
                   self.src)
        self.labels = LabelSet(x="Q", y="P_minus_ET", text="basin", source=self.src, text_font_size="9pt",
                                y_offset=6, text_align="center")
        fig.add_layout(self.labels)
        _add(fig, Line(x="x", y="y", line_color="grey", line_dash="dashed"), self.line)
        fig.add_tools(HoverTool(renderers=[pts], tooltips=[("basin", "@basin"), ("name", "@name"),
                                                           ("years", "@years"), ("Q", "@Q{0.0}"),
                                                           ("P - ET", "@P_minus_ET{0.0}")]))

    def update(self, table: pd.DataFrame, unit: str = "mm/year") -> None:
        t = table.dropna(subset=["P_minus_ET", "Q"]) if len(table) else table
        top = float(np.nanmax(t[["P_minus_ET", "Q"]].values)) * 1.1 if len(t) else 1.0
        cols = {c: (t[c].values if c in t else []) for c in ("Q", "P_minus_ET", "years")}
        cols.update({c: ([str(v) for v in t[c].values] if c in t else []) for c in ("basin", "name")})
        self.src.data = cols
        self.line.data = {"x": [0.0, top], "y": [0.0, top]}
        self.fig.xaxis.axis_label = f"gauged Q ({unit})"
        self.fig.yaxis.axis_label = f"P - ET ({unit})"
        self.fig.title.text = ("All basins, long-term means (complete years)" if len(t)
                               else "No basin has complete years for this combination")


# One-shot figures (the report, notebooks, tests): build, fill once, return the bokeh figure.
def component_bars(result, unit_system: str = "mm", *, width: int | None = None) -> figure:
    """`BarsPlot` of one selection."""
    p = BarsPlot(width=width)
    p.update(result, unit_system)
    return p.fig


def residual_series(result, unit_system: str = "mm", *, width: int | None = None) -> figure:
    """`ResidualPlot` of one selection."""
    p = ResidualPlot(width=width)
    p.update(result, unit_system)
    return p.fig


def balance_scatter(result, unit_system: str = "mm", *, width: int | None = None) -> figure:
    """`ScatterPlot` of one selection."""
    p = ScatterPlot(width=width)
    p.update(result, unit_system)
    return p.fig


def basin_map(basins, scores: pd.Series, selected: str | None = None, metric: str = "rmse", *,
              width: int | None = None, title: str | None = None) -> figure:
    """`MapPlot` of a basin GeoDataFrame coloured by `scores` (best `metric` per basin id)."""
    p = MapPlot(basin_outlines(basins), width=width)
    p.update(scores, selected, metric)
    if title:
        p.fig.title.text = title
    return p.fig


def multi_basin(table: pd.DataFrame, unit: str = "mm/year", *, width: int | None = None) -> figure:
    """`MultiBasinPlot` of a `long_term_all` table."""
    p = MultiBasinPlot(width=width)
    p.update(table, unit)
    return p.fig
