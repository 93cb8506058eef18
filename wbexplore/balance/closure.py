"""One combination over one basin and period: series, uncertainty and metrics.

Inputs are the canonical basin series (see `wbexplore.pipeline`); nothing here
reads files. Everything the explorer shows for a selection comes from
`compute_selection`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, replace

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from ..units import mm_per_month_to_flow_m3s, mm_to_m3
from .metrics import compute_metrics
from .storage import (METHODS, fill_gaps, match_window, match_window_variance, shift_later, storage_change,
                      storage_change_variance)

__all__ = [
    "Selection", "SelectionResult", "compute_selection", "component_terms", "period_mask",
    "with_ensembles", "source_ids", "UNIT_SYSTEMS", "to_unit_system", "Q_RELATIVE_ERROR",
    "water_year", "month_labels", "MAX_LAG_MONTHS", "check_lag",
]

UNIT_SYSTEMS = ("mm", "m3", "m3/s")
# Gauged Q is compared at most a year later than the basin terms: a longer routing delay is not a
# monthly water balance any more, and each month of lag shortens the compared period.
MAX_LAG_MONTHS = 12


def check_lag(lag) -> int:
    """The discharge lag in months (0..`MAX_LAG_MONTHS`); `InputError` otherwise (one message for every caller)."""
    if isinstance(lag, bool) or not isinstance(lag, (int, np.integer)) or not 0 <= lag <= MAX_LAG_MONTHS:
        raise InputError(f"lag {lag} must be between 0 and {MAX_LAG_MONTHS} months")
    return int(lag)

# Relative error of gauged monthly discharge: a few percent for a rated station (common practice;
# the 5% used here is from memory of typical stage-discharge uncertainty, not from a standard).
Q_RELATIVE_ERROR = 0.05
ENSEMBLE_PREFIX = "ensemble_"


@dataclass(frozen=True)
class Selection:
    """A combination of sources for one basin and period.

    start, end : "YYYY-MM" or None (whole series)
    storage_change : "central" | "backward" | "forward"
    matched : filter P, ET and Q with the kernel of the storage difference (see `storage`)
    fill_gaps : interpolate TWSA gaps linearly (flagged), default off
    lag : months by which gauged Q is compared later than the basin terms (0 = none)
    min_valid_fraction : months where a source covers less of the basin are treated as missing
    water_year_start : first calendar month of the water year (1 = calendar year)
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

    def to_dict(self) -> dict:
        return asdict(self)

    def replace(self, **kw) -> "Selection":
        return replace(self, **kw)


@dataclass
class SelectionResult:
    selection: Selection
    frame: pd.DataFrame  # one row per month of the period (mm/month)
    metrics: dict
    area_km2: float
    basin_name: str
    messages: list = field(default_factory=list)

    @property
    def n_valid(self) -> int:
        return int(self.metrics.get("n_valid", 0))


def source_ids(ds: xr.Dataset, component: str) -> list[str]:
    """Source variables of one component, in dataset order (uses Variables, not DataArrays: fast)."""
    names = ds.data_vars
    return [str(n) for n, v in ds.variables.items()
            if n in names and v.attrs.get("role") == "source" and v.attrs.get("component") == component]


def _values(ds: xr.Dataset, name: str) -> np.ndarray:
    return ds.variables[name].values


def with_ensembles(ds: xr.Dataset) -> xr.Dataset:
    """Add ``ensemble_P``, ``ensemble_ET``, ``ensemble_TWSA``: the mean of each component's products
    (months where every product is valid)."""
    out = ds.copy()
    for comp in ("P", "ET", "TWSA"):
        ids = [s for s in source_ids(ds, comp) if not s.startswith(ENSEMBLE_PREFIX)]
        if len(ids) < 2:
            continue
        stack = xr.concat([ds[s] for s in ids], dim="member")
        name = f"{ENSEMBLE_PREFIX}{comp}"
        out[name] = stack.mean("member", skipna=False)
        out[name].attrs = {"role": "source", "component": comp, "units": ds[ids[0]].attrs.get("units"),
                           "long_name": f"ensemble mean of {', '.join(ids)}", "source_id": name}
        vfs = [ds[f"valid_fraction_{s}"] for s in ids if f"valid_fraction_{s}" in ds]
        if vfs:
            out[f"valid_fraction_{name}"] = xr.concat(vfs, dim="member").min("member")
    return out


def month_labels(ds: xr.Dataset) -> pd.DatetimeIndex:
    return pd.DatetimeIndex(ds["time"].values)


def water_year(months: pd.DatetimeIndex, start_month: int = 1) -> np.ndarray:
    """Water year of each month, named by the calendar year in which it ends."""
    y = months.year.values
    return np.where(months.month.values >= start_month, y + (1 if start_month > 1 else 0), y)


def period_mask(months: pd.DatetimeIndex, start: str | None, end: str | None) -> np.ndarray:
    """Boolean mask of months within start..end (inclusive, "YYYY-MM"); refuses periods outside the data."""
    def parse(v, what):
        try:
            return pd.Timestamp(v).to_period("M").to_timestamp()
        except Exception:
            raise InputError(f"{what} {v!r} is not a month (YYYY-MM)") from None

    lo = parse(start, "start") if start else months[0]
    hi = parse(end, "end") if end else months[-1]
    if lo > hi:
        raise InputError(f"period {lo:%Y-%m}..{hi:%Y-%m} ends before it starts")
    if hi < months[0] or lo > months[-1]:
        raise InputError(f"period {lo:%Y-%m}..{hi:%Y-%m} is outside the data ({months[0]:%Y-%m}..{months[-1]:%Y-%m})")
    return np.asarray((months >= lo) & (months <= hi))


def _basin_index(ds: xr.Dataset, basin: str) -> int:
    ids = [str(b) for b in ds.variables["basin"].values]
    if str(basin) not in ids:
        raise InputError(f"basin {basin!r} is not in the series (known: {', '.join(ids)})")
    return ids.index(str(basin))


def _source(ds: xr.Dataset, sid: str, component: str) -> xr.DataArray:
    if sid not in ds.data_vars or ds.variables[sid].attrs.get("role") != "source":
        if sid.startswith(ENSEMBLE_PREFIX):
            raise InputError(f"source {sid!r} needs ensembles enabled (at least two {component} products)")
        raise InputError(f"source {sid!r} is not in the series (known {component}: {', '.join(source_ids(ds, component))})")
    comp = ds.variables[sid].attrs.get("component")
    if comp != component:
        raise InputError(f"source {sid!r} is a {comp} product, not {component}")


def _valid(ds, sid, b, min_vf):
    name = f"valid_fraction_{sid}"
    if name in ds.variables:
        return _values(ds, name)[b] >= min_vf
    return np.ones(ds.sizes["time"], dtype=bool)


def component_terms(ds: xr.Dataset, sel: Selection) -> dict:
    """Full-length monthly terms of a selection (mm/month; TWSA in mm), before the period cut.

    Keys: P, ET, Q, TWSA, dS, and the window-matched P_w, ET_w, Q_w, and ``filled`` (TWSA
    months interpolated on request).
    """
    if sel.storage_change not in METHODS:
        raise InputError(f"storage-change method {sel.storage_change!r} is not one of {', '.join(METHODS)}")
    if "discharge" not in ds:
        raise InputError("the series hold no discharge: add 'discharge' to the catalog")
    b = _basin_index(ds, sel.basin)
    out = {}
    for comp in ("P", "ET", "TWSA"):
        sid = getattr(sel, comp)
        _source(ds, sid, comp)
        v = _values(ds, sid)[b].astype(np.float64)
        v = np.where(_valid(ds, sid, b, sel.min_valid_fraction), v, np.nan)
        out[comp] = v
    q = _values(ds, "discharge")[b].astype(np.float64)
    if check_lag(sel.lag):
        q = shift_later(q, sel.lag)
    out["Q"] = q
    twsa = out["TWSA"]
    filled = np.zeros(twsa.shape, dtype=bool)
    if sel.fill_gaps:
        twsa, filled = fill_gaps(twsa)
    out["TWSA_used"] = twsa
    out["filled"] = filled
    out["dS"] = storage_change(twsa, sel.storage_change)
    for k in ("P", "ET", "Q"):
        out[f"{k}_w"] = match_window(out[k], sel.storage_change) if sel.matched else out[k]
    return out


def _sigma_component(ds, sel, comp, b, values):
    """Per-month standard error (mm) of one component: stated error, else product spread."""
    sid = getattr(sel, comp)
    attrs = ds.variables[sid].attrs
    if attrs.get("relative_error") is not None or attrs.get("absolute_error_mm") is not None:
        rel = float(attrs.get("relative_error") or 0.0)
        ab = float(attrs.get("absolute_error_mm") or 0.0)
        return np.sqrt((rel * np.abs(values)) ** 2 + ab**2), "stated"
    ids = [s for s in source_ids(ds, comp) if not s.startswith(ENSEMBLE_PREFIX)]
    if len(ids) >= 2:
        stack = np.stack([np.where(_valid(ds, s, b, sel.min_valid_fraction), _values(ds, s)[b], np.nan) for s in ids])
        n = np.sum(np.isfinite(stack), axis=0)
        with np.errstate(invalid="ignore"):
            mean = np.nanmean(np.where(n >= 2, stack, 0.0), axis=0)
            sd = np.sqrt(np.nansum((stack - mean) ** 2, axis=0) / np.maximum(n - 1, 1))
        return np.where(n >= 2, sd, np.nan), "spread"
    return np.full(values.shape, np.nan), "none"


def compute_selection(ds: xr.Dataset, sel: Selection, *, q_relative_error: float = Q_RELATIVE_ERROR,
                      covariance=None, min_valid: int = 24) -> SelectionResult:
    """Series, uncertainty and metrics of one selection.

    Parameters
    ----------
    ds : canonical basin series
    sel : Selection
    q_relative_error : relative standard error of gauged Q (default 5%)
    covariance : optional 4x4 array, correlation matrix of the errors of (P, ET, Q, dS);
        default independent errors.
    min_valid : fewer valid months than this and the metrics are NaN (with a message)

    Returns
    -------
    SelectionResult with ``frame`` columns (mm/month unless noted):
    P, ET, Q, dS (window-matched where ``sel.matched``), TWSA (mm), residual, Qhat,
    P_raw, ET_raw, Q_raw, residual_unmatched, sigma_P, sigma_ET, sigma_Q, sigma_dS, sigma_residual,
    beyond_2sigma (bool), valid (bool), twsa_filled (bool), valid_fraction_P/ET/TWSA (0..1).
    """
    if "ensemble_" in sel.P + sel.ET + sel.TWSA and not any(str(v).startswith(ENSEMBLE_PREFIX) for v in ds.data_vars):
        ds = with_ensembles(ds)
    terms = component_terms(ds, sel)
    months = month_labels(ds)
    mask = period_mask(months, sel.start, sel.end)
    b = _basin_index(ds, sel.basin)
    P, ET, Q, dS = terms["P_w"], terms["ET_w"], terms["Q_w"], terms["dS"]
    res = P - ET - Q - dS
    sP, srcP = _sigma_component(ds, sel, "P", b, terms["P"])
    sE, srcE = _sigma_component(ds, sel, "ET", b, terms["ET"])
    sM, srcM = _sigma_component(ds, sel, "TWSA", b, terms["TWSA_used"])
    sQ = q_relative_error * np.abs(terms["Q"])
    def flux_var(sd):
        return match_window_variance(sd**2, sel.storage_change) if sel.matched else sd**2

    vP, vE, vQ = flux_var(sP), flux_var(sE), flux_var(sQ)
    vS = storage_change_variance(sM**2, sel.storage_change)
    sig = np.sqrt(np.stack([vP, vE, vQ, vS]))
    g = np.array([1.0, -1.0, -1.0, -1.0])
    if covariance is None:
        vr = np.sum(sig**2, axis=0)
    else:
        C = np.asarray(covariance, float)
        if C.shape != (4, 4):
            raise InputError("covariance must be a 4x4 correlation matrix for (P, ET, Q, dS)")
        vr = np.einsum("i,it,ij,jt,j->t", g, sig, C, sig, g)
    sr = np.sqrt(vr)
    valid = np.isfinite(res)
    frame = pd.DataFrame({
        "P": P, "ET": ET, "Q": Q, "dS": dS, "TWSA": terms["TWSA"], "residual": res, "Qhat": P - ET - dS,
        "P_raw": terms["P"], "ET_raw": terms["ET"], "Q_raw": terms["Q"],
        "residual_unmatched": terms["P"] - terms["ET"] - terms["Q"] - dS,
        "sigma_P": sig[0], "sigma_ET": sig[1], "sigma_Q": sig[2], "sigma_dS": sig[3], "sigma_residual": sr,
        "beyond_2sigma": valid & np.isfinite(sr) & (np.abs(res) > 2 * sr),
        "valid": valid, "twsa_filled": terms["filled"],
    }, index=pd.Index(months, name="month"))
    for comp in ("P", "ET", "TWSA"):
        name = f"valid_fraction_{getattr(sel, comp)}"
        frame[f"valid_fraction_{comp}"] = _values(ds, name)[b] if name in ds.variables else np.nan
    frame = frame.loc[mask]
    pm = months[mask]
    wy = water_year(pm, sel.water_year_start)
    f = frame
    metrics = compute_metrics(f["P"].values, f["ET"].values, f["Q"].values, f["dS"].values,
                              month_of_year=pm.month.values, water_year=wy, min_valid=min_valid, explain=True)
    undefined = str(metrics.pop("undefined"))
    metrics = {k: float(v) if np.ndim(v) == 0 else v for k, v in metrics.items()}
    metrics["n_valid"] = int(metrics["n_valid"])
    metrics["n_beyond_2sigma"] = int(frame["beyond_2sigma"].sum())
    msgs = []
    n = metrics["n_valid"]
    if n == 0:
        msgs.append(_no_overlap_message(ds, sel, terms, mask, months))
    elif n < min_valid:
        msgs.append(f"only {n} valid months in {pm[0]:%Y-%m}..{pm[-1]:%Y-%m} (at least {min_valid} needed to score)")
    n_gap = int((~np.isfinite(terms["dS"][mask]) & np.isfinite(terms["P"][mask])).sum())
    if n_gap:
        msgs.append(f"{n_gap} months without storage change (TWSA gap or series edge)")
    if undefined:
        msgs.append(undefined)
    if terms["filled"][mask].any():
        msgs.append(f"{int(terms['filled'][mask].sum())} TWSA months interpolated across a gap (flagged)")
    return SelectionResult(selection=sel, frame=frame, metrics=metrics,
                           area_km2=float(ds["basin_area_km2"].values[b]) if "basin_area_km2" in ds.coords else float("nan"),
                           basin_name=str(ds["basin_name"].values[b]) if "basin_name" in ds.coords else str(sel.basin),
                           messages=msgs + [f"uncertainty: P {srcP}, ET {srcE}, TWSA {srcM}, Q {q_relative_error:.0%} of flow"])


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


_FLUX_COLS = ("P", "ET", "Q", "dS", "residual", "Qhat", "P_raw", "ET_raw", "Q_raw", "residual_unmatched",
              "sigma_P", "sigma_ET", "sigma_Q", "sigma_dS", "sigma_residual")


def to_unit_system(frame: pd.DataFrame, area_km2: float, system: str) -> pd.DataFrame:
    """Flux columns of a selection frame in mm/month ("mm"), m3 per month ("m3") or mean m3/s ("m3/s").

    TWSA stays in mm (a storage, not a flux) for "mm"; it becomes m3 for both volume systems.
    """
    if system not in UNIT_SYSTEMS:
        raise InputError(f"unit system {system!r} is not one of {', '.join(UNIT_SYSTEMS)}")
    if system == "mm":
        return frame.copy()
    out = frame.copy()
    area_m2 = area_km2 * 1e6
    months = pd.DatetimeIndex(frame.index)
    for c in _FLUX_COLS:
        if c in out:
            out[c] = mm_to_m3(out[c].values, area_m2) if system == "m3" else \
                mm_per_month_to_flow_m3s(out[c].values, months, area_m2)
    if "TWSA" in out:
        out["TWSA"] = mm_to_m3(out["TWSA"].values, area_m2)
    return out
