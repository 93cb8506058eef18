"""Estimates by difference: one balance term from the others, with its propagated standard error.

    ET = P - Q - dS + inflows - outflows
    Q  = P - ET - dS + inflows - outflows      (an ungauged outlet, from a chosen combination)
    dS = P - ET - Q + inflows - outflows

(signs from the term table, `wbexplore.balance.terms`), at three scales:

- ``month``: the terms of the closure pipeline (`engine.closure_arrays`: window-matched fluxes where the
  options say so, the storage change of the chosen method), so the estimate is the unknown term as
  the window-matched balance sees it (mm/month);
- ``water_year``: sums over every whole water year of the period (12 months, every month estimated),
  mm per water year;
- ``long_term``: over whole water years the storage term is taken to vanish: ``ET = P - Q`` (+ flows),
  ``Q = P - ET``, and for ``dS`` the mean yearly storage change the fluxes imply; raw monthly totals,
  mean per year (mm/year). The storage change that was left out is reported beside it
  (``storage_change``, from the TWSA product, where it covers the years).

Standard errors come from the monthly error variances of each term (`uncertainty.product_error` for
the products, a relative gauge error for Q and the flows), independent between terms and between raw
months, pushed through the kernels that make each term (`storage.sum_variance`: window-matched months
share raw months, and a sum of storage differences telescopes, so their variances do not simply add).
Systematic errors (a product's bias) are not in them and do not average out over years: say so
wherever the band is shown.

Pure computation on the canonical series: no files, no prints.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from ..series import DISCHARGE, ROLE_DISCHARGE, ROLE_SOURCE
from . import uncertainty as unc
from .closure import Selection
from .engine import closure_arrays, water_year
from .storage import apply_kernel, kernel, sum_variance
from .terms import BASE_TERMS, SOURCE_COMPONENTS, balance_text

__all__ = ["TERMS", "OWN_COMPONENT", "SCALES", "DifferenceEstimate", "estimate_by_difference", "formula", "NOTE"]

TERMS = tuple(t.name for t in BASE_TERMS if t.component != "P")  # ("ET", "Q", "dS"): what P is balanced against
# the component whose chosen source gives the estimated term itself (not needed for the estimate; Q: the gauge)
OWN_COMPONENT = {"ET": "ET", "Q": None, "dS": "TWSA"}
SCALES = ("month", "water_year", "long_term")
NOTE = ("Standard errors propagate random errors, independent between terms and months; systematic product "
        "errors (bias) are not in them and do not average out over years.")
_PLACEHOLDER = "__by_difference_{}"


def formula(term: str, terms=BASE_TERMS) -> str:
    """The estimate as text, e.g. "ET = P - Q - dS" (+ each flow with its sign)."""
    if term not in TERMS:
        raise InputError(f"--term {term!r} is not one of {', '.join(TERMS)}")
    # every term of TERMS leaves the unit (sign -1): it equals the signed sum of the others
    return f"{term} = {balance_text(tuple(t for t in terms if t.name != term))}"


@dataclass(frozen=True)
class DifferenceEstimate:
    """An estimate by difference over one basin (see the module text).

    term : "ET" | "Q" | "dS"
    selection : the `Selection` (the unknown term's own source may be None)
    monthly : DataFrame indexed by month: ``estimate``, ``standard_error`` (mm/month), ``product`` (the term
        as the chosen product or gauge has it, window-matched like the estimate; NaN without one)
    annual : DataFrame indexed by ``water_year`` (named by the year it ends): ``estimate``,
        ``standard_error`` (mm per water year), ``months``, and for ET and Q ``storage_change`` with its
        ``storage_change_standard_error`` (the dS term the estimate includes)
    long_term : dict: ``water_years`` (count), ``years`` (their names: years left out between ``first`` and ``last``
        are not in it, so name ``years``, not the span), ``first``, ``last``, ``estimate`` and ``standard_error``
        (mm/year, storage term left out), ``storage_change`` (mm/year, mean over the years where the TWSA
        product gives it, None otherwise: the term that was left out), ``storage_change_years``, ``product``
        (mm/year: the chosen product or gauged Q of the term, its own totals, mean over ``product_years`` of the
        years: those where it has every month; None where it has none or none was chosen) and
        ``estimate_product_years`` (the estimate over those same years, to compare with it)
    uncertainty : component -> `uncertainty.ProductError` of each product used
    q_relative_error : relative gauge error of Q and of the flows
    formula : e.g. "ET = P - Q - dS"
    """

    term: str
    selection: Selection
    monthly: pd.DataFrame
    annual: pd.DataFrame
    long_term: dict
    uncertainty: dict
    q_relative_error: float
    formula: str
    area_km2: float = float("nan")
    basin_name: str = ""
    messages: tuple = field(default_factory=tuple)

    @property
    def uncertainty_source(self) -> dict:
        """component -> how its error was obtained (plus Q, a relative gauge error, when used)."""
        out = {c: e.method for c, e in self.uncertainty.items()}
        if self.term != "Q":
            out["Q"] = "gauge"
        return out


def _entering(terms, pick) -> tuple:
    """The terms without the flows that do not enter this unit (0 or missing in every month, by the schema)."""
    return tuple(t for t in terms if t.gridded or t.name == "Q" or np.any(np.nan_to_num(pick(f"{t.name}_raw")) != 0))


def _with_placeholders(ds: xr.Dataset, sel: Selection, term: str) -> tuple[xr.Dataset, dict]:
    """The series with an empty source for the unknown's component when none is chosen (its values are
    never used), and an empty discharge for Q when the series hold none; the sources for the pipeline."""
    sources = {c: getattr(sel, c) for c in SOURCE_COMPONENTS}
    comp = OWN_COMPONENT[term]
    add = {}
    nan = np.full((ds.sizes["basin"], ds.sizes["time"]), np.nan)
    if comp is not None and sources[comp] is None:
        name = _PLACEHOLDER.format(comp)
        add[name] = xr.Variable(("basin", "time"), nan, {"role": ROLE_SOURCE, "component": comp, "units": "mm"})
        sources[comp] = name
    if term == "Q" and DISCHARGE not in ds:
        add[DISCHARGE] = xr.Variable(("basin", "time"), nan, {"role": ROLE_DISCHARGE, "units": "mm/month"})
    for c, s in sources.items():
        if s is None:
            raise InputError(f"estimate of {term} needs a {c} source (--{c} SRC)")
    return (ds.assign(add) if add else ds), sources


def estimate_by_difference(ds: xr.Dataset, sel: Selection, term: str = "ET", *,
                           q_relative_error: float = unc.Q_RELATIVE_ERROR, uncertainty: str | None = None,
                           strict: bool = False) -> DifferenceEstimate:
    """Estimate ``term`` from the other terms of ``sel`` (monthly, per water year and long-term).

    Parameters
    ----------
    ds : canonical basin series
    sel : Selection
        Basin, sources and options (period, storage change, window matching, water-year start). The
        source of the unknown's own component may be None (ET or TWSA not needed); given, it is shown
        beside the estimate as ``product``.
    term : "ET" | "Q" | "dS"
    q_relative_error : relative standard error of gauged Q and of every flow (default 5%)
    uncertainty : "auto" | "stated" | "collocation" | "spread" (`uncertainty.product_error`; default auto)
    strict : refuse (`InputError`) instead of falling back to the spread when collocation cannot be
        estimated over the period (the command line's behaviour)

    Returns
    -------
    DifferenceEstimate
    """
    if term not in TERMS:
        raise InputError(f"--term {term!r} is not one of {', '.join(TERMS)}")
    method = unc.DEFAULT_METHOD if uncertainty is None else unc.check_method(uncertainty)
    series, sources = _with_placeholders(ds, sel, term)
    opts = sel.options()
    a = closure_arrays(series, opts, basins=[sel.basin], sources={c: [s] for c, s in sources.items()})
    months = a["months"]
    mask = opts.period(months)
    b = int(a["b"][0])
    terms = a["terms"]
    sm = opts.storage_change

    def pick(name):
        v = a[name]
        return v[0, 0] if v.ndim == 3 else v[0]

    own = OWN_COMPONENT[term]
    errors = {}
    kw = {"period": mask, "min_valid_fraction": opts.min_valid_fraction, "method": method, "strict": strict}
    for c in SOURCE_COMPONENTS:
        if c == own:
            continue
        values = a["TWSA"][0, 0] if c == "TWSA" else a[f"{c}_raw"][0, 0]
        errors[c] = unc.product_error(series, sources[c], b, values=values, **kw)
    # raw monthly variance and kernel of every known term
    known = []
    for t in terms:
        if t.name == term:
            continue
        if t.gridded:
            var = errors[t.component].variance
        else:
            var = unc.gauge_error(pick(f"{t.name}_raw"), q_relative_error) ** 2
        known.append((t, var, kernel(t.name, sm, matched=opts.matched)))
    sign = {t.name: t.sign for t in terms}
    acc = None
    for t, _v, _w in known:
        v = t.sign * pick(t.name)
        acc = v if acc is None else acc + v
    est = -acc / sign[term]
    var = sum(apply_kernel(v, tuple(x * x for x in w)) for _t, v, w in known)
    product = pick(term)  # NaN where no product or gauge was chosen (the placeholders are empty)
    monthly = pd.DataFrame({"estimate": est[mask], "standard_error": np.sqrt(var)[mask], "product": product[mask]},
                           index=pd.Index(months[mask], name="month"))

    # water years: whole, inside the period, every month estimated
    wy = water_year(months, opts.water_year_start)
    rows = []
    ds_term = next(t for t in terms if t.storage)
    for y in np.unique(wy[mask]):
        sel_y = (wy == y) & mask
        if sel_y.sum() != 12 or not np.all(np.isfinite(est[sel_y])):
            continue
        row = {"water_year": int(y), "months": 12, "estimate": float(est[sel_y].sum()),
               "standard_error": float(np.sqrt(sum(sum_variance(v, w, sel_y) for _t, v, w in known)))}
        if term != "dS":
            dsv = next(v for t, v, _w in known if t is ds_term)
            row["storage_change"] = float(pick("dS")[sel_y].sum())
            row["storage_change_standard_error"] = float(np.sqrt(sum_variance(dsv, kernel("dS", sm), sel_y)))
        rows.append(row)
    cols = ["water_year", "months", "estimate", "standard_error"] + (
        ["storage_change", "storage_change_standard_error"] if term != "dS" else [])
    annual = pd.DataFrame(rows, columns=cols).set_index("water_year")

    # long term: whole water years where every known flux is there; the storage term left out
    fluxes = [(t, v) for t, v, _w in known if not t.storage]
    years = []
    for y in np.unique(wy[mask]):
        sel_y = (wy == y) & mask
        if sel_y.sum() == 12 and all(np.all(np.isfinite(pick(f"{t.name}_raw")[sel_y])) for t, _v in fluxes):
            years.append(int(y))
    lt = {"water_years": len(years), "years": years, "first": years[0] if years else None, "last": years[-1] if years else None,
          "estimate": float("nan"), "standard_error": float("nan"), "storage_change": None, "storage_change_years": 0,
          "product": None, "product_years": 0, "estimate_product_years": None}
    if years:
        def complete(x) -> list:  # those of the years where ``x`` has every month
            return [y for y in years if np.all(np.isfinite(x[(wy == y) & mask]))]

        def yearly_mean(x, ys) -> float:  # mean yearly total of ``x`` over the years ``ys``
            return float(x[np.isin(wy, ys) & mask].sum() / len(ys))

        def estimate_mean(ys) -> float:  # the estimate with the storage term left out, mean over the years ``ys``
            sel_ys = np.isin(wy, ys) & mask
            return float(sum(-t.sign * pick(f"{t.name}_raw")[sel_ys].sum() for t, _v in fluxes) / sign[term] / len(ys))

        sel_all = np.isin(wy, years) & mask
        lt["estimate"] = estimate_mean(years)
        lt["standard_error"] = float(np.sqrt(sum(v[sel_all].sum() for _t, v in fluxes)) / len(years))
        if term != "dS":
            ds_years = complete(pick("dS"))
            if ds_years:
                lt["storage_change"] = yearly_mean(pick("dS"), ds_years)
            lt["storage_change_years"] = len(ds_years)
        # the chosen product (or gauge) of the term as it stands (its own totals, not window-matched) over those of
        # the years where it has every month, and the estimate over the same years: the pair to compare
        product = pick("dS" if term == "dS" else f"{term}_raw")
        p_years = complete(product)
        lt["product_years"] = len(p_years)
        if p_years:
            lt["product"] = yearly_mean(product, p_years)
            lt["estimate_product_years"] = estimate_mean(p_years)
    msgs = [f"uncertainty of {c} ({e.source}): {e.note}" for c, e in errors.items()]
    if not years:
        msgs.append("no whole water year in the period: no long-term estimate")
    sel_out = sel.replace(**{c: (None if str(s).startswith("__") else s) for c, s in sources.items()})
    return DifferenceEstimate(
        term=term, selection=sel_out, monthly=monthly, annual=annual, long_term=lt, uncertainty=errors,
        q_relative_error=float(q_relative_error), formula=formula(term, _entering(terms, pick)),
        area_km2=float(series["basin_area_km2"].values[b]) if "basin_area_km2" in series.coords else float("nan"),
        basin_name=str(series["basin_name"].values[b]) if "basin_name" in series.coords else str(sel.basin),
        messages=tuple(msgs))
