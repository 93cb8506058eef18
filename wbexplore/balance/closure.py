"""One combination over one basin and period: series, uncertainty and metrics.

Inputs are the canonical basin series (see `wbexplore.pipeline`); nothing here
reads files. Everything the explorer shows for a selection comes from
`compute_selection`.
"""

from __future__ import annotations

import re
from dataclasses import asdict, dataclass, field, fields, replace

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from ..series import STORAGE_STATE, is_waterbody, source_ids, valid_fraction_name
from ..units import mm_per_month_to_flow_m3s, mm_to_m3
from .engine import (ENSEMBLE_PREFIX, basin_index, check_source, closure_arrays, combine, metrics_arrays,
                     water_year, with_ensembles)
from .options import MAX_LAG_MONTHS, OPTION_NAMES, ClosureOptions, check_lag, period_mask
from . import uncertainty as unc
from .storage import apply_kernel, storage_note, variance_kernels
from .terms import BASE_TERMS, SOURCE_COMPONENTS, Q as Q_TERM, term_signs


def flow_terms_of(terms) -> tuple:
    """The flow rows (component "flow") of a balance's term rows."""
    return tuple(t for t in terms if t.component == "flow")

__all__ = [
    "Selection", "SelectionResult", "compute_selection", "component_terms", "period_mask",
    "with_ensembles", "source_ids", "UNIT_SYSTEMS", "to_unit_system", "Q_RELATIVE_ERROR",
    "water_year", "month_labels", "MAX_LAG_MONTHS", "check_lag", "ClosureOptions", "ENSEMBLE_PREFIX",
]

UNIT_SYSTEMS = ("mm", "m3", "m3/s", "hm3")

Q_RELATIVE_ERROR = unc.Q_RELATIVE_ERROR  # re-exported: the value lives with the other errors (uncertainty.py)


@dataclass(frozen=True)
class Selection:
    """A combination of sources for one basin, with its closure options.

    start, end : "YYYY-MM" or None (whole series)
    storage_change : "central" | "backward" | "forward"
    matched : filter every flux with the kernel of the storage difference (see `storage`)
    fill_gaps : interpolate TWSA gaps linearly (flagged), default off
    lag : months by which gauged Q is compared later than the basin terms (0 = none)
    min_valid_fraction : months where a source covers less of the basin are treated as missing
    water_year_start : first calendar month of the water year (1 = calendar year)
    area : water bodies: "outline" (default) or "surface" (the area at the month's level), see `ClosureOptions`

    The option fields are those of `ClosureOptions` (``options()`` gives it, ``from_options`` builds a
    selection from one).
    """

    basin: str
    P: str
    ET: str
    TWSA: str
    start: str | None = None
    end: str | None = None
    storage_change: str = "central"
    matched: bool = True
    fill_gaps: bool = False
    lag: int = 0
    min_valid_fraction: float = 0.5
    water_year_start: int = 1
    area: str = "outline"

    def to_dict(self) -> dict:
        return asdict(self)

    def replace(self, **kw) -> "Selection":
        return replace(self, **kw)

    def options(self, **kw) -> ClosureOptions:
        """The selection's `ClosureOptions` (``kw``: options a selection does not hold, e.g. min_valid)."""
        own = {f.name: getattr(self, f.name) for f in fields(self) if f.name in OPTION_NAMES}
        return ClosureOptions(**own, **kw)

    def sources(self) -> dict:
        """Component -> [source id] (the form `closure_terms` takes)."""
        return {c: [getattr(self, c)] for c in SOURCE_COMPONENTS}

    @classmethod
    def from_options(cls, basin: str, options: ClosureOptions, **sources) -> "Selection":
        """A selection of ``sources`` (P=, ET=, TWSA=) for ``basin`` with every option of ``options`` that a
        selection holds."""
        own = {f.name: getattr(options, f.name) for f in fields(cls) if f.name in OPTION_NAMES}
        return cls(basin=basin, **sources, **own)


@dataclass
class SelectionResult:
    selection: Selection
    frame: pd.DataFrame  # one row per month of the period (mm/month)
    metrics: dict
    area_km2: float
    basin_name: str
    messages: list = field(default_factory=list)
    terms: tuple = BASE_TERMS  # the balance's `Term` rows, flows included (frame columns by name)
    # component -> `uncertainty.ProductError`: where each sigma_<component> came from
    uncertainty: dict = field(default_factory=dict)
    q_relative_error: float = Q_RELATIVE_ERROR  # of gauged Q and of every flow
    storage_state: str | None = None  # a water body's (`series.STORAGE_STATE`); None for a basin

    @property
    def storage_note(self) -> str | None:
        """What outputs say instead of the storage-change options where these do not apply (`storage.storage_note`)."""
        return storage_note(self.storage_state)

    @property
    def uncertainty_line(self) -> str:
        """Where each term's uncertainty comes from, one line (CSV headers, notes, reports)."""
        return unc.uncertainty_text(self.uncertainty, q_relative_error=self.q_relative_error)

    @property
    def uncertainty_source(self) -> dict:
        """component -> how its error was obtained ("stated", "collocation", "spread", "none"; "posterior" for a
        merged source)."""
        return {c: e.method for c, e in self.uncertainty.items()}

    @property
    def n_valid(self) -> int:
        return int(self.metrics.get("n_valid", 0))


def _values(ds: xr.Dataset, name: str) -> np.ndarray:
    return ds.variables[name].values


def month_labels(ds: xr.Dataset) -> pd.DatetimeIndex:
    return pd.DatetimeIndex(ds["time"].values)


_basin_index = basin_index
_source = check_source


def _valid(ds, sid, b, min_vf):
    name = valid_fraction_name(sid)
    if name in ds.variables:
        return _values(ds, name)[b] >= min_vf
    return np.ones(ds.sizes["time"], dtype=bool)


def component_terms(ds: xr.Dataset, sel: Selection) -> dict:
    """Full-length monthly terms of a selection (mm/month; TWSA in mm), before the period cut.

    Keys: P, ET, Q, TWSA, dS, the window-matched P_w, ET_w, Q_w, ``filled`` (TWSA months interpolated on
    request), and each flow by its variable name (window-matched). A view of `closure_arrays` (kept for
    old callers).
    """
    a = closure_arrays(ds, sel.options(), basins=[sel.basin], sources=sel.sources())
    out = {"P": a["P_raw"][0, 0], "ET": a["ET_raw"][0, 0], "TWSA": a["TWSA_raw"][0, 0], "Q": a["Q_raw"][0],
           "TWSA_used": a["TWSA"][0, 0], "filled": a["filled"][0, 0], "dS": a["dS"][0, 0],
           "P_w": a["P"][0, 0], "ET_w": a["ET"][0, 0], "Q_w": a["Q"][0]}
    for t in flow_terms_of(a["terms"]):
        out[t.name] = a[t.name][0]
    return out


def compute_selection(ds: xr.Dataset, sel: Selection, *, q_relative_error: float = Q_RELATIVE_ERROR,
                      covariance=None, min_valid: int = 24, uncertainty: str | None = None) -> SelectionResult:
    """Series, uncertainty and metrics of one selection (a view of the closure pipeline, `closure_arrays`).

    Parameters
    ----------
    ds : canonical basin series
    sel : Selection
    q_relative_error : relative standard error of gauged Q and of every gauged flow (default 5%)
    covariance : optional 4x4 array, correlation matrix of the errors of (P, ET, Q, dS);
        default independent errors (flows: always independent).
    min_valid : fewer valid months than this and the metrics are NaN (with a message)
    uncertainty : "auto" (default, `uncertainty.DEFAULT_METHOD`) | "stated" | "collocation" | "spread"
        Where each product's error comes from (`wbexplore.balance.uncertainty`); "auto" falls back to the
        spread when collocation cannot be estimated over the period, and says so in ``messages``.

    Returns
    -------
    SelectionResult with ``frame`` columns (mm/month unless noted):
    P, ET, Q, dS (window-matched where ``sel.matched``), TWSA (mm), residual, Qhat,
    P_raw, ET_raw, Q_raw, residual_unmatched, sigma_P, sigma_ET, sigma_Q, sigma_dS, sigma_residual,
    beyond_2sigma (bool), valid (bool), twsa_filled (bool), valid_fraction_P/ET/TWSA (0..1),
    disagreement_P/ET/TWSA (standard deviation of the component's products, mm/month, TWSA mm: the
    "product disagreement", whatever the uncertainty source); with flows,
    each flow ``flow_<id>`` (window-matched), ``flow_<id>_raw``, ``sigma_flow_<id>`` and ``net_flow``
    (inflows - outflows).
    """
    opts = sel.options(min_valid=min_valid)
    a = closure_arrays(ds, opts, basins=[sel.basin], sources=sel.sources())
    ds = a["ds"]
    months = a["months"]
    mask = opts.period(months)
    b = int(a["b"][0])
    flows = flow_terms_of(a["terms"])
    no_q = Q_TERM.name not in {t.name for t in a["terms"]}  # a water body: no gauged discharge
    P, ET, Q, dS = a["P"][0, 0], a["ET"][0, 0], a["Q"][0], a["dS"][0, 0]
    P_raw, ET_raw, Q_raw, M_raw, M_used = a["P_raw"][0, 0], a["ET_raw"][0, 0], a["Q_raw"], a["TWSA_raw"][0, 0], a["TWSA"][0, 0]
    Q_raw = Q_raw[0]
    net = None if a["net_flow"] is None else a["net_flow"][0]
    terms_ = a["terms"]
    on_sources = {t.name for t in terms_ if t.component in SOURCE_COMPONENTS}  # (basin, source, time) arrays
    res, qhat = combine({t.name: (a[t.name][0, 0] if t.name in on_sources else a[t.name][0]) for t in terms_}, terms_)
    res_unmatched, _ = combine({t.name: (a[t.name][0, 0] if t.storage else a[f"{t.name}_raw"][0, 0]
                                         if t.name in on_sources else a[f"{t.name}_raw"][0]) for t in terms_}, terms_)
    method = unc.DEFAULT_METHOD if uncertainty is None else uncertainty
    # one basin, period and valid fraction: each component's products stacked, collocated and spread once
    shared: dict = {}
    kw = {"period": mask, "min_valid_fraction": sel.min_valid_fraction, "method": method, "cache": shared}
    errors = {"P": unc.product_error(ds, sel.P, b, values=P_raw, **kw),
              "ET": unc.product_error(ds, sel.ET, b, values=ET_raw, **kw),
              "TWSA": unc.product_error(ds, sel.TWSA, b, values=M_used, **kw)}
    sQ = unc.gauge_error(Q_raw, q_relative_error)

    # the unit's own kernels (an end-of-month water body: the month itself, storage differenced month by month)
    state = str(ds[STORAGE_STATE].values[b]) if is_waterbody(ds) else None
    flux_w, ds_w = variance_kernels(state, sel.storage_change, matched=sel.matched)

    def flux_var(v):
        return apply_kernel(v, flux_w)

    vP, vE, vQ = flux_var(errors["P"].variance), flux_var(errors["ET"].variance), flux_var(sQ**2)
    vS = apply_kernel(errors["TWSA"].variance, ds_w)
    sig = np.sqrt(np.stack([vP, vE, vQ, vS]))
    g = term_signs(BASE_TERMS)
    if covariance is None:
        vr = np.sum(sig**2, axis=0)
    else:
        C = np.asarray(covariance, float)
        if C.shape != (4, 4):
            raise InputError("covariance must be a 4x4 correlation matrix for (P, ET, Q, dS)")
        vr = np.einsum("i,it,ij,jt,j->t", g, sig, C, sig, g)
    sig_flows = {}
    for t in flows:
        sig_flows[t.name] = np.sqrt(flux_var(unc.gauge_error(a[f"{t.name}_raw"][0], q_relative_error) ** 2))
        vr = vr + sig_flows[t.name] ** 2
    sr = np.sqrt(vr)
    valid = np.isfinite(res)
    cols = {
        "P": P, "ET": ET, "Q": Q, "dS": dS, "TWSA": M_raw, "residual": res, "Qhat": qhat,
        "P_raw": P_raw, "ET_raw": ET_raw, "Q_raw": Q_raw,
        "residual_unmatched": res_unmatched,
        "sigma_P": sig[0], "sigma_ET": sig[1], "sigma_Q": sig[2], "sigma_dS": sig[3], "sigma_residual": sr,
        "beyond_2sigma": valid & np.isfinite(sr) & (np.abs(res) > 2 * sr),
        "valid": valid, "twsa_filled": a["filled"][0, 0],
    }
    for comp in SOURCE_COMPONENTS:
        name = valid_fraction_name(getattr(sel, comp))
        cols[f"valid_fraction_{comp}"] = (_values(ds, name)[b] if name in ds.variables
                                          else np.full(months.size, np.nan))
    for comp in SOURCE_COMPONENTS:
        cols[f"disagreement_{comp}"] = unc.product_disagreement(ds, comp, b, min_valid_fraction=sel.min_valid_fraction,
                                                                cache=shared)
    for t in flows:
        cols[t.name] = a[t.name][0]
        cols[f"{t.name}_raw"] = a[f"{t.name}_raw"][0]
        cols[f"sigma_{t.name}"] = sig_flows[t.name]
    if flows:
        cols["net_flow"] = net
    # one frame built at once (inserting columns one by one costs more than the balance itself)
    pm = months[mask]
    frame = pd.DataFrame({k: v[mask] for k, v in cols.items()}, index=pd.Index(pm, name="month"))
    metrics = metrics_arrays(res[mask], qhat[mask], None if no_q else Q[mask], P[mask], pm, opts, explain=True)
    undefined = str(metrics.pop("undefined"))
    metrics = {k: float(v) if np.ndim(v) == 0 else v for k, v in metrics.items()}
    metrics["n_valid"] = int(metrics["n_valid"])
    metrics["n_beyond_2sigma"] = int(cols["beyond_2sigma"][mask].sum())
    msgs = []
    n = metrics["n_valid"]
    terms = {"P": P_raw, "ET": ET_raw, "dS": a["dS"][0, 0], "Q": Q_raw}
    if n == 0:
        msgs.append(_no_overlap_message(ds, sel, terms, mask, months))
    elif n < min_valid:
        msgs.append(f"only {n} valid months in {pm[0]:%Y-%m}..{pm[-1]:%Y-%m} (at least {min_valid} needed to score)")
    n_gap = int((~np.isfinite(terms["dS"][mask]) & np.isfinite(terms["P"][mask])).sum())
    if n_gap:
        msgs.append(f"{n_gap} months without storage change (TWSA gap or series edge)")
    if undefined:
        msgs.append(undefined)
    filled = a["filled"][0, 0]
    if filled[mask].any():
        msgs.append(f"{int(filled[mask].sum())} TWSA months interpolated across a gap (flagged)")
    return SelectionResult(selection=sel, frame=frame, metrics=metrics,
                           area_km2=float(_values(ds, "basin_area_km2")[b]) if "basin_area_km2" in ds.coords else float("nan"),
                           basin_name=str(_values(ds, "basin_name")[b]) if "basin_name" in ds.coords else str(sel.basin),
                           messages=msgs + [f"uncertainty: P {errors['P'].method}, ET {errors['ET'].method}, "
                                            + (f"TWSA {errors['TWSA'].method}, " if state is None else
                                               "storage: no error stated for levels (sigma_dS and sigma_residual "
                                               "left empty), ")
                                            + (f"flows {q_relative_error:.0%} of flow" if no_q
                                               else f"Q {q_relative_error:.0%} of flow")]
                           + [f"uncertainty of {c} ({e.source}): {e.note}" for c, e in errors.items()
                              if "not used" in e.note or "cannot separate" in e.note],
                           terms=a["terms"], uncertainty=errors, q_relative_error=float(q_relative_error),
                           storage_state=state)


def _span(months, ok):
    idx = np.flatnonzero(ok)
    if idx.size == 0:
        return "no data"
    return f"{months[idx[0]]:%Y-%m}..{months[idx[-1]]:%Y-%m}"


def _no_overlap_message(ds, sel, terms, mask, months) -> str:
    pm = months[mask]
    parts = []
    for name, key in ((sel.P, "P"), (sel.ET, "ET"), (sel.TWSA, "dS"), ("discharge", "Q")):
        ok = np.isfinite(terms[key])
        inside = int(ok[mask].sum())
        parts.append(f"{name} has {inside} months here (data {_span(months, ok)})")
    return (f"no month in {pm[0]:%Y-%m}..{pm[-1]:%Y-%m} has P, ET, storage change and discharge together: "
            + "; ".join(parts))


_FLUX_COLS = (*(t.name for t in BASE_TERMS), "residual", "Qhat", *(f"{t.name}_raw" for t in BASE_TERMS if not t.storage),
              "residual_unmatched", *(f"sigma_{t.name}" for t in BASE_TERMS), "sigma_residual", "net_flow")
_FLOW_COL = re.compile(r"(sigma_)?flow_.*")


def to_unit_system(frame: pd.DataFrame, area_km2: float, system: str) -> pd.DataFrame:
    """Flux columns of a selection frame in mm/month ("mm"), m3 per month ("m3"), mean m3/s ("m3/s") or
    hm3 per month ("hm3", 1 hm3 = 1e6 m3: the scale of a reservoir's terms).

    TWSA stays in mm (a storage, not a flux) for "mm"; it becomes m3 for "m3" and "m3/s", hm3 for "hm3".
    """
    if system not in UNIT_SYSTEMS:
        raise InputError(f"unit system {system!r} is not one of {', '.join(UNIT_SYSTEMS)}")
    if system == "mm":
        return frame.copy()
    out = frame.copy()
    area_m2 = area_km2 * 1e6
    months = pd.DatetimeIndex(frame.index)
    for c in [c for c in out if c in _FLUX_COLS or _FLOW_COL.fullmatch(str(c))]:
        if c in out:
            out[c] = mm_per_month_to_flow_m3s(out[c].values, months, area_m2) if system == "m3/s" else \
                mm_to_m3(out[c].values, area_m2) / (1e6 if system == "hm3" else 1.0)
    if "TWSA" in out:
        out["TWSA"] = mm_to_m3(out["TWSA"].values, area_m2) / (1e6 if system == "hm3" else 1.0)
    return out
