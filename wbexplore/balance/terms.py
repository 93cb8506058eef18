"""THE term table: every term of a water balance, its sign and its kind.

    residual = sum over terms of sign * term = P - ET - Q - dS + inflows - outflows
    Qhat     = residual + Q                  = P - ET - dS + inflows - outflows

(Signs: what enters the unit is +1, what leaves it -1, storage change -1 because a growing store holds
back water; the general balance of a hydrology textbook: inputs - outputs = change in storage.)

Kinds
-----
gridded flux     a product per source, averaged over the unit (P, ET), mm/month
gridded storage  a product per source whose monthly means become a storage change (TWSA -> dS), mm
station flux     one gauged series (outlet discharge Q; every ``flows`` entry), mm/month over the unit
station storage  one gauged series of a store (a waterbody level turned into volume), mm

This is the only module that knows which terms a balance has and their signs. Every other module takes
component lists, signs and labels from here. Adding a term kind is a row here plus its reader (which puts
the series variable into the canonical series, see `wbexplore.series`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..series import DIRECTIONS, DISCHARGE, FLOW_UNITS, LEVELS, flow_variables, is_waterbody

__all__ = ["Term", "KINDS", "P", "ET", "Q", "DS", "BASE_TERMS", "DS_LEVELS", "WATERBODY_TERMS",
           "SOURCE_COMPONENTS", "FLUX_COMPONENTS",
           "balance_terms", "flow_terms", "balance_text", "combine", "term_signs", "signs_of", "term"]

KINDS = ("gridded flux", "gridded storage", "station flux", "station storage")


@dataclass(frozen=True)
class Term:
    """One balance term.

    name : column / variable name in closure outputs ("P", "ET", "Q", "dS", "flow_<id>")
    component : what a source or series of it is called in catalogs and series ("P", "ET", "Q", "TWSA", "flow")
    sign : +1.0 (enters the unit) or -1.0 (leaves it, or storage gained)
    kind : one of `KINDS`
    label : display name
    units : units of the term in closure outputs (mm/month)
    variable : the series variable of a station term ("discharge", "flow_<id>"); None for gridded terms,
        whose variables are the sources chosen for ``component``
    """

    name: str
    component: str
    sign: float
    kind: str
    label: str
    units: str = "mm/month"
    variable: str | None = None

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"term {self.name!r}: kind {self.kind!r} is not one of {', '.join(KINDS)}")
        if self.sign not in (1.0, -1.0):
            raise ValueError(f"term {self.name!r}: sign {self.sign!r} is not +1 or -1")

    @property
    def gridded(self) -> bool:
        return self.kind.startswith("gridded")

    @property
    def storage(self) -> bool:
        return self.kind.endswith("storage")


P = Term("P", "P", 1.0, "gridded flux", "Precipitation")
ET = Term("ET", "ET", -1.0, "gridded flux", "Evapotranspiration")
Q = Term("Q", "Q", -1.0, "station flux", "Gauged discharge", variable=DISCHARGE)
DS = Term("dS", "TWSA", -1.0, "gridded storage", "Storage change")
BASE_TERMS: tuple[Term, ...] = (P, ET, Q, DS)
# A water body (series with attrs["unit"] == "waterbody"): P and E on the water surface, no gauged outlet
# discharge, storage change from levels. The storage is the pseudo-source "levels" of the TWSA component (one
# entry of the TWSA source dimension), so every view of the combinations works unchanged.
WB_P = Term("P", "P", 1.0, "gridded flux", "Precipitation on the water surface")
WB_ET = Term("ET", "ET", -1.0, "gridded flux", "Evaporation from the water surface")
DS_LEVELS = Term("dS", "TWSA", -1.0, "station storage", "Storage change from levels", variable=LEVELS)
WATERBODY_TERMS: tuple[Term, ...] = (WB_P, WB_ET, DS_LEVELS)

# components that are chosen among gridded products (a source per component), in table order
SOURCE_COMPONENTS: tuple[str, ...] = tuple(t.component for t in BASE_TERMS if t.gridded)
# flux terms of the base balance (window-matched with the storage kernel), in table order
FLUX_COMPONENTS: tuple[str, ...] = tuple(t.name for t in BASE_TERMS if not t.storage)


def flow_terms(ds: xr.Dataset) -> tuple[Term, ...]:
    """A station-flux term per ``role="flow"`` variable of the series, sign from its ``direction``."""
    out = []
    for name in flow_variables(ds):
        a = ds.variables[name].attrs
        direction = a.get("direction")
        if direction not in DIRECTIONS:
            from ..errors import InputError

            raise InputError(f"series variable {name!r}: field 'direction' {direction!r} is not 'in' or 'out'")
        out.append(Term(name, "flow", DIRECTIONS[direction], "station flux", str(a.get("label") or name),
                        str(a.get("units") or FLOW_UNITS), variable=name))
    return tuple(out)


def balance_terms(ds: xr.Dataset | None = None) -> tuple[Term, ...]:
    """Every term of the balance of ``ds``: P, ET, Q, dS, then its flows (none without ``ds``); a water
    body's series: P, ET, dS from levels (`WATERBODY_TERMS`, no Q), then its flows."""
    if ds is None:
        return BASE_TERMS
    return (WATERBODY_TERMS if is_waterbody(ds) else BASE_TERMS) + flow_terms(ds)


def balance_text(terms: tuple[Term, ...] = BASE_TERMS) -> str:
    """The residual as text: "P - ET - Q - dS" (+ each flow with its sign)."""
    parts = [f"{'-' if t.sign < 0 else '+'} {t.name}" for t in terms]
    return " ".join(parts)[2:] if parts[0].startswith("+") else " ".join(parts)


def _accumulate(acc, v, sign):
    if acc is None:
        return v if sign > 0 else -v
    return acc + v if sign > 0 else acc - v


def combine(values: dict, terms) -> tuple:
    """(residual, Qhat) of broadcastable term values (``values``: term name -> array).

    residual = sum of sign * term over ``terms`` in table order (P - ET - Q - dS + inflows - outflows);
    Qhat the same without the gauged discharge Q (the discharge the other terms predict). Added and
    subtracted term by term in table order: without flows this is bitwise ((P - ET) - Q) - dS, as before
    the term table existed.
    """
    res = qhat = None
    for t in terms:
        v = values[t.name]
        res = _accumulate(res, v, t.sign)
        if t.name != Q.name:
            qhat = _accumulate(qhat, v, t.sign)
    return res, qhat


def term(name: str, terms: tuple[Term, ...] = BASE_TERMS) -> Term:
    """The term called ``name``."""
    for t in terms:
        if t.name == name:
            return t
    raise KeyError(name)


def term_signs(terms: tuple[Term, ...] = BASE_TERMS) -> np.ndarray:
    """Signs of ``terms`` as a float array (the balance row G of ``G x = 0``)."""
    return np.array([t.sign for t in terms], dtype=np.float64)


def signs_of(names, terms: tuple[Term, ...] = BASE_TERMS) -> dict:
    """name -> sign for the named terms."""
    return {n: term(n, terms).sign for n in names}
