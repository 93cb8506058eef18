"""Terms of a water body's balance in volumes: P and E on the water surface, pan evaporation, unit views.

Pure computation on xarray objects whose ``units`` attribute says what they hold: monthly depths in
``mm/month``, areas in ``m2``, volumes per month in ``m3/month``. Storage change from levels is in
`wbexplore.balance.storage` (the one place that knows storage-change methods).

A water body's balance (DESIGN.md): P + inflows - E - outflows - dS(level) = residual (unmeasured
exchange: seepage, ungauged inflow, abstraction).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputError
from ..units import m3_per_month_to_flow_m3s
from .storage import apply_curves

__all__ = ["PAN_COEFFICIENT", "SURFACE_AREAS", "surface_area_at_level", "surface_volume", "pan_to_lake_evaporation",
           "express_volume"]

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
