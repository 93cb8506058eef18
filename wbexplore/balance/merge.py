"""Merged best estimates of P, ET and TWSA per basin and month, then a budget forced to close.

Two steps, per basin (pure computation: series in, series out):

1. **Merging.** The products of each component are combined month by month with inverse-error-variance
   weights, ``x = sum(x_k / v_k) / sum(1 / v_k)``, ``var(x) = 1 / sum(1 / v_k)`` (independent errors; a month
   uses the products that have it). The error variance ``v_k`` (mm2) of each product follows the one order of
   `wbexplore.balance.uncertainty` (the same as for the uncertainty of one selection): the error the catalog
   states for it (``relative_error``, ``absolute_error_mm``: what the analyst knows wins); else collocation
   over the component's products (at least three, at least `uncertainty.MIN_COLLOCATION_MONTHS` months where
   all are valid; triple collocation, Stoffelen 1998; with more, multiple collocation); else the merge is
   refused with the number of products (the product spread, which a band may fall back to, is not an error of
   a product and gives no weights). Method ``collocation`` takes collocation errors only (three products or
   more for every component). Collocation estimates errors *after* a linear rescaling of each product: a
   product that is a scaled copy of the truth (a multiplicative bias, a damped seasonal cycle) has a
   collocation error near zero, and an estimate not distinguishable from zero given its sampling error
   (`uncertainty.collocation_doubt`: at or below zero, or a tiny positive one) is refused, naming the product,
   never floored: collocation sees random error only (`uncertainty.COLLOCATION_CAVEAT`, in the outputs).
2. **Forced closure.** The merged P, ET, TWSA monthly means, the gauged Q and every gauged flow are moved,
   as little as their weights allow, until the balance closes in the engine's own form
   (`wbexplore.balance.engine`: window-matched fluxes against the storage difference, or raw fluxes when
   not matched) in every month that has all its terms. The rows share unknowns (a month's TWSA enters two
   storage differences; a matched flux three months), so the constraint is solved for the whole series at
   once (`wbexplore.balance.correction.constrained_projection`). Techniques (after the comparison of
   Abolafia-Rosenzweig et al. 2021, Remote Sensing of Environment; from memory):

   ``pr``           proportional redistribution: each month's residual is split among its terms in proportion
                    to their magnitudes (weights ``|term| / sum(kernel^2)``; for one month alone this is
                    exactly ``term_k - sign_k * residual * |term_k| / sum |term_j|``). Error variances are
                    carried through that linear map.
   ``ckf``          the constrained Kalman filter (Pan and Wood 2006): weights are the error variances of
                    step 1 and of gauged Q (`uncertainty.gauge_error`); posterior ``C - C G' (G C G')^-1 G C``.
   ``collocation``  multiple collocation for every component (no stated errors), then the filter.

The merged series become sources: ``merged_P``, ``merged_ET``, ``merged_TWSA`` (``role="source"``) with
``<name>_standard_error`` (mm/month; TWSA mm) as ancillary variables, beside the adjusted station terms
``merged_Q`` and ``merged_<flow>`` (``role="merged_station"``). With those in place of the gauged ones, the
engine's residual of the merged combination is zero (to rounding). `with_merged` adds the sources to a series
so that `rank`, export and the explorer treat them like any product.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from . import uncertainty as unc
from .correction import constrained_projection
from .engine import MERGED_PREFIX, basin_ids, is_merged, masked_values
from .options import ClosureOptions
from .storage import match_window, storage_change
from .terms import SOURCE_COMPONENTS, balance_terms

__all__ = ["MERGE_METHODS", "MERGED_PREFIX", "ComponentErrors", "merge_products", "product_error_variances",
           "inverse_variance_merge", "force_closure", "proportional_redistribution", "with_merged", "merged_name",
           "merge_form", "merged_basin", "merged_components", "DEFAULT_METHOD",
           "merged_label"]

MERGE_METHODS = {
    "pr": "proportional redistribution of the residual",
    "ckf": "constrained Kalman filter (Pan and Wood 2006)",
    "collocation": "multiple collocation, then the constrained Kalman filter",
}
DEFAULT_METHOD = "ckf"  # the variant a merged source is built with unless one is named (explorer, export, report)
GIVEN = "given"  # error variances passed to `merge_products` (``variances``): they override the order


def merged_label(method: str) -> str:
    """Display name of the merged sources of ``method``: "Merged (constrained Kalman filter)" (the variant named)."""
    _check_method(method)
    return f"Merged ({MERGE_METHODS[method].split(' (')[0]})"


def merged_name(term_or_component: str) -> str:
    """Variable of a merged term (``merged_P``, ``merged_TWSA``, ``merged_Q``, ``merged_flow_<id>``)."""
    return f"{MERGED_PREFIX}{term_or_component}"


@dataclass(frozen=True)
class ComponentErrors:
    """Error variances of the products of one component in one basin.

    component : "P" | "ET" | "TWSA"
    products : product ids, in series order
    methods : how each product's error was obtained: `uncertainty.STATED`, `uncertainty.COLLOCATION` or
        ``"given"`` (one per product)
    variance : (products, time) error variances, mm2 (mm/month squared for fluxes)
    """

    component: str
    products: tuple
    methods: tuple
    variance: np.ndarray

    @property
    def source(self) -> str:
        """The methods used, sorted and joined ("collocation / stated" where products differ)."""
        return " / ".join(sorted(set(self.methods)))


def _check_method(method: str) -> None:
    if method not in MERGE_METHODS:
        raise InputError(f"merge method {method!r} is not one of {', '.join(MERGE_METHODS)}")


def _stack(ds, ids, b, min_vf) -> np.ndarray:
    """(products, time) values of basin index ``b`` ((products, basins, time) for an index array), months below
    the valid fraction missing."""
    return np.stack([masked_values(ds, s, b, min_vf) for s in ids])


def product_error_variances(ds: xr.Dataset, component: str, basin: str, *, method: str = "ckf",
                            min_valid_fraction: float = 0.5, variances: dict | None = None) -> tuple:
    """(values, `ComponentErrors`) of the products of ``component`` in ``basin``.

    ``values`` is (products, time) in mm/month (TWSA mm), months below ``min_valid_fraction`` missing.
    ``variances`` (product id -> mm2, constant over time) overrides both collocation and stated errors.
    Refusals (`InputError`, one line): no or too few products for collocation (with the count), too few
    common months for collocation (with the minimum), and a variance that is not positive and finite where
    the product has a value (naming the basin, product, month and value).
    """
    _check_method(method)
    ids = unc.component_products(ds, component)
    b = basin_ids(ds).index(str(basin))
    X = _stack(ds, ids, b, min_valid_fraction) if ids else np.zeros((0, ds.sizes["time"]))
    attrs = [ds.variables[s].attrs for s in ids]
    return X, _component_errors(X, ids, attrs, component=component, basin=basin, method=method,
                                variances=variances, months=ds["time"].values)


def _component_errors(X, ids, attrs, *, component, basin, method, variances, months) -> ComponentErrors:
    """`ComponentErrors` of the (products, time) values ``X`` (the core of `product_error_variances`): each
    product's error by the order of `wbexplore.balance.uncertainty`, the product spread excepted (refused)."""
    where = f"basin {basin!r}: {component}"
    T = X.shape[1]
    if variances is not None and ids and all(s in variances for s in ids):
        V = [np.full(T, float(variances[s])) for s in ids]
        how = [GIVEN] * len(ids)
    else:
        V = [None if method == "collocation" else unc.stated_variance(a, X[i], source=s)
             for i, (s, a) in enumerate(zip(ids, attrs))]
        missing = [s for s, v in zip(ids, V) if v is None]
        how = [unc.STATED if v is not None else unc.COLLOCATION for v in V]
        if missing and len(ids) < 3:
            if method == "collocation":
                raise InputError(f"{where} has {len(ids)} product(s) ({', '.join(ids) or 'none'}); method "
                                 f"'collocation' needs at least 3 products of every component")
            raise InputError(f"{where} has {len(ids)} product(s) ({', '.join(ids) or 'none'}): collocation needs "
                             f"at least 3, and {', '.join(missing)} state no error (relative_error or "
                             f"absolute_error_mm in the catalog)")
        if missing:
            try:
                tc = unc.collocation_variances(X, ids, component=component)
            except InputError as exc:
                raise InputError(f"{where}: {exc}") from None
            for s in missing:
                doubt = unc.collocation_doubt(s, tc[s])
                if doubt is not None:
                    raise InputError(f"{where}: {doubt}; its weight would be unbounded (state errors in the "
                                     "catalog instead: relative_error, absolute_error_mm)")
            V = [np.full(T, tc[s]["error_variance"]) if v is None else v for s, v in zip(ids, V)]
    V = np.stack(V) if V else np.zeros((0, T))
    bad = np.isfinite(X) & ~(np.isfinite(V) & (V > 0))
    if bad.any():
        i, t = np.argwhere(bad)[0]
        src = how[i]
        month = "" if src in (unc.COLLOCATION, GIVEN) else f" in {str(months[t])[:7]}"
        hint = (" (collocation sees no error in a scaled copy of the truth, and errors shared between products "
                "or a short period push its estimate below zero; state errors in the catalog instead)"
                if src == unc.COLLOCATION else "")
        raise InputError(f"{where}: {src} error variance of product {ids[i]!r}{month} is {float(V[i, t]):.6g} "
                         f"mm2, not positive and finite{hint}")
    return ComponentErrors(component, tuple(ids), tuple(how), V)


def inverse_variance_merge(values, variances) -> tuple:
    """Inverse-error-variance mean over axis 0 (products), month by month.

    Returns (merged, merged_variance, count): ``sum(x/v) / sum(1/v)``, ``1 / sum(1/v)`` over the products
    that have a value, and how many did (NaN and 0 where none).
    """
    X = np.asarray(values, dtype=np.float64)
    V = np.asarray(variances, dtype=np.float64)
    ok = np.isfinite(X)
    w = np.where(ok, 1.0 / np.where(ok, V, 1.0), 0.0)
    sw = w.sum(axis=0)
    n = ok.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        merged = np.where(n > 0, np.sum(w * np.where(ok, X, 0.0), axis=0) / sw, np.nan)
        var = np.where(n > 0, 1.0 / sw, np.nan)
    return merged, var, n


def _kernel(fn, method) -> np.ndarray:
    """Weights on months (i-1, i, i+1) of a linear monthly operator of `storage` (one place knows them)."""
    return fn(np.eye(3), method)[:, 1]


def _rows(values: dict, terms, options: ClosureOptions):
    """Balance rows of one basin: (G as (row, column, coefficient) lists, residual before, row months).

    Unknowns are laid out term by term in table order, each over all months; a row is a month whose
    residual (the engine's form) is defined.
    """
    T = next(iter(values.values())).size
    method = options.storage_change
    flux_k = _kernel(match_window, method) if options.matched else np.array([0.0, 1.0, 0.0])
    ds_k = _kernel(storage_change, method)
    res = np.zeros(T)
    coef = []
    for j, t in enumerate(terms):
        k = ds_k if t.storage else flux_k
        x = values[t.name]
        term_val = storage_change(x, method) if t.storage else (match_window(x, method) if options.matched else x)
        res = res + t.sign * term_val
        coef.append((j, t.sign * k))
    months = np.flatnonzero(np.isfinite(res))
    r_idx = np.arange(months.size)
    rows, cols, data = [], [], []
    for j, k in coef:
        for off, w in zip((-1, 0, 1), k):
            if w != 0.0:
                rows.append(r_idx)
                cols.append(j * T + months + off)
                data.append(np.full(months.size, w))
    cat = (lambda parts, dt: np.concatenate(parts).astype(dt) if parts else np.zeros(0, dt))
    return (cat(rows, np.intp), cat(cols, np.intp), cat(data, np.float64)), res, months


def _pr_weights(x, G, T, terms) -> np.ndarray:
    """Proportional redistribution's weight of each unknown: the mean, over the rows that use it, of
    ``|term value in that row| / sum(coefficients of the term in that row ^ 2)``."""
    coo = G.tocoo()
    term = coo.col // T
    x0 = np.where(np.isfinite(x), x, 0.0)
    R = G.shape[0]
    n_terms = len(terms)
    key = coo.row * n_terms + term  # (row, term) pairs
    value = np.bincount(key, weights=coo.data * x0[coo.col], minlength=R * n_terms)
    k2 = np.bincount(key, weights=coo.data**2, minlength=R * n_terms)
    with np.errstate(invalid="ignore", divide="ignore"):
        per = np.where(k2 > 0, np.abs(value) / k2, 0.0)
    w = np.bincount(coo.col, weights=per[key], minlength=x.size)
    cnt = np.bincount(coo.col, minlength=x.size)
    return np.where(cnt > 0, w / np.maximum(cnt, 1), 0.0)


def proportional_redistribution(terms, signs) -> np.ndarray:
    """One month's terms with the residual split in proportion to their magnitudes (the published arithmetic).

    ``terms`` (..., n) and ``signs`` (n,): returns ``terms - signs * residual * |terms| / sum |terms|`` with
    ``residual = sum(signs * terms)``. (`force_closure` with ``method="pr"`` gives the same for a month whose
    terms no other month shares.)
    """
    x = np.asarray(terms, dtype=np.float64)
    s = np.asarray(signs, dtype=np.float64)
    r = x @ s
    a = np.abs(x) / np.sum(np.abs(x), axis=-1, keepdims=True)
    return x - s * a * r[..., None]


def force_closure(values: dict, variances: dict, terms, options: ClosureOptions, *, method: str) -> tuple:
    """Move the terms of one basin until its balance closes in every month that has all of them.

    Parameters
    ----------
    values, variances : term name -> (time,) array
        Fluxes in mm/month, the storage term as monthly-mean storage (mm); error variances in mm2.
    terms : the `Term` rows (`wbexplore.balance.terms.balance_terms`)
    options : `ClosureOptions` (storage-change method, window matching)
    method : "pr" | "ckf" | "collocation"

    Returns
    -------
    (adjusted, posterior_variance, residual_before, rows) : two dicts like the inputs, the residual of the
    inputs (mm/month, NaN where a month lacks a term) and the months (indices) the constraint holds in.
    """
    from scipy.sparse import csr_matrix

    _check_method(method)
    names = [t.name for t in terms]
    T = values[names[0]].size
    (r, c, d), res, months = _rows(values, terms, options)
    x = np.concatenate([values[n] for n in names])
    v = np.concatenate([variances[n] for n in names])
    G = csr_matrix((d, (r, c)), shape=(months.size, x.size))
    if method == "pr":
        xn, vn = constrained_projection(x, _pr_weights(x, G, T, terms), G, variance=np.where(np.isfinite(v), v, 0.0))
    else:
        xn, vn = constrained_projection(x, np.where(np.isfinite(v), v, 0.0), G)
    vn = np.where(np.isfinite(v), vn, np.nan)
    adj = {n: xn[j * T:(j + 1) * T] for j, n in enumerate(names)}
    post = {n: np.maximum(vn[j * T:(j + 1) * T], 0.0) for j, n in enumerate(names)}
    return adj, post, res, months


def merge_products(ds: xr.Dataset, *, method: str, basins=None, options: ClosureOptions | None = None,
                   q_relative_error: float = unc.Q_RELATIVE_ERROR, variances: dict | None = None) -> xr.Dataset:
    """Merged best estimates of P, ET and TWSA for each basin, with the budget forced to close.

    Parameters
    ----------
    ds : canonical basin series (`wbexplore.series`)
    method : "pr" | "ckf" | "collocation" (see the module text); named in every output variable
    basins : basin ids (default every basin)
    options : `ClosureOptions`: the storage-change method, window matching and ``min_valid_fraction`` of the
        closure form (default ``ClosureOptions()``); a lag or gap filling is refused
    q_relative_error : relative standard error of gauged Q and of every gauged flow (default 5%)
    variances : product id -> error variance (mm2), overriding collocation and stated errors

    Returns
    -------
    xarray.Dataset (basin, time): ``merged_P``, ``merged_ET`` (mm/month), ``merged_TWSA`` (mm) as sources,
    each with ``<name>_standard_error`` and ``<name>_count`` (products merged that month); ``merged_Q`` and
    ``merged_<flow>`` (adjusted station terms, mm/month) with standard errors; ``residual_before`` (the
    merged products with gauged Q, mm/month) and ``residual_after``; ``error_variance`` (basin, product; mm2;
    NaN where the variance varies by month, i.e. stated errors). Attributes name the method, the closure
    form (the command line adds the caution text).
    """
    _check_method(method)
    opts = options or ClosureOptions()
    if opts.lag or opts.fill_gaps:
        raise InputError("merge: a discharge lag or TWSA gap filling is not supported (use lag 0, no filling)")
    if not 0.0 <= q_relative_error or not np.isfinite(q_relative_error):
        raise InputError(f"q_relative_error {q_relative_error!r} must be a finite number >= 0")
    if variances is not None:
        for k, val in variances.items():
            if not (isinstance(val, (int, float, np.floating)) and np.isfinite(val) and val > 0):
                raise InputError(f"error variance of product {k!r} is {val!r} mm2, not positive and finite")
    if "discharge" not in ds:
        raise InputError("the series hold no discharge: add 'discharge' to the catalog")
    all_ids = basin_ids(ds)
    wanted = all_ids if basins is None else [str(x) for x in basins]
    for x in wanted:
        if x not in all_ids:
            raise InputError(f"basin {x!r} is not in the series (known: {', '.join(all_ids)})")
    terms = balance_terms(ds)
    station = [t for t in terms if not t.gridded]
    T = ds.sizes["time"]
    products = [s for c in SOURCE_COMPONENTS for s in unc.component_products(ds, c)]
    out = {n: np.full((len(wanted), T), np.nan) for n in
           [merged_name(t.component if t.gridded else t.name) for t in terms]}
    se = {n: np.full((len(wanted), T), np.nan) for n in out}
    counts = {c: np.zeros((len(wanted), T), dtype=np.int16) for c in SOURCE_COMPONENTS}
    res_before = np.full((len(wanted), T), np.nan)
    res_after = np.full((len(wanted), T), np.nan)
    err_var = np.full((len(wanted), len(products)), np.nan)
    err_src = {}
    negative = 0
    b_all = np.array([all_ids.index(x) for x in wanted], dtype=np.intp)
    stacks = {}
    for c in SOURCE_COMPONENTS:  # (products, basins, time), read once
        ids = unc.component_products(ds, c)
        stacks[c] = (ids, [ds.variables[s].attrs for s in ids],
                     _stack(ds, ids, b_all, opts.min_valid_fraction) if ids else np.zeros((0, len(wanted), T)))
    station_values = {t.name: masked_values(ds, t.variable, b_all, opts.min_valid_fraction) for t in station}
    months = ds["time"].values
    for bi, basin in enumerate(wanted):
        vals, vars_ = {}, {}
        for t in terms:
            if t.gridded:
                ids, attrs, stack = stacks[t.component]
                X = stack[:, bi]
                errs = _component_errors(X, ids, attrs, component=t.component, basin=basin, method=method,
                                         variances=variances, months=months)
                m, mv, n = inverse_variance_merge(X, errs.variance)
                vals[t.name], vars_[t.name] = m, mv
                counts[t.component][bi] = n
                err_src.setdefault(t.component, set()).update(errs.methods)
                for i, s in enumerate(errs.products):
                    if errs.methods[i] != unc.STATED:  # one number for every month
                        err_var[bi, products.index(s)] = errs.variance[i, 0]
            else:
                q = station_values[t.name][bi]
                vals[t.name], vars_[t.name] = q, unc.gauge_error(q, q_relative_error) ** 2
        adj, post, res, _ = force_closure(vals, vars_, terms, opts, method=method)
        after = _residual(adj, terms, opts)
        res_before[bi], res_after[bi] = res, after
        for t in terms:
            n = merged_name(t.component if t.gridded else t.name)
            out[n][bi] = np.where(np.isfinite(vals[t.name]), adj[t.name], np.nan)
            se[n][bi] = np.sqrt(post[t.name])
            if not t.storage:
                negative += int(np.sum(out[n][bi] < 0))
    return _dataset(ds, wanted, out, se, counts, res_before, res_after, err_var, products, err_src, terms,
                    station, method, opts, q_relative_error, negative)


def _residual(values, terms, opts) -> np.ndarray:
    res = 0.0
    for t in terms:
        x = values[t.name]
        v = storage_change(x, opts.storage_change) if t.storage else (
            match_window(x, opts.storage_change) if opts.matched else x)
        res = res + t.sign * v
    return res


def _dataset(ds, wanted, out, se, counts, res_before, res_after, err_var, products, err_src, terms, station,
             method, opts, q_rel, negative) -> xr.Dataset:
    what = MERGE_METHODS[method]
    form = (f"{opts.storage_change} storage difference against "
            f"{'window-matched' if opts.matched else 'raw monthly'} fluxes")
    b_idx = [basin_ids(ds).index(x) for x in wanted]
    coords = {"basin": ("basin", np.array(wanted, dtype=object)), "time": ds["time"].values}
    for c in ("basin_name", "basin_area_km2"):
        if c in ds.coords:
            coords[c] = ("basin", ds[c].values[b_idx])
    data = {}
    for t in terms:
        name = merged_name(t.component if t.gridded else t.name)
        units = "mm" if t.storage else "mm/month"
        if t.gridded:
            ids = unc.component_products(ds, t.component)
            src = " / ".join(sorted(err_src.get(t.component, ())))
            caveat = "; collocation: random error only" if unc.COLLOCATION in src else ""
            attrs = {"role": "source", "component": t.component, "units": units, "source_id": name,
                     "long_name": f"merged {t.component} ({', '.join(ids)}; inverse error variance, errors: "
                                  f"{src}{caveat}), budget closed by {what} [{method}]",
                     "label": f"Merged {t.component} ({method})", "products": ", ".join(ids),
                     "error_variance_source": src}
            if caveat:
                attrs["error_variance_caveat"] = unc.COLLOCATION_CAVEAT
        else:
            attrs = {"role": "merged_station", "component": t.component, "units": units,
                     "long_name": f"{t.label} adjusted by {what} [{method}] (gauged {t.variable}, "
                                  f"{q_rel:.0%} relative error)", "adjusts": t.variable}
        attrs.update({"merge_method": method, "ancillary_variables": f"{name}_standard_error"})
        data[name] = (("basin", "time"), out[name], attrs)
        data[f"{name}_standard_error"] = (("basin", "time"), se[name], {
            "units": units, "long_name": f"posterior standard error of {name} [{method}]", "merge_method": method})
        if t.gridded:
            data[f"{name}_count"] = (("basin", "time"), counts[t.component], {
                "long_name": f"number of {t.component} products merged in the month", "units": "1",
                "merge_method": method})
    data["residual_before"] = (("basin", "time"), res_before, {
        "units": "mm/month", "long_name": f"residual of the merged products with gauged terms ({form})",
        "merge_method": method})
    data["residual_after"] = (("basin", "time"), res_after, {
        "units": "mm/month", "long_name": f"residual after {what} [{method}] ({form})", "merge_method": method})
    data["error_variance"] = (("basin", "product"), err_var, {
        "units": "mm2", "long_name": "error variance of each product used for its weight (collocation, random "
                                     "error only, or given; NaN: stated errors, which vary by month)",
        "merge_method": method})
    coords["product"] = ("product", np.array(products, dtype=object))
    res = xr.Dataset(data, coords=coords)
    res.attrs = {"merge_method": method, "merge_method_description": what,
                 "closure_form": form, "closure_options": opts.to_json(), "q_relative_error": float(q_rel),
                 "negative_flux_months": int(negative),
                 "references": "Pan and Wood 2006 (constrained Kalman filter); Stoffelen 1998 and McColl et al. "
                               "2014 (collocation); Abolafia-Rosenzweig et al. 2021 (closure techniques compared)"}
    return res


def with_merged(ds: xr.Dataset, merged: xr.Dataset) -> xr.Dataset:
    """``ds`` with the merged sources of ``merged`` (`merge_products`) added as sources like any product.

    The basins of ``merged`` must be those of ``ds``; only ``merged_P``, ``merged_ET`` and ``merged_TWSA``
    are added (with their standard errors): the gauged terms stay as measured.
    """
    if basin_ids(merged) != basin_ids(ds):
        raise InputError("the merged series cover other basins than the series (merge every basin first)")
    out = ds.copy()
    for c in SOURCE_COMPONENTS:
        n = merged_name(c)
        out[n] = (("basin", "time"), merged[n].values, dict(merged[n].attrs))
        out[f"{n}_standard_error"] = (("basin", "time"), merged[f"{n}_standard_error"].values,
                                      dict(merged[f"{n}_standard_error"].attrs))
    return out


def merged_components(sel) -> list[str]:
    """The components whose chosen source in ``sel`` (a `Selection`) is a merged one (``merged_<component>``)."""
    return [c for c in SOURCE_COMPONENTS if is_merged(getattr(sel, c))]


def merge_form(storage_change: str, matched: bool) -> ClosureOptions:
    """The closure form in which a merged source offered beside the products is built for a selection: its
    storage-change method and window matching; the other options at their defaults (``min_valid_fraction``
    0.5, no lag, no gap filling, the whole record: the merge does not follow the period). The explorer and a
    selection file's export use this one form, so that the file replays what the page showed."""
    return ClosureOptions(storage_change=storage_change, matched=bool(matched))


def merged_basin(ds: xr.Dataset, basin: str, *, method: str, options: ClosureOptions,
                 q_relative_error: float = unc.Q_RELATIVE_ERROR) -> xr.Dataset:
    """``basin``'s series alone (a basin's balance does not depend on the others) with its merged sources
    (`merge_products` in the closure form ``options``, then `with_merged`). Refusals as `merge_products`, and
    a water body's series (its storage is its own: it has no merged sources)."""
    if ds.attrs.get("unit") == "waterbody":
        raise InputError(f"water body {basin!r} has no merged sources (its storage is its own)")
    m = merge_products(ds, method=method, basins=[basin], options=options, q_relative_error=q_relative_error)
    one = [basin_ids(ds).index(str(basin))]
    return with_merged(ds.isel(basin=one), m)
