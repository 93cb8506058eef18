"""Views: pure drawing functions (holoviews, bokeh backend) of numbers computed in `balance/`.

Nothing here computes a balance term: every function takes a `SelectionResult`, a ranking
table or a per-basin table and draws it. Colours: the Okabe-Ito colour-blind-safe palette,
one fixed colour per component throughout.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..balance.closure import to_unit_system
from ..balance.terms import BASE_TERMS, SOURCE_COMPONENTS, balance_text
from ..escape import html_text, md_text

if TYPE_CHECKING:  # pragma: no cover
    import holoviews as hv

__all__ = ["COLORS", "SEASON_COLORS", "UNIT_LABEL", "component_bars", "residual_series", "balance_scatter",
           "basin_map", "multi_basin", "summary_html", "warnings_for", "warnings_markdown", "explain"]

COLORS = {"P": "#0072B2", "ET": "#009E73", "Q": "#56B4E9", "dS": "#CC79A7", "residual": "#D55E00",
          "band": "#E69F00", "gap": "#BBBBBB",
          "flow": "#999933"}
SEASON_COLORS = {"DJF": "#0072B2", "MAM": "#009E73", "JJA": "#E69F00", "SON": "#CC79A7"}
UNIT_LABEL = {"mm": "mm/month", "m3": "m3/month", "m3/s": "m3/s"}
GRAVIMETRY_MIN_KM2 = 200_000  # rule of thumb for satellite-gravimetry storage (e.g. Longuevergne et al. 2010, WRR)


def _hv():
    import holoviews as hv

    if not hv.Store.current_backend or "bokeh" not in hv.Store.renderers:
        hv.extension("bokeh", logo=False)
    return hv


def _short(message: str, n: int = 110) -> str:
    return message if len(message) <= n else message[: n - 3] + "..."


def explain(message: str, *, title: str = ""):
    """A standalone placeholder that says why there is nothing to draw."""
    hv = _hv()
    return hv.Text(0.5, 0.5, message).opts(xaxis=None, yaxis=None, toolbar=None, responsive=True, height=260,
                                            title=title, fontsize={"text": 11}, show_frame=False)


def _nodata(result) -> str | None:
    if result.frame["valid"].any():
        return None
    return "No valid month: " + _short(result.messages[0] if result.messages else "nothing to compare")


# Every view returns the same element structure with or without data (an empty frame carries the
# explanation in its title), so the explorer can update them in place as DynamicMaps.


def _terms(result):
    """The balance's terms of a selection result (older results: the four base terms)."""
    return getattr(result, "terms", None) or BASE_TERMS


def component_bars(result, unit_system: str = "mm"):
    """Period means of every balance term (P and inflows in; ET, Q, outflows, dS out) and the residual."""
    hv = _hv()
    f = to_unit_system(result.frame, result.area_km2, unit_system)
    ok = result.frame["valid"].values
    rows = _terms(result)
    terms = [t.name for t in rows] + ["residual"]
    roles = ["storage" if t.storage else ("inflow" if t.sign > 0 else "outflow") for t in rows] + ["imbalance"]
    vals = [float(f.loc[ok, k].mean()) if ok.any() else 0.0 for k in terms]
    df = pd.DataFrame({"term": terms, "value": vals, "color": [COLORS.get(k, COLORS["flow"]) for k in terms],
                       "role": roles})
    unit = UNIT_LABEL[unit_system]
    msg = _nodata(result)
    bars = hv.Bars(df, kdims=["term"], vdims=["value", "color", "role"]).opts(
        color="color", responsive=True, height=280, framewise=True,
        ylabel=f"mean over valid months ({unit})", xlabel="", tools=["hover"], line_color=None)
    return (bars * hv.HLine(0).opts(color="black", line_width=1)).opts(
        title=msg or f"Component means, {result.n_valid} valid months")


def _runs(mask: np.ndarray):
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return []
    splits = np.flatnonzero(np.diff(idx) > 1) + 1
    return [(r[0], r[-1]) for r in np.split(idx, splits)]


def residual_series(result, unit_system: str = "mm"):
    """Residual per month with a +/- 2 sigma band, gaps shaded, months beyond 2 sigma marked."""
    hv = _hv()
    f = to_unit_system(result.frame, result.area_km2, unit_system)
    t = pd.DatetimeIndex(f.index)
    unit = UNIT_LABEL[unit_system]
    r = f["residual"].values
    s = f["sigma_residual"].values
    df = pd.DataFrame({"month": t, "residual": r, "lo": r - 2 * s, "hi": r + 2 * s})
    band = hv.Area(df, "month", ["lo", "hi"], label="± 2 sigma").opts(color=COLORS["band"], alpha=0.3,
                                                                      line_width=0, framewise=True)
    curve = hv.Curve(df, "month", "residual", label="residual").opts(color=COLORS["residual"], line_width=2,
                                                                      tools=["hover"], framewise=True)
    flag = result.frame["beyond_2sigma"].values
    pts = hv.Scatter(df[flag], "month", "residual", label="beyond 2 sigma").opts(
        color="black", marker="x", size=9, line_width=2, framewise=True)
    gaps = ~result.frame["valid"].values
    spans = pd.DataFrame([(t[a] - pd.Timedelta(days=15), t[b] + pd.Timedelta(days=15)) for a, b in _runs(gaps)],
                         columns=["x0", "x1"])
    if spans.empty:
        spans = pd.DataFrame({"x0": pd.to_datetime([]), "x1": pd.to_datetime([])})
    vsp = hv.VSpans(spans, kdims=["x0", "x1"]).opts(color=COLORS["gap"], alpha=0.45, line_width=0,
                                                    framewise=True)
    sel = result.selection
    msg = _nodata(result)
    overlay = vsp * band * curve * pts * hv.HLine(0).opts(color="black", line_width=1)
    return overlay.opts(responsive=True, height=300, ylabel=f"{balance_text(_terms(result))} ({unit})",
                        xlabel="month", title=msg or f"Residual, {sel.P} / {sel.ET} / {sel.TWSA} (grey: gaps)",
                        legend_position="top_left", show_grid=True)


def _season(month: np.ndarray) -> np.ndarray:
    return np.array(["DJF", "DJF", "MAM", "MAM", "MAM", "JJA", "JJA", "JJA", "SON", "SON", "SON", "DJF"])[month - 1]


def balance_scatter(result, unit_system: str = "mm"):
    """P - ET - dS against gauged Q: months coloured by season, complete years as large marks, 1:1 line."""
    hv = _hv()
    fr = result.frame
    f = to_unit_system(fr, result.area_km2, unit_system)
    ok = fr["valid"].values
    t = pd.DatetimeIndex(f.index)
    df = pd.DataFrame({"Q": f["Q"].values, "Qhat": f["Qhat"].values, "season": _season(t.month.values),
                       "month": [f"{m:%Y-%m}" for m in t]})[ok]
    unit = UNIT_LABEL[unit_system]
    pts = hv.Scatter(df, "Q", ["Qhat", "season", "month"]).opts(
        color="season", cmap=SEASON_COLORS, size=5, alpha=0.8, tools=["hover"], legend_position="bottom_right",
        framewise=True)
    years = t.year.values
    ann = []
    for y in np.unique(years):
        m = years == y
        if m.sum() == 12 and ok[m].all():
            ann.append((y, f["Q"].values[m].mean(), f["Qhat"].values[m].mean()))
    a = pd.DataFrame(ann, columns=["year", "Q", "Qhat"])  # annual totals drawn as their monthly mean
    yr = hv.Scatter(a, "Q", ["Qhat", "year"], label="year (mean month)").opts(
        color="black", marker="square", size=11, fill_alpha=0.15, line_width=1.5, tools=["hover"], framewise=True)
    vals = df[["Q", "Qhat"]].values
    lim = [float(np.nanmin(vals)), float(np.nanmax(vals))] if len(df) else [0.0, 1.0]
    line = hv.Curve([(lim[0], lim[0]), (lim[1], lim[1])], label="1:1").opts(color="grey", line_dash="dashed",
                                                                             framewise=True)
    m = result.metrics
    msg = _nodata(result)
    title = msg or f"KGE {m['kge']:.2f}  NSE {m['nse']:.2f}  r {m['r']:.2f}  PBIAS {m['pbias']:.1f}%"
    return (pts * yr * line).opts(responsive=True, height=320, xlabel=f"gauged Q ({unit})",
                                  ylabel=f"{balance_text(tuple(t for t in _terms(result) if t.name != 'Q'))} ({unit})", title=title, show_grid=True)


def basin_map(basins, scores: pd.Series, selected: str | None = None, metric: str = "rmse"):
    """Basin outlines on lon/lat axes (no tiles) coloured by their best closure score; the selected one outlined."""
    hv = _hv()
    polys = []
    order = basins.sort_values("area_km2", ascending=False)  # small (nested) basins drawn last, on top
    for bid, row in order.iterrows():
        geoms = getattr(row.geometry, "geoms", [row.geometry])
        for g in geoms:
            x, y = g.exterior.coords.xy
            polys.append({"x": np.asarray(x), "y": np.asarray(y), "basin": str(bid), "name": row["name"],
                          "score": float(scores.get(bid, np.nan)), "area_km2": float(row["area_km2"]),
                          "lw": 3.0 if str(bid) == selected else 0.8})
    p = hv.Polygons(polys, vdims=["score", "basin", "name", "area_km2", "lw"]).opts(
        color="score", cmap="viridis_r" if metric in ("rmse", "mae", "annual_rmse") else "viridis",
        colorbar=True, clabel=f"best {metric}", line_color="black", line_width="lw", alpha=0.85,
        tools=["hover", "tap"], responsive=True, height=360, xlabel="longitude (deg E)",
        ylabel="latitude (deg N)", title="Basins (click to select)", data_aspect=1, nonselection_alpha=0.85)
    return p


def multi_basin(table: pd.DataFrame, unit: str = "mm/year"):
    """Long-term P - ET against Q for every basin with the chosen combination."""
    hv = _hv()
    t = table.dropna(subset=["P_minus_ET", "Q"]) if len(table) else table
    top = float(np.nanmax(t[["P_minus_ET", "Q"]].values)) * 1.1 if len(t) else 1.0
    pts = hv.Scatter(t, "Q", ["P_minus_ET", "basin", "name", "years"]).opts(
        size=10, color=COLORS["P"], tools=["hover"], framewise=True)
    labels = hv.Labels(t, ["Q", "P_minus_ET"], "basin").opts(text_font_size="9pt", yoffset=top * 0.03,
                                                             framewise=True)
    line = hv.Curve([(0.0, 0.0), (top, top)]).opts(color="grey", line_dash="dashed", framewise=True)
    title = ("All basins, long-term means (complete years)" if len(t)
             else "No basin has complete years for this combination")
    return (pts * labels * line).opts(responsive=True, height=300, xlabel=f"gauged Q ({unit})",
                                      ylabel=f"P - ET ({unit})", title=title, show_grid=True)


def warnings_markdown(result, series) -> str:
    """`warnings_for` as a Markdown list, each warning escaped to literal text."""
    return "\n".join(f"- {md_text(w)}" for w in warnings_for(result, series)) or "No warnings for this selection."


def warnings_for(result, series) -> list[str]:
    """Reader-facing warnings for a selection (size vs storage resolution, coverage, gaps)."""
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

    rows = [("relative imbalance", f"{fmt(m['rel_imbalance'], '.1f')} %"),
            ("mean residual", f"{fmt(m['bias'], '.2f')} mm/month"),
            ("RMSE", f"{fmt(m['rmse'], '.2f')} mm/month"),
            ("KGE", fmt(m["kge"], ".3f")), ("NSE", fmt(m["nse"], ".3f")),
            ("valid months", str(m["n_valid"])), ("basin area", f"{result.area_km2:,.0f} km2")]
    cells = "".join(f"<tr><td>{k}</td><td style='text-align:right'><b class='wbx-{k.replace(' ', '-')}'>{v}</b></td></tr>"
                    for k, v in rows)
    e = html_text  # names and ids come from input files: never markup
    return (f"<div class='wbx-summary'><h4 style='margin:2px 0'>{e(result.basin_name)} ({e(sel.basin)})</h4>"
            f"<div>{e(sel.P)} / {e(sel.ET)} / {e(sel.TWSA)}, {e(sel.storage_change)} difference"
            f"{', window-matched' if sel.matched else ''}</div><table>{cells}</table></div>")
