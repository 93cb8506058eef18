"""The error of the chosen product, not of the crowd: per-month error variances of a source.

This module is the one place that knows which error a product gets. The order, for each product on its
own (used by the uncertainty of a selection, `product_error`, and by the merge, `wbexplore.balance.merge`):

1. ``stated``: the catalog states it (``relative_error``, ``absolute_error_mm``: standard errors, as
   ``sqrt((relative_error * value)^2 + absolute_error_mm^2)``; `stated_variance`);
2. ``collocation``: the component has at least three independent products (`component_products`: ensemble
   means and merged series left out) with at least `MIN_COLLOCATION_MONTHS` months where every one of them is
   valid in the period: the collocation error variance of the product (triple collocation, Stoffelen 1998;
   covariance form of McColl et al. 2014, GRL 41:6229; with more than three products the multiple-collocation
   mean over triplets, `collocation.multiple_collocation`; `collocation_variances`), the same for every month;
3. otherwise: for a band (`product_error`, ``method="auto"``), ``spread``: the standard deviation of the
   component's products in each month, which measures their disagreement, not the error of the chosen one
   (labelled so wherever it is shown); for a merge, a refusal (`InputError`, one line): weights need an
   error of each product, and the spread is not one.

A collocation estimate is used only where it is distinguishable from zero: above `SIGNIFICANCE_Z` times its
sampling standard error (`collocation.collocation_standard_errors`). One at or below zero is never floored,
and a tiny positive one is not used either (a damped or scaled copy of the truth comes out as sampling noise
around zero, and would get a band of hundredths of a mm/month): the band falls back to the spread and says why
(`collocation_doubt`), the merge (and ``method="collocation"``) refuses, naming the product.

A merged source (`wbexplore.balance.merge`, ``merged_<component>``) is not a product: its error is the merge's
posterior standard error (``<name>_standard_error``, month by month), ``posterior`` (`POSTERIOR`), whatever
the order above (its correlation with the other merged terms, which the closure constraint creates, is left out).

What was used is recorded (`ProductError.method`, `method_label`) and travels with every output that
carries an uncertainty. The product spread stays available on its own as `product_disagreement`.

Speed: collocation error variances are memoised by the content of what they are estimated from
(`collocation_variances`: component, product ids and the bytes of the masked values over the period), so a
selection recomputed after another option changed (a different P product, storage method, lag) does not
collocate again; a changed series is a different key (never a stale result). Within one selection the stacked
products and their spread are shared between the error of each product and the disagreement columns (the
``cache`` argument of `product_error` and `product_disagreement`).

What collocation measures: the *random* error of a product around a linear calibration of the truth
(``x = a + b t + e``, errors independent of the truth and of each other). A multiplicative bias or a
damped seasonal cycle is part of ``a + b t`` and is not in the error variance: collocation is blind to
systematic errors. Every text that reports a collocation error says so ("random error only", `COLLOCATION_CAVEAT`).

Pure computation: no files, no prints.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from ..series import source_ids
from .collocation import multiple_collocation
from .engine import DERIVED_PREFIXES, is_merged, masked_values

__all__ = ["ProductError", "METHODS", "STATED", "COLLOCATION", "SPREAD", "NONE", "POSTERIOR", "band_text", "MIN_COLLOCATION_MONTHS",
           "DEFAULT_METHOD", "product_error", "product_errors", "all_product_errors", "product_disagreement", "stated_variance",
           "collocation_variances", "method_label", "uncertainty_text", "legend_text", "check_method",
           "component_products", "Q_RELATIVE_ERROR", "gauge_error", "SIGNIFICANCE_Z", "COLLOCATION_CAVEAT",
           "collocation_doubt", "error_inputs"]

# Relative error of gauged monthly discharge: a few percent for a rated station (common practice;
# the 5% used here is from memory of typical stage-discharge uncertainty, not from a standard).
Q_RELATIVE_ERROR = 0.05

STATED, COLLOCATION, SPREAD, NONE = "stated", "collocation", "spread", "none"
POSTERIOR = "posterior"  # a merged source: the merge's posterior standard error
METHODS = ("auto", STATED, COLLOCATION, SPREAD)
# Two years of common months: the sampling standard error of a variance estimate is about sqrt(2 / n)
# of it (normal errors), 29% at n = 24; fewer months and the estimate is mostly noise (common practice).
MIN_COLLOCATION_MONTHS = 24
DEFAULT_METHOD = "auto"
# A collocation error variance is used when it exceeds this many of its sampling standard errors: the
# one-sided 5% point of the normal distribution (we ask only whether the error variance is above zero).
SIGNIFICANCE_Z = 1.645
COLLOCATION_CAVEAT = ("random error only: collocation is blind to scaling and damping errors (a linear "
                      "calibration absorbs them)")

_LABELS = {
    STATED: "stated product error (catalog)",
    COLLOCATION: "collocation error variance of the product (random error only: blind to scaling and damping errors)",
    SPREAD: "product spread (disagreement between products, not the chosen product's error)",
    NONE: "no error estimate",
    POSTERIOR: "posterior error of the merged source (inverse error variances, then the closure constraint)",
}


def method_label(method: str) -> str:
    """The name of an uncertainty source for legends, notes and reports."""
    if method not in _LABELS:
        raise InputError(f"uncertainty source {method!r} is not one of {', '.join(_LABELS)}")
    return _LABELS[method]


def check_method(method: str) -> str:
    """``method`` if it is one of `METHODS`, else `InputError`."""
    if method not in METHODS:
        raise InputError(f"--uncertainty {method!r} is not one of {', '.join(METHODS)}")
    return method


@dataclass(frozen=True)
class ProductError:
    """Per-month error variance of one source.

    source : source id
    component : "P" | "ET" | "TWSA"
    method : `STATED` | `COLLOCATION` | `SPREAD` | `NONE`
    variance : array (T,), mm2 (P, ET: (mm/month)^2; TWSA: mm^2), NaN where unknown
    note : how it was obtained (products, months) or why ``auto`` fell back
    reason : why ``auto`` fell back to the spread (or to none), in a few words ("" when it did not)
    """

    source: str
    component: str
    method: str
    variance: np.ndarray
    note: str = ""
    reason: str = ""

    @property
    def sigma(self) -> np.ndarray:
        """Standard error per month (mm/month; TWSA mm)."""
        return np.sqrt(self.variance)

    @property
    def label(self) -> str:
        return method_label(self.method)


def component_products(ds: xr.Dataset, component: str) -> list[str]:
    """The independent products of ``component``: ensemble means and merged series are left out (they are
    computed from the products, so their errors are not independent of the products' errors)."""
    return [s for s in source_ids(ds, component) if not s.startswith(DERIVED_PREFIXES)]



def stated_variance(attrs: dict, values, *, source: str) -> np.ndarray | None:
    """Variance (mm2) per month from the stated errors in ``attrs``, or None when none is stated.

    `InputError` naming the source and field for a stated error that is not a positive finite number.
    """
    rel, ab = attrs.get("relative_error"), attrs.get("absolute_error_mm")
    if rel is None and ab is None:
        return None
    for field, v in (("relative_error", rel), ("absolute_error_mm", ab)):
        if v is None:
            continue
        try:
            f = float(v)
        except (TypeError, ValueError):
            f = float("nan")
        if isinstance(v, bool) or not np.isfinite(f) or f <= 0:
            raise InputError(f"source {source!r}: field {field!r}: {v!r} must be a positive finite number")
    x = np.asarray(values, dtype=np.float64)
    return (float(rel or 0.0) * x) ** 2 + float(ab or 0.0) ** 2


def gauge_error(values, relative_error: float = Q_RELATIVE_ERROR) -> np.ndarray:
    """Standard error of a gauged term (outlet Q, a gauged flow) per month: ``relative_error * |value|``, in the
    units of ``values`` (mm/month); the one place for the error of gauged terms (selection band, estimates by
    difference, merge)."""
    return relative_error * np.abs(np.asarray(values, dtype=np.float64))


def collocation_doubt(source: str, estimate: dict) -> str | None:
    """Why ``source``'s collocation error variance cannot be used, or None when it can.

    ``estimate`` is ``source``'s entry of `collocation_variances` (``error_variance``, ``standard_error``, ``n``).
    It is usable when it exceeds `SIGNIFICANCE_Z` times its sampling standard error; otherwise collocation saw
    no random error in the product, which says nothing about its systematic error.
    """
    ev, se, n = float(estimate["error_variance"]), float(estimate["standard_error"]), int(estimate["n"])
    if ev > 0 and np.isfinite(se) and ev > SIGNIFICANCE_Z * se:
        return None
    if not ev > 0:
        what = f"collocation error variance of {source!r} is {ev:.3g} mm2, not positive"
    else:
        what = (f"collocation error variance of {source!r} is {ev:.3g} mm2, within {SIGNIFICANCE_Z} sampling "
                f"standard errors ({se:.3g} mm2) of zero")
    return (f"collocation cannot separate {source}'s error from zero: it sees no random error ({what} over "
            f"{n} months); systematic errors are invisible to collocation")


def collocation_variances(stack, names, *, component: str = "", min_months: int = MIN_COLLOCATION_MONTHS) -> dict:
    """Collocation error variance (mm2) of each of N >= 3 products (rows of ``stack``, time last).

    `InputError` with fewer than three products (saying how many there are) or fewer than ``min_months``
    months where every product is valid (naming the minimum).

    Results are memoised by content (`_MEMO`): the same component, product ids, ``min_months`` and bitwise the
    same ``stack`` give the estimate computed before (a fresh copy); anything else is computed again.
    """
    stack = np.ascontiguousarray(stack, dtype=np.float64)
    what = f"{component} " if component else ""
    if stack.shape[0] < 3:
        raise InputError(f"collocation needs at least three {what}products; there {'is' if stack.shape[0] == 1 else 'are'} "
                         f"{stack.shape[0]} ({', '.join(names) or 'none'})")
    n = int(np.all(np.isfinite(stack), axis=0).sum())
    if n < min_months:
        raise InputError(f"period too short to estimate error variances by collocation: {n} months where every "
                         f"{what}product ({', '.join(names)}) is valid, at least {min_months} needed")
    key = (component, tuple(str(x) for x in names), int(min_months), stack.shape,
           hashlib.blake2b(stack, digest_size=32).digest())
    found = _MEMO.get(key)
    if found is None:
        found = multiple_collocation(stack, names=names, min_samples=min_months)
        _MEMO.put(key, found)
    return {k: dict(v) for k, v in found.items()}


class _Memo:
    """A small least-recently-used memo (thread-safe: the explorer's server may compute from several threads)."""

    def __init__(self, size: int):
        self.size = size
        self._d: OrderedDict = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key):
        with self._lock:
            v = self._d.get(key)
            if v is not None:
                self._d.move_to_end(key)
            return v

    def put(self, key, value) -> None:
        with self._lock:
            self._d[key] = value
            self._d.move_to_end(key)
            while len(self._d) > self.size:
                self._d.popitem(last=False)

    def clear(self) -> None:
        with self._lock:
            self._d.clear()

    def __len__(self) -> int:
        return len(self._d)


# Collocation estimates by content of their input (`collocation_variances`): a few kB per entry (the key holds a
# 32-byte digest of the stack, the value one small dict per product); 4096 entries cover 1,000 basins x 3 components.
_MEMO = _Memo(4096)


def _spread(stack) -> np.ndarray:
    """Sample standard deviation of the products in each month (NaN where fewer than two are valid)."""
    n = np.sum(np.isfinite(stack), axis=0)
    with np.errstate(invalid="ignore"):
        mean = np.nanmean(np.where(n >= 2, stack, 0.0), axis=0)
        sd = np.sqrt(np.nansum((stack - mean) ** 2, axis=0) / np.maximum(n - 1, 1))
    return np.where(n >= 2, sd, np.nan)


def _products(ds: xr.Dataset, component: str, basin_index: int, min_valid_fraction: float,
              cache: dict | None) -> tuple:
    """(ids, stack): ``component``'s independent products (`component_products`) and their values at the basin
    (products x months, months below ``min_valid_fraction`` missing; None without products), from ``cache``
    when it holds them."""
    key = ("products", component)
    if cache is not None and key in cache:
        return cache[key]
    ids = component_products(ds, component)
    stack = np.stack([masked_values(ds, s, basin_index, min_valid_fraction) for s in ids]) if ids else None
    if cache is not None:
        cache[key] = (ids, stack)
    return ids, stack


def _products_spread(ds, component, basin_index, min_valid_fraction, cache) -> np.ndarray:
    """`_spread` of ``component``'s products at the basin (shared through ``cache``); callers need >= 2 products."""
    key = ("spread", component)
    if cache is not None and key in cache:
        return cache[key]
    sd = _spread(_products(ds, component, basin_index, min_valid_fraction, cache)[1])
    if cache is not None:
        cache[key] = sd
    return sd


def product_disagreement(ds: xr.Dataset, component: str, basin_index: int, *, min_valid_fraction: float = 0.5,
                         cache: dict | None = None) -> np.ndarray:
    """Standard deviation (mm/month; TWSA mm) of ``component``'s products in each month: how much they
    disagree (NaN where fewer than two are valid). Not the error of any one product.

    ``cache`` : dict, optional; shared with `product_error` calls for the same basin and valid fraction (the
    products are stacked once). Do not change the returned array when passing one.
    """
    ids, _ = _products(ds, component, basin_index, min_valid_fraction, cache)
    if len(ids) < 2:
        return np.full(ds.sizes["time"], np.nan)
    return _products_spread(ds, component, basin_index, min_valid_fraction, cache)


def product_error(ds: xr.Dataset, source: str, basin_index: int, *, values=None, period=None,
                  min_valid_fraction: float = 0.5, method: str = DEFAULT_METHOD, strict: bool = False,
                  cache: dict | None = None) -> ProductError:
    """Per-month error variance of ``source`` over one basin (see the module text for the order).

    Parameters
    ----------
    ds : canonical basin series
    source : source id (a P, ET or TWSA product)
    basin_index : the basin's index in ``ds``
    values : array (T,), optional
        The source as the balance uses it (e.g. TWSA with gaps filled), for stated relative errors;
        default the series' values (months below ``min_valid_fraction`` missing).
    period : bool array (T,), optional
        Months over which collocation error variances are estimated (default all).
    min_valid_fraction : months where a product covers less of the basin are missing (0..1)
    method : "auto" | "stated" | "collocation" | "spread"
        "auto": stated, else collocation, else spread; for a merged source (``merged_<component>`` with its
        ``_standard_error``) its posterior (`POSTERIOR`). An explicit method is used or refused.
    strict : bool
        With "auto", refuse (`InputError`) instead of falling back to the spread when the component has
        three products or more but the period is too short to estimate collocation error variances. (An
        estimate not distinguishable from zero, `collocation_doubt`, falls back to the spread, saying why,
        unless collocation was asked for.)
    cache : dict, optional
        Shared between calls for one basin, period and valid fraction (`all_product_errors`,
        `closure.compute_selection`, with `product_disagreement`): each component's products are stacked,
        collocated and spread once.

    Returns
    -------
    ProductError
    """
    check_method(method)
    attrs = ds.variables[source].attrs
    comp = attrs.get("component")
    posterior = f"{source}_standard_error"
    if method == "auto" and is_merged(source) and posterior in ds.variables:
        from .merge import MERGE_METHODS  # merge.py builds on this module: imported where it is used

        se = ds.variables[posterior].values[basin_index].astype(np.float64)
        how = MERGE_METHODS.get(attrs.get("merge_method"), "merge")
        return ProductError(source, comp, POSTERIOR, se**2, f"posterior of the merge ({how}; products "
                            f"{attrs.get('products', '?')}, errors {attrs.get('error_variance_source', '?')})")
    ids, stack = _products(ds, comp, basin_index, min_valid_fraction, cache)
    if values is not None:
        x = np.asarray(values, dtype=np.float64)
    else:  # the series' own values (the product's row of the stack when it is one of the products)
        x = stack[ids.index(source)] if source in ids else masked_values(ds, source, basin_index, min_valid_fraction)
    if method in ("auto", STATED):
        v = stated_variance(attrs, x, source=source)
        if v is not None:
            return ProductError(source, comp, STATED, v, "stated in the catalog")
        if method == STATED:
            raise InputError(f"source {source!r}: no stated error in the catalog (fields 'relative_error', "
                             "'absolute_error_mm')")
    why = reason = ""
    if source not in ids and method == COLLOCATION:
        raise InputError(f"source {source!r} is derived from the {comp} products (not independent of them): "
                         "collocation needs independent products")
    if method == COLLOCATION or (method == "auto" and len(ids) >= 3 and source in ids):
        if cache is not None and comp in cache:
            tc, failure = cache[comp]
        else:
            cut = stack if period is None else np.where(np.asarray(period, dtype=bool), stack, np.nan)
            tc = failure = None
            try:
                tc = collocation_variances(cut, ids, component=comp)
            except InputError as exc:
                failure = exc
            if cache is not None:
                cache[comp] = (tc, failure)
        if failure is not None:
            if method == COLLOCATION or strict:
                raise InputError(str(failure))
            why = f" (collocation not used: {failure})"
            reason = f"period too short for collocation ({MIN_COLLOCATION_MONTHS} common months needed)"
        doubt = None if tc is None else collocation_doubt(source, tc[source])
        if doubt is not None:
            if method == COLLOCATION:
                raise InputError(doubt)
            why = f" ({doubt}; the product spread is used)"
            reason = "collocation sees no random error in it"
        if tc is not None and doubt is None:
            ev = tc[source]["error_variance"]
            kind = "triple" if len(ids) == 3 else f"multiple ({len(ids)} products)"
            note = f"{kind} collocation with {', '.join(s for s in ids if s != source)} over {tc[source]['n']} months"
            return ProductError(source, comp, COLLOCATION, np.where(np.isfinite(x), ev, np.nan), note)
    if not reason and method == "auto":
        reason = ("derived from the products, not independent of them" if source not in ids
                  else f"{len(ids)} {comp} product{'s' if len(ids) != 1 else ''}, collocation needs 3")
    if len(ids) >= 2:
        sd = _products_spread(ds, comp, basin_index, min_valid_fraction, cache)
        return ProductError(source, comp, SPREAD, sd**2, f"spread of {', '.join(ids)}{why}", reason)
    return ProductError(source, comp, NONE, np.full(x.shape, np.nan), f"one {comp} product only{why}", reason)


def all_product_errors(ds: xr.Dataset, basin_index: int, *, sources: dict | None = None, **kw) -> dict:
    """source id -> `ProductError` for every source of ``sources`` (component -> list of ids; default every
    product of each component) over one basin; keywords of `product_error` (each component collocated once)."""
    from .terms import SOURCE_COMPONENTS

    cache: dict = {}
    if sources is None:
        sources = {c: component_products(ds, c) for c in SOURCE_COMPONENTS}
    return {s: product_error(ds, s, basin_index, cache=cache, **kw) for ids in sources.values() for s in ids}


def product_errors(ds: xr.Dataset, sources: dict, basin_index: int, **kw) -> dict:
    """component -> `ProductError` for ``sources`` (component -> source id); keywords of `product_error`."""
    return {c: product_error(ds, s, basin_index, **kw) for c, s in sources.items()}


def uncertainty_text(errors: dict, *, q_relative_error: float | None = None) -> str:
    """One line naming the source of each component's uncertainty ("P collocation (...); ET ..."), ending
    with `COLLOCATION_CAVEAT` where a collocation error is used."""
    parts = [f"{c} {e.method} ({e.note})" for c, e in errors.items()]
    if q_relative_error is not None:
        parts.append(f"Q {q_relative_error:.0%} of flow (gauge error)")
    if any(e.method == COLLOCATION for e in errors.values()):
        parts.append(f"collocation: {COLLOCATION_CAVEAT}")
    return "; ".join(parts)


_SHORT = {STATED: "stated", COLLOCATION: "collocation", SPREAD: "product spread", NONE: "none",
          POSTERIOR: "merge posterior"}


def legend_text(errors: dict) -> str:
    """Short text for a band's legend: "± 2 sigma (P collocation, ET stated, TWSA product spread); collocation:
    random error only"."""
    text = "± 2 sigma (" + ", ".join(f"{c} {_SHORT[e.method]}" for c, e in errors.items()) + ")"
    if any(e.method == COLLOCATION for e in errors.values()):
        text += "; collocation: random error only"
    return text


def error_inputs(ds: xr.Dataset, error: ProductError) -> tuple[str, ...]:
    """The other products ``error`` was computed from: every independent product of its component
    (`component_products`) for collocation and for the spread, none for a stated error or none.

    What a selection file must record, besides its own products, for its uncertainty (and so its
    ``n_beyond_2sigma``) to replay exactly.
    """
    if error.method in (COLLOCATION, SPREAD):
        return tuple(s for s in component_products(ds, error.component) if s != error.source)
    return ()


def band_text(errors: dict, *, q_relative_error: float | None = None) -> str:
    """One short line: which error each component's band uses, with the reason of a fallback to the spread
    ("Band ± 2 sigma: P collocation (random error only); ET product spread (collocation sees no random error in
    it); TWSA product spread (2 TWSA products, collocation needs 3); Q 5% of flow")."""
    parts = []
    for c, e in errors.items():
        why = " (random error only)" if e.method == COLLOCATION else f" ({e.reason})" if e.reason else ""
        parts.append(f"{c} {_SHORT[e.method]}{why}")
    if q_relative_error is not None:
        parts.append(f"Q {q_relative_error:.0%} of flow")
    return "Band ± 2 sigma: " + "; ".join(parts)
