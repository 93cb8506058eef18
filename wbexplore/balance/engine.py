"""The one closure pipeline: canonical series in, balance terms of every combination out.

``closure_terms(ds, options)`` returns one `xarray.Dataset` over ``(basin, P_source, ET_source, TWSA_source,
time)``: each term of the balance (`wbexplore.balance.terms`) on the dims it depends on, window-matched with
the storage kernel where ``options.matched`` (every flux: P, ET, Q and every flow), and

    residual = P - ET - Q - dS + inflows - outflows
    Qhat     = P - ET - dS + inflows - outflows

over every combination. ``closure_metrics(terms)`` reduces over time. Masking (valid fraction), storage
change, lag, gap filling and window matching happen here and nowhere else; `rank`, `rank_all`,
`best_scores`, `best_selection` and `compute_selection` are views of these results.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from ..series import DISCHARGE, STORAGE_STATE, SURFACE_AREA, is_waterbody, source_ids, valid_fraction_name
from .metrics import METRICS, metrics_from_residual
from .options import ClosureOptions
from .storage import fill_gaps, match_state_window, match_window, shift_later, state_storage_change, storage_change
from .terms import BASE_TERMS, DS, P, Q, SOURCE_COMPONENTS, WATERBODY_TERMS, combine, flow_terms

__all__ = ["closure_terms", "closure_metrics", "closure_arrays", "combination_arrays", "metrics_arrays", "ENSEMBLE_PREFIX", "MERGED_PREFIX", "DERIVED_PREFIXES", "is_merged", "with_ensembles", "SOURCE_DIMS", "masked_values"]

ENSEMBLE_PREFIX = "ensemble_"
MERGED_PREFIX = "merged_"  # `wbexplore.balance.merge`: merged best estimates
# Sources computed from a component's products (not independent of them: never collocated with them)
DERIVED_PREFIXES = (ENSEMBLE_PREFIX, MERGED_PREFIX)


def is_merged(source) -> bool:
    """``source`` (an id, or anything whose text is one) names a merged best estimate (`MERGED_PREFIX`)."""
    return str(source).startswith(MERGED_PREFIX)

SOURCE_DIMS = {c: f"{c}_source" for c in SOURCE_COMPONENTS}


def with_ensembles(ds: xr.Dataset) -> xr.Dataset:
    """Add ``ensemble_<component>`` for every source component: the mean of its products (months where
    every product is valid); series derived from the products (`DERIVED_PREFIXES`: ensembles, merged
    sources) are not members."""
    out = ds.copy()
    for comp in SOURCE_COMPONENTS:
        ids = [s for s in source_ids(ds, comp) if not s.startswith(DERIVED_PREFIXES)]
        if len(ids) < 2:
            continue
        stack = xr.concat([ds[s] for s in ids], dim="member")
        name = f"{ENSEMBLE_PREFIX}{comp}"
        out[name] = stack.mean("member", skipna=False)
        out[name].attrs = {"role": "source", "component": comp, "units": ds[ids[0]].attrs.get("units"),
                           "long_name": f"ensemble mean of {', '.join(ids)}", "source_id": name}
        vfs = [ds[valid_fraction_name(s)] for s in ids if valid_fraction_name(s) in ds]
        if vfs:
            out[valid_fraction_name(name)] = xr.concat(vfs, dim="member").min("member")
    return out


def basin_ids(ds: xr.Dataset) -> list[str]:
    return [str(b) for b in ds.variables["basin"].values]


def basin_index(ds: xr.Dataset, basin: str) -> int:
    ids = basin_ids(ds)
    if str(basin) not in ids:
        raise InputError(f"basin {basin!r} is not in the series (known: {', '.join(ids)})")
    return ids.index(str(basin))


def check_source(ds: xr.Dataset, sid: str, component: str) -> None:
    """`InputError` unless ``sid`` is a source of ``component`` in ``ds``."""
    if sid not in ds.data_vars or ds.variables[sid].attrs.get("role") != "source":
        if sid.startswith(ENSEMBLE_PREFIX):
            raise InputError(f"source {sid!r} needs ensembles enabled (at least two {component} products)")
        raise InputError(f"source {sid!r} is not in the series (known {component}: {', '.join(source_ids(ds, component))})")
    comp = ds.variables[sid].attrs.get("component")
    if comp != component:
        raise InputError(f"source {sid!r} is a {comp} product, not {component}")


def prepare(ds: xr.Dataset, options: ClosureOptions, sources: dict | None = None):
    """(series, source ids per component) for ``options``: ensembles added when asked (or when a named
    source is one), every named source checked."""
    if DISCHARGE not in ds and not is_waterbody(ds):
        raise InputError("the series hold no discharge: add 'discharge' to the catalog")
    if sources is not None:
        wanted = [s for v in sources.values() for s in v]
        if any(s.startswith(ENSEMBLE_PREFIX) for s in wanted) and not any(
                str(v).startswith(ENSEMBLE_PREFIX) for v in ds.data_vars):
            ds = with_ensembles(ds)
        for comp, v in sources.items():
            for s in v:
                check_source(ds, s, comp)
        return ds, {c: list(sources[c]) for c in SOURCE_COMPONENTS}
    if options.ensemble:
        ds = with_ensembles(ds)
    ids = {c: [s for s in source_ids(ds, c) if options.ensemble or not s.startswith(ENSEMBLE_PREFIX)]
           for c in SOURCE_COMPONENTS}
    for c, v in ids.items():
        if not v:
            raise InputError(f"the series hold no {c} source")
    return ds, ids


def _stack(ds, ids, min_vf, b):
    """(n_basins, n_sources, T) float64, months below the valid fraction masked (b: index array)."""
    return np.stack([masked_values(ds, s, b, min_vf) for s in ids], axis=1)


def masked_values(ds: xr.Dataset, name: str, b, min_valid_fraction: float) -> np.ndarray:
    """float64 values of variable ``name`` at basin index ``b`` (an int: (T,); an index array: (basins, T)),
    months where its ``valid_fraction_<name>`` is below ``min_valid_fraction`` (0..1) missing (NaN)."""
    v = ds.variables[name].values[b].astype(np.float64)
    vf = valid_fraction_name(name)
    if vf in ds.variables:
        v = np.where(ds.variables[vf].values[b] >= min_valid_fraction, v, np.nan)
    return v


def closure_arrays(ds: xr.Dataset, options: ClosureOptions, *, basins=None, sources: dict | None = None) -> dict:
    """Full-length terms as numpy arrays (the numpy core of `closure_terms`; time is the last axis).

    Keys: ``ids`` (sources per component), ``basins`` (ids), ``b`` (their indices), ``terms`` (the
    `Term` rows, flows included), per gridded component ``<c>`` (matched where asked) and ``<c>_raw``
    (basin, source, time), ``TWSA`` (as used: gaps filled where asked), ``TWSA_raw``, ``filled``, ``dS``,
    ``Q`` / ``Q_raw`` (basin, time; lagged), each flow's variable name (matched) and ``<name>_raw``,
    ``net_flow`` (sum of the flows' signed values, matched; None without flows), ``months``.
    """
    ds, ids = prepare(ds, options, sources)
    found = None if basins is None else _positions(ds, basins)
    if found is not None:  # a few basins of text ids: looked up in the index (listing every id costs more)
        b, names = found
    else:
        all_ids = basin_ids(ds)
        if basins is None:
            b = np.arange(ds.sizes["basin"])
        else:
            where = {x: i for i, x in enumerate(all_ids)}
            for x in basins:
                if str(x) not in where:
                    raise InputError(f"basin {x!r} is not in the series (known: {', '.join(all_ids)})")
            b = np.array([where[str(x)] for x in basins], dtype=np.intp)
        names = [all_ids[i] for i in b]
    mvf = options.min_valid_fraction
    method = options.storage_change
    out = {"ids": ids, "basins": names, "b": b, "ds": ds}
    wb = is_waterbody(ds)
    if options.area != "outline" and not wb:
        raise InputError(f"area {options.area!r}: only a water body's P and E can fall on another area than its "
                         "outline (these series are basins)")
    if wb and options.lag:
        raise InputError(f"lag {options.lag}: the lag shifts gauged outlet discharge, which a water body's balance "
                         "does not have")
    if wb:  # each water body's storage state sets its own storage difference and flux window
        states = [str(s) for s in ds[STORAGE_STATE].values[b]]

        def match(raw):
            return match_state_window(raw, states, method, matched=options.matched)
    else:
        def match(raw):
            return match_window(raw, method) if options.matched else raw
    for t in BASE_TERMS:
        if t.gridded and not t.storage:
            raw = _stack(ds, ids[t.component], mvf, b)
            if wb and options.area == "surface":  # volume on the surface at the month's level, over the outline
                ratio = ds.variables[SURFACE_AREA].values[b] / ds["basin_area_km2"].values[b][:, None]
                raw = raw * ratio[:, None, :]
            out[f"{t.name}_raw"] = raw
            out[t.name] = match(raw)
    M = _stack(ds, ids[DS.component], mvf, b)
    out["TWSA_raw"] = M
    filled = np.zeros(M.shape, dtype=bool)
    if options.fill_gaps:
        M, filled = fill_gaps(M)
    out["TWSA"] = M
    out["filled"] = filled
    out["dS"] = state_storage_change(M, states, method) if wb else storage_change(M, method)
    if wb:  # no gauged outlet discharge: the Q term is absent from the balance (zero where a view asks for it)
        q = np.zeros((b.size, ds.sizes["time"]))
    else:
        q = ds.variables[DISCHARGE].values[b].astype(np.float64)
    if options.lag and not wb:
        q = shift_later(q, options.lag)
    out["Q_raw"] = q
    out["Q"] = q if wb else match(q)
    flows = flow_terms(ds)
    net = net_raw = None
    for t in flows:
        raw = masked_values(ds, t.variable, b, mvf)
        val = match(raw)
        out[f"{t.name}_raw"] = raw
        out[t.name] = val
        net = t.sign * val if net is None else net + t.sign * val
        net_raw = t.sign * raw if net_raw is None else net_raw + t.sign * raw
    out["net_flow"] = net
    out["net_flow_raw"] = net_raw
    out["terms"] = (WATERBODY_TERMS if wb else BASE_TERMS) + flows
    out["months"] = _months(ds)
    return out


def _months(ds: xr.Dataset) -> pd.DatetimeIndex:
    """The series' time stamps as a `pandas.DatetimeIndex` (unnamed): its own index where it has one."""
    idx = getattr(ds.xindexes.get("time"), "index", None)
    if isinstance(idx, pd.DatetimeIndex):
        return idx.rename(None)
    return pd.DatetimeIndex(ds["time"].values)


def _positions(ds: xr.Dataset, basins) -> tuple | None:
    """(indices, ids) of ``basins`` found in the series' unique index of text basin ids, or None (then the
    caller lists every id as text and looks them up there, refusing unknown ones)."""
    idx = getattr(ds.xindexes.get("basin"), "index", None)
    if idx is None or not pd.api.types.is_string_dtype(idx.dtype) or not idx.is_unique:
        return None
    b = []
    for x in basins:
        try:
            i = idx.get_loc(str(x))
        except KeyError:
            return None
        if not isinstance(i, (int, np.integer)) or not isinstance(idx[i], str):
            return None
        b.append(int(i))
    return np.array(b, dtype=np.intp), [str(idx[i]) for i in b]


def closure_terms(ds: xr.Dataset, options: ClosureOptions | None = None, *, basins=None,
                  sources: dict | None = None, **kwargs) -> xr.Dataset:
    """Every balance term of every combination, over the period (mm/month; TWSA mm).

    Parameters
    ----------
    ds : xarray.Dataset
        Canonical basin series (`wbexplore.series`).
    options : ClosureOptions, optional
        Default ``ClosureOptions()``; keyword arguments (the old option names) are laid over it.
    basins : list of str, optional
        Basins to keep (default all).
    sources : dict, optional
        Component -> list of source ids (default every source of each component).

    Returns
    -------
    xarray.Dataset with dims (basin, P_source, ET_source, TWSA_source, time), time cut to the period
    (terms are computed on the full series first, so the window and storage kernels reach the months next
    to the period). Variables: ``P``, ``ET`` (basin, <c>_source, time), ``TWSA``, ``dS``, ``filled``
    (basin, TWSA_source, time), ``Q`` and every flow ``flow_<id>`` (basin, time), their ``<name>_raw``
    (before window matching), ``residual`` and ``Qhat`` (basin, P_source, ET_source, TWSA_source, time).
    Each term variable carries ``sign``, ``kind`` and ``label`` from the term table; the options are in
    ``attrs["closure_options"]`` (JSON text, `ClosureOptions.from_json`); where each product's error would
    come from in each basin is ``attrs["uncertainty_source"]`` (JSON text {basin: {source: "stated" |
    "collocation" | "spread" | "none" | "posterior"}}, `wbexplore.balance.uncertainty`).
    """
    opts = ClosureOptions.from_kwargs(options, **kwargs)
    a = closure_arrays(ds, opts, basins=basins, sources=sources)
    mask = opts.period(a["months"])
    return _to_dataset(a, opts, mask)


def combination_arrays(a: dict, mask) -> dict:
    """Residual and Qhat of every combination over the period's months (numpy core of `closure_terms`).

    Returns dict with ``residual``, ``Qhat`` (basin, P, ET, TWSA, time), and ``P``, ``Q`` broadcastable to
    them (the inputs `metrics_arrays` needs besides), ``net`` (basin, time) or None.
    """
    # each term on the axes it depends on: basin, then P, ET, TWSA source, then time
    axes = {c: i + 1 for i, c in enumerate(SOURCE_COMPONENTS)}
    values = {}
    for t in a["terms"]:
        v = a[t.name][..., mask]
        if t.component in axes:  # (basin, source, time) -> its source axis (a water body's levels too)
            shape = [v.shape[0]] + [1] * len(SOURCE_COMPONENTS) + [v.shape[-1]]
            shape[axes[t.component]] = v.shape[1]
            v = v.reshape(shape)
        else:
            v = v.reshape((v.shape[0],) + (1,) * len(SOURCE_COMPONENTS) + (v.shape[-1],))
        values[t.name] = v
    res, qhat = combine(values, a["terms"])
    net = None if a["net_flow"] is None else a["net_flow"][..., mask]
    # a water body's balance has no Q: None (metrics that compare with gauged discharge are then undefined)
    return {"residual": res, "Qhat": qhat, "P": values[P.name], "Q": values.get(Q.name), "net": net}


def _to_dataset(a: dict, opts: ClosureOptions, mask) -> xr.Dataset:
    ds = a["ds"]
    ids = a["ids"]
    c = combination_arrays(a, mask)
    res, qhat, net = c["residual"], c["Qhat"], c["net"]
    dims = {c: ("basin", SOURCE_DIMS[c], "time") for c in SOURCE_COMPONENTS}
    full = ("basin",) + tuple(SOURCE_DIMS.values()) + ("time",)
    coords = {"basin": a["basins"], "time": a["months"][mask],
              **{SOURCE_DIMS[c]: ids[c] for c in SOURCE_COMPONENTS}}
    for c in ("basin_name", "basin_area_km2"):
        if c in ds.coords:
            coords[c] = ("basin", ds[c].values[a["b"]])
    data = {}
    for t in a["terms"]:
        d = dims[t.component] if t.component in dims else ("basin", "time")
        attrs = {"sign": t.sign, "kind": t.kind, "label": t.label, "units": t.units, "component": t.component}
        data[t.name] = (d, a[t.name][..., mask], attrs)
        if t.storage:
            data["TWSA"] = (d, a["TWSA"][..., mask], {"units": "mm", "label": "Storage anomaly (as used)"})
            data["TWSA_raw"] = (d, a["TWSA_raw"][..., mask], {"units": "mm"})
            data["filled"] = (d, a["filled"][..., mask])
        else:
            data[f"{t.name}_raw"] = (d, a[f"{t.name}_raw"][..., mask], attrs)
    if net is not None:
        data["net_flow"] = (("basin", "time"), net, {"units": "mm/month", "label": "Inflows - outflows"})
    data["residual"] = (full, res, {"units": "mm/month", "label": "Residual"})
    data["Qhat"] = (full, qhat, {"units": "mm/month", "label": "Discharge predicted by the balance"})
    out = xr.Dataset(data, coords=coords)
    out.attrs = {"closure_options": opts.to_json(),  # text: the Dataset stays writable to netCDF
                 "uncertainty_source": _uncertainty_sources(a, opts, mask)}
    return out


def _uncertainty_sources(a: dict, opts: ClosureOptions, mask) -> str:
    """JSON text {basin: {source: method}}: where each product's error would come from over the period
    (`uncertainty.product_error`, default method: stated, collocation or spread)."""
    import json

    from .uncertainty import all_product_errors

    ds = a["ds"]
    out = {}
    for name, b in zip(a["basins"], a["b"]):
        errs = all_product_errors(ds, int(b), sources=a["ids"], period=mask, min_valid_fraction=opts.min_valid_fraction)
        out[name] = {s: e.method for s, e in errs.items()}
    return json.dumps(out, sort_keys=True)


def _year_month(months: pd.DatetimeIndex) -> tuple:
    """(calendar year, month 1..12) of each stamp, int32 as pandas' ``.year`` / ``.month`` give them (from the
    datetime64 values directly: pandas' field accessors cost more than the arithmetic)."""
    m = np.asarray(months.values).astype("datetime64[M]").astype(np.int64)  # months since 1970-01
    return (m // 12 + 1970).astype(np.int32), (m % 12 + 1).astype(np.int32)


def water_year(months: pd.DatetimeIndex, start_month: int = 1) -> np.ndarray:
    """Water year of each month, named by the calendar year in which it ends."""
    return _water_year(*_year_month(months), start_month)


def _water_year(year, month, start_month: int) -> np.ndarray:
    return np.where(month >= start_month, year + (1 if start_month > 1 else 0), year)


def metrics_arrays(residual, qhat, Q, P, months: pd.DatetimeIndex, options: ClosureOptions, *,
                   explain: bool = False) -> dict:
    """`metrics_from_residual` with the month of year and water year of ``months`` and ``options``."""
    y, m = _year_month(months)
    return metrics_from_residual(residual, qhat, Q, P, month_of_year=m, water_year=_water_year(y, m, options.water_year_start),
                                 min_valid=options.min_valid, explain=explain)


def closure_metrics(terms: xr.Dataset, *, explain: bool = False) -> xr.Dataset:
    """Metrics of every combination of `closure_terms` output, reduced over time.

    Returns
    -------
    xarray.Dataset over (basin, P_source, ET_source, TWSA_source): every metric of `METRICS` (units in
    each variable's attrs), ``scored`` (at least ``options.min_valid`` valid months) and, with
    ``explain``, ``undefined`` (why a metric is NaN on degenerate data).
    """
    opts = ClosureOptions.from_json(terms.attrs["closure_options"]) if "closure_options" in terms.attrs \
        else ClosureOptions()
    months = pd.DatetimeIndex(terms["time"].values)
    full = terms["residual"].dims
    v = terms.variables
    P = v["P"].values[:, :, None, None]
    Q = v["Q"].values[:, None, None, None] if "Q" in v else None  # None: a water body (no gauged discharge)
    m = metrics_arrays(v["residual"].values, v["Qhat"].values, Q, P, months, opts, explain=explain)
    shape = terms["residual"].shape[:-1]
    data = {k: (full[:-1], np.broadcast_to(m[k], shape), {"units": METRICS[k][1], "description": METRICS[k][2]})
            for k in METRICS}
    data["scored"] = (full[:-1], np.broadcast_to(m["n_valid"] >= opts.min_valid, shape))
    if explain:
        data["undefined"] = (full[:-1], np.broadcast_to(m["undefined"], shape))
    coords = {k: v for k, v in terms.coords.items() if "time" not in v.dims}
    out = xr.Dataset(data, coords=coords)
    out.attrs = dict(terms.attrs)
    return out
