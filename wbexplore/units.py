"""Unit harmonisation (the one module that knows units).

Canonical units inside wbexplore:

* P, ET, Q  -- totals over a calendar month, **mm per month** (``mm/month``),
* TWSA      -- monthly mean equivalent water thickness, **mm**,
* areas     -- m2 inside computations, km2 in outputs,
* volumes   -- m3, flows -- m3/s.

Parsing and dimensional checks use pint. A "month" in a unit string is a
*calendar* month (an amount per month), never pint's mean month of 30.44 days:
``mm/month`` input is taken as the month's total as it stands.

Liquid water density 1000 kg m-3 (common practice) makes 1 kg m-2 = 1 mm.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pandas as pd

from .errors import UnitError

__all__ = [
    "WATER_DENSITY_KG_M3",
    "FluxUnit",
    "parse_flux_unit",
    "parse_storage_unit",
    "parse_discharge_unit",
    "parse_level_unit",
    "parse_area_unit",
    "parse_volume_unit",
    "m3_per_month_to_flow_m3s",
    "days_in_month",
    "seconds_in_month",
    "flow_m3s_to_mm_per_month",
    "mm_per_month_to_flow_m3s",
    "mm_to_m3",
    "m3_to_mm",
]

WATER_DENSITY_KG_M3 = 1000.0

_MONTH_RE = re.compile(r"\b(month|months|mon|mo)\b", re.IGNORECASE)


@lru_cache(maxsize=1)
def _ureg():
    import pint

    ureg = pint.UnitRegistry(cache_folder=None)
    # A placeholder for the calendar month so that pint never applies its mean month.
    ureg.define("calendar_month = [calendar_time] = calmonth")
    return ureg


def _normalise(text: str) -> str:
    t = str(text).strip()
    # Common spellings seen in product files: "kg m-2 s-1", "mm d-1", "mm day-1".
    t = re.sub(r"(?<=[A-Za-z])(-?\d+)", r"^\1", t)  # m-2 -> m^-2, s-1 -> s^-1
    t = t.replace("**", "^")
    t = re.sub(r"\bd\b", "day", t)
    t = re.sub(r"\bhr\b", "hour", t)
    t = re.sub(r"\bh\b", "hour", t)
    t = _MONTH_RE.sub("calmonth", t)
    # space-separated factors multiply
    t = re.sub(r"\s+", " ", t)
    return t


# The unit spellings catalogs and product files commonly carry, with their factors, so that the
# common path never builds pint's registry. pint stays the authority: every entry is checked
# against pint to 1e-12 relative (tests/test_units.py), and any other spelling goes through pint.
# Measured (cProfile of `wbexplore extract` and a timed child process, 2 cores): building pint's registry
# from its text definitions cost 0.46 s in a quiet process and 1.35 s under load; a table look-up costs
# microseconds. (The pint *module*, 0.13 to 0.26 s, is still imported: xarray imports it when it decodes
# a file's times, to ask whether they are pint arrays.)
# kind: "rate" (factor: mm/day), "depth" (mm; a length), "mass_depth" (mm of water per kg m-2: not a
# length), "per_month" (mm per calendar month), "flow" (m3/s).
_DAY_S = 86400.0
_KNOWN: dict[str, tuple[str, float]] = {
    **dict.fromkeys(("mm/day", "mm/d", "mm d-1", "mm day-1", "mm.day-1", "mm per day", "kg m-2 day-1",
                     "kg m-2 d-1", "kg/m2/day", "kg/m^2/day"), ("rate", 1.0)),
    **dict.fromkeys(("mm/h", "mm/hr", "mm/hour", "mm h-1", "mm hr-1", "kg m-2 h-1"), ("rate", 24.0)),
    **dict.fromkeys(("kg m-2 s-1", "kg/m2/s", "kg/m^2/s", "kg m**-2 s**-1", "mm/s", "mm s-1"), ("rate", _DAY_S)),
    **dict.fromkeys(("m/s", "m s-1"), ("rate", 1000.0 * _DAY_S)),
    **dict.fromkeys(("m/day", "m d-1", "m day-1"), ("rate", 1000.0)),
    **dict.fromkeys(("cm/day", "cm d-1", "cm day-1"), ("rate", 10.0)),
    **dict.fromkeys(("mm/month", "mm month-1", "mm/mon", "mm mon-1", "kg m-2 month-1", "kg/m2/month"),
                    ("per_month", 1.0)),
    **dict.fromkeys(("cm/month", "cm month-1"), ("per_month", 10.0)),
    **dict.fromkeys(("m/month", "m month-1"), ("per_month", 1000.0)),
    "mm": ("depth", 1.0), "cm": ("depth", 10.0), "m": ("depth", 1000.0),
    **dict.fromkeys(("kg m-2", "kg/m2", "kg/m^2", "kg m**-2"), ("mass_depth", 1.0)),
    **dict.fromkeys(("m3/s", "m^3/s", "m3 s-1", "m**3/s", "m3.s-1"), ("flow", 1.0)),
    **dict.fromkeys(("l/s", "L/s", "l s-1", "L s-1"), ("flow", 1e-3)),
    **dict.fromkeys(("m3/day", "m3 d-1", "m3/d"), ("flow", 1.0 / _DAY_S)),
    **dict.fromkeys(("ML/day", "ML/d", "Ml/d", "Ml/day", "ML d-1"), ("flow", 1000.0 / _DAY_S)),
}


def _known(text) -> tuple[str, float] | None:
    """(kind, factor) of a unit spelling in `_KNOWN` (exact match after trimming), else None."""
    return _KNOWN.get(str(text).strip()) if isinstance(text, str) else None


def _parse(text: str, *, what: str):
    ureg = _ureg()
    try:
        q = ureg.Quantity(1.0, _normalise(text))
    except Exception as exc:  # noqa: BLE001 - pint's parser raises UndefinedUnitError, AssertionError, tokenize.TokenError,
        # ZeroDivisionError, TypeError ... (tried: 'foo', 'mm/', '((mm', '1/0', 'mm**x'): one line each, exit 2
        raise UnitError(f"{what}: cannot parse unit {text!r} ({exc.__class__.__name__})") from None
    return q


@dataclass(frozen=True)
class FluxUnit:
    """How to turn values of a P/ET variable into mm per calendar month.

    kind:
      ``"rate"``       values are rates; multiply by ``mm_per_value_per_day`` x days;
      ``"amount"``     values are totals over the file's own time step, in mm x ``factor_mm``;
      ``"per_month"``  values are already totals per calendar month, in mm x ``factor_mm``.
    """

    kind: str
    factor: float  # mm per day per unit (rate) or mm per unit (amount, per_month)
    text: str

    def monthly_factor(self, month_index: pd.DatetimeIndex) -> np.ndarray:
        """Factor (array over months) taking one monthly value to mm per month."""
        if self.kind == "rate":
            return self.factor * days_in_month(month_index).astype(float)
        return np.full(len(month_index), self.factor)

    def daily_factor(self) -> float:
        """Factor taking one daily value to mm per day (a daily amount)."""
        if self.kind == "per_month":
            raise UnitError(
                f"unit {self.text!r} is an amount per month and cannot describe daily values"
            )
        return self.factor  # rate in mm/day x 1 day, or an amount per day


def parse_flux_unit(text: str, *, source: str = "?", component: str = "P") -> FluxUnit:
    """Parse a P or ET unit: a rate (depth/time or mass/area/time) or an amount (depth, mass/area).

    Raises `UnitError` naming the source and the unit for any other dimension.
    """
    known = _known(text)
    if known is not None and known[0] != "flow":
        kind, factor = known
        return FluxUnit({"depth": "amount", "mass_depth": "amount"}.get(kind, kind), factor, text)
    what = f"source {source!r} ({component})"
    q = _parse(text, what=what)
    ureg = _ureg()
    dim = dict(q.dimensionality)
    cal = dim.pop("[calendar_time]", 0)
    if cal not in (0, -1):
        raise UnitError(f"{what}: unit {text!r} is not a depth or a rate")
    mass = dim.get("[mass]", 0)
    base = q
    if mass == 1:  # mass per area (per time): divide by the density of water
        base = q / ureg.Quantity(WATER_DENSITY_KG_M3, "kg/m^3")
    bdim = dict(base.dimensionality)
    bdim.pop("[calendar_time]", None)
    if cal == -1:
        if bdim != {"[length]": 1}:
            raise UnitError(f"{what}: unit {text!r} is not a depth per month")
        mm = base * ureg.calmonth
        return FluxUnit("per_month", float(mm.to("mm").magnitude), text)
    if bdim == {"[length]": 1, "[time]": -1}:
        return FluxUnit("rate", float(base.to("mm/day").magnitude), text)
    if bdim == {"[length]": 1}:
        return FluxUnit("amount", float(base.to("mm").magnitude), text)
    raise UnitError(
        f"{what}: unit {text!r} has dimension {q.dimensionality}; "
        "expected a depth rate (mm/day, kg m-2 s-1, m/s, mm/month) or a depth per time step (mm)"
    )


def parse_storage_unit(text: str, *, source: str = "?") -> float:
    """Factor taking a TWSA value to mm of equivalent water thickness (cm, mm, m, kg m-2)."""
    known = _known(text)
    if known is not None and known[0] in ("depth", "mass_depth"):
        return known[1]
    what = f"source {source!r} (TWSA)"
    q = _parse(text, what=what)
    ureg = _ureg()
    if "[calendar_time]" in q.dimensionality:
        raise UnitError(f"{what}: unit {text!r} is a rate; TWSA needs a water thickness (mm, cm, m, kg m-2)")
    if q.dimensionality == ureg.Quantity(1, "kg/m^2").dimensionality:
        q = q / ureg.Quantity(WATER_DENSITY_KG_M3, "kg/m^3")
    if q.dimensionality != ureg.Quantity(1, "mm").dimensionality:
        raise UnitError(
            f"{what}: unit {text!r} has dimension {q.dimensionality}; "
            "TWSA needs a water thickness (mm, cm, m, kg m-2)"
        )
    return float(q.to("mm").magnitude)


@dataclass(frozen=True)
class DischargeUnit:
    kind: str  # "flow" (factor to m3/s) or "depth" (FluxUnit)
    factor: float
    flux: FluxUnit | None
    text: str


def parse_discharge_unit(text: str, *, where: str = "discharge") -> DischargeUnit:
    """A flow (m3/s, l/s, ...) or a per-period depth unit (mm/month, mm/day)."""
    known = _known(text)
    if known is not None:
        if known[0] == "flow":
            return DischargeUnit("flow", known[1], None, text)
        return DischargeUnit("depth", 1.0, parse_flux_unit(text, source=where, component="Q"), text)
    q = _parse(text, what=where)
    ureg = _ureg()
    if q.dimensionality == ureg.Quantity(1, "m^3/s").dimensionality:
        return DischargeUnit("flow", float(q.to("m^3/s").magnitude), None, text)
    try:
        flux = parse_flux_unit(text, source=where, component="Q")
    except UnitError:
        raise UnitError(
            f"{where}: unit {text!r} is neither a flow (m3/s) nor a depth per period (mm/month)"
        ) from None
    return DischargeUnit("depth", 1.0, flux, text)


def parse_level_unit(text: str, *, where: str = "level") -> float:
    """Factor taking a water level (m, cm, mm ...) to metres; anything but a length is refused."""
    known = _known(text)
    if known is not None and known[0] == "depth":
        return known[1] / 1000.0
    q = _parse(text, what=where)
    if q.dimensionality != _ureg().Quantity(1, "m").dimensionality:
        raise UnitError(f"{where}: unit {text!r} is not a length (m, cm) for a water level")
    return float(q.to("m").magnitude)


# Areas and volumes of storage curves and water bodies, spelled as such tables commonly do: factors to m2 and m3,
# checked against pint to 1e-12 (tests/test_units.py). Without them every catalog with a water body built pint's
# registry (0.9 s of a 6.5 s `wbexplore report` under cProfile, most of opening the catalog).
_KNOWN_AREA: dict[str, float] = {
    **dict.fromkeys(("km2", "km^2", "km**2"), 1e6), **dict.fromkeys(("m2", "m^2", "m**2"), 1.0), "ha": 1e4,
}
_KNOWN_VOLUME: dict[str, float] = {
    **dict.fromkeys(("hm3", "hm^3", "hm**3"), 1e6), **dict.fromkeys(("m3", "m^3", "m**3"), 1.0),
    **dict.fromkeys(("km3", "km^3"), 1e9), **dict.fromkeys(("ML", "Ml"), 1e3), "GL": 1e6,
}


def parse_area_unit(text: str, *, where: str = "area") -> float:
    """Factor taking an area (km2, ha, m2 ...) to m2; anything but an area is refused."""
    known = _KNOWN_AREA.get(text.strip()) if isinstance(text, str) else None
    if known is not None:
        return known
    q = _parse(text, what=where)
    if q.dimensionality != _ureg().Quantity(1, "m^2").dimensionality:
        raise UnitError(f"{where}: unit {text!r} is not an area (km2, ha, m2)")
    return float(q.to("m^2").magnitude)


# A cubic megametre (pint's reading of "Mm3") is 1e18 m3, a million times the largest lake; a file that
# says Mm3 almost surely means a million m3 (hm3). Volumes above this are refused rather than taken literally.
_LARGEST_VOLUME_FACTOR_M3 = 1e12


def parse_volume_unit(text: str, *, where: str = "volume") -> float:
    """Factor taking a volume (hm3, m3, ML ...) to m3; anything but a volume is refused.

    "Mm3" is refused: pint reads it as cubic megametres (1e18 m3), where a reservoir table means a
    million m3; write hm3 (1 hm3 = 1e6 m3).
    """
    known = _KNOWN_VOLUME.get(text.strip()) if isinstance(text, str) else None
    if known is not None:
        return known
    q = _parse(text, what=where)
    if q.dimensionality != _ureg().Quantity(1, "m^3").dimensionality:
        raise UnitError(f"{where}: unit {text!r} is not a volume (hm3, m3, ML)")
    f = float(q.to("m^3").magnitude)
    if f > _LARGEST_VOLUME_FACTOR_M3:
        raise UnitError(f"{where}: unit {text!r} is {f:.3g} m3 per unit (cubic megametres?); "
                        "for a million m3 write hm3")
    return f


def _month_index(months) -> pd.DatetimeIndex:
    idx = pd.DatetimeIndex(pd.to_datetime(np.asarray(months)))
    return idx


def days_in_month(months) -> np.ndarray:
    """Number of days in the calendar month of each stamp (Gregorian rule)."""
    return np.asarray(_month_index(months).days_in_month, dtype=np.int64)


def seconds_in_month(months) -> np.ndarray:
    """Seconds in each calendar month."""
    return days_in_month(months).astype(float) * 86400.0


def flow_m3s_to_mm_per_month(q_m3s, months, area_m2):
    """Mean flow over the month (m3/s) to depth over the basin (mm/month)."""
    return np.asarray(q_m3s, dtype=float) * seconds_in_month(months) / np.asarray(area_m2, float) * 1000.0


def mm_per_month_to_flow_m3s(depth_mm, months, area_m2):
    """Depth over the basin per month (mm/month) to mean flow over the month (m3/s)."""
    return np.asarray(depth_mm, dtype=float) / 1000.0 * np.asarray(area_m2, float) / seconds_in_month(months)


def mm_to_m3(depth_mm, area_m2):
    """Depth over an area (mm) to volume (m3)."""
    return np.asarray(depth_mm, dtype=float) / 1000.0 * np.asarray(area_m2, float)


def m3_to_mm(volume_m3, area_m2):
    """Volume (m3) to depth over an area (mm)."""
    return np.asarray(volume_m3, dtype=float) / np.asarray(area_m2, float) * 1000.0


def m3_per_month_to_flow_m3s(volume_m3, months):
    """Volume per calendar month (m3) to mean flow over the month (m3/s), with the real days of each month."""
    return np.asarray(volume_m3, dtype=float) / seconds_in_month(months)
