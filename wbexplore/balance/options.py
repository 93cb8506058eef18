"""`ClosureOptions`: every option of a closure computation, validated once.

The library (`closure_terms`, `rank`, `compute_selection`, ...), the command line, the explorer state and
the selection file all carry one of these; the old keyword arguments of `rank` and friends build one.
"""

from __future__ import annotations

import functools
from dataclasses import asdict, dataclass, fields, replace

import numpy as np
import pandas as pd

from ..errors import InputError
from .storage import METHODS

__all__ = ["ClosureOptions", "AREAS", "MAX_LAG_MONTHS", "check_lag", "parse_month", "period_mask", "OPTION_NAMES"]

# Gauged Q is compared at most a year later than the basin terms: a longer routing delay is not a
# monthly water balance any more, and each month of lag shortens the compared period.
MAX_LAG_MONTHS = 12
# The area P and E of a water body fall on: its outline (default), or the surface at the month's level (from the
# storage curve). Basins have only their outline.
AREAS = ("outline", "surface")


def check_lag(lag) -> int:
    """The discharge lag in months (0..`MAX_LAG_MONTHS`); `InputError` otherwise (one message for every caller)."""
    if isinstance(lag, bool) or not isinstance(lag, (int, np.integer)) or not 0 <= lag <= MAX_LAG_MONTHS:
        raise InputError(f"lag {lag} must be between 0 and {MAX_LAG_MONTHS} months")
    return int(lag)


def parse_month(v, what: str) -> pd.Timestamp:
    """A month given as text ("YYYY-MM", or anything pandas reads as a date) as its month-start stamp."""
    if isinstance(v, str):  # text (what options hold): read once per distinct text
        return _parse_month_text(v, what)
    return _parse_month(v, what)


def _parse_month(v, what: str) -> pd.Timestamp:
    try:
        return pd.Timestamp(v).to_period("M").to_timestamp()
    except Exception:
        raise InputError(f"{what} {v!r} is not a month (YYYY-MM)") from None


@functools.lru_cache(maxsize=512)
def _parse_month_text(v: str, what: str) -> pd.Timestamp:
    return _parse_month(v, what)  # a refusal is an exception: never cached


def period_mask(months: pd.DatetimeIndex, start: str | None, end: str | None) -> np.ndarray:
    """Boolean mask of months within start..end (inclusive, "YYYY-MM"); refuses periods outside the data."""
    lo = parse_month(start, "start") if start else months[0]
    hi = parse_month(end, "end") if end else months[-1]
    if lo > hi:
        raise InputError(f"period {lo:%Y-%m}..{hi:%Y-%m} ends before it starts")
    if hi < months[0] or lo > months[-1]:
        raise InputError(f"period {lo:%Y-%m}..{hi:%Y-%m} is outside the data ({months[0]:%Y-%m}..{months[-1]:%Y-%m})")
    v = np.asarray(months.values)  # compared as datetime64 (pandas' index comparisons cost more than the rest)
    return (v >= np.datetime64(lo)) & (v <= np.datetime64(hi))


@dataclass(frozen=True)
class ClosureOptions:
    """Options of a closure computation (validated on creation; `InputError` naming the option and value).

    start, end : str or None
        First and last month of the period ("YYYY-MM", inclusive); None: the whole series.
    storage_change : "central" | "backward" | "forward"
        Difference of TWSA monthly means (see `wbexplore.balance.storage`).
    matched : bool
        Window matching: filter every flux (P, ET, Q, flows) with the kernel of the storage difference.
    fill_gaps : bool
        Interpolate interior TWSA gaps linearly (flagged).
    lag : int
        Months by which gauged Q is compared later than the basin terms (0..12).
    min_valid_fraction : float
        Months where a source covers less of the basin (0..1) are missing.
    min_valid : int
        Fewer valid months than this (months) and a combination is not scored.
    water_year_start : int
        First calendar month of the water year (1..12; 1 = calendar year), for annual metrics.
    ensemble : bool
        Add each component's ensemble mean as a source (ranking).
    area : "outline" | "surface"
        Water bodies only: P and E (depths from the products, mm/month) fall on the outline's area (default) or
        on the surface area at the month's level (``surface_area_km2`` of the series); either way the terms are
        volumes expressed as depths over the reference area (the outline): depth x area / outline area.
    """

    start: str | None = None
    end: str | None = None
    storage_change: str = "central"
    matched: bool = True
    fill_gaps: bool = False
    lag: int = 0
    min_valid_fraction: float = 0.5
    min_valid: int = 24
    water_year_start: int = 1
    ensemble: bool = False
    area: str = "outline"

    def __post_init__(self):
        check_lag(self.lag)
        if self.area not in AREAS:
            raise InputError(f"area {self.area!r} is not one of {', '.join(AREAS)}")
        if self.storage_change not in METHODS:
            raise InputError(f"storage-change method {self.storage_change!r} is not one of {', '.join(METHODS)}")
        for name in ("matched", "fill_gaps", "ensemble"):
            if not isinstance(getattr(self, name), (bool, np.bool_)):
                raise InputError(f"option {name}: {getattr(self, name)!r} must be true or false")
        mvf = self.min_valid_fraction
        if isinstance(mvf, bool) or not isinstance(mvf, (int, float, np.integer, np.floating)) or not 0 <= mvf <= 1:
            raise InputError(f"min_valid_fraction {mvf!r} must be a number between 0 and 1")
        mv = self.min_valid
        if isinstance(mv, bool) or not isinstance(mv, (int, np.integer)) or mv < 0:
            raise InputError(f"min_valid {mv!r} must be a whole number of months, 0 or more")
        wy = self.water_year_start
        if isinstance(wy, bool) or not isinstance(wy, (int, np.integer)) or not 1 <= wy <= 12:
            raise InputError(f"water_year_start {wy!r} must be a month number between 1 and 12")
        lo = parse_month(self.start, "start") if self.start else None
        hi = parse_month(self.end, "end") if self.end else None
        if lo is not None and hi is not None and lo > hi:
            raise InputError(f"period {lo:%Y-%m}..{hi:%Y-%m} ends before it starts")

    def to_dict(self) -> dict:
        return asdict(self)

    def to_json(self) -> str:
        """The options as JSON text (what a netCDF attribute or a file can hold)."""
        import json

        return json.dumps({k: (bool(v) if isinstance(v, np.bool_) else int(v) if isinstance(v, np.integer)
                               else float(v) if isinstance(v, np.floating) else v)
                           for k, v in self.to_dict().items()}, sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> "ClosureOptions":
        """`to_json` read back (validated again)."""
        import json

        return cls(**json.loads(text))

    def replace(self, **kw) -> "ClosureOptions":
        return replace(self, **kw)

    @classmethod
    def from_kwargs(cls, options: "ClosureOptions | None" = None, **kwargs) -> "ClosureOptions":
        """``options`` with ``kwargs`` (old keyword arguments) laid over it; unknown names are refused."""
        unknown = set(kwargs) - set(OPTION_NAMES)
        if unknown:
            raise TypeError(f"unknown closure option(s): {', '.join(sorted(unknown))}")
        if options is None:
            return cls(**kwargs)
        return options.replace(**kwargs) if kwargs else options

    def period(self, months: pd.DatetimeIndex) -> np.ndarray:
        """Mask of the period's months within ``months`` (refuses a period outside them)."""
        return period_mask(months, self.start, self.end)


OPTION_NAMES = tuple(f.name for f in fields(ClosureOptions))
