"""Texts for readers shared by the explorer and the report: summaries, warnings (no panel, no bokeh).

Every function takes a `SelectionResult` (or the series) and formats it; nothing here computes a balance
term. Names and units come from `wbexplore.names`; rules that decide a warning live in `wbexplore.balance`
(`balance.cautions`). Every text from a file (basin names, ids) is escaped (`wbexplore.escape`).
"""

from __future__ import annotations

import re

import numpy as np

from .balance.cautions import storage_resolution_warning
from .balance.terms import SOURCE_COMPONENTS
from .balance.uncertainty import band_text
from .escape import html_text, md_text
from .names import METRIC_NAMES, metric_name, option_label
from .plots import (  # plots imports bokeh only inside its drawing code
    EXCHANGE_LABEL,
    waterbody_messages,
)
from .series import FLOW_PREFIX

__all__ = ["COVERAGE_MIN", "estimate_html", "estimate_lines", "summary_html", "unsigned_zero", "warnings_for", "warnings_markdown", "waterbody_summary_html", "waterbody_warnings_markdown"]

COVERAGE_MIN = 0.9  # a product covering less of the basin than this share on average is named in the warnings


def _fmt(v, spec):
    return "n/a" if v is None or not np.isfinite(v) else unsigned_zero(format(v, spec))


def unsigned_zero(text: str) -> str:
    """A number rounded to zero without its sign ("-0" -> "0", "+0.0" -> "0.0"): a reader takes "-0" for a
    negative value."""
    return text[1:] if re.fullmatch(r"[-+]0(\.0*)?", text) else text


def markdown_list(lines, empty: str = "No warnings for this selection.") -> str:
    """``lines`` as a Markdown list, each escaped to literal text (``empty`` when there is none)."""
    return "\n".join(f"- {md_text(w)}" for w in lines) or empty


def warnings_markdown(result, series, *, notes=()) -> str:
    """`warnings_for` as a Markdown list, then ``notes`` (lines from the state, e.g. why no merged source is
    offered; empty ones left out), each escaped to literal text."""
    return markdown_list([*warnings_for(result, series), *(n for n in notes if n)])


def warnings_for(result, series) -> list[str]:
    """Reader-facing warnings for a selection (size vs storage resolution, coverage, gaps). The uncertainty
    messages are left to the summary's one line on the band (`summary_html`)."""
    out = []
    size = storage_resolution_warning(result.area_km2)
    if size:
        out.append(size)
    f = result.frame
    for comp in SOURCE_COMPONENTS:
        vf = f[f"valid_fraction_{comp}"].replace(0, np.nan).mean()
        if np.isfinite(vf) and vf < COVERAGE_MIN:
            out.append(f"{comp} product covers only {vf:.0%} of the basin on average.")
    out.extend(m for m in result.messages if not m.startswith("uncertainty"))
    return out


def summary_html(result, *, metric: str = "rmse") -> str:
    """The selection's metrics as a small HTML table (every text from a file escaped)."""
    m = result.metrics
    sel = result.selection
    # (metric key, css name kept for scripts and tests, number format); names and units from `wbexplore.names`
    shown = (("rel_imbalance", "relative-imbalance", ".1f"), ("bias", "mean-residual", ".2f"), ("rmse", "RMSE", ".2f"),
             ("kge", "KGE", ".3f"), ("nse", "NSE", ".3f"), ("pbias", "PBIAS", ".1f"))
    rows = [(metric_name(k), css, f"{_fmt(m[k], spec)} {METRIC_NAMES[k].units}".strip(), METRIC_NAMES[k].help)
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
    """A water body's warnings (`waterbody_messages`) as a Markdown list, each escaped to literal text."""
    return markdown_list(waterbody_messages(result))


def waterbody_summary_html(result, exchange) -> str:
    """A water body's selection: the unmeasured exchange (mean and standard error, m3/s and hm3/month; positive =
    unmeasured loss) and the closure's spread, as a small HTML table (every text from a file escaped)."""
    m, se, sel = exchange.mean, exchange.standard_error, result.selection
    rows = [("unmeasured exchange", f"{_fmt(m['m3/s'], '.2f')} ± {_fmt(se['m3/s'], '.2f')} m3/s"),
            ("per month", f"{_fmt(m['hm3'], '.2f')} ± {_fmt(se['hm3'], '.2f')} hm3"),
            ("RMSE", f"{_fmt(result.metrics['rmse'], '.2f')} mm/month"),
            ("valid months", str(result.metrics["n_valid"])), ("outline area", f"{result.area_km2:,.0f} km2")]
    cells = "".join(f"<tr><td>{k}</td><td style='text-align:right'><b class='wbx-{k.replace(' ', '-')}'>{v}</b></td></tr>"
                    for k, v in rows)
    e = html_text
    return (f"<div class='wbx-summary'><h4 style='margin:2px 0'>{e(result.basin_name)} ({e(sel.basin)}), water body</h4>"
            f"<div>P {e(sel.P)} / E {e(sel.ET)} / storage from levels</div><table>{cells}</table>"
            f"<div><i>{e(EXCHANGE_LABEL)}; ± 1 standard error</i></div></div>")


def estimate_lines(est) -> list[str]:
    """An estimate by difference (`balance.estimate.DifferenceEstimate`) for a reader, one line each: the formula
    and the long-term value over whole water years with the storage change left out, the chosen product or gauge
    over the same years, the band's error sources, and what the standard error leaves out (`estimate.NOTE`)."""
    from .balance.estimate import NOTE
    from .io.estimates import water_years_text
    from .plots import estimate_is_merged, estimate_label

    lt, t = est.long_term, est.term
    if not lt["water_years"]:
        head = f"{est.formula}: no whole water year in the period, so no long-term value (monthly values only)."
    else:
        left = ""
        if t != "dS":
            left = (f"; storage change left out: {_fmt(lt['storage_change'], '+.0f')} mm/year over "
                    f"{lt['storage_change_years']} of the years" if lt["storage_change"] is not None
                    else "; storage change left out (not known over these years)")
        # over whole water years the storage term is left out: "ET = P - Q" (the formula without its "- dS")
        head = (f"Long-term {est.formula.replace(' - dS', '') if t != 'dS' else est.formula}: "
                f"{_fmt(lt['estimate'], '.0f')} ± {_fmt(lt['standard_error'], '.0f')} mm/year (± 1 standard error) over "
                f"{lt['water_years']} whole water years ({water_years_text(lt['years'])}){left}.")
    lines = [head]
    shown = estimate_label(est)
    if lt["water_years"] and shown and lt.get("product") is not None:
        lines.append(f"{shown[:1].upper() + shown[1:]}: {_fmt(lt['product'], '.0f')} mm/year over {lt['product_years']} "
                     f"of those years, where it has every month (the estimate over the same years: "
                     f"{_fmt(lt['estimate_product_years'], '.0f')} mm/year).")
    elif lt["water_years"] and shown:
        lines.append(f"{shown[:1].upper() + shown[1:]}: no whole water year of its own in those years to compare.")
    if estimate_is_merged(est):
        lines.append("The merged source closes the budget by construction: its agreement with the estimate is not a "
                     "check of either.")
    lines.append(estimate_band_text(est))
    m = est.monthly
    unknown = m.index[m["estimate"].notna() & m["standard_error"].isna()]
    if len(unknown):  # e.g. the spread of a component where only one of its products has the month
        lines.append(f"No band in {len(unknown)} month{'s' if len(unknown) > 1 else ''} with an estimate (first "
                     f"{unknown[0]:%Y-%m}, last {unknown[-1]:%Y-%m}): the error of a term is unknown there.")
    lines.append(NOTE)
    return lines


def estimate_band_text(est) -> str:
    """One line: each known term's error in the estimate's band (`uncertainty.band_text`), the gauge's for Q and for
    every flow that enters the balance."""
    text = band_text(est.uncertainty, q_relative_error=None if est.term == "Q" else est.q_relative_error)
    if FLOW_PREFIX in est.formula:  # a flow enters the balance (`estimate.formula` names every one)
        text += f"; flows {est.q_relative_error:.0%} of flow (gauges)"
    return text + "."


def estimate_html(est, *, note: str = "") -> str:
    """`estimate_lines` as a small HTML block (every text from a file escaped); ``note`` where ``est`` is None."""
    e = html_text
    if est is None:
        return f"<div class='wbx-estimate'><i>No estimate by difference: {e(note)}</i></div>"
    lines = estimate_lines(est)
    return (f"<div class='wbx-estimate'><b>{e(est.formula)}</b> (by difference, {e(est.basin_name)})"
            + "".join(f"<div>{e(x)}</div>" for x in lines) + "</div>")
