"""Self-contained HTML report of one selection, to hand over: one A4 page when printed, no network needed.

Top to bottom: a one-sentence verdict (the best-closing combination, by how much, and the runner-up, from
`wbexplore.balance.rank`), the products with their labels and resolutions, the metrics of the selection
beside the runner-up's (plain names and units from `wbexplore.names`), static plots (`wbexplore.plots`, no
toolbar), the water-year closure table (`wbexplore.balance.annual`), the best combinations, warnings, the
caution and the method notes (storage-change method, window matching, uncertainty source), the date and the
wbexplore version. Nothing here computes a balance term; the texts shared with the explorer are
`wbexplore.texts` (the report never imports the explorer).
"""

from __future__ import annotations

import dataclasses
import re
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .balance import compute_selection, rank
from .balance.annual import annual_closure
from .balance.combos import RANK_TABLE_COLUMNS
from .balance.engine import MERGED_PREFIX, is_merged
from .balance.merge import DEFAULT_METHOD, MERGE_METHODS, merge_form, merged_basin, merged_components, merged_name
from .balance.metrics import METRICS
from .balance.terms import SOURCE_COMPONENTS, balance_text
from .errors import InputError
from .escape import html_text
from .texts import unsigned_zero
from .io.catalog import Catalog, CatalogError, open_catalog
from .io.writers import CAUTION, atomic_path, check_output
from .series import FLOW_PREFIX
from .names import (
    METRIC_NAMES,
    OPTIONS,
    REPORT_NAMES,
    column_label,
    map_metric,
    metric_label,
    metric_name,
)

__all__ = ["report_html", "verdict", "write_report"]

e = html_text  # every text from a file (names, ids, labels, titles) reaches the page escaped

# metrics shown for a water body (the others compare the balance with a gauged outlet, which a water body lacks)
WATERBODY_METRICS = ("rmse", "bias", "mae", "rel_imbalance", "n_valid", "n_beyond_2sigma")
TOP_ROWS = 5  # combinations listed in the ranking table (the selection's own row is added when it is lower)
PLOT_WIDTH, PLOT_HEIGHT = 360, 115  # px: two plots side by side fit an A4 page's printable width (730 px)

STYLE = """
@page { size: A4; margin: 7mm; }
body { font: 9px/1.3 sans-serif; color: #111; width: 730px; margin: 4px auto; }
h1 { font-size: 15px; margin: 0 0 2px 0; } h2 { font-size: 11px; margin: 4px 0 2px 0; }
p { margin: 2px 0; } ul { margin: 2px 0; padding-left: 16px; }
.verdict { font-size: 10px; border-left: 4px solid #0072B2; padding: 3px 6px; background: #f2f7fb; }
.caution { border: 1.5px solid #D55E00; padding: 2px 5px; }
table { border-collapse: collapse; } td, th { padding: 0 4px; border-bottom: 1px solid #ddd; line-height: 1.15; }
th { text-align: left; background: #f0f0f0; font-weight: 600; overflow-wrap: anywhere; } td.n { text-align: right; }
tr.chosen td { font-weight: 700; }
.cols { display: flex; gap: 10px; align-items: flex-start; } .cols > div { flex: 1 1 0; min-width: 0; }
.cols > div.wide { flex: 1.25 1 0; } table.metrics td:first-child { white-space: nowrap; }
.plots { display: grid; grid-template-columns: 360px 360px; gap: 4px 10px; } .plots > div.tall { grid-row: span 2; }
table.estimates td.n, table.estimates th { white-space: nowrap; } table.ranking th { font-size: 8px; } table.ranking th:first-child { white-space: nowrap; }
table.annual { font-size: 8.5px; } ul.notes { columns: 2; column-gap: 14px; } ul.notes li { break-inside: avoid; }
.small { font-size: 8.5px; color: #333; }
@media print { body { margin: 0 auto; } .plots, table { break-inside: avoid; } }
"""


def _fmt(v, spec=".3f"):
    try:
        return "n/a" if v is None or not np.isfinite(float(v)) else unsigned_zero(format(float(v), spec))
    except (TypeError, ValueError):
        return str(v)


def _metric_value(key: str, v, *, units: bool = True) -> str:
    """A metric's value with a precision that suits its units (`wbexplore.names`), the units after it unless
    ``units=False`` (a table whose row names carry them)."""
    u = METRIC_NAMES[key].units if key in METRIC_NAMES else ""
    if key in ("n_valid", "n_beyond_2sigma"):
        return _fmt(v, ".0f")
    spec = ".3f" if not u else ".1f" if u in ("%", "mm/year") else ".2f"
    return f"{_fmt(v, spec)} {u}".strip() if units else _fmt(v, spec)


def _label(cat: Catalog, sid: str) -> str:
    """A product's display name with its id in brackets (the id alone where the catalog has no label; a merged
    source: "Merged P [merged_P]", its variant named in the method notes)."""
    if is_merged(sid):
        return f"Merged {sid.removeprefix(MERGED_PREFIX)} [{sid}]"
    try:
        spec = cat.source(sid)
    except CatalogError:  # a pseudo-source (a water body's levels) or an ensemble: no catalog entry
        return f"[{sid}]"
    return f"{spec.label} [{sid}]" if spec.label else f"[{sid}]"


def _combo(cat: Catalog, row, components) -> str:
    return ", ".join(f"{c} {_label(cat, row[c])}" for c in components)


def _better_by(by: str, best: float, other: float) -> str:
    """How much better ``best`` is than ``other`` by metric ``by``, in its units (for "abs" metrics: |value|)."""
    sense, units = METRICS[by][0], METRIC_NAMES[by].units
    diff = abs(other) - abs(best) if sense == "abs" else (other - best if sense == "lower" else best - other)
    return f"{_fmt(diff, '.2f' if units else '.3f')}{' ' + units if units else ''}"


def verdict(cat: Catalog, ranking: pd.DataFrame, *, name: str, unit: str, by: str, waterbody: bool = False) -> str:
    """One sentence (plain text): which combination closes best for the unit and period, by metric ``by``, and the
    runner-up with its figure (for a water body: P/E products with the unmeasured exchange in m3/s).

    ``ranking`` is `wbexplore.balance.rank` output for the unit (best first, ``attrs`` start/end); every figure in
    the sentence is a value of that table.
    """
    comps = ("P", "ET") if waterbody else SOURCE_COMPONENTS
    scored = ranking[ranking["scored"]] if "scored" in ranking else ranking
    period = f"{ranking.attrs.get('start', '?')} to {ranking.attrs.get('end', '?')}"
    if not len(scored):
        return f"{name} ({unit}), {period}: no combination has enough valid months to be scored."
    best = scored.iloc[0]

    def fig(row):
        text = f"{metric_name(by)} {_metric_value(by, row[by])}"
        if waterbody:
            text += (f", unmeasured exchange {_fmt(row['exchange_m3s'], '.2f')} ± "
                     f"{_fmt(row['exchange_m3s_se'], '.2f')} m3/s")
        return text

    what = "pair of P and E products" if waterbody else "combination"
    s = f"{name} ({unit}), {period}: the {what} that closes best is {_combo(cat, best, comps)} ({fig(best)})"
    if len(scored) > 1:
        run = scored.iloc[1]
        s += (f"; the runner-up, {_combo(cat, run, comps)}, gives {fig(run)}, "
              f"{_better_by(by, float(best[by]), float(run[by]))} worse")
    else:
        s += "; there is no runner-up (one scored combination)"
    return s + f" (ranked by {metric_name(by)} over {len(scored)} combinations)."


def _resolutions(cat: Catalog, ids) -> dict:
    """Product id -> grid spacing text ("0.25 deg", "5 km"), read from each product's grid (`io.grids`)."""
    from .io.grids import open_source
    from .spatial.grid import describe_grid

    out = {}
    known = {s.id for s in cat.sources}
    for sid in ids:
        if sid not in known:  # a pseudo-source (levels) or an ensemble: no grid of its own
            continue
        g = open_source(cat.source(sid))
        d = describe_grid(g.x, g.y, g.crs)
        if d.is_geographic:
            out[sid] = (f"{d.dx:.4g} deg" if np.isclose(d.dx, d.dy, rtol=1e-6)
                        else f"{d.dx:.4g} x {d.dy:.4g} deg")
        else:
            to_km = d.crs.axis_info[0].unit_conversion_factor / 1000.0  # CRS units -> km (pyproj)
            out[sid] = (f"{d.dx * to_km:.4g} km" if np.isclose(d.dx, d.dy, rtol=1e-6)
                        else f"{d.dx * to_km:.4g} x {d.dy * to_km:.4g} km")
    return out


def _table(heads, rows, *, cls: str, titles=None, chosen=None) -> str:
    th = "".join(f"<th title='{e(t)}'>{e(h)}</th>" if t else f"<th>{e(h)}</th>"
                 for h, t in zip(heads, titles or [""] * len(heads)))
    body = ""
    for i, r in enumerate(rows):
        mark = " class='chosen'" if chosen is not None and chosen[i] else ""
        body += f"<tr{mark}>" + "".join(
            f"<td class='n'>{e(v)}</td>" if isinstance(v, str) and re.match(r"^[-+]?[\d.,]+( |$)|^n/a$", v)
            else f"<td>{e(v)}</td>" for v in r) + "</tr>"
    return f"<table class='{cls}'><tr>{th}</tr>{body}</table>"


def _products_table(cat: Catalog, ds, sel) -> str:
    from .series import source_ids

    comps = ("P", "ET") if ds.attrs.get("unit") == "waterbody" else SOURCE_COMPONENTS
    ids = [(c, sid) for c in comps for sid in source_ids(ds, c)]
    res = _resolutions(cat, [sid for _, sid in ids])
    rows, chosen = [], []
    for c, sid in ids:
        rows.append([c, _label(cat, sid), res.get(sid, "-"), str(ds[sid].attrs.get("source_step", "-"))])
        chosen.append(getattr(sel, c) == sid)
    keys = ("component", "product", "grid", "step")
    return _table([REPORT_NAMES[k].name for k in keys], rows, cls="products", chosen=chosen,
                  titles=[REPORT_NAMES[k].help for k in keys])


def _metrics_table(res, other, keys, *, other_name: str) -> str:
    heads = ["Metric", "Selection", other_name]
    rows = [[metric_label(k) if k in METRIC_NAMES else "Months beyond 2 sigma",
             _metric_value(k, res.metrics.get(k), units=False),
             _metric_value(k, other.get(k), units=False) if other is not None else "-"]
            for k in keys if k in res.metrics]
    titles = ["plain name (units)", "", ""]
    return _table(heads, rows, cls="metrics", titles=titles)


def _annual_table(cat: Catalog, res, *, volumes: bool = False) -> str:
    """The water-year closure table (`balance.annual`): totals in mm/year over the balance unit, or with
    ``volumes`` (a water body, whose other views are in hm3) in hm3/year over the same area (the outline's)."""
    from .units import mm_to_m3

    a = annual_closure(res)
    t = a.table
    # hm3 per mm over the unit's area (1 mm over 1 km2 = 1000 m3; `units.mm_to_m3`, checked against pint)
    factor = float(mm_to_m3(1.0, res.area_km2 * 1e6)) / 1e6 if volumes else 1.0
    units = "hm3/year" if volumes else a.units
    over = (f" (1 mm over the outline's {res.area_km2:,.0f} km2 = {_fmt(factor, '.4g')} hm3)" if volumes
            else " over the balance unit")

    def head(k):
        if k == "residual":
            return "Residual"
        return _symbol(k)  # P, ET, Q, dS, a flow's catalog id: the symbols of the balance line above the table
    heads = [REPORT_NAMES["water_year"].name] + [head(k) for k in a.terms]
    rows = [[str(y)] + [_fmt(r[k] * factor, ".0f") for k in a.terms] for y, r in a.complete.iterrows()]
    part = t[~t["complete"]]
    start = pd.Timestamp(2001, a.water_year_start, 1).strftime("%B")
    bias = res.metrics.get("annual_bias")
    caption = (f"<p class='small'>Totals per water year in {units}{e(over)} "
               f"({e(_balance_line(a.balance_terms))} = residual{e(_flow_legend(a.balance_terms))}); water year from "
               f"{start}, named by the year it ends. "
               f"Mean residual of the {len(a.complete)} complete years "
               f"{_fmt(None if bias is None else bias * factor, '.1f')} {units}.</p>")
    missing = ("<p class='small'>Years with a missing month (no totals, never scaled up; valid months): "
               + ", ".join(f"{y} ({int(n)})" for y, n in part["n_valid"].items()) + ".</p>") if len(part) else ""
    return caption + _table(heads, rows, cls="annual") + missing


def _ranking_table(cat: Catalog, ranking, sel, cols, comps) -> str:
    top = ranking.head(TOP_ROWS)
    is_sel = np.ones(len(ranking), bool)
    for c in comps:
        is_sel &= ranking[c].to_numpy() == getattr(sel, c)
    if is_sel.any() and not is_sel[:TOP_ROWS].any():
        top = pd.concat([top, ranking[is_sel]])
    chosen = np.ones(len(top), bool)
    for c in comps:
        chosen &= top[c].to_numpy() == getattr(sel, c)
    heads = ["Rank" if c == "rank" else c if c in comps else column_label(c) for c in cols]

    def cell(r, c):
        if c == "rank" or c in comps:
            return str(r[c])
        if c == "exchange_m3s":  # mean ± its standard error (the next column of the ranking)
            return f"{_fmt(r[c], '.2f')} ± {_fmt(r['exchange_m3s_se'], '.2f')}"
        return _fmt(r[c], ".0f" if c == "n_valid" else ".2f")
    rows = [[cell(r, c) for c in cols] for _, r in top.iterrows()]
    return (_table(heads, rows, cls="ranking", chosen=chosen)
            + f"<p class='small'>{len(top)} of {len(ranking)} combinations shown (bold: this report's selection); "
              "`wbexplore rank` lists them all.</p>")


def _symbol(name: str) -> str:
    """A term's symbol in the report: P, ET, Q, dS, or a flow's catalog id (``flow_<id>`` is the series' name)."""
    return name.removeprefix(FLOW_PREFIX)


def _balance_line(terms) -> str:
    """The residual as text with the report's symbols ("P - ET - dS + ombrel - release")."""
    return balance_text(tuple(dataclasses.replace(t, name=_symbol(t.name)) for t in terms))


def _flow_legend(terms) -> str:
    """"; ombrel: <its label> (inflow), ..." for the flows among ``terms`` ("" without flows): the table's headers
    are the catalog's ids, the legend gives the catalog's labels."""
    flows = [t for t in terms if t.name.startswith(FLOW_PREFIX)]
    return "".join(f"; {_symbol(t.name)}: {t.label} ({'inflow' if t.sign > 0 else 'outflow'})" for t in flows)


def _method_notes(res, sel, *, waterbody: bool, extra: str = "") -> str:
    terms = annual_closure(res).balance_terms  # the flows' labels are in the water-year table's caption
    sc = OPTIONS[sel.storage_change]
    if res.storage_note:  # a water body with end-of-month volumes: the options do not apply
        storage = e(res.storage_note)
    else:
        storage = (f"Storage change: {e(sc.name.lower())} difference of monthly-mean storage ({e(sc.help)}). "
                   + (f"{e(OPTIONS['matched'].name)}: {e(OPTIONS['matched'].help)}." if sel.matched
                      else "Fluxes are each month's own totals (not window-matched): the storage difference spans "
                           "a different window, so even a consistent balance leaves a seasonal smoothing error."))
    means = ("P and E are area-weighted means over the water body's outline; storage from water levels through the "
             "storage curve; gauged inflows and outflows over the same area." if waterbody else
             "Basin means are area-weighted with exact cell coverage fractions and ellipsoidal cell areas; rates are "
             "turned into calendar-month totals with the true number of days; a month with a missing day is left "
             "empty, never scaled.")
    scores = ("" if waterbody else
              " KGE (Gupta et al. 2009), KGE' (Kling et al. 2012), NSE (Nash and Sutcliffe 1970), NSE beyond the "
              "seasons (Lehmann et al. 2022) and PBIAS (Moriasi et al. 2007) compare P - ET - dS with gauged Q; "
              "PBIAS has the opposite sign of the mean residual.")
    return (f"<ul class='small notes'><li>{means}</li><li>{storage}</li>"
            f"<li>Residual r = {e(_balance_line(terms))} (mm/month).{scores}{extra}</li>"
            f"<li>Uncertainty (stated error, else collocation, else product spread; residual sigma by propagation of "
            f"independent errors). Used here: {e(res.uncertainty_line)}.</li></ul>")


def _static(fig, *, height: int = PLOT_HEIGHT):
    """A figure for a printed page: no toolbar (nothing to click on paper), the report's size, small type and
    legends that leave the data visible."""
    from bokeh.models import ColorBar

    fig.toolbar_location = None
    fig.width, fig.height = PLOT_WIDTH, height
    fig.sizing_mode = "fixed"
    fig.title.text_font_size = "10px"
    for ax in (*fig.xaxis, *fig.yaxis):
        ax.axis_label_text_font_size, ax.major_label_text_font_size = "9px", "8px"
    for lg in fig.legend:
        lg.update(label_text_font_size="8px", glyph_height=9, glyph_width=12, spacing=0, padding=2, margin=2,
                  label_height=9, background_fill_alpha=0.6)
    factors = getattr(fig.x_range, "factors", None)
    if factors is not None and len(factors) > 5:  # a bar per term and flow: tilt the names so they do not overlap
        fig.xaxis.major_label_orientation = 0.5
    for cb in fig.right:
        if isinstance(cb, ColorBar):
            cb.update(title_text_font_size="8px", major_label_text_font_size="8px", width=10)
    return fig


def _header(cat, res, sel, *, kind: str, sources: str, area: str) -> str:
    now = datetime.now(UTC)
    return (f"<h1>wbexplore report: {e(res.basin_name)} ({e(sel.basin)}){kind}</h1>"
            f"<p class='small'>Catalog: {e(cat.title)} ({e(cat.path.name)}, sha256 {cat.sha256[:16]}...). "
            f"Period {res.frame.index[0]:%Y-%m} to {res.frame.index[-1]:%Y-%m}. {sources} {area} "
            f"Written {now:%Y-%m-%d %H:%M} UTC by wbexplore {e(__version__)}.</p>")


def _merge_note(ds, sel) -> str:
    """The method note of the merged sources of ``sel`` ("" where none is chosen)."""
    merged = merged_components(sel)
    if not merged:
        return ""
    a = ds[merged_name(merged[0])].attrs
    parts = "; ".join(f"{c} from {ds[merged_name(c)].attrs.get('products', '?')} (error variances: "
                      f"{ds[merged_name(c)].attrs.get('error_variance_source', '?')})" for c in merged)
    return (f" Merged sources: the products of each component merged with inverse error variances, then the budget "
            f"closed by {MERGE_METHODS[a['merge_method']]} ({a['merge_method']}); {parts}. A merged source is not "
            "independent of its products, and it closes the budget by construction over the months the merge "
            "used: its metrics say how much had to be moved, not that the products are right.")


def report_html(cat: Catalog, ds, sel, *, by: str = "rmse", merge_method: str | None = None) -> str:
    """The report page of selection ``sel`` over the series ``ds`` (basins, incremental units or water bodies).

    A merged source in ``sel`` (``merged_P`` ...) is built for the basin with ``merge_method`` (default
    `balance.merge.DEFAULT_METHOD`, as in the explorer) in `balance.merge.merge_form`; the map still ranks the products of every basin."""
    full = ds
    if merged_components(sel):
        ds = merged_basin(ds, sel.basin, method=merge_method or DEFAULT_METHOD,
                          options=merge_form(sel.storage_change, sel.matched))
    res = compute_selection(ds, sel)
    ranking = rank(ds, sel.basin, sel.options(), by=by)
    if ds.attrs.get("unit") == "waterbody":
        return _page(_waterbody_parts(cat, ds, sel, res, ranking, by=by), f"wbexplore report {sel.basin} (water body)")
    from . import plots
    from .balance import rank_all
    from .pipeline import load_basins
    from .texts import warnings_for

    incremental = ds.attrs.get("unit") == "incremental"
    shown = map_metric(by)  # a depth metric (RMSE) would make the smallest flows look best: the map says which
    best = rank_all(full, sel.options(), by=shown)
    scores = best[best["rank"] == 1].set_index("basin")[shown] if len(best) else pd.Series(dtype=float)
    estimates = _estimates(ds, sel)
    et = estimates.get("ET")
    # the component means are in the water-year table: the long-term estimates by difference take their place,
    # beside the monthly ET by difference
    figs = [(plots.basin_map(load_basins(cat), scores, sel.basin, shown, title=f"Basins by best {metric_name(shown)}",
                             rank_by=by), "tall"),
            f"<h2>Long-term estimates by difference</h2>{_estimates_table(estimates)}",
            *([] if isinstance(et, str) else [_one_line_legend(plots.difference_estimate(et))]),
            plots.residual_series(res), plots.balance_scatter(res)]
    unit = ""
    if incremental:
        b = ds.sel(basin=sel.basin)
        unit = (f" Incremental unit: the basin minus its upstream basins {e(str(b['upstream_basins'].values))}"
                f" (whole basin {float(b['whole_area_km2']):,.0f} km2); their gauged outflow enters as inflow.")
    comps = SOURCE_COMPONENTS
    head = _header(cat, res, sel, kind=", incremental unit" if incremental else "",
                   sources=f"Selection: {e(_combo(cat, sel.__dict__, comps))}.",
                   area=f"{'Incremental area' if incremental else 'Basin area'} {res.area_km2:,.0f} km2.{unit}")
    text = verdict(cat, ranking, name=str(res.basin_name), unit=sel.basin, by=by)
    other, other_name = _comparison(ranking, sel, comps, by)
    keys = [k for k in METRIC_NAMES] + ["n_beyond_2sigma"]
    warn = "".join(f"<li>{e(w)}</li>" for w in warnings_for(res, ds)) or "<li>none</li>"
    body = (f"<p class='verdict'><b>Verdict.</b> {e(text)}</p>"
            f"<div class='cols'><div class='wide'><h2>Products</h2>{_products_table(cat, ds, sel)}</div>"
            f"<div><h2>Closure metrics</h2>{_metrics_table(res, other, keys, other_name=other_name)}</div></div>"
            "{plots}"
            f"<div class='cols'><div><h2>Water-year closure</h2>{_annual_table(cat, res)}</div>"
            f"<div class='wide'><h2>Every combination, ranked by {e(metric_label(by))}: the best</h2>"
            f"{_ranking_table(cat, ranking, sel, list(RANK_TABLE_COLUMNS), comps)}"
            f"<h2>Warnings</h2><ul class='small'>{warn}</ul>"
            f"<p class='caution small'><b>Caution.</b> {e(CAUTION)}</p></div></div>"
            f"<h2>Method notes</h2>{_method_notes(res, sel, waterbody=False, extra=e(_merge_note(ds, sel)))}")
    return _page((head, figs, body), f"wbexplore report {sel.basin}{' (incremental)' if incremental else ''}")


def _one_line_legend(fig):
    """The estimate plot's legend on one line under it, its entries short: the band's sources are in the note under
    the estimates table (a three-line legend left the plot a strip on the page)."""
    from bokeh.core.properties import value

    lg = fig.legend[0]
    lg.orientation = "horizontal"
    lg.items[0].label = value("± 2 sigma")
    lg.items[1].label = value("by difference")
    return fig


def _estimates(ds, sel) -> dict:
    """Term -> `balance.estimate.DifferenceEstimate` of ET, Q and dS from the other terms of ``sel`` (the
    explorer's uncertainty: stated, else collocation, else the product spread, labelled); a term that cannot be
    estimated maps to its one-line reason (text)."""
    from .balance.estimate import TERMS, estimate_by_difference

    out = {}
    for t in TERMS:
        try:
            out[t] = estimate_by_difference(ds, sel, t)
        except InputError as exc:  # the term's row says why
            out[t] = str(exc)
    return out


def _estimates_table(estimates: dict) -> str:
    """Long-term estimates by difference (mm/year, whole water years, storage left out) beside the chosen product or
    gauge over the same years, and one line: the band's sources and what the standard error leaves out."""
    from .balance.estimate import formula as formula_of
    from .plots import estimate_band_label, estimate_is_merged, estimate_label

    rows, band = [], ""
    for t, est in estimates.items():
        if isinstance(est, str):  # why it could not be estimated
            rows.append([t, est, "", "", ""])
            continue
        lt = est.long_term
        if not lt["water_years"]:
            rows.append([est.formula, "no whole water year", "", "", ""])
            continue
        # over whole years the storage term is left out; flows (named in the method notes' residual line) are
        # summed up as "+ flows" so that a basin with transfers keeps the table one line per term
        formula = formula_of(t).replace(" - dS", "") if t != "dS" else formula_of(t)
        if est.formula != formula_of(t):
            formula += " (+ flows)"
        shown = estimate_label(est)
        beside = (f"{shown} {_fmt(lt['product'], '.0f')} (est. {_fmt(lt['estimate_product_years'], '.0f')}, "
                  f"{lt['product_years']} yr)" if lt.get("product") is not None and shown else "")
        rows.append([formula, f"{_fmt(lt['estimate'], '.0f')} ± {_fmt(lt['standard_error'], '.0f')}",
                     str(lt["water_years"]),
                     "" if t == "dS" or lt["storage_change"] is None
                     else f"{_fmt(lt['storage_change'], '+.0f')} ({lt['storage_change_years']} yr)", beside])
        if t == "ET":
            band = estimate_band_label(est)
    merged = (" A merged source closes the budget by construction: its agreement with an estimate is not a check."
              if any(not isinstance(x, str) and estimate_is_merged(x) for x in estimates.values())
              else "")
    heads = ["Term", "mm/yr ± se", "yrs", "dS out", "product or gauge (est.), same yrs"]
    titles = ["over whole water years the storage term is left out", "mean per water year ± 1 standard error",
              "whole water years used", "mean storage change left out (mm/year), over the years where the TWSA product has every month",
              "the chosen product or gauged Q over the years where it has every month, and the estimate over those"]
    return (_table(heads, rows, cls="estimates", titles=titles)
            + f"<p class='small'>ET plot: {e(band)}. A product's bias is not in ± se.{merged}</p>")


def _comparison(ranking, sel, comps, by):
    """The metrics the selection is compared with: the runner-up's when the selection is the best, else the best's."""
    scored = ranking[ranking["scored"]] if "scored" in ranking else ranking
    if not len(scored):
        return None, "Runner-up"
    first = scored.iloc[0]
    is_best = all(first[c] == getattr(sel, c) for c in comps)
    if is_best:
        if len(scored) < 2:
            return None, "Runner-up"
        row, what = scored.iloc[1], "Runner-up"
    else:
        row, what = first, "Best"
    return row.to_dict(), what


def _page(parts, title: str) -> str:
    """The page: the head text, the body with the figures in its ``{plots}`` place, bokeh's JavaScript inlined.

    A figure given as ``(fig, "tall")`` spans two rows of the two-column grid (the basin map: its colour bar and
    note leave a one-row map no room to draw the basins); a text is an HTML cell of the grid."""
    from bokeh.embed import components
    from bokeh.resources import Resources

    # bokeh's core bundle inlined (the plots need no widget, table or math bundle: 1.3 MB instead of 3.9 MB)
    js = Resources(mode="inline", components=["bokeh"]).render_js()

    head, figs, body = parts
    cells = [f if isinstance(f, (tuple, str)) else (f, "") for f in figs]
    drawn = [c for c in cells if not isinstance(c, str)]
    tall = 2 * PLOT_HEIGHT + 4  # two rows and the grid's gap
    script, divs = components([_static(f, height=tall if kind == "tall" else PLOT_HEIGHT) for f, kind in drawn])
    divs = iter(divs)
    grid = "<div class='plots'>" + "".join(
        f"<div class='table-cell'>{c}</div>" if isinstance(c, str) else
        f"<div class='{c[1]}'>{next(divs)}</div>" if c[1] else f"<div>{next(divs)}</div>" for c in cells) + "</div>"
    out = (f"<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'><title>{e(title)}</title>"
           f"<style>{STYLE}</style>{js}</head>"
           f"<body>{head}{body.replace('{plots}', grid)}{script}</body></html>")
    # panel (once imported in the process) registers a server-relative module shim, and once a Tabulator
    # widget exists in the process (an explorer in the same notebook) its stylesheet (on panel's CDN): a
    # standalone file cannot load them and does not need them: drop both so the file makes no request at all
    out = re.sub(r'<script[^>]*src="(?:static/extensions/|https?://)[^"]*"[^>]*></script>\n?', "", out)
    return re.sub(r'<link[^>]*href="(?:static/extensions/|https?://)[^"]*"[^>]*>\n?', "", out)


def _waterbody_parts(cat: Catalog, ds, sel, res, ranking, *, by: str):
    """Head, figures and body of a water body's report: volumes (hm3/month), the residual as unmeasured
    exchange, the level and volume; no metric against a gauged outlet (a water body has none)."""
    from . import plots
    from .balance.waterbody import unmeasured_exchange
    from .io.waterbodies import read_waterbody_outlines
    from .pipeline import load_basins, waterbody_series
    from .series import SURFACE_AREA
    from .texts import waterbody_messages

    surf = ds[SURFACE_AREA].sel(basin=sel.basin) if SURFACE_AREA in ds else None
    ex = unmeasured_exchange(res, surface_area_km2=surf)
    levels = waterbody_series(cat, method=sel.storage_change).sel(waterbody=sel.basin)
    start, end = f"{res.frame.index[0]:%Y-%m}", f"{res.frame.index[-1]:%Y-%m}"
    lake_map = plots.MapPlot(plots.basin_outlines(load_basins(cat)),
                             waterbodies=plots.basin_outlines(read_waterbody_outlines(cat.waterbodies)))
    lake_map.update(pd.Series(dtype=float), sel.basin, by)
    lake_map.colorbar.visible = False  # the basins are not scored here (the water body's series only)
    lake_map.fig.title.text = f"Water body {sel.basin} (thick outline)"
    figs = [lake_map.fig, plots.component_bars(res, "hm3"), plots.exchange_series(res, ex, "hm3"),
            plots.level_volume(levels, start=start, end=end, name=str(res.basin_name))]
    m, se = ex.mean, ex.standard_error
    xrows = [[k, _fmt(m[u], ".4g"), _fmt(se[u], ".3g")]
             for k, u in (("m3/s (mean over the month)", "m3/s"), ("hm3/month", "hm3"),
                          ("mm/month over the water surface", "mm_surface"))]
    sign = "an unmeasured loss (seepage, abstraction)" if m["hm3"] > 0 else "an unmeasured gain (ungauged inflow)"
    lead = (f"<p class='exchange'><b>Unmeasured exchange</b> (= residual, the net unmeasured outflow; positive = "
            f"unmeasured loss): mean {_fmt(m['m3/s'], '.2f')} &plusmn; {_fmt(se['m3/s'], '.2f')} m3/s = "
            f"{_fmt(m['hm3'], '.2f')} &plusmn; {_fmt(se['hm3'], '.2f')} hm3/month (&plusmn; 1 standard error), "
            f"i.e. {sign} on average over {res.n_valid} valid months.</p>")
    comps = ("P", "ET")
    head = _header(cat, res, sel, kind=", water body",
                   sources=f"Selection: P {e(_label(cat, sel.P))}, E {e(_label(cat, sel.ET))}, storage from water "
                           f"levels ({e(sel.TWSA)}).", area=f"Outline area {res.area_km2:,.0f} km2.")
    text = verdict(cat, ranking, name=str(res.basin_name), unit=sel.basin, by=by, waterbody=True)
    other, other_name = _comparison(ranking, sel, comps, by)
    cols = [c for c in ("rank", "P", "ET", "rmse", "bias", "n_valid", "exchange_m3s") if c in ranking]
    warn = "".join(f"<li>{e(w)}</li>" for w in waterbody_messages(res)) or "<li>none</li>"
    extra = (f" The unmeasured exchange X = r is the net unmeasured outflow (positive = unmeasured loss); its "
             f"standard error is inflated for lag-1 autocorrelation (n' = n (1 - r1) / (1 + r1), Wilks): r1 = "
             f"{_fmt(ex.r1, '.2f')}, n' = {_fmt(ex.n_eff, '.1f')}. 1 hm3 = 1e6 m3; m3/s is the mean flow over the "
             "calendar month.")
    body = (f"<p class='verdict'><b>Verdict.</b> {e(text)}</p>{lead}"
            f"<div class='cols'><div class='wide'><h2>Products</h2>{_products_table(cat, ds, sel)}</div>"
            f"<div><h2>Closure metrics (mm/month over the outline)</h2>"
            f"{_metrics_table(res, other, WATERBODY_METRICS, other_name=other_name)}"
            f"<h2>Unmeasured exchange, mean and standard error</h2>"
            f"{_table(['unit', 'mean', 'standard error'], xrows, cls='exchange')}</div></div>"
            "{plots}"
            f"<div class='cols'><div><h2>Water-year closure</h2>{_annual_table(cat, res, volumes=True)}</div>"
            f"<div class='wide'><h2>Every P and E combination, ranked by {e(metric_label(by))}: the best</h2>"
            f"{_ranking_table(cat, ranking, sel, cols, comps)}"
            f"<h2>Warnings</h2><ul class='small'>{warn}</ul>"
            f"<p class='caution small'><b>Caution.</b> {e(CAUTION)}</p>"
            f"<h2>Method notes</h2>{_method_notes(res, sel, waterbody=True, extra=extra)}</div></div>")
    return head, figs, body


def write_report(catalog, ds, sel, out, *, overwrite: bool = False, by: str = "rmse",
                 merge_method: str | None = None) -> Path:
    """Write the HTML report atomically (refuses to overwrite unless asked, and any input of the catalog always)."""
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    check_output(out, overwrite=overwrite, protect=cat)
    text = report_html(cat, ds, sel, by=by, merge_method=merge_method)
    with atomic_path(out, overwrite=overwrite, protect=cat) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(out)
