"""Water-year totals of one selection's balance terms (the report's annual closure table).

A view of `compute_selection`'s monthly frame: each term (P, ET, Q, dS, every flow, as they enter the
residual: window-matched where the selection says so) and the residual are summed over the months of each
water year (`engine.water_year`, named by the calendar year in which it ends). A year's totals are given only
when all twelve of its months are valid (the residual is defined): a partial year is listed with its count of
valid months and empty totals, never scaled up. This is the same rule as the metric ``annual_bias``, whose
value is the mean of the ``residual`` column here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .engine import water_year

__all__ = ["AnnualClosure", "annual_closure"]


@dataclass(frozen=True)
class AnnualClosure:
    """Water-year totals of one selection.

    table : DataFrame indexed by ``water_year`` (int, the year in which it ends); one column per balance term
        in the term table's order (P, ET, Q, dS, flows ``flow_<id>``) and ``residual``, in mm/year over the
        balance unit (NaN for an incomplete year); ``n_valid`` the year's valid months (0..12), ``complete``.
    water_year_start : first calendar month of the water year (1 = calendar year)
    terms : the table's value columns, in order (``residual`` last)
    balance_terms : the `Term` rows of the unit's balance (a flow that does not enter the unit is left out)
    units : "mm/year"
    """

    table: pd.DataFrame
    water_year_start: int
    terms: tuple
    balance_terms: tuple
    units: str = "mm/year"

    @property
    def complete(self) -> pd.DataFrame:
        """The complete water years only."""
        return self.table[self.table["complete"]]


def annual_closure(result) -> AnnualClosure:
    """Water-year totals of a `SelectionResult`'s balance terms and residual (mm/year).

    Parameters
    ----------
    result : SelectionResult
        Its ``frame`` (mm/month per term, ``valid``) and ``terms`` (the term rows, flows included; a flow that is
    0.0 in every month does not enter the unit, by the series schema, and gets no column).

    Returns
    -------
    AnnualClosure
    """
    f = result.frame
    start = int(result.selection.water_year_start)
    # a flow that does not enter this unit is 0.0 in every month (series schema): no column for it
    rows_ = tuple(t for t in result.terms if t.name in f and (t.component != "flow" or f[t.name].fillna(0.0).ne(0.0).any()))
    names = tuple(t.name for t in rows_) + ("residual",)
    wy = water_year(pd.DatetimeIndex(f.index), start)
    valid = f["valid"].to_numpy(bool)
    years = np.unique(wy)
    rows = {}
    n_valid = np.array([int(valid[wy == y].sum()) for y in years])
    n_months = np.array([int((wy == y).sum()) for y in years])
    complete = (n_valid == 12) & (n_months == 12)
    for k in names:
        v = f[k].to_numpy(float)
        tot = np.array([v[wy == y].sum() for y in years])
        rows[k] = np.where(complete, tot, np.nan)
    table = pd.DataFrame(rows, index=pd.Index(years.astype(int), name="water_year"))
    table["n_valid"] = n_valid
    table["complete"] = complete
    return AnnualClosure(table=table, water_year_start=start, terms=names, balance_terms=rows_)
