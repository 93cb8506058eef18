"""Every P x ET x TWSA combination, scored and ranked (vectorised over combinations)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from .closure import (ENSEMBLE_PREFIX, Selection, _basin_index, check_lag, month_labels, period_mask,
                      source_ids, water_year, with_ensembles)
from .metrics import METRICS, check_metric, compute_metrics, sort_key
from .storage import METHODS, match_window, shift_later, storage_change

__all__ = ["rank", "rank_all", "combination_terms", "best_selection", "long_term_all"]


def _stack_all(ds, ids, min_vf, b=None):
    """(n_sources, [n_basins,] T) float64 with months below the valid fraction masked."""
    sl = slice(None) if b is None else b
    out = []
    for s in ids:
        v = ds.variables[s].values[sl].astype(np.float64)
        name = f"valid_fraction_{s}"
        if name in ds.variables:
            v = np.where(ds.variables[name].values[sl] >= min_vf, v, np.nan)
        out.append(v)
    return np.stack(out)


def _prepare(ds, *, storage_change_method, matched, lag, min_valid_fraction, ensemble):
    check_lag(lag)
    if storage_change_method not in METHODS:
        raise InputError(f"storage-change method {storage_change_method!r} is not one of {', '.join(METHODS)}")
    if "discharge" not in ds:
        raise InputError("the series hold no discharge: add 'discharge' to the catalog")
    if ensemble:
        ds = with_ensembles(ds)
    ids = {c: [s for s in source_ids(ds, c) if ensemble or not s.startswith(ENSEMBLE_PREFIX)] for c in ("P", "ET", "TWSA")}
    for c, v in ids.items():
        if not v:
            raise InputError(f"the series hold no {c} source")
    return ds, ids


def combination_terms(ds: xr.Dataset, basin: str | None, *, storage_change_method: str = "central",
                      matched: bool = True, lag: int = 0, min_valid_fraction: float = 0.5, ensemble: bool = False):
    """Arrays for all combinations: P (nP, [nb,] T), ET (nE, ...), dS (nS, ...), Q ([nb,] T) and the ids.

    With ``basin=None`` every basin is kept (a basin axis after the source axis).
    """
    ds, ids = _prepare(ds, storage_change_method=storage_change_method, matched=matched, lag=lag,
                       min_valid_fraction=min_valid_fraction, ensemble=ensemble)
    b = None if basin is None else _basin_index(ds, basin)
    P = _stack_all(ds, ids["P"], min_valid_fraction, b)
    ET = _stack_all(ds, ids["ET"], min_valid_fraction, b)
    M = _stack_all(ds, ids["TWSA"], min_valid_fraction, b)
    Q = ds.variables["discharge"].values.astype(np.float64)
    if b is not None:
        Q = Q[b]
    dS = storage_change(M, storage_change_method)
    if lag:
        Q = shift_later(Q, lag)
    if matched:
        P, ET, Q = (match_window(a, storage_change_method) for a in (P, ET, Q))
    return ids, P, ET, dS, Q


def _table(ids, m, prefix_shape=()):
    nP, nE, nS = len(ids["P"]), len(ids["ET"]), len(ids["TWSA"])
    pi, ei, si = np.meshgrid(np.arange(nP), np.arange(nE), np.arange(nS), indexing="ij")
    df = pd.DataFrame({"P": np.asarray(ids["P"])[pi.ravel()], "ET": np.asarray(ids["ET"])[ei.ravel()],
                       "TWSA": np.asarray(ids["TWSA"])[si.ravel()]})
    return df, (nP, nE, nS)


def _finish_rank(df, by, min_valid):
    df["n_valid"] = df["n_valid"].astype(int)
    df["scored"] = df["n_valid"] >= min_valid
    key = np.where(df["scored"], sort_key(by, df[by].values), np.inf)
    order = np.argsort(key, kind="stable")
    df = df.iloc[order].reset_index(drop=True)
    df.insert(0, "rank", np.where(df["scored"], np.arange(1, len(df) + 1), 0))
    return df


def rank(ds: xr.Dataset, basin: str, *, start: str | None = None, end: str | None = None,
         storage_change: str = "central", matched: bool = True, by: str = "rmse", ensemble: bool = False,
         min_valid: int = 24, lag: int = 0, min_valid_fraction: float = 0.5,
         water_year_start: int = 1) -> pd.DataFrame:
    """Score every P x ET x TWSA combination for one basin and period, best first.

    Ties keep the catalog order of the sources (stable sort). Combinations with fewer than
    ``min_valid`` valid months are listed after the scored ones with ``scored = False`` and
    NaN metrics.

    Returns
    -------
    pandas.DataFrame with columns rank, P, ET, TWSA, scored, every metric of `METRICS` and ``undefined``
    (why a metric is NaN on degenerate data, e.g. discharge without variance; "" where all are defined).
    """
    check_metric(by)
    ids, P, ET, dS, Q = combination_terms(ds, basin, storage_change_method=storage_change, matched=matched,
                                          lag=lag, min_valid_fraction=min_valid_fraction, ensemble=ensemble)
    months = month_labels(ds)
    mask = period_mask(months, start, end)
    pm = months[mask]
    m = compute_metrics(P[:, None, None, mask], ET[None, :, None, mask], Q[None, None, None, mask],
                        dS[None, None, :, mask], month_of_year=pm.month.values,
                        water_year=water_year(pm, water_year_start), min_valid=min_valid, explain=True)
    df, shape = _table(ids, m)
    for k in METRICS:
        df[k] = np.broadcast_to(m[k], shape).ravel()
    df["undefined"] = np.broadcast_to(m["undefined"], shape).ravel()
    if (df["n_valid"] == 0).all():
        from .closure import _span

        b = _basin_index(ds, basin)
        spans = [f"{v} {_span(months, np.isfinite(ds[v].values[b]))}"
                 for v in ["discharge"] + ids["P"] + ids["ET"] + ids["TWSA"] if v in ds]
        raise InputError(
            f"no month in {pm[0]:%Y-%m}..{pm[-1]:%Y-%m} has P, ET, storage change and discharge together for basin "
            f"{basin!r}; data cover: " + ", ".join(spans).replace("discharge ", "discharge covers ", 1))
    df = _finish_rank(df, by, min_valid)
    df.attrs = {"basin": basin, "by": by, "start": f"{pm[0]:%Y-%m}", "end": f"{pm[-1]:%Y-%m}",
                "storage_change": storage_change, "matched": matched, "lag": lag}
    return df


def best_scores(ds: xr.Dataset, *, by: str = "rmse", start: str | None = None, end: str | None = None,
                storage_change: str = "central", matched: bool = True, min_valid: int = 24, lag: int = 0,
                min_valid_fraction: float = 0.5, water_year_start: int = 1) -> pd.Series:
    """The best value of metric ``by`` over all combinations, per basin (NaN where none is scored)."""
    check_metric(by)
    ids, P, ET, dS, Q = combination_terms(ds, None, storage_change_method=storage_change, matched=matched, lag=lag,
                                          min_valid_fraction=min_valid_fraction)
    months = month_labels(ds)
    mask = period_mask(months, start, end)
    pm = months[mask]
    m = compute_metrics(np.moveaxis(P, 1, 0)[:, :, None, None, mask], np.moveaxis(ET, 1, 0)[:, None, :, None, mask],
                        Q[:, None, None, None, mask], np.moveaxis(dS, 1, 0)[:, None, None, :, mask],
                        month_of_year=pm.month.values, water_year=water_year(pm, water_year_start),
                        min_valid=min_valid)
    nb = Q.shape[0]
    vals = np.broadcast_to(m[by], (nb, len(ids["P"]), len(ids["ET"]), len(ids["TWSA"]))).reshape(nb, -1)
    ok = np.broadcast_to(m["n_valid"] >= min_valid,
                         (nb, len(ids["P"]), len(ids["ET"]), len(ids["TWSA"]))).reshape(nb, -1)
    key = np.where(ok, sort_key(by, vals), np.inf)
    j = np.argmin(key, axis=1)
    best = vals[np.arange(nb), j]
    best = np.where(np.isfinite(key[np.arange(nb), j]), best, np.nan)
    return pd.Series(best, index=[str(b) for b in ds.variables["basin"].values], name=by)


def rank_all(ds: xr.Dataset, *, by: str = "rmse", start: str | None = None, end: str | None = None,
             storage_change: str = "central", matched: bool = True, ensemble: bool = False, min_valid: int = 24,
             lag: int = 0, min_valid_fraction: float = 0.5, water_year_start: int = 1) -> pd.DataFrame:
    """`rank` for every basin at once (one vectorised pass): a long table basin x combination x metric,
    best first within each basin. Basins without any valid month are left out."""
    check_metric(by)
    ids, P, ET, dS, Q = combination_terms(ds, None, storage_change_method=storage_change, matched=matched, lag=lag,
                                          min_valid_fraction=min_valid_fraction, ensemble=ensemble)
    months = month_labels(ds)
    mask = period_mask(months, start, end)
    pm = months[mask]
    # axes: basin, P, ET, TWSA, time
    Pb = np.moveaxis(P, 1, 0)[:, :, None, None, mask]
    Eb = np.moveaxis(ET, 1, 0)[:, None, :, None, mask]
    Sb = np.moveaxis(dS, 1, 0)[:, None, None, :, mask]
    Qb = Q[:, None, None, None, mask]
    m = compute_metrics(Pb, Eb, Qb, Sb, month_of_year=pm.month.values,
                        water_year=water_year(pm, water_year_start), min_valid=min_valid, explain=True)
    parts = []
    basins = [str(b) for b in ds.variables["basin"].values]
    for i, b in enumerate(basins):
        df, shape = _table(ids, None)
        for k in METRICS:
            df[k] = np.broadcast_to(m[k][i], shape).ravel()
        df["undefined"] = np.broadcast_to(m["undefined"][i], shape).ravel()
        if (df["n_valid"] == 0).all():
            continue
        df = _finish_rank(df, by, min_valid)
        df.insert(0, "basin", b)
        parts.append(df)
    if not parts:
        raise InputError("no basin has a valid month for any combination")
    out = pd.concat(parts, ignore_index=True)
    out.attrs = {"by": by, "start": f"{pm[0]:%Y-%m}", "end": f"{pm[-1]:%Y-%m}", "storage_change": storage_change,
                 "matched": matched, "lag": lag}
    return out


def best_selection(ds: xr.Dataset, basin: str, **kwargs) -> Selection:
    """The first-ranked combination as a `Selection` (same options as `rank`)."""
    r = rank(ds, basin, **kwargs)
    row = r.iloc[0]
    return Selection(basin=basin, P=row["P"], ET=row["ET"], TWSA=row["TWSA"], start=kwargs.get("start"),
                     end=kwargs.get("end"), storage_change=kwargs.get("storage_change", "central"),
                     matched=kwargs.get("matched", True), lag=kwargs.get("lag", 0))


def long_term_all(ds: xr.Dataset, template: Selection) -> pd.DataFrame:
    """Long-term means over complete years of P - ET, Q and dS (mm/year) for every basin with the
    sources and options of ``template`` (one row per basin; basins without complete years get NaN)."""
    from .closure import component_terms

    months = month_labels(ds)
    mask = period_mask(months, template.start, template.end)
    wy = water_year(months[mask], template.water_year_start)
    years = [y for y in np.unique(wy) if (wy == y).sum() == 12]
    rows = []
    names = ds["basin_name"].values if "basin_name" in ds.coords else ds["basin"].values
    areas = ds["basin_area_km2"].values if "basin_area_km2" in ds.coords else np.full(ds.sizes["basin"], np.nan)
    for i, b in enumerate(ds["basin"].values):
        t = component_terms(ds, template.replace(basin=str(b)))
        P, ET, Q, dS = (t[k][mask] for k in ("P_w", "ET_w", "Q_w", "dS"))
        ok = np.isfinite(P) & np.isfinite(ET) & np.isfinite(Q) & np.isfinite(dS)
        tot = [(P[m].sum() - ET[m].sum(), Q[m].sum(), dS[m].sum()) for y in years
               for m in [wy == y] if ok[m].all()]
        arr = np.array(tot) if tot else np.full((1, 3), np.nan)
        rows.append({"basin": str(b), "name": str(names[i]), "area_km2": float(areas[i]),
                     "P_minus_ET": float(np.mean(arr[:, 0])), "Q": float(np.mean(arr[:, 1])),
                     "dS": float(np.mean(arr[:, 2])), "years": len(tot)})
    return pd.DataFrame(rows)
