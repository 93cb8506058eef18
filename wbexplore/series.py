"""The canonical basin series: variable names, attributes, validation, and the ``.wbx`` accessor.

One `xarray.Dataset` with dims ``(basin, time)``, month-start stamps:

- a variable per gridded product (``role="source"``, ``component`` P | ET | TWSA, P and ET in mm/month,
  TWSA in mm) and its ``valid_fraction_<id>`` (0..1, share of the basin with data);
- ``discharge`` (``role="discharge"``, mm/month over the basin): gauged outlet discharge, Q;
- a water body's series (``attrs["unit"] == "waterbody"``, `wbexplore.pipeline.extract` with ``waterbodies=True``):
  the ``basin`` dimension holds water-body ids, ``basin_area_km2`` the outline area (the reference area of
  every depth), no ``discharge``; the storage from levels is the one pseudo-source ``levels`` (component TWSA,
  mm over the reference area: volume / area), its state per unit in the coordinate ``storage_state``
  ("end_of_month" | "monthly_mean"), and the surface area at each month's level in ``surface_area_km2``;
- a variable ``flow_<id>`` per further balance flow (``role="flow"``, ``flow_id``, ``direction`` in | out,
  ``label``, ``units="mm/month"``, ``component="flow"``): mm/month over the unit's area, 0.0 for basins the
  flow does not enter, NaN where its gauge is missing; optionally ``valid_fraction_flow_<id>``.

This module is the one place that spells these names; nothing here imports the balance engine at import
time (the accessor delegates to it when called).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from .errors import InputError

__all__ = ["ROLE_SOURCE", "ROLE_FLOW", "ROLE_DISCHARGE", "DISCHARGE", "FLOW_PREFIX", "DIRECTIONS",
           "FLOW_UNITS", "UNIT_WATERBODY", "LEVELS", "STORAGE_STATE",
           "SURFACE_AREA", "is_waterbody", "valid_fraction_name", "flow_name", "source_ids", "flow_variables", "validate_series",
           "WbxAccessor"]

ROLE_SOURCE = "source"
ROLE_FLOW = "flow"
ROLE_DISCHARGE = "discharge"
DISCHARGE = "discharge"
FLOW_PREFIX = "flow_"
VALID_PREFIX = "valid_fraction_"
DIRECTIONS = {"in": 1.0, "out": -1.0}
FLOW_UNITS = "mm/month"
UNIT_WATERBODY = "waterbody"  # attrs["unit"] of a water body's series
LEVELS = "levels"  # the pseudo-source (component TWSA) of a water body's storage from levels
STORAGE_STATE = "storage_state"  # coordinate (basin): "end_of_month" | "monthly_mean"
SURFACE_AREA = "surface_area_km2"  # variable (basin, time): the surface area at the month's level


def is_waterbody(ds: xr.Dataset) -> bool:
    """Whether ``ds`` holds water-body balances (``attrs["unit"] == "waterbody"``)."""
    return ds.attrs.get("unit") == UNIT_WATERBODY


def valid_fraction_name(variable: str) -> str:
    """Name of the valid-fraction variable of a source or flow variable (``valid_fraction_<variable>``)."""
    return f"{VALID_PREFIX}{variable}"


def flow_name(flow_id: str) -> str:
    """Series variable of a flow (``flow_<id>``)."""
    return f"{FLOW_PREFIX}{flow_id}"


def source_ids(ds: xr.Dataset, component: str) -> list[str]:
    """Source variables of one component, in dataset order (reads Variables, not DataArrays: fast)."""
    names = ds.data_vars
    return [str(n) for n, v in ds.variables.items()
            if n in names and v.attrs.get("role") == ROLE_SOURCE and v.attrs.get("component") == component]


def flow_variables(ds: xr.Dataset) -> list[str]:
    """Flow variables (``role="flow"``), in dataset order."""
    names = ds.data_vars
    return [str(n) for n, v in ds.variables.items() if n in names and v.attrs.get("role") == ROLE_FLOW]


def _source_components() -> tuple:
    from .balance.terms import SOURCE_COMPONENTS  # the term table knows them (imported when used: no cycle)

    return SOURCE_COMPONENTS


def _where(ds) -> str:
    return str(ds.attrs.get("source") or "series")


def validate_series(ds: xr.Dataset) -> xr.Dataset:
    """Check that ``ds`` is a canonical series; `InputError` naming the variable, field and value otherwise.

    Checks: dims ``basin`` and ``time``; every source and flow variable on ``(basin, time)``; a source's
    ``component`` one of P, ET, TWSA; a flow's ``direction`` in | out, its ``units`` mm/month and its name
    ``flow_<flow_id>``; valid fractions within 0..1. Returns ``ds`` unchanged.
    """
    where = _where(ds)
    for d in ("basin", "time"):
        if d not in ds.dims:
            raise InputError(f"{where}: the series have no {d!r} dimension (dims: {', '.join(map(str, ds.dims))})")
    for n, v in ds.data_vars.items():
        role = v.attrs.get("role")
        if role in (ROLE_SOURCE, ROLE_FLOW, ROLE_DISCHARGE) and tuple(v.dims) != ("basin", "time"):
            raise InputError(f"{where}: variable {n!r}: dims {tuple(v.dims)} are not ('basin', 'time')")
        if role == ROLE_SOURCE and v.attrs.get("component") not in _source_components():
            raise InputError(f"{where}: variable {n!r}: field 'component' {v.attrs.get('component')!r} "
                             f"is not one of {', '.join(_source_components())}")
        if role == ROLE_FLOW:
            fid = v.attrs.get("flow_id")
            if not isinstance(fid, str) or flow_name(fid) != n:
                raise InputError(f"{where}: variable {n!r}: field 'flow_id' {fid!r} does not match the name "
                                 f"{FLOW_PREFIX}<flow_id>")
            if v.attrs.get("direction") not in DIRECTIONS:
                raise InputError(f"{where}: variable {n!r}: field 'direction' {v.attrs.get('direction')!r} "
                                 "is not 'in' or 'out'")
            if v.attrs.get("units") != FLOW_UNITS:
                raise InputError(f"{where}: variable {n!r}: field 'units' {v.attrs.get('units')!r} "
                                 f"is not {FLOW_UNITS!r}")
        if str(n).startswith(VALID_PREFIX):
            a = np.asarray(v.values, dtype=float)
            bad = np.isfinite(a) & ((a < 0) | (a > 1))
            if bad.any():
                raise InputError(f"{where}: variable {n!r}: value {a[bad][0]!r} is outside 0..1")
    return ds


@xr.register_dataset_accessor("wbx")
class WbxAccessor:
    """``ds.wbx``: canonical-series helpers. Holds only the Dataset; every method delegates to a function."""

    def __init__(self, ds: xr.Dataset):
        self._ds = ds

    def validate(self) -> xr.Dataset:
        """`validate_series`."""
        return validate_series(self._ds)

    def sources(self, component: str) -> list[str]:
        """`source_ids`."""
        return source_ids(self._ds, component)

    def flows(self) -> list[str]:
        """`flow_variables`."""
        return flow_variables(self._ds)

    def terms(self):
        """`wbexplore.balance.terms.balance_terms`."""
        from .balance.terms import balance_terms

        return balance_terms(self._ds)

    def closure_terms(self, options=None, **kwargs):
        """`wbexplore.balance.closure_terms`."""
        from .balance import closure_terms

        return closure_terms(self._ds, options, **kwargs)

    def rank(self, basin: str, **kwargs):
        """`wbexplore.balance.rank`."""
        from .balance import rank

        return rank(self._ds, basin, **kwargs)
