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
    "EXCHANGE_LABEL",
    "SEASON_COLORS",
    "UNIT_LABEL",
    "WATERBODY_COLOR",
    "BarsPlot",
    "EstimatePlot",
    "ExchangePlot",
    "LevelVolumePlot",
    "MapPlot",
    "MultiBasinPlot",
    "Outlines",
    "ResidualPlot",
    "ScatterPlot",
    "balance_scatter",
    "basin_map",
    "basin_outlines",
    "component_bars",
    "difference_estimate",
    "disagreement_map",
    "estimate_band_label",
    "estimate_is_merged",
    "estimate_label",
    "exchange_series",
    "level_volume",
    "multi_basin",
    "residual_series",
    "waterbody_messages",
]

COLORS = {"P": "#0072B2", "ET": "#009E73", "Q": "#56B4E9", "dS": "#CC79A7", "residual": "#D55E00",
          "band": "#E69F00", "gap": "#BBBBBB", "flow": "#999933"}
SEASON_COLORS = {"DJF": "#0072B2", "MAM": "#009E73", "JJA": "#E69F00", "SON": "#CC79A7"}
UNIT_LABEL = {"mm": "mm/month", "m3": "m3/month", "m3/s": "m3/s", "hm3": "hm3/month"}
WATERBODY_COLOR = "#56B4E9"  # lakes and reservoirs on the map (Okabe-Ito sky blue), whatever the scores
# a water body's residual r is shown as the unmeasured exchange X = -r (`balance.waterbody.Exchange`)
EXCHANGE_LABEL = "unmeasured exchange (= residual, net unmeasured outflow; positive = unmeasured loss)"


def waterbody_messages(result) -> list[str]:
    """A water body's messages for a reader, without those about metrics against a gauged outlet (a water body has
    none: its views leave those metrics out) and the uncertainty line (shown on its own)."""
    return [m for m in result.messages if not m.startswith("uncertainty") and " undefined: " not in m]


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
        self.band_item = fig.legend[0].items[-1]  # `update` names the band's error source in it
        line = _add(fig, Line(x="month", y="residual", line_color=COLORS["residual"], line_width=2), self.src,
                    legend="residual")
        _add(fig, Scatter(x="month", y="residual", marker="x", size=9, line_width=2, line_color="black"),
             self.flag, legend="beyond 2 sigma")
        _zero_line(fig)
        fig.add_tools(HoverTool(renderers=[line], tooltips=[("month", "@month{%Y-%m}"), ("residual", "@residual{0.00}")],
                                formatters={"@month": "datetime"}))
        fig.xaxis.axis_label = "month"
        fig.legend.location = "top_left"

    def _fill(self, result, f, values) -> None:
        """Refill the sources: ``values`` per month of ``f`` (the frame in the unit system) with its +/- 2 sigma band,
        the months beyond 2 sigma flagged, and the invalid months shaded."""
        t = pd.DatetimeIndex(f.index).values
        s = f["sigma_residual"].values
        self.src.data = {"month": t, "residual": values, "lo": values - 2 * s, "hi": values + 2 * s}
        flag = result.frame["beyond_2sigma"].values.astype(bool)
        self.flag.data = {"month": t[flag], "residual": values[flag]}
        half = np.timedelta64(15, "D")
        runs = _runs(~result.frame["valid"].values)
        self.gaps.data = {"x0": np.array([t[a] - half for a, _ in runs], dtype="datetime64[ns]"),
                          "x1": np.array([t[b] + half for _, b in runs], dtype="datetime64[ns]")}

    def update(self, result, unit_system: str = "mm") -> None:
        f = to_unit_system(result.frame, result.area_km2, unit_system)
        self._fill(result, f, f["residual"].values)
        from bokeh.core.properties import value

        from .balance.uncertainty import legend_text

        # which error the band is made of (stated, collocation, product spread, merge posterior), per component
        self.band_item.label = value(legend_text(result.uncertainty) if result.uncertainty else "± 2 sigma")
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
    label_basin, label_x, label_y : one entry per basin: its id and a point inside the part of it not covered
    by a basin nested in it (degrees; shapely's ``representative_point``, see `_label_points`).
    """

    xs: tuple
    ys: tuple
    basin: tuple
    name: tuple
    area_km2: tuple
    drains_to: tuple = ()
    label_basin: tuple = ()
    label_x: tuple = ()
    label_y: tuple = ()

    def bounds(self) -> tuple[float, float, float, float]:
        """(west, south, east, north) of every part, in degrees; the unit square for no outline."""
        if not self.xs:
            return (0.0, 0.0, 1.0, 1.0)
        x = np.concatenate([np.asarray(a, dtype=float) for a in self.xs])
        y = np.concatenate([np.asarray(a, dtype=float) for a in self.ys])
        return (float(np.nanmin(x)), float(np.nanmin(y)), float(np.nanmax(x)), float(np.nanmax(y)))


def basin_outlines(basins) -> Outlines:
    """`Outlines` of a basin GeoDataFrame (EPSG:4326, indexed by basin id, with ``name`` and ``area_km2``,
    and ``drains_to`` where the catalog nests basins); none for ``None`` (series opened without their outlines)."""
    xs, ys, ids, names, areas, down = [], [], [], [], [], []
    if basins is None:
        return Outlines((), (), (), (), (), ())
    ordered = basins.sort_values("area_km2", ascending=False)
    for bid, row in ordered.iterrows():
        for g in getattr(row.geometry, "geoms", [row.geometry]):
            x, y = g.exterior.coords.xy
            xs.append(np.asarray(x))
            ys.append(np.asarray(y))
            ids.append(str(bid))
            names.append(str(row["name"]))
            areas.append(float(row["area_km2"]))
            d = row["drains_to"] if "drains_to" in basins.columns else None
            down.append("" if d is None or (isinstance(d, float) and np.isnan(d)) else str(d))
    points = _label_points(ordered.geometry)
    return Outlines(tuple(xs), tuple(ys), tuple(ids), tuple(names), tuple(areas), tuple(down),
                    tuple(str(b) for b in ordered.index), tuple(float(p.x) for p in points),
                    tuple(float(p.y) for p in points))


def _label_points(geoms) -> list:
    """A point inside the visible part of each geometry (`geoms` largest first, drawn in that order): the
    geometry minus the later ones drawn over it (nested basins), so that a basin's label does not sit on the
    basin nested in it. The point is shapely's ``polylabel`` of the largest visible part (the point farthest
    from its edges); shapely's ``representative_point`` where that fails (both always inside, unlike a
    centroid; ``representative_point`` alone put a basin's label against the edge of the basin nested in it)."""
    import shapely
    from shapely.ops import polylabel

    arr = np.asarray(geoms.values, dtype=object)
    tree = shapely.STRtree(arr)
    out = []
    for i, g in enumerate(arr):
        over = [arr[j] for j in tree.query(g, predicate="intersects") if j > i]
        visible = shapely.difference(g, shapely.union_all(over)) if over else g
        part = max(getattr(visible, "geoms", [visible]), key=lambda p: p.area) if not visible.is_empty else g
        point = None
        if part.geom_type == "Polygon":  # the point farthest from the part's edges: room for the text
            x0, y0, x1, y1 = part.bounds
            point = polylabel(part, tolerance=max(x1 - x0, y1 - y0) / 100.0)
        out.append(point if point is not None and part.contains(point) else part.representative_point())
    return out


def _best_title(metric: str) -> str:
    """The map legend's title: the plain name of the metric with its units (`wbexplore.names`), and for an
    efficiency which end is best."""
    from .names import metric_label, metric_scale

    extra = " (1 is perfect)" if metric_scale(metric) == "efficiency" else ""
    return f"best {metric_label(metric)} per basin{extra}"


def _map_colours(metric: str, score: np.ndarray) -> dict:
    """Palette and limits of the map's colour scale for `metric` (`wbexplore.names.metric_scale`).

    signed: a diverging palette (brown: the balance gives less water than the gauge carries away, blue-green:
    more, whatever the metric's sign convention) with limits +-max|v|, so that 0 is its pale middle colour;
    efficiency: sequential from -1 to 1 (values below -1 drawn in the lowest colour), 1 the bright end;
    magnitude: sequential from 0 to the largest value, 0 the bright end (magnitudes are >= 0: a scale from the
    smallest value would make a small difference look large).
    """
    from bokeh.palettes import BrBG, Viridis256

    from .names import SIGNED_METRICS, metric_scale

    finite = np.abs(score[np.isfinite(score)])
    top = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
    kind = metric_scale(metric)
    if kind == "signed":
        # BrBG runs from blue-green to brown: brown for "less water" at the negative end of a residual-signed metric
        brbg = tuple(BrBG[11])
        return {"palette": brbg[::-1] if SIGNED_METRICS[metric] > 0 else brbg, "low": -top, "high": top}
    if kind == "efficiency":
        return {"palette": Viridis256, "low": -1.0, "high": 1.0}
    return {"palette": Viridis256[::-1], "low": 0.0, "high": top}


class MapPlot(_Plot):
    """Basin outlines on lon/lat axes (no tiles) coloured by their best closure score; the selected one outlined.

    Each basin carries its id at a point inside it (`Outlines.label_x`, ``label_y``). Nesting: a basin that
    drains into another is outlined dashed, and its hover names the basin it drains to.

    Water bodies (``waterbodies``, their `Outlines`) are drawn on top in one fixed colour (they are not
    scored against basins), outlined and labelled; the selected one (a water-body id as ``selected``) thick.

    Shape: the figure fills its container's width (or ``width`` pixels) at a fixed height; the data ranges are
    computed by bokehjs from the outlines alone (basins and water bodies, plus `MARGIN` of their extent on each
    side) after every layout, widened in one direction so that a kilometre east spans as many pixels as a
    kilometre north at the outlines' middle latitude (``match_aspect`` with ``aspect_scale`` = cos(latitude): a
    degree of longitude is that much shorter than a degree of latitude). Whatever the width, every outline is
    inside the frame and none is squeezed. The colour bar lies under the map, across its width, so that it never
    takes width from a narrow map and its title (the metric and its units) is never cut.

    Colours: `update` says which metric the scores are; the scale follows `wbexplore.names.metric_scale`
    (diverging and symmetric about 0 for signed metrics, 1 best for efficiencies, from 0 for magnitudes).
    Which metric the explorer shows is `wbexplore.names.map_metric` ("Rank by" where it compares across
    basins, else the Kling-Gupta efficiency, explained under the title).

    `on_tap(lon, lat)` (explorer) is called with the clicked point in degrees.
    """

    MARGIN = 0.06  # share of the outlines' extent added on each side (bokeh's range_padding is the total: 2x)

    def __init__(self, outlines: Outlines, *, width: int | None = None, css: str | None = None,
                 waterbodies: Outlines | None = None):
        self.outlines = outlines
        self.waterbodies = waterbodies if waterbodies is not None and len(waterbodies.basin) else None
        super().__init__(width=width, css=css)

    def _build(self, width):
        from bokeh.models import (
            BasicTicker,
            ColorBar,
            ColumnDataSource,
            DataRange1d,
            FixedTicker,
            HoverTool,
            LabelSet,
            LinearColorMapper,
            Patches,
            TapTool,
            Title,
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
        _, south, _, north = self._extent()
        self.fig = fig = _figure(width=width, height=440, match_aspect=True,
                                 aspect_scale=float(np.cos(np.radians((south + north) / 2.0))),
                                 x_range=DataRange1d(range_padding=2 * self.MARGIN),
                                 y_range=DataRange1d(range_padding=2 * self.MARGIN),
                                 title="Basins (click to select)")
        outline = Patches(xs="xs", ys="ys", fill_color={"field": "score", "transform": self.mapper},
                          line_color="black", line_width={"field": "lw"}, line_dash={"field": "dash"},
                          fill_alpha=0.85)
        basins = _add(fig, outline, self.src)
        basins.nonselection_glyph = outline  # a tapped basin does not fade the others
        self.note = Title(text="", text_font_size="9pt", text_font_style="italic", text_color="#444444")
        fig.add_layout(self.note, "above")
        self._tickers = {"efficiency": FixedTicker(ticks=[-1.0, -0.5, 0.0, 0.5, 1.0]), "other": BasicTicker()}
        self.colorbar = ColorBar(color_mapper=self.mapper, title=_best_title("rmse"), orientation="horizontal",
                                 height=12, title_standoff=4, padding=6, ticker=self._tickers["other"])
        fig.add_layout(self.colorbar, "below")
        self.hover = HoverTool(renderers=[basins], tooltips=self._tooltips("rmse"))
        fig.add_tools(self.hover, TapTool())
        fig.xaxis.axis_label = "longitude (deg E)"
        fig.yaxis.axis_label = "latitude (deg N)"
        self.label_src = ColumnDataSource({"x": list(o.label_x), "y": list(o.label_y), "text": list(o.label_basin)})
        self.labels = LabelSet(x="x", y="y", text="text", source=self.label_src, text_font_size="9pt",
                               text_align="center", text_baseline="middle", background_fill_color="white",
                               background_fill_alpha=0.7)
        fig.add_layout(self.labels)
        self.wb_src = None
        ranged = [basins]
        if self.waterbodies is not None:
            ranged.append(self._build_waterbodies(fig))
        fig.x_range.renderers = fig.y_range.renderers = ranged  # the outlines alone set the view

    def _extent(self) -> tuple[float, float, float, float]:
        """(west, south, east, north) of the basins and water bodies, in degrees."""
        boxes = [self.outlines.bounds()] + ([self.waterbodies.bounds()] if self.waterbodies is not None else [])
        if not self.outlines.xs and self.waterbodies is not None:
            boxes = boxes[1:]
        b = np.array(boxes)
        return float(b[:, 0].min()), float(b[:, 1].min()), float(b[:, 2].max()), float(b[:, 3].max())

    def _build_waterbodies(self, fig):
        from bokeh.models import (
            ColumnDataSource,
            HoverTool,
            LabelSet,
            Legend,
            LegendItem,
            Patches,
        )

        w = self.waterbodies
        self.wb_src = ColumnDataSource({"xs": list(w.xs), "ys": list(w.ys), "waterbody": list(w.basin),
                                        "name": list(w.name), "area_km2": list(w.area_km2),
                                        "lw": [1.5] * len(w.basin)})
        lake = Patches(xs="xs", ys="ys", fill_color=WATERBODY_COLOR, fill_alpha=0.9, line_color="black",
                       line_width={"field": "lw"})
        r = _add(fig, lake, self.wb_src)
        r.nonselection_glyph = lake
        # the legend under the map (inside the frame it covered basins at 1024 px)
        fig.add_layout(Legend(items=[LegendItem(label="water body (not scored)", renderers=[r])],
                              orientation="horizontal", location="top_left", border_line_alpha=0.0,
                              padding=2, margin=4, label_text_font_size="9pt"), "below")
        fig.add_tools(HoverTool(renderers=[r], tooltips=[("water body", "@waterbody"), ("name", "@name"),
                                                         ("outline area (km2)", "@area_km2{0,0}")]))
        # a water body is small: its id beside it (to the right of its point), not on top of it
        self.wb_labels = LabelSet(x="x", y="y", text="text", x_offset=6, text_font_size="8pt",
                                  text_baseline="middle", text_color="#1f4e79",
                                  source=ColumnDataSource({"x": list(w.label_x), "y": list(w.label_y),
                                                           "text": list(w.label_basin)}))
        fig.add_layout(self.wb_labels)
        fig.title.text = "Basins and water bodies (click to select)"
        return r

    @staticmethod
    def _tooltips(metric: str) -> list:
        from .names import metric_label

        return [("basin", "@basin"), ("name", "@name"), (f"best {metric_label(metric)}", "@score{0.000}"),
                ("area (km2)", "@area_km2{0,0}"), ("drains to", "@drains_to")]

    def update(self, scores: pd.Series, selected: str | None = None, metric: str = "rmse", *,
               rank_by: str | None = None) -> None:
        """Colour each basin by its score in `scores` (best `metric` per basin id; NaN: grey) and outline
        `selected`; `rank_by`: the ranking's metric, explained on the map when it is not `metric`."""
        from .names import map_note, metric_scale

        score = np.array([float(scores.get(b, np.nan)) for b in self.outlines.basin])
        self.src.data = dict(self.src.data, score=score,
                             lw=[3.0 if b == selected else 0.8 for b in self.outlines.basin])
        if self.wb_src is not None:
            self.wb_src.data = dict(self.wb_src.data,
                                    lw=[4.0 if w == selected else 1.5 for w in self.waterbodies.basin])
        self.mapper.update(**_map_colours(metric, score))
        efficiency = metric_scale(metric) == "efficiency"  # clipped at -1: the tick says so
        self.colorbar.update(title=_best_title(metric), ticker=self._tickers["efficiency" if efficiency else "other"],
                             major_label_overrides={-1.0: "-1 or less"} if efficiency else {})
        self.hover.tooltips = self._tooltips(metric)
        self.note.text = map_note(rank_by) if rank_by is not None and rank_by != metric else ""


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


class ExchangePlot(ResidualPlot):
    """A water body's residual as unmeasured exchange X = residual per month (volume units), +/- 2 sigma band.

    The monthly values come from `wbexplore.balance.waterbody.unmeasured_exchange` (its ``monthly`` table);
    the band is the residual's sigma in the same units. Positive = an unmeasured loss (seepage, abstraction).
    """

    def update(self, result, exchange=None, unit_system: str = "hm3") -> None:
        """Draw ``exchange`` (`unmeasured_exchange` of ``result``; computed here when not given) in
        ``unit_system`` (every unit system is also a column of `Exchange.monthly`)."""
        if exchange is None:
            from .balance.waterbody import unmeasured_exchange

            exchange = unmeasured_exchange(result)
        f = to_unit_system(result.frame, result.area_km2, unit_system)
        self._fill(result, f, exchange.monthly[unit_system].reindex(f.index).to_numpy(float))
        s = f["sigma_residual"].values
        from bokeh.core.properties import value

        for item in self.fig.legend[0].items:
            if getattr(item.label, "value", item.label) == "residual":
                item.label = value("unmeasured exchange")  # a bare string would name a data column
        unit = UNIT_LABEL[unit_system]
        self.fig.yaxis.axis_label = f"unmeasured exchange ({unit})"  # the sign convention: in the title
        m, se = exchange.mean, exchange.standard_error
        self.fig.title.text = _nodata(result) or (
            f"Unmeasured exchange (= residual; positive = unmeasured loss): mean {m['m3/s']:.2f} +/- {se['m3/s']:.2f} "
            f"m3/s = {m['hm3']:.2f} +/- {se['hm3']:.2f} hm3/month (+/- 1 standard error)"
            + ("" if np.isfinite(s).any() else "; no 2-sigma band: a term's error is unknown"))


def estimate_is_merged(est) -> bool:
    """Whether the source an estimate by difference is set beside (ET, or TWSA for dS) is a merged source
    (`balance.merge`): it closes the budget by construction."""
    from .balance.engine import is_merged

    src = _own_source(est)
    return src is not None and is_merged(src)


def _own_source(est):
    """The chosen source of the estimated term itself (ET's ET product, dS's TWSA product; None for Q or none chosen)."""
    from .balance.estimate import OWN_COMPONENT

    comp = OWN_COMPONENT[est.term]
    return None if comp is None else getattr(est.selection, comp)


def estimate_label(est) -> str:
    """The chosen product or gauge a `DifferenceEstimate` is drawn beside ("ET product tansy", "gauged Q", "dS of
    TWSA quarry", "merged ET [merged_ET]"), or "" where none was chosen (its ``product`` column is empty)."""
    if est.term == "Q":
        return "gauged Q"
    src = _own_source(est)
    if src is None:
        return ""
    if estimate_is_merged(est):  # not a product: the budget closes on it by construction
        return f"merged {'ET' if est.term == 'ET' else 'dS'} [{src}]"
    return f"ET product {src}" if est.term == "ET" else f"dS of TWSA {src}"


def estimate_band_label(est) -> str:
    """The band's legend: which error each known term carries (`balance.uncertainty.legend_text`), and the gauges'
    (Q, and every flow that enters the balance)."""
    from .balance.uncertainty import legend_text
    from .series import FLOW_PREFIX

    text = legend_text(est.uncertainty) if est.uncertainty else "± 2 sigma"
    gauged = (["Q"] if est.term != "Q" else []) + (["flows"] if FLOW_PREFIX in est.formula else [])
    return text + (f"; {' and '.join(gauged)} ± {est.q_relative_error:.0%} (gauge)" if gauged else "")


class EstimatePlot(_Plot):
    """One balance term estimated by difference from the others (`balance.estimate.DifferenceEstimate`) per month,
    with its +/- 2 standard-error band, beside the chosen product of that term (ET, the storage change of the
    chosen TWSA) or the gauged Q; the legend (under the plot: it covers no data) names each term's error source.

    The band holds the random errors the estimate propagates; a product's bias is not in it (`estimate.NOTE`).
    """

    def _build(self, width):
        from bokeh.models import (
            ColumnDataSource,
            HoverTool,
            Legend,
            LegendItem,
            Line,
            Patches,
        )

        self.src = ColumnDataSource(self._empty())
        self.fig = fig = _figure(width=width, height=300, x_axis_type="datetime")
        # the band as one polygon per run of estimated months: an area over NaN would bridge a gap with a band
        self.band = ColumnDataSource({"xs": [], "ys": []})
        band = _add(fig, Patches(xs="xs", ys="ys", fill_color=COLORS["band"], fill_alpha=0.3, line_width=0), self.band)
        self.line = _add(fig, Line(x="month", y="estimate", line_color=COLORS["residual"], line_width=2), self.src)
        self.prod = _add(fig, Line(x="month", y="product", line_color="black", line_width=1.2, line_dash="dashed"),
                         self.src)
        self.items = [LegendItem(label="± 2 sigma", renderers=[band]), LegendItem(label="estimate", renderers=[self.line]),
                      LegendItem(label="product", renderers=[self.prod])]
        fig.add_layout(Legend(items=self.items, orientation="vertical", location="top_left", border_line_alpha=0.0,
                              padding=2, margin=2, spacing=0, label_text_font_size="9pt"), "below")
        _zero_line(fig)
        self.hover = HoverTool(renderers=[self.line], tooltips=[("month", "@month{%Y-%m}"), ("estimate", "@estimate{0.00}"),
                                                                ("product", "@product{0.00}")],
                               formatters={"@month": "datetime"})
        fig.add_tools(self.hover)
        fig.xaxis.axis_label = "month"

    @staticmethod
    def _empty() -> dict:
        return {"month": np.array([], dtype="datetime64[ns]"), "estimate": [], "lo": [], "hi": [], "product": []}

    def update(self, est, unit_system: str = "mm", *, note: str = "") -> None:
        """Draw ``est`` (a `DifferenceEstimate`; None: an empty plot titled with ``note``, why there is none) in
        ``unit_system`` (`UNIT_LABEL`); the title gives the long-term estimate in mm/year over whole water years."""
        from bokeh.core.properties import value

        if est is None:  # nothing of the last estimate stays on the plot
            self.src.data = self._empty()
            self.band.data = {"xs": [], "ys": []}
            self.prod.visible = False
            for item, text in zip(self.items, ("± 2 sigma", "estimate", "product")):
                item.label = value(text)
            self.fig.yaxis.axis_label = UNIT_LABEL[unit_system]
            self.fig.title.text = _short(f"No estimate by difference: {note}" if note else "No estimate by difference")
            return
        m = est.monthly
        months = pd.DatetimeIndex(m.index)
        # one factor per month turns mm/month into the unit system (the same for the estimate, its error and the
        # product: every conversion is linear in the depth)
        ones = pd.DataFrame({"Q": np.ones(len(months))}, index=months)
        k = to_unit_system(ones, est.area_km2, unit_system)["Q"].to_numpy(float)
        e, se, pr = (m[c].to_numpy(float) * k for c in ("estimate", "standard_error", "product"))
        lo, hi = e - 2 * se, e + 2 * se
        self.src.data = {"month": months.values, "estimate": e, "lo": lo, "hi": hi, "product": pr}
        ms = months.values.astype("datetime64[ms]").astype(np.int64).astype(float)  # bokeh's datetime: ms since 1970
        runs = _runs(np.isfinite(lo) & np.isfinite(hi))
        self.band.data = {"xs": [np.r_[ms[a:b + 1], ms[a:b + 1][::-1]] for a, b in runs],
                          "ys": [np.r_[lo[a:b + 1], hi[a:b + 1][::-1]] for a, b in runs]}
        shown = estimate_label(est)
        self.prod.visible = bool(shown) and bool(np.isfinite(pr).any())
        self.items[0].label = value(estimate_band_label(est))
        self.items[1].label = value(f"{est.formula} (by difference)")
        self.items[2].label = value(shown or "no product chosen")
        self.hover.tooltips = [("month", "@month{%Y-%m}"), (f"{est.term} by difference", "@estimate{0.00}"),
                               ("± 2 sigma", "@lo{0.00} .. @hi{0.00}")] + ([(shown, "@product{0.00}")] if shown else [])
        self.fig.yaxis.axis_label = f"{est.term} ({UNIT_LABEL[unit_system]})"
        lt = est.long_term
        if lt["water_years"]:
            self.fig.title.text = (f"{est.term} by difference: {lt['estimate']:.0f} ± {lt['standard_error']:.0f} "
                                   f"mm/year long-term ({lt['water_years']} water years)")
        else:
            self.fig.title.text = f"{est.term} by difference (no whole water year in the period: no long-term value)"


class LevelVolumePlot(_Plot):
    """A water body's level (m, left axis) and the volume its storage curve gives (hm3, right axis) per month;
    months outside the selected period shaded."""

    def _build(self, width):
        from bokeh.models import (
            ColumnDataSource,
            DataRange1d,
            GlyphRenderer,
            HoverTool,
            LegendItem,
            Line,
            LinearAxis,
            Range1d,
            VStrip,
        )

        empty_t = np.array([], dtype="datetime64[ns]")
        self.src = ColumnDataSource({"month": empty_t, "level": [], "volume": []})
        self.out = ColumnDataSource({"x0": empty_t, "x1": empty_t})
        self.fig = fig = _figure(width=width, height=280, x_axis_type="datetime")
        self.fig.extra_y_ranges = {"volume": Range1d(0.0, 1.0)}
        _add(fig, VStrip(x0="x0", x1="x1", fill_color=COLORS["gap"], fill_alpha=0.3, line_width=0), self.out)
        lvl = _add(fig, Line(x="month", y="level", line_color=COLORS["P"], line_width=2), self.src,
                   legend="level (m)")
        fig.y_range = DataRange1d(renderers=[lvl])  # the left axis spans the levels only (volumes: right axis)
        vol = GlyphRenderer(glyph=Line(x="month", y="volume", line_color=COLORS["dS"], line_width=2,
                                       line_dash="dashed"), data_source=self.src, y_range_name="volume")
        fig.renderers.append(vol)
        fig.legend[0].items.append(LegendItem(label="volume (hm3)", renderers=[vol]))
        fig.add_layout(LinearAxis(y_range_name="volume", axis_label="volume (hm3)"), "right")
        fig.add_tools(HoverTool(renderers=[lvl], tooltips=[("month", "@month{%Y-%m}"), ("level (m)", "@level{0.00}"),
                                                          ("volume (hm3)", "@volume{0,0.0}")],
                                formatters={"@month": "datetime"}))
        fig.yaxis[0].axis_label = "level (m)"
        fig.xaxis.axis_label = "month"
        fig.legend.location = "top_left"

    def update(self, levels, *, start=None, end=None, name: str = "") -> None:
        """``levels``: one water body of `wbexplore.pipeline.waterbody_series` (``level`` in m, ``volume`` in m3,
        over ``time``); ``start``, ``end``: the selected period ("YYYY-MM"), shaded outside."""
        t = pd.DatetimeIndex(levels["time"].values)
        level = np.asarray(levels["level"].values, dtype=float)
        vol_hm3 = np.asarray(levels["volume"].values, dtype=float) / 1e6  # m3 -> hm3 (1 hm3 = 1e6 m3)
        self.src.data = {"month": t.values, "level": level, "volume": vol_hm3}
        ok = np.isfinite(vol_hm3)
        lo, hi = (float(vol_hm3[ok].min()), float(vol_hm3[ok].max())) if ok.any() else (0.0, 1.0)
        pad = 0.05 * (hi - lo) if hi > lo else 1.0
        self.fig.extra_y_ranges["volume"].update(start=lo - pad, end=hi + pad)
        x0, x1 = [], []
        if start and t.size and pd.Timestamp(start) > t[0]:
            x0.append(t[0].to_datetime64())
            x1.append(pd.Timestamp(start).to_datetime64())
        if end and t.size and pd.Timestamp(end) < t[-1]:
            x0.append((pd.Timestamp(end) + pd.offsets.MonthBegin(1)).to_datetime64())
            x1.append(t[-1].to_datetime64())
        self.out.data = {"x0": np.array(x0, dtype="datetime64[ns]"), "x1": np.array(x1, dtype="datetime64[ns]")}
        what = f"{name}: " if name else ""
        self.fig.title.text = f"{what}level and volume (grey: outside the period)"


def _cell_patches(cm, values) -> dict:
    """Columns of a Patches source for the touched cells of a `CellMeans`: corners, value, coverage."""
    t = cm.touched
    lon, lat = cm.lon[t], cm.lat[t]
    cov = cm.coverage[t]
    return {"xs": [list(r) for r in lon], "ys": [list(r) for r in lat], "value": values[t].astype(float),
            "mean": cm.mean[t].astype(float), "coverage_pct": 100.0 * cov, "months": cm.months[t].astype(int),
            # fully covered cells opaque, a cell 10% inside the basin faint: alpha by coverage fraction
            "alpha": 0.25 + 0.7 * cov}


def disagreement_map(cells: dict, outlines: Outlines | None = None, *, basin: str, component: str,
                     labels: dict | None = None, panel_width: int = 240, height: int = 240):
    """Where the products of one component disagree in one basin: per product, its long-term mean in each
    cell (top row, one colour scale shared by all products) and its difference from the mean of the other
    products (bottom row, a diverging scale centred on zero, symmetric), over the basin outline.

    Each cell's opacity is its coverage fraction of the basin (a cell half inside is half transparent);
    hover shows the value, the coverage in percent and the months behind the mean.

    Parameters
    ----------
    cells : dict
        Product id -> `wbexplore.spatial.cells.CellMeans` of ``basin`` (products of other components are
        left out), e.g. ``load_cell_means(catalog)[basin]``.
    outlines : Outlines, optional
        Basin outlines (`basin_outlines`); ``basin``'s parts are drawn.
    basin, component : str
        The basin id and the component (P, ET or TWSA).
    labels : dict, optional
        Product id -> display label (default: the id).
    panel_width, height : int
        Size of each panel in pixels.

    Returns
    -------
    bokeh.models.GridPlot
        Two rows of one panel per product (``len(children) == 2 * products``); a one-line text (a ``Div``)
        when the component has no product with cell means, or is the storage (TWSA anomalies are each about
        their own baseline: their long-term means do not compare).
    """
    from bokeh.layouts import gridplot
    from bokeh.models import (
        ColorBar,
        ColumnDataSource,
        Div,
        HoverTool,
        LinearColorMapper,
        Patches,
    )
    from bokeh.palettes import RdBu11, Viridis256

    from .balance.terms import DS
    from .names import TERM_NAMES, term_units
    from .spatial.cells import difference_from_others

    chosen = {s: cm for s, cm in cells.items() if cm.component == component}
    name = TERM_NAMES[component].name if component in TERM_NAMES else component
    units = term_units(component)
    if not chosen:
        return Div(text=f"No {name} product has cell means for basin {basin}.")
    if component == DS.component:
        # storage anomalies are each about their own product's baseline period (and a gap moves a mean): two
        # products' long-term means differ by those choices, not by water, so a map of their differences would
        # show a disagreement that is not there. The balance uses their month-to-month differences (dS).
        return Div(text=f"{name} products are not mapped against each other: each is an anomaly about its own "
                        "baseline period, so their long-term means differ by that choice (and by gaps), not by "
                        "water. The balance uses their month-to-month differences (storage change), which the "
                        "residual and ranking compare.")
    labels = labels or {}
    diffs = difference_from_others(chosen)
    finite = np.concatenate([cm.mean[cm.touched] for cm in chosen.values()])
    finite = finite[np.isfinite(finite)]
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    mean_mapper = LinearColorMapper(palette=Viridis256, low=lo, high=hi if hi > lo else lo + 1.0,
                                    nan_color="#d9d9d9")
    dvals = np.concatenate([d[chosen[s].touched] for s, d in diffs.items()])
    m = float(np.nanmax(np.abs(dvals))) if np.isfinite(dvals).any() else 1.0
    m = m if m > 0 else 1.0
    # bokeh's RdBu11 runs from dark blue to dark red: reversed, so that the low end (a product with less than the
    # others) is red and the high end (more) blue
    diff_mapper = LinearColorMapper(palette=list(RdBu11)[::-1], low=-m, high=m, nan_color="#d9d9d9")
    if outlines is not None:
        parts = [i for i, b in enumerate(outlines.basin) if b == basin]
        o_xs = [list(outlines.xs[i]) for i in parts]
        o_ys = [list(outlines.ys[i]) for i in parts]
    else:
        o_xs = o_ys = []
    top, bottom = [], []
    x_range = y_range = None
    for row, mapper, what in ((top, mean_mapper, "mean"), (bottom, diff_mapper, "difference")):
        for s, cm in chosen.items():
            label = labels.get(s, s)
            label = label if len(label) <= 12 else s  # a panel is 240 px: longer titles were cut off
            values = cm.mean if what == "mean" else diffs[s]
            title = (f"{label}: mean {cm.period[0]}..{cm.period[1]}" if what == "mean"
                     else f"{label} minus others' mean")
            kw = {"x_range": x_range, "y_range": y_range} if x_range is not None else {}
            fig = _figure(width=panel_width, height=height, match_aspect=True, title=title, **kw)
            x_range, y_range = fig.x_range, fig.y_range
            src = ColumnDataSource(_cell_patches(cm, values))
            glyph = Patches(xs="xs", ys="ys", fill_color={"field": "value", "transform": mapper},
                            fill_alpha={"field": "alpha"}, line_color="white", line_width=0.3)
            r = _add(fig, glyph, src)
            if o_xs:
                fig.patches(o_xs, o_ys, fill_alpha=0.0, line_color="black", line_width=2)
            value_name = (f"{name} mean ({units})" if what == "mean"
                          else f"difference from the others ({units})")
            fig.add_tools(HoverTool(renderers=[r], tooltips=[(value_name, "@value{0.0}"),
                                                             (f"product mean ({units})", "@mean{0.0}"),
                                                             ("share of cell in basin (%)", "@coverage_pct{0}"),
                                                             ("months", "@months")]))
            fig.xaxis.axis_label = "longitude (deg E)"
            fig.yaxis.axis_label = "latitude (deg N)"
            row.append(fig)
        # short enough for the panel's height (the bar's title runs along it): "Precipitation (P) long-term mean
        # (mm/month)" was cut off at 240 px; what the colours are is in each panel's title
        title = f"{component} mean ({units})" if what == "mean" else f"difference ({units})"
        row[-1].add_layout(ColorBar(color_mapper=mapper, title=title, width=10, name=f"colorbar {what}"), "right")
        row[-1].width = panel_width + 90
    grid = gridplot([top, bottom], toolbar_location="right", merge_tools=True)
    grid.name = f"disagreement {basin} {component}"
    return grid


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
              width: int | None = None, title: str | None = None, rank_by: str | None = None) -> figure:
    """`MapPlot` of a basin GeoDataFrame coloured by `scores` (best `metric` per basin id; `rank_by`: the
    ranking's metric where it differs, explained on the map)."""
    p = MapPlot(basin_outlines(basins), width=width)
    p.update(scores, selected, metric, rank_by=rank_by)
    if title:
        p.fig.title.text = title
    return p.fig


def multi_basin(table: pd.DataFrame, unit: str = "mm/year", *, width: int | None = None) -> figure:
    """`MultiBasinPlot` of a `long_term_all` table."""
    p = MultiBasinPlot(width=width)
    p.update(table, unit)
    return p.fig


def difference_estimate(est, unit_system: str = "mm", *, width: int | None = None) -> figure:
    """`EstimatePlot` of one `DifferenceEstimate`."""
    p = EstimatePlot(width=width)
    p.update(est, unit_system)
    return p.fig


def exchange_series(result, exchange=None, unit_system: str = "hm3", *, width: int | None = None) -> figure:
    """`ExchangePlot` of one water body's selection."""
    p = ExchangePlot(width=width)
    p.update(result, exchange, unit_system)
    return p.fig


def level_volume(levels, *, start=None, end=None, name: str = "", width: int | None = None) -> figure:
    """`LevelVolumePlot` of one water body (a `wbexplore.pipeline.waterbody_series` selection)."""
    p = LevelVolumePlot(width=width)
    p.update(levels, start=start, end=end, name=name)
    return p.fig
