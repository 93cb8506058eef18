"""Self-contained HTML report of one selection (no network needed to view it).

The explorer's bokeh figures (`wbexplore.plots`, drawn by the same code) with their JavaScript
inlined, plus the selection's metrics, the ranking table, method notes and the caution.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from . import __version__
from .balance import compute_selection, rank
from .balance.combos import RANK_TABLE_COLUMNS, WATERBODY_TABLE_COLUMNS
from .balance.terms import balance_text
from .escape import html_text
from .io.catalog import Catalog, open_catalog
from .io.writers import CAUTION, atomic_path, check_output
from .names import METRIC_NAMES, metric_label

__all__ = ["report_html", "write_report"]

METHOD_NOTES = """
<ul>
<li>Basin means are area-weighted with exact cell coverage fractions (exactextract) and WGS84 ellipsoidal cell
areas (Snyder 1987 authalic formula); cells without data drop out and the valid share of basin area is recorded.</li>
<li>Rates are converted to totals per calendar month with the true number of days; daily data are summed to months
and a month with a missing day is left empty.</li>
<li>TWSA products give monthly <em>mean</em> storage. The storage change is a {method} difference of monthly means;
{matched}</li>
<li>Residual r = {balance} (mm/month). KGE (Gupta et al. 2009), KGE' (Kling et al. 2012), NSE (Nash and
Sutcliffe 1970), cyclostationary NSE (Lehmann et al. 2022) and PBIAS (Moriasi et al. 2007) compare
P - ET - dS with gauged Q.</li>
<li>Uncertainty: the chosen product's own error: stated in the catalog, else its collocation error variance
(three products or more of the component: Stoffelen 1998; McColl et al. 2014), else the spread of the products
(their disagreement, not the chosen product's error); Q from a relative gauge error; residual sigma by
propagation of independent errors. Collocation sees random errors only, not a product's bias.
Used here: {uncertainty}.</li>
</ul>
"""


WATERBODY_NOTES = """
<ul>
<li>P and E are area-weighted means of the gridded products over the water body's outline (exact cell coverage
fractions, WGS84 ellipsoidal cell areas), as volumes over the outline area; gauged inflows and outflows are
station series over the same area.</li>
<li>Storage comes from water levels through the storage curve (level to volume, monotone cubic interpolation;
levels outside the curve leave their month empty). Daily levels give end-of-month volumes, differenced month by
month; monthly-mean levels are differenced with the {method} kernel{matched}</li>
<li>Residual r = {balance}. The unmeasured exchange is X = r, the net unmeasured outflow that closes the balance:
positive = unmeasured loss (seepage, leakage through the dam, abstraction), negative = ungauged inflow.
Its mean is given with its standard error, inflated for lag-1 autocorrelation (effective sample size
n' = n (1 - r1) / (1 + r1), Wilks, Statistical Methods in the Atmospheric Sciences); here r1 = {r1}, n' = {n_eff}.
Volumes: 1 hm3 = 1e6 m3; m3/s is the mean flow over the calendar month (its real number of days).</li>
<li>Uncertainty: the chosen product's own error: stated in the catalog, else its collocation error variance
(three products or more of the component), else the spread of the products; gauged flows from a relative error;
residual sigma by propagation of independent errors. Used here: {uncertainty}.</li>
</ul>
"""
# metrics shown for a water body (the others compare the balance with a gauged outlet, which a water body lacks)
WATERBODY_METRICS = ("rmse", "bias", "mae", "rel_imbalance", "n_valid", "n_beyond_2sigma")


def _fmt(v, spec=".3f"):
    try:
        return "n/a" if v is None or not np.isfinite(float(v)) else format(float(v), spec)
    except (TypeError, ValueError):
        return str(v)


def report_html(cat: Catalog, ds, sel, *, by: str = "rmse") -> str:
    """The report page of selection ``sel`` over the series ``ds`` (basins, incremental units or water bodies)."""
    from . import plots
    from .explorer import views
    from .pipeline import load_basins

    res = compute_selection(ds, sel)
    ranking = rank(ds, sel.basin, sel.options(), by=by)
    if ds.attrs.get("unit") == "waterbody":
        return _finish(_waterbody_parts(cat, ds, sel, res, ranking, by=by), f"wbexplore report {sel.basin} (water body)")
    basins = load_basins(cat)
    from .balance import rank_all

    best = rank_all(ds, sel.options(), by=by)
    scores = best[best["rank"] == 1].set_index("basin")[by] if len(best) else pd.Series(dtype=float)
    figs = [plots.basin_map(basins, scores, sel.basin, by, width=950,
                            title=f"Basins coloured by best {by}; {sel.basin} outlined"),
            plots.component_bars(res, width=950), plots.residual_series(res, width=950),
            plots.balance_scatter(res, width=950)]
    m = res.metrics
    mrows = "".join(f"<tr title='{html_text(METRIC_NAMES[k].help) if k in METRIC_NAMES else ''}'>"
                    f"<td>{html_text(metric_label(k))}</td><td style='text-align:right'>{html_text(_fmt(v, '.4g'))}</td></tr>"
                    for k, v in m.items())
    cols = list(RANK_TABLE_COLUMNS)
    heads = ["Rank" if c == "rank" else metric_label(c) if c in METRIC_NAMES else c for c in cols]
    trows = "".join("<tr>" + "".join(f"<td>{html_text(_fmt(r[c], '.3f') if isinstance(r[c], float) else str(r[c]))}</td>"
                                     for c in cols) + "</tr>" for _, r in ranking.iterrows())
    incremental = ds.attrs.get("unit") == "incremental"
    unit = ""
    if incremental:
        b = ds.sel(basin=sel.basin)
        unit = (f" Incremental unit: the basin minus its upstream basins {html_text(str(b['upstream_basins'].values))}"
                f" (whole basin {float(b['whole_area_km2']):,.0f} km2); their gauged outflow enters as inflow.")
    head = (f"<h1>wbexplore report: {html_text(res.basin_name)} ({html_text(sel.basin)})"
            f"{', incremental unit' if incremental else ''}</h1>"
            f"<p class='caution' style='border:2px solid #D55E00;padding:8px'><b>Caution.</b> {html_text(CAUTION)}</p>"
            f"<p>Catalog: {html_text(cat.title)} ({html_text(cat.path.name)}, sha256 {cat.sha256[:16]}...). "
            f"Period {res.frame.index[0]:%Y-%m}..{res.frame.index[-1]:%Y-%m}. Sources: P = {html_text(sel.P)}, "
            f"ET = {html_text(sel.ET)}, TWSA = {html_text(sel.TWSA)}. {'Incremental area' if incremental else 'Basin area'} {res.area_km2:,.0f} km2.{unit} "
            f"wbexplore {__version__}.</p>")
    warn = "".join(f"<li>{html_text(w)}</li>" for w in views.warnings_for(res, ds))
    notes = METHOD_NOTES.format(method=html_text(sel.storage_change), balance=html_text(balance_text(res.terms)),
                                uncertainty=html_text(res.uncertainty_line),
                                matched="P, ET and Q are filtered with the same window (window-matched)."
                                if sel.matched else "fluxes are compared as monthly totals (not window-matched).")
    tail = (f"<h2>Selection metrics</h2><table class='metrics'>{mrows}</table>"
            f"<h2>Warnings</h2><ul>{warn or '<li>none</li>'}</ul>"
            f"<h2>Every combination (ranked by {html_text(metric_label(by))})</h2><table class='ranking' border='1' "
            f"style='border-collapse:collapse'><tr>{''.join(f'<th>{html_text(h)}</th>' for h in heads)}</tr>{trows}</table>"
            f"<h2>Method notes</h2>{notes}")
    return _finish((head, figs, tail), f"wbexplore report {sel.basin}{' (incremental)' if incremental else ''}")


def _finish(parts, title: str) -> str:
    """The page: the head text, the figures, the tail text, bokeh's JavaScript inlined."""
    from bokeh.embed import file_html
    from bokeh.layouts import column
    from bokeh.models import Div
    from bokeh.resources import INLINE

    head, figs, tail = parts
    layout = column(Div(text=head, width=950), *figs, Div(text=tail, width=950))
    out = file_html(layout, resources=INLINE, title=title)
    # panel (once imported in the process) registers a server-relative module shim, and once a Tabulator
    # widget exists in the process (an explorer in the same notebook) its stylesheet: a standalone
    # file cannot load them and does not need them: drop both so the file makes no request at all
    # (a rendered Tabulator also registers its stylesheet on panel's CDN: dropped the same way, so that the file
    # makes no outside request whatever ran before in the process)
    out = re.sub(r'<script src="(?:static/extensions/|https?://)[^"]*"></script>\n?', "", out)
    return re.sub(r'<link[^>]*href="(?:static/extensions/|https?://)[^"]*"[^>]*>\n?', "", out)


def _waterbody_parts(cat: Catalog, ds, sel, res, ranking, *, by: str):
    """Head, figures and tail of a water body's report: volumes (hm3/month), the residual as unmeasured
    exchange, the level and volume; no metric against a gauged outlet (a water body has none)."""
    from . import plots
    from .balance.waterbody import unmeasured_exchange
    from .io.waterbodies import read_waterbody_outlines
    from .pipeline import load_basins, waterbody_series
    from .series import SURFACE_AREA

    e = html_text
    surf = ds[SURFACE_AREA].sel(basin=sel.basin) if SURFACE_AREA in ds else None
    ex = unmeasured_exchange(res, surface_area_km2=surf)
    levels = waterbody_series(cat, method=sel.storage_change).sel(waterbody=sel.basin)
    start, end = f"{res.frame.index[0]:%Y-%m}", f"{res.frame.index[-1]:%Y-%m}"
    lake_map = plots.MapPlot(plots.basin_outlines(load_basins(cat)), width=950,
                             waterbodies=plots.basin_outlines(read_waterbody_outlines(cat.waterbodies)))
    lake_map.update(pd.Series(dtype=float), sel.basin, by)
    lake_map.colorbar.visible = False  # the basins are not scored here (the water body's series only)
    lake_map.fig.title.text = f"Water body {sel.basin} (thick outline) among the catalog's basins and water bodies"
    figs = [lake_map.fig, plots.component_bars(res, "hm3", width=950),
            plots.exchange_series(res, ex, "hm3", width=950),
            plots.level_volume(levels, start=start, end=end, name=str(res.basin_name), width=950)]
    m, se = ex.mean, ex.standard_error
    xrows = "".join(f"<tr><td>{k}</td><td style='text-align:right'>{_fmt(m[u], '.4g')}</td>"
                    f"<td style='text-align:right'>{_fmt(se[u], '.3g')}</td></tr>"
                    for k, u in (("m3/s (mean over the month)", "m3/s"), ("hm3/month", "hm3"), ("m3/month", "m3"),
                                 ("mm/month over the water surface", "mm_surface")))
    sign = "an unmeasured loss (seepage, abstraction)" if m["hm3"] > 0 else "an unmeasured gain (ungauged inflow)"
    lead = (f"<p class='exchange'><b>Unmeasured exchange</b> (= residual, the net unmeasured outflow; positive = "
            f"unmeasured loss): mean {_fmt(m['m3/s'], '.2f')} &plusmn; {_fmt(se['m3/s'], '.2f')} m3/s = "
            f"{_fmt(m['hm3'], '.2f')} &plusmn; {_fmt(se['hm3'], '.2f')} hm3/month (&plusmn; 1 standard error), "
            f"i.e. {sign} on average over {res.n_valid} valid months.</p>")
    head = (f"<h1>wbexplore report: {e(res.basin_name)} ({e(sel.basin)}), water body</h1>"
            f"<p class='caution' style='border:2px solid #D55E00;padding:8px'><b>Caution.</b> {e(CAUTION)}</p>"
            f"<p>Catalog: {e(cat.title)} ({e(cat.path.name)}, sha256 {cat.sha256[:16]}...). "
            f"Period {start}..{end}. Sources: P = {e(sel.P)}, E = {e(sel.ET)}, storage from water levels "
            f"({e(sel.TWSA)}). Outline area {res.area_km2:,.0f} km2. wbexplore {__version__}.</p>{lead}")
    mrows = "".join(f"<tr><td>{e(k)}</td><td style='text-align:right'>{e(_fmt(res.metrics.get(k), '.4g'))}</td></tr>"
                    for k in WATERBODY_METRICS if k in res.metrics)
    cols = [c for c in WATERBODY_TABLE_COLUMNS if c in ranking]
    trows = "".join("<tr>" + "".join(f"<td>{e(_fmt(r[c], '.3f') if isinstance(r[c], float) else str(r[c]))}</td>"
                                     for c in cols) + "</tr>" for _, r in ranking.iterrows())
    notes = WATERBODY_NOTES.format(method=e(sel.storage_change), balance=e(balance_text(res.terms)),
                                   uncertainty=e(res.uncertainty_line), r1=_fmt(ex.r1, ".2f"),
                                   n_eff=_fmt(ex.n_eff, ".1f"),
                                   matched=" (P and E filtered with the same window)." if sel.matched else ".")
    warn = "".join(f"<li>{e(w)}</li>" for w in plots.waterbody_messages(res))
    tail = (f"<h2>Unmeasured exchange, mean and standard error</h2><table class='exchange'><tr><th>unit</th>"
            f"<th>mean</th><th>standard error</th></tr>{xrows}</table>"
            f"<h2>Closure metrics (mm/month over the outline)</h2><table class='metrics'>{mrows}</table>"
            f"<h2>Warnings</h2><ul>{warn or '<li>none</li>'}</ul>"
            f"<h2>Every P and E combination (ranked by {e(by)}; exchange per month, _se its standard error)</h2>"
            f"<table class='ranking' border='1' style='border-collapse:collapse'>"
            f"<tr>{''.join(f'<th>{c}</th>' for c in cols)}</tr>{trows}</table>"
            f"<h2>Method notes</h2>{notes}")
    return head, figs, tail


def write_report(catalog, ds, sel, out, *, overwrite: bool = False, by: str = "rmse") -> Path:
    """Write the HTML report atomically (refuses to overwrite unless asked, and any input of the catalog always)."""
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    check_output(out, overwrite=overwrite, protect=cat)
    text = report_html(cat, ds, sel, by=by)
    with atomic_path(out, overwrite=overwrite, protect=cat) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(out)
