"""Every P x ET x TWSA combination, scored and ranked: views of `closure_terms` / `closure_metrics`."""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from .closure import Selection, _span
from .engine import closure_arrays, combination_arrays, metrics_arrays, water_year
from .metrics import METRICS, check_metric, sort_key
from .options import ClosureOptions
from .terms import SOURCE_COMPONENTS, flow_terms
from ..series import is_waterbody

__all__ = ["RANK_TABLE_COLUMNS", "EXCHANGE_COLUMNS", "WATERBODY_TABLE_COLUMNS", "rank", "rank_all", "combination_terms", "best_selection", "best_scores", "long_term_all"]


# the columns a ranking shows (command line, explorer, report)
RANK_TABLE_COLUMNS = ("rank", *SOURCE_COMPONENTS, "rmse", "bias", "rel_imbalance", "kge", "nse", "n_valid")


def combination_terms(ds: xr.Dataset, basin: str | None, *, storage_change_method: str = "central",
                      matched: bool = True, lag: int = 0, min_valid_fraction: float = 0.5, ensemble: bool = False):
    """Arrays for all combinations: P (nP, [nb,] T), ET (nE, ...), dS (nS, ...), Q ([nb,] T) and the ids.

    Kept for old callers: a view of `closure_arrays`. These arrays have no place for flows, so a series
    with flows is refused (its residual would silently leave them out); use `closure_terms`.
    """
    flows = flow_terms(ds)
    if flows:
        raise InputError(f"combination_terms: the series has flows ({', '.join(t.name for t in flows)}) that "
                         "these arrays cannot carry; use closure_terms")
    opts = ClosureOptions(storage_change=storage_change_method, matched=matched, lag=lag,
                          min_valid_fraction=min_valid_fraction, ensemble=ensemble)
    a = closure_arrays(ds, opts, basins=None if basin is None else [basin])
    P, ET, dS, Q = tuple(np.moveaxis(a[k], 1, 0) for k in ("P", "ET", "dS")) + (a["Q"],)
    if basin is not None:
        P, ET, dS, Q = P[:, 0], ET[:, 0], dS[:, 0], Q[0]
    return a["ids"], P, ET, dS, Q


def _ranked(a: dict, m: dict, by: str, min_valid: int) -> pd.DataFrame:
    """Every basin's combinations in one table, best first within each basin (basins in series order).

    Columns: basin, rank, P, ET, TWSA, every metric of `METRICS`, undefined, scored. Ties keep the catalog
    order of the sources (stable sort). Basins without any valid month are left out.
    """
    ids, basins = a["ids"], a["basins"]
    shape = (len(basins),) + tuple(len(ids[c]) for c in SOURCE_COMPONENTS)
    idx = np.meshgrid(*(np.arange(n) for n in shape), indexing="ij")
    n_valid = np.broadcast_to(m["n_valid"], shape).ravel().astype(int)
    scored = n_valid >= min_valid
    key = np.where(scored, sort_key(by, np.broadcast_to(m[by], shape).ravel()), np.inf)
    order = np.lexsort((key, idx[0].ravel()))  # by basin, then key; stable for ties
    keep = np.zeros(len(basins), dtype=bool)
    keep[np.unique(idx[0].ravel()[n_valid > 0])] = True
    order = order[keep[idx[0].ravel()[order]]]
    b_of = idx[0].ravel()[order]
    # position within the basin, 1-based
    first = np.searchsorted(b_of, b_of, side="left")
    pos = np.arange(order.size) - first + 1
    cols = {"basin": np.asarray(basins, dtype=object)[b_of],
            "rank": np.where(scored[order], pos, 0)}
    for c, x in zip(SOURCE_COMPONENTS, idx[1:]):
        cols[c] = np.asarray(ids[c], dtype=object)[x.ravel()[order]]
    for k in METRICS:
        cols[k] = n_valid[order] if k == "n_valid" else np.broadcast_to(m[k], shape).ravel()[order]
    cols["undefined"] = np.broadcast_to(m["undefined"], shape).ravel()[order]
    cols["scored"] = scored[order]
    return pd.DataFrame(cols)


def _metrics(ds, opts, basins=None):
    """(arrays of `closure_arrays`, period months, metric arrays over (basin, P, ET, TWSA)): the numpy form
    of `closure_metrics(closure_terms(...), explain=True)`, without building the labelled Datasets."""
    a = closure_arrays(ds, opts, basins=basins)
    mask = opts.period(a["months"])
    c = combination_arrays(a, mask)
    a["combination"] = c  # kept for views that need the residuals themselves (a water body's exchange)
    pm = a["months"][mask]
    return a, pm, metrics_arrays(c["residual"], c["Qhat"], c["Q"], c["P"], pm, opts, explain=True)


def _attrs(opts: ClosureOptions, pm: pd.DatetimeIndex, by: str) -> dict:
    return {"by": by, "start": f"{pm[0]:%Y-%m}", "end": f"{pm[-1]:%Y-%m}", "storage_change": opts.storage_change,
            "matched": opts.matched, "lag": opts.lag}


def rank(ds: xr.Dataset, basin: str, options: ClosureOptions | None = None, *, by: str = "rmse",
         **kwargs) -> pd.DataFrame:
    """Score every P x ET x TWSA combination for one basin and period, best first.

    ``options`` (`ClosureOptions`), or its fields as keyword arguments (start, end, storage_change, matched,
    lag, min_valid_fraction, min_valid, water_year_start, ensemble: the old form). Ties keep the catalog
    order of the sources (stable sort). Combinations with fewer than ``min_valid`` valid months are listed
    after the scored ones with ``scored = False`` and NaN metrics. Flows of the series enter every residual.

    Returns
    -------
    pandas.DataFrame with columns rank, P, ET, TWSA, scored, every metric of `METRICS` and ``undefined``
    (why a metric is NaN on degenerate data, e.g. discharge without variance; "" where all are defined).
    """
    check_metric(by)
    opts = ClosureOptions.from_kwargs(options, **kwargs)
    a, pm, m = _metrics(ds, opts, [basin])
    df = _ranked(a, m, by, opts.min_valid)
    if not len(df):
        ids, months = a["ids"], a["months"]
        src, b = a["ds"], int(a["b"][0])  # the series with ensembles, where asked
        spans = [f"{v} {_span(months, np.isfinite(src[v].values[b]))}"
                 for v in ["discharge"] + ids["P"] + ids["ET"] + ids["TWSA"] if v in src]
        raise InputError(
            f"no month in {pm[0]:%Y-%m}..{pm[-1]:%Y-%m} has P, ET, storage change and discharge together for basin "
            f"{basin!r}; data cover: " + ", ".join(spans).replace("discharge ", "discharge covers ", 1))
    df = df.drop(columns="basin")
    if is_waterbody(a["ds"]):
        df = _with_exchange(df, a, opts)
    df.attrs = {"basin": basin, **_attrs(opts, pm, by)}
    return df


# a water body's ranking also gives its mean residual (unmeasured exchange) in volume units, with standard errors
EXCHANGE_COLUMNS = ("exchange_hm3", "exchange_hm3_se", "exchange_m3s", "exchange_m3s_se", "exchange_mm_surface",
                    "exchange_mm_surface_se")
# a water body's ranking as shown (report, explorer): no metric against a gauged outlet (it has none; its storage is
# always the levels), the exchange per month in volume units with its standard error
WATERBODY_TABLE_COLUMNS = ("rank", "P", "ET", "rmse", "bias", "n_valid", "exchange_hm3", "exchange_hm3_se",
                           "exchange_m3s", "exchange_m3s_se")


def _with_exchange(df: pd.DataFrame, a: dict, opts: ClosureOptions) -> pd.DataFrame:
    """Rows of one water body's ranking with the mean monthly residual in hm3, m3/s and mm over the surface
    (and their standard errors: `wbexplore.balance.waterbody.exchange_summary`)."""
    from ..series import SURFACE_AREA
    from .waterbody import exchange_summary

    mask = opts.period(a["months"])
    c = a["combination"]
    ds, b = a["ds"], int(a["b"][0])
    surf = ds.variables[SURFACE_AREA].values[b][mask] * 1e6 if SURFACE_AREA in ds.variables else \
        np.full(int(mask.sum()), float(ds["basin_area_km2"].values[b]) * 1e6)
    summ = exchange_summary(c["residual"][0], a["months"][mask],
                            reference_area_m2=float(ds["basin_area_km2"].values[b]) * 1e6, surface_area_m2=surf)
    ids = a["ids"]
    pos = tuple(np.fromiter(map({sid: i for i, sid in enumerate(ids[comp])}.__getitem__, df[comp]), dtype=np.intp,
                            count=len(df)) for comp in SOURCE_COMPONENTS)
    cols = {}
    for unit, name in (("hm3", "exchange_hm3"), ("m3/s", "exchange_m3s"), ("mm_surface", "exchange_mm_surface")):
        mean, se = summ[unit]
        cols[name] = mean[pos]
        cols[f"{name}_se"] = se[pos]
    return pd.concat([df, pd.DataFrame(cols, index=df.index)], axis=1)  # one block: cheaper than six inserts


def best_scores(ds: xr.Dataset, options: ClosureOptions | None = None, *, by: str = "rmse",
                **kwargs) -> pd.Series:
    """The best value of metric ``by`` over all combinations, per basin (NaN where none is scored)."""
    check_metric(by)
    opts = ClosureOptions.from_kwargs(options, **kwargs)
    a = closure_arrays(ds, opts)
    mask = opts.period(a["months"])
    c = combination_arrays(a, mask)
    m = metrics_arrays(c["residual"], c["Qhat"], c["Q"], c["P"], a["months"][mask], opts)
    nb = len(a["basins"])
    shape = c["residual"].shape[:-1]
    vals = np.broadcast_to(m[by], shape).reshape(nb, -1)
    ok = np.broadcast_to(m["n_valid"] >= opts.min_valid, shape).reshape(nb, -1)
    key = np.where(ok, sort_key(by, vals), np.inf)
    j = np.argmin(key, axis=1)
    best = vals[np.arange(nb), j]
    best = np.where(np.isfinite(key[np.arange(nb), j]), best, np.nan)
    return pd.Series(best, index=a["basins"], name=by)


def rank_all(ds: xr.Dataset, options: ClosureOptions | None = None, *, by: str = "rmse", **kwargs) -> pd.DataFrame:
    """`rank` for every basin at once (one vectorised pass): a long table basin x combination x metric,
    best first within each basin. Basins without any valid month are left out."""
    check_metric(by)
    opts = ClosureOptions.from_kwargs(options, **kwargs)
    a, pm, m = _metrics(ds, opts)
    out = _ranked(a, m, by, opts.min_valid)
    if not len(out):
        raise InputError("no basin has a valid month for any combination")
    out.attrs = _attrs(opts, pm, by)
    return out


def best_selection(ds: xr.Dataset, basin: str, options: ClosureOptions | None = None, *, by: str = "rmse",
                   **kwargs) -> Selection:
    """The first-ranked combination as a `Selection` (same options as `rank`)."""
    opts = ClosureOptions.from_kwargs(options, **kwargs)
    r = rank(ds, basin, opts, by=by)
    row = r.iloc[0]
    # every option a selection holds, so that the selection scores as the row it was chosen from
    return Selection.from_options(basin, opts, P=row["P"], ET=row["ET"], TWSA=row["TWSA"])


def long_term_all(ds: xr.Dataset, template: Selection) -> pd.DataFrame:
    """Long-term means over complete years of P - ET, Q and dS (mm/year) for every basin with the
    sources and options of ``template`` (one row per basin; basins without complete years get NaN).
    With flows in the series, ``net_flow`` (inflows - outflows, mm/year) too."""
    opts = template.options()
    a = closure_arrays(ds, opts, sources=template.sources())
    months = a["months"]
    mask = opts.period(months)
    wy = water_year(months[mask], template.water_year_start)
    years = [y for y in np.unique(wy) if (wy == y).sum() == 12]
    rows = []
    ds = a["ds"]
    names = ds["basin_name"].values if "basin_name" in ds.coords else ds["basin"].values
    areas = ds["basin_area_km2"].values if "basin_area_km2" in ds.coords else np.full(ds.sizes["basin"], np.nan)
    flows = a["net_flow"] is not None
    for i, b in enumerate(ds["basin"].values):
        P, ET, Q, dS = a["P"][i, 0][mask], a["ET"][i, 0][mask], a["Q"][i][mask], a["dS"][i, 0][mask]
        F = a["net_flow"][i][mask] if flows else None
        ok = np.isfinite(P) & np.isfinite(ET) & np.isfinite(Q) & np.isfinite(dS)
        if flows:
            ok &= np.isfinite(F)
        tot = [(P[m].sum() - ET[m].sum(), Q[m].sum(), dS[m].sum()) + ((F[m].sum(),) if flows else ())
               for y in years for m in [wy == y] if ok[m].all()]
        arr = np.array(tot) if tot else np.full((1, 4 if flows else 3), np.nan)
        row = {"basin": str(b), "name": str(names[i]), "area_km2": float(areas[i]),
               "P_minus_ET": float(np.mean(arr[:, 0])), "Q": float(np.mean(arr[:, 1])),
               "dS": float(np.mean(arr[:, 2])), "years": len(tot)}
        if flows:
            row["net_flow"] = float(np.mean(arr[:, 3]))
        rows.append(row)
    return pd.DataFrame(rows)
