"""Terms of a water body's balance in volumes: P and E on the water surface, pan evaporation, unit views.

Pure computation on xarray objects whose ``units`` attribute says what they hold: monthly depths in
``mm/month``, areas in ``m2``, volumes per month in ``m3/month``. Storage change from levels is in
`wbexplore.balance.storage` (the one place that knows storage-change methods).

A water body's balance (DESIGN.md): P + inflows - E - outflows - dS(level) = residual (unmeasured
exchange: seepage, ungauged inflow, abstraction).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError
from ..units import m3_per_month_to_flow_m3s
from .storage import apply_curves

__all__ = ["PAN_COEFFICIENT", "SURFACE_AREAS", "surface_area_at_level", "surface_volume", "pan_to_lake_evaporation",
           "express_volume", "EXCHANGE_UNITS", "exchange_units", "mean_standard_error", "exchange_summary",
           "Exchange", "unmeasured_exchange"]

# Lake evaporation as a share of evaporation-pan readings: 0.7 is common practice for annual totals
# (monthly values vary with the lake's heat storage; give a site's own coefficient where known).
PAN_COEFFICIENT = 0.7
SURFACE_AREAS = ("outline", "level")
VOLUME_UNITS = ("m3/month", "hm3/month", "m3/s", "mm/month")


def _units(da: xr.DataArray, expected: str, what: str) -> None:
    got = da.attrs.get("units")
    if got != expected:
        raise InputError(f"{what}: units {got!r}, expected {expected!r}")


def surface_area_at_level(levels: xr.DataArray, curves: Mapping[str, Callable], *,
                          dim: str = "waterbody") -> xr.DataArray:
    """Surface area (m2) at each month's level, through each water body's area curve.

    Parameters
    ----------
    levels : xarray.DataArray
        ``(dim, time)`` monthly mean levels in m (``units`` "m").
    curves : mapping of water-body id to callable
        ``area(level_m) -> m2``, NaN outside the curve (never extrapolated).

    Returns
    -------
    xarray.DataArray
        ``(dim, time)`` in m2; NaN where the level is missing or outside the curve (a level outside
        also raises `LevelOutsideCurveWarning` naming the water body and the months).
    """
    _units(levels, "m", "levels")
    out = apply_curves(levels, curves, dim=dim, what="monthly mean level, surface area")
    return out.assign_attrs(units="m2", long_name="water surface area at the month's level")


def surface_volume(depth: xr.DataArray, *, outline_area_m2: xr.DataArray,
                   surface_area_m2: xr.DataArray | None = None, area: str = "outline") -> xr.DataArray:
    """A depth over the water surface (P or E, mm/month) as a volume per month (m3/month).

    Parameters
    ----------
    depth : xarray.DataArray
        Monthly totals in mm/month (``units`` "mm/month"), e.g. a product averaged over the outline.
    outline_area_m2 : xarray.DataArray
        The outline's area (m2) per water body (the default surface).
    surface_area_m2 : xarray.DataArray, optional
        The surface area at each month's level (m2, see `surface_area_at_level`); needed for ``area="level"``.
    area : {"outline", "level"}
        Which area the depth falls on: the outline (default) or the surface at the month's level.

    Returns
    -------
    xarray.DataArray
        Volume per month, m3/month = mm/month / 1000 x m2.
    """
    _units(depth, "mm/month", "depth")
    if area not in SURFACE_AREAS:
        raise InputError(f"surface area {area!r} is not one of {', '.join(SURFACE_AREAS)}")
    if area == "outline":
        a = outline_area_m2
    else:
        if surface_area_m2 is None:
            raise InputError("area='level' needs the surface area at each month's level")
        a = surface_area_m2
    _units(a, "m2", "area")
    out = depth / 1000.0 * a
    out.attrs = {"units": "m3/month", "surface": area,
                 "long_name": f"{depth.attrs.get('long_name', 'depth')} over the water surface"}
    return out


def pan_to_lake_evaporation(pan: xr.DataArray, *, coefficient: float = PAN_COEFFICIENT) -> xr.DataArray:
    """Open-water evaporation (mm/month) from a pan-evaporation series: pan x ``coefficient``.

    The default 0.7 is common practice (see `PAN_COEFFICIENT`); a coefficient outside (0, 1.5] is refused.
    """
    _units(pan, "mm/month", "pan evaporation")
    c = float(coefficient)
    if not 0.0 < c <= 1.5:
        raise InputError(f"pan coefficient {coefficient!r} is outside (0, 1.5]")
    out = pan * c
    out.attrs = {"units": "mm/month", "pan_coefficient": c, "long_name": "lake evaporation from pan"}
    return out


def express_volume(volume: xr.DataArray, units: str, *, area_m2: xr.DataArray | None = None) -> xr.DataArray:
    """A volume per month (m3/month, ``time`` of month-start stamps) in other units.

    ``units``: "m3/month" (unchanged), "hm3/month" (/1e6), "m3/s" (mean flow over the calendar month,
    with its real number of days) or "mm/month" (depth over ``area_m2``, m2).
    """
    _units(volume, "m3/month", "volume")
    if units not in VOLUME_UNITS:
        raise InputError(f"volume units {units!r} are not one of {', '.join(VOLUME_UNITS)}")
    if units == "m3/month":
        out = volume.copy()
    elif units == "hm3/month":
        out = volume / 1e6
    elif units == "m3/s":
        months = pd.DatetimeIndex(volume["time"].values)
        per_s = xr.DataArray(m3_per_month_to_flow_m3s(np.ones(months.size), months), dims="time",
                             coords={"time": volume["time"]})
        out = volume * per_s
    else:
        if area_m2 is None:
            raise InputError("mm/month needs the area the volume is spread over (area_m2)")
        _units(area_m2, "m2", "area")
        out = volume / area_m2 * 1000.0
    out.attrs = {**volume.attrs, "units": units}
    return out


# ---- the residual of a water body: unmeasured exchange ------------------------------------------------
# Sign (DESIGN.md): P + inflows - E - outflows - dS(level) = residual = unmeasured exchange X. X is what the
# measured terms leave unexplained, reported with the residual's own sign in every unit: positive = water that
# left by unmeasured paths (seepage through the dam, leakage, abstraction), negative = an ungauged gain.
# units the residual is reported in: a volume per month (m3, hm3), a mean flow over the calendar month (m3/s)
# and a depth over the water surface at the month's level (mm)
EXCHANGE_UNITS = ("m3", "hm3", "m3/s", "mm_surface")
# largest lag-1 autocorrelation used to inflate a standard error (beyond it n' < n / 39: no mean is defensible)
_R1_MAX = 0.95


def exchange_units(depth_mm, months, *, reference_area_m2, surface_area_m2) -> dict:
    """A monthly water-body quantity (mm/month over its reference area) in every `EXCHANGE_UNITS` unit.

    Parameters
    ----------
    depth_mm : array, time on the last axis
        A depth per month over the reference area (mm/month), e.g. the unmeasured exchange (= the residual).
    months : pandas.DatetimeIndex
        Month-start stamps of the last axis (the real number of days of each month for m3/s).
    reference_area_m2 : float or array
        The area the depths are expressed over (the outline, m2).
    surface_area_m2 : array, time on the last axis
        The water surface at each month's level (m2), for the depth over the surface.

    Returns
    -------
    dict
        "m3" (m3 per month), "hm3" (1e6 m3 per month), "m3/s" (mean over the calendar month) and
        "mm_surface" (mm over the month's surface area).
    """
    from ..units import m3_per_month_to_flow_m3s, m3_to_mm, mm_to_m3

    vol = mm_to_m3(depth_mm, reference_area_m2)
    return {"m3": vol, "hm3": vol / 1e6, "m3/s": m3_per_month_to_flow_m3s(vol, pd.DatetimeIndex(months)),
            "mm_surface": m3_to_mm(vol, surface_area_m2)}


def mean_standard_error(x) -> tuple:
    """Mean's standard error of a monthly series with lag-1 autocorrelation (time on the last axis, NaN skipped).

    ``se = s / sqrt(n) * sqrt((1 + r1) / (1 - r1))``: the variance of the mean with the effective sample size
    ``n' = n (1 - r1) / (1 + r1)`` of a first-order autoregressive series (Wilks, Statistical Methods in the
    Atmospheric Sciences, the variance inflation of a time mean; cited from memory). ``s``: sample standard
    deviation (ddof 1) of the valid months; ``r1``: lag-1 autocorrelation from the pairs of consecutive valid
    months (``sum (x_t - m)(x_t+1 - m) / sum (x_t - m)^2``), taken as 0 where negative or undefined (never
    shrinking the error below the independent case) and at most 0.95.

    Returns
    -------
    (se, r1, n_eff) : arrays over the leading axes (NaN with fewer than two valid months)
    """
    a = np.asarray(x, dtype=np.float64)
    ok = np.isfinite(a)
    n = ok.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(n > 0, np.nansum(a, axis=-1) / np.maximum(n, 1), np.nan)
        d = np.where(ok, a - m[..., None], 0.0)
        ss = np.sum(d * d, axis=-1)
        pair = ok[..., 1:] & ok[..., :-1]
        r1 = np.sum(np.where(pair, d[..., 1:] * d[..., :-1], 0.0), axis=-1) / ss
        r1 = np.clip(np.where(np.isfinite(r1), r1, 0.0), 0.0, _R1_MAX)
        s2 = ss / (n - 1)
        se = np.sqrt(s2 / n * (1 + r1) / (1 - r1))
        n_eff = n * (1 - r1) / (1 + r1)
    few = n < 2
    return (np.where(few, np.nan, se), np.where(few, np.nan, r1), np.where(few, np.nan, n_eff))


def exchange_summary(residual_mm, months, *, reference_area_m2, surface_area_m2) -> dict:
    """Mean monthly unmeasured exchange (= the residual; positive = unmeasured loss) and its standard error in every
    `EXCHANGE_UNITS` unit.

    Vectorised over leading axes (e.g. every P x ET combination); months where the residual is NaN are left
    out. Returns ``{unit: (mean, standard error)}`` (`mean_standard_error`).
    """
    out = {}
    for unit, v in exchange_units(np.asarray(residual_mm, dtype=float), months, reference_area_m2=reference_area_m2,
                                  surface_area_m2=surface_area_m2).items():
        v = np.where(np.isfinite(residual_mm), v, np.nan)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a combination without any valid month: NaN
            mean = np.nanmean(v, axis=-1)
        out[unit] = (mean, mean_standard_error(v)[0])
    return out


@dataclass(frozen=True)
class Exchange:
    """A water body's residual as unmeasured exchange X = residual: the net unmeasured outflow (seepage, leakage
    through the dam, abstraction positive; an ungauged inflow negative).

    monthly : pandas.DataFrame
        One row per month of the period, columns `EXCHANGE_UNITS` (m3, hm3 per month; m3/s mean over the month;
        mm over the surface at the month's level), ``mm`` (over the reference area) and ``residual_mm`` (the
        balance's residual, = mm).
    mean, standard_error : dict
        Unit -> mean monthly value and its standard error (`mean_standard_error`).
    r1, n_eff : float
        Lag-1 autocorrelation used and the effective number of months.
    """

    monthly: pd.DataFrame
    mean: dict
    standard_error: dict
    r1: float
    n_eff: float


def unmeasured_exchange(result, *, surface_area_km2: xr.DataArray | None = None) -> Exchange:
    """The residual of a water body's `compute_selection` result as unmeasured exchange (see `Exchange`).

    ``surface_area_km2`` (time): the surface at each month's level (the series' ``surface_area_km2``); without
    it the outline area stands for the surface.
    """
    frame = result.frame
    months = pd.DatetimeIndex(frame.index)
    area_m2 = float(result.area_km2) * 1e6
    if surface_area_km2 is None:
        surf = np.full(months.size, area_m2)
    else:
        surf = surface_area_km2.reindex(time=months).values * 1e6
    r = frame["residual"].to_numpy(float)
    x = r
    units = exchange_units(x, months, reference_area_m2=area_m2, surface_area_m2=surf)
    monthly = pd.DataFrame({"mm": x, **units, "residual_mm": r}, index=frame.index)
    ok = np.isfinite(r)
    mean, se = {}, {}
    for u in ("mm",) + EXCHANGE_UNITS:
        v = monthly[u].to_numpy(float)
        mean[u] = float(np.mean(v[ok])) if ok.any() else float("nan")
        se[u] = float(mean_standard_error(np.where(ok, v, np.nan))[0])
    _, r1, n_eff = mean_standard_error(np.where(ok, r, np.nan))
    return Exchange(monthly=monthly, mean=mean, standard_error=se, r1=float(r1), n_eff=float(n_eff))
