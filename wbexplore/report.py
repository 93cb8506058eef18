"""Self-contained HTML report of one selection (no network needed to view it).

The explorer's bokeh figures (`wbexplore.plots`, drawn by the same code) with their JavaScript
inlined, plus the selection's metrics, the ranking table, method notes and the caution.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from . import __version__
from .balance import compute_selection, rank
from .balance.combos import RANK_TABLE_COLUMNS
from .balance.terms import balance_text
from .escape import html_text
from .io.catalog import Catalog, open_catalog
from .io.writers import CAUTION, atomic_path, check_output
from .names import METRIC_NAMES, metric_label

__all__ = ["write_report", "report_html"]

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


def _fmt(v, spec=".3f"):
    try:
        return "n/a" if v is None or not np.isfinite(float(v)) else format(float(v), spec)
    except (TypeError, ValueError):
        return str(v)


def report_html(cat: Catalog, ds, sel, *, by: str = "rmse") -> str:
    from bokeh.embed import file_html
    from bokeh.layouts import column
    from bokeh.models import Div
    from bokeh.resources import INLINE

    from . import plots
    from .explorer import views
    from .pipeline import load_basins

    res = compute_selection(ds, sel)
    ranking = rank(ds, sel.basin, sel.options(), by=by)
    basins = load_basins(cat)
    import pandas as pd

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
    layout = column(Div(text=head, width=950), *figs, Div(text=tail, width=950))
    out = file_html(layout, resources=INLINE, title=f"wbexplore report {sel.basin}{' (incremental)' if incremental else ''}")
    # panel (once imported in the process) registers a server-relative module shim, and once a Tabulator
    # widget exists in the process (an explorer in the same notebook) its stylesheet: a standalone
    # file cannot load them and does not need them: drop both so the file makes no request at all
    out = re.sub(r'<script src="static/extensions/[^"]*"></script>\n?', "", out)
    return re.sub(r'<link[^>]*href="static/extensions/[^"]*"[^>]*>\n?', "", out)


def write_report(catalog, ds, sel, out, *, overwrite: bool = False, by: str = "rmse") -> Path:
    """Write the HTML report atomically (refuses to overwrite unless asked, and any input of the catalog always)."""
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    check_output(out, overwrite=overwrite, protect=cat)
    text = report_html(cat, ds, sel, by=by)
    with atomic_path(out, overwrite=overwrite, protect=cat) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(out)
