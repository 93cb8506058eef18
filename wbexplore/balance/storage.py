"""Storage change from TWSA monthly means, and the flux windows that match it.

Derivation (the one place that knows storage-change methods)
------------------------------------------------------------
Gravimetric products deliver the *mean* storage of each month, ``M[i]``, not an
end-of-month state. Take fluxes as constant rates within each month, with net
total ``F[i] = P[i] - ET[i] - Q[i]`` (mm/month) over month ``i`` of length ``T``.
Storage is then piecewise linear, and the mean over month ``i`` is the average of
its start and end states: ``M[i] = (S[i-1] + S[i]) / 2`` with ``S[i] = S[i-1] + F[i]``.
Hence exactly

    backward:  M[i]   - M[i-1]        = (F[i-1] + F[i]) / 2
    forward:   M[i+1] - M[i]          = (F[i] + F[i+1]) / 2
    central:  (M[i+1] - M[i-1]) / 2   = (F[i-1] + 2 F[i] + F[i+1]) / 4

A one-month difference of monthly means spans mid-month to mid-month: half of
each of the two months. Comparing these differences with the raw monthly fluxes
``F[i]`` (the "unmatched" closure) is therefore off by a smoothing error that
grows with the seasonal cycle; the *window-matched* closure filters P, ET and Q
with the same kernel before taking the residual, and closes a consistent truth
exactly. Both are offered; the size of their difference is worth showing.

Multi-month windows across a gap: for two valid months ``i < j``,
``M[j] - M[i] = F[i]/2 + sum(F[i+1..j-1]) + F[j]/2`` (the flux total between the
two mid-months), so a closure over a window that spans missing TWSA months is
still available (`window_closure`).

Gaps: a month whose difference needs a missing month is NaN (and counted). No
interpolation across a gap unless asked (``fill="linear"``), and then the filled
months are flagged.

Water bodies (storage from levels)
----------------------------------
A lake's storage comes from its level through a storage curve (level -> volume, m3).
Two kinds of level series give two kinds of volume state (attribute ``state``):

- ``end_of_month`` (from daily levels, `wbexplore.temporal.station_month_end_states`): the
  volume at the end of each month, ``V[m]``; the storage change of month ``m`` is
  ``V[m] - V[m-1]``, exactly the net flux total of month ``m``: the matching window is the
  month itself (kernel ``(0, 1, 0)``), no smoothing.
- ``monthly_mean`` (from monthly-mean levels only): the volume at the month's mean level stands
  for the month's mean storage and is handled exactly as TWSA: `storage_change` with the same
  method and the same flux kernels (`match_window`). The volume at the mean level is not the mean
  volume where the curve bends (they differ by about ``A'(h) var(h) / 2`` over the month); daily
  levels avoid that.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from ..errors import InputError, LevelOutsideCurveWarning

__all__ = ["METHODS", "KERNELS", "storage_change", "match_window", "apply_kernel", "match_window_variance",
           "storage_change_variance", "DS_KERNELS", "kernel", "sum_variance", "shift_later", "fill_gaps", "window_closure",
           "VOLUME_STATES", "level_volumes", "apply_curves", "volume_storage_change", "volume_kernel", "match_volume_window",
           "state_storage_change", "match_state_window", "variance_kernels",
           "END_OF_MONTH_NOTE", "storage_note"]

METHODS = ("central", "backward", "forward")
# weights on F[i-1], F[i], F[i+1]
KERNELS = {
    "central": (0.25, 0.5, 0.25),
    "backward": (0.5, 0.5, 0.0),
    "forward": (0.0, 0.5, 0.5),
}


def _check(method: str) -> None:
    if method not in METHODS:
        raise InputError(f"storage-change method {method!r} is not one of {', '.join(METHODS)}")


def _shift(a: np.ndarray, k: int) -> np.ndarray:
    """out[..., i] = a[..., i - k] (NaN where out of range)."""
    out = np.full(a.shape, np.nan)
    if k > 0:
        out[..., k:] = a[..., :-k]
    elif k < 0:
        out[..., :k] = a[..., -k:]
    else:
        out[...] = a
    return out


def storage_change(twsa_mm, method: str = "central") -> np.ndarray:
    """Monthly storage change (mm/month) from monthly-mean TWSA (mm), time on the last axis.

    ``central``: (M[i+1] - M[i-1]) / 2; ``backward``: M[i] - M[i-1]; ``forward``: M[i+1] - M[i].
    NaN where a needed month is missing or outside the series.
    """
    _check(method)
    m = np.asarray(twsa_mm, dtype=np.float64)
    if method == "central":
        return 0.5 * (_shift(m, -1) - _shift(m, 1))
    if method == "backward":
        return m - _shift(m, 1)
    return _shift(m, -1) - m


# weights on var(M[i-1]), var(M[i]), var(M[i+1]) of the difference, for independent monthly errors
_DS_VARIANCE_KERNELS = {"central": (0.25, 0.0, 0.25), "backward": (1.0, 1.0, 0.0), "forward": (0.0, 1.0, 1.0)}


def apply_kernel(values, weights) -> np.ndarray:
    """sum_k w_k * values[..., i + k - 1] for weights (w_prev, w_same, w_next); NaN at missing neighbours."""
    f = np.asarray(values, dtype=np.float64)
    a, b, c = weights
    out = b * f
    if a:
        out = out + a * _shift(f, 1)
    if c:
        out = out + c * _shift(f, -1)
    return out


def match_window(flux, method: str = "central") -> np.ndarray:
    """Filter monthly flux totals (mm/month) with the kernel the storage difference implies."""
    _check(method)
    return apply_kernel(flux, KERNELS[method])


def match_window_variance(variance, method: str = "central") -> np.ndarray:
    """Variance (mm2) of window-matched fluxes, for errors independent between months."""
    _check(method)
    return apply_kernel(variance, [w * w for w in KERNELS[method]])


def storage_change_variance(variance, method: str = "central") -> np.ndarray:
    """Variance (mm2) of `storage_change` from the monthly TWSA error variances (independent months)."""
    _check(method)
    return apply_kernel(variance, _DS_VARIANCE_KERNELS[method])


# weights on M[i-1], M[i], M[i+1] of `storage_change` (signed; `_DS_VARIANCE_KERNELS` are their squares)
DS_KERNELS = {"central": (-0.5, 0.0, 0.5), "backward": (-1.0, 1.0, 0.0), "forward": (0.0, -1.0, 1.0)}


def kernel(term: str, method: str = "central", *, matched: bool = True) -> tuple[float, float, float]:
    """Weights on month i-1, i, i+1 of the raw monthly series that give a balance term at month i.

    ``term`` "dS": the storage difference of TWSA monthly means (`DS_KERNELS`); any flux: the window of
    `match_window` where ``matched``, else the month itself (0, 1, 0).
    """
    _check(method)
    if term == "dS":
        return DS_KERNELS[method]
    return KERNELS[method] if matched else (0.0, 1.0, 0.0)


def sum_variance(variance, weights, select) -> np.ndarray:
    """Variance (mm2) of the sum over the selected months of a kernel-filtered series.

    For ``y[i] = sum_k w_k x[i + k - 1]`` with independent monthly errors of variance ``variance[j]``
    (last axis: time), ``sum_{i in select} y[i] = sum_j c_j x[j]`` with ``c = K^T 1_select``; the result
    is ``sum_j c_j^2 variance[j]`` (the filtered months share raw months, so their variances do not add).

    Parameters
    ----------
    variance : array (..., T), mm2
    weights : (w_prev, w_same, w_next)
    select : bool array (T,) or (..., T): the months summed

    Returns
    -------
    array (...): NaN where a raw month that carries weight has no variance.
    """
    v = np.asarray(variance, dtype=np.float64)
    a = np.broadcast_to(np.asarray(select, dtype=np.float64), v.shape)
    w0, w1, w2 = weights
    c = w1 * a
    # c[j] = sum_i a[i] K[i, j] with K[i, i-1] = w0, K[i, i] = w1, K[i, i+1] = w2
    c[..., :-1] = c[..., :-1] + w0 * a[..., 1:]
    c[..., 1:] = c[..., 1:] + w2 * a[..., :-1]
    used = c != 0
    with np.errstate(invalid="ignore"):
        terms = np.where(used, c * c * v, 0.0)
    out = terms.sum(axis=-1)
    return np.where(np.any(used & ~np.isfinite(v), axis=-1), np.nan, out)


def shift_later(values, months: int) -> np.ndarray:
    """out[..., i] = values[..., i + months]: compare a series ``months`` later (NaN past the end)."""
    return _shift(np.asarray(values, dtype=np.float64), -months)


def fill_gaps(twsa_mm, *, max_gap: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Linear interpolation across interior gaps of TWSA (last axis); returns (filled, flag).

    Only on request: filled months are flagged ``True`` so that views and exports
    can say so. Gaps longer than ``max_gap`` months stay NaN.
    """
    m = np.array(twsa_mm, dtype=np.float64, copy=True)
    flag = np.zeros(m.shape, dtype=bool)
    flat = m.reshape(-1, m.shape[-1])
    fflat = flag.reshape(-1, m.shape[-1])
    t = np.arange(m.shape[-1])
    for row, frow in zip(flat, fflat):
        ok = np.isfinite(row)
        if ok.sum() < 2:
            continue
        first, last = np.flatnonzero(ok)[[0, -1]]
        miss = ~ok & (t > first) & (t < last)
        if max_gap is not None and miss.any():
            # drop runs longer than max_gap
            runs = np.split(np.flatnonzero(miss), np.flatnonzero(np.diff(np.flatnonzero(miss)) > 1) + 1)
            for r in runs:
                if r.size > max_gap:
                    miss[r] = False
        row[miss] = np.interp(t[miss], t[ok], row[ok])
        frow[miss] = True
    return m, flag


def window_closure(twsa_mm, net_flux_mm, i: int, j: int) -> dict:
    """Closure between the mid-points of two valid TWSA months ``i < j`` (1-D inputs).

    Returns the storage difference M[j] - M[i] (mm), the net flux total between the two
    mid-months F[i]/2 + sum F[i+1..j-1] + F[j]/2 (mm), and their difference (mm).
    """
    m = np.asarray(twsa_mm, dtype=np.float64)
    f = np.asarray(net_flux_mm, dtype=np.float64)
    if not (0 <= i < j < m.size):
        raise InputError(f"window needs two months i < j inside the series, got {i}, {j}")
    if not (np.isfinite(m[i]) and np.isfinite(m[j])):
        raise InputError("window_closure needs TWSA at both ends of the window")
    ds = m[j] - m[i]
    flux = 0.5 * f[i] + np.sum(f[i + 1:j]) + 0.5 * f[j]
    return {"storage_change_mm": float(ds), "net_flux_mm": float(flux), "residual_mm": float(flux - ds),
            "months": int(j - i)}


# ---- water bodies: storage from levels -----------------------------------------------------------
VOLUME_STATES = ("end_of_month", "monthly_mean")
_END_KERNEL = (0.0, 1.0, 0.0)


def _state(da: xr.DataArray) -> str:
    state = da.attrs.get("state")
    if state not in VOLUME_STATES:
        raise InputError(f"{da.name or 'volume'}: attribute 'state' {state!r} is not one of {', '.join(VOLUME_STATES)}")
    return state


def level_volumes(levels: xr.DataArray, curves: Mapping[str, Callable], *, dim: str = "waterbody") -> xr.DataArray:
    """Volumes (m3) from water levels (m) through each water body's storage curve.

    Parameters
    ----------
    levels : xarray.DataArray
        Dims ``(dim, "time")``, levels in m (``units`` attribute "m"), ``state`` attribute
        "end_of_month" or "monthly_mean" (carried over to the volumes).
    curves : mapping of water-body id to callable
        ``curve(level_m) -> volume_m3``, NaN outside the curve's level range (never extrapolated).
    dim : str
        The water-body dimension.

    Returns
    -------
    xarray.DataArray
        Same dims and ``state``, in m3. A level outside its curve leaves the month empty (NaN) and
        raises one `LevelOutsideCurveWarning` per water body naming it and the months.
    """
    state = _state(levels)
    out = apply_curves(levels, curves, dim=dim, what=f"{state.replace('_', '-')} level")
    return out.assign_attrs(units="m3", state=state, long_name="water-body volume from level")


def apply_curves(levels: xr.DataArray, curves: Mapping[str, Callable], *, dim: str = "waterbody",
                 what: str = "level") -> xr.DataArray:
    """Each water body's levels (m) through its own curve (volume or area); NaN and one
    `LevelOutsideCurveWarning` per water body (naming it and the months) where a level is outside."""
    import warnings

    if levels.attrs.get("units", "m") != "m":
        raise InputError(f"levels: units {levels.attrs.get('units')!r}, expected 'm'")
    lv = levels.transpose(dim, "time")
    out = np.full(lv.shape, np.nan)
    months = pd.DatetimeIndex(lv["time"].values)
    for i, wb in enumerate(lv[dim].values):
        if str(wb) not in curves:
            raise InputError(f"water body {str(wb)!r} has no storage curve")
        h = lv.values[i].astype(float)
        v = np.asarray(curves[str(wb)](h), dtype=float)
        outside = np.isfinite(h) & ~np.isfinite(v)
        v[outside] = np.nan
        out[i] = v
        if outside.any():
            names = ", ".join(f"{m:%Y-%m}" for m in months[outside])
            warnings.warn(f"water body {str(wb)!r}: level outside the storage curve in {names} ({what}); "
                          "those months are left empty", LevelOutsideCurveWarning, stacklevel=3)
    return xr.DataArray(out, dims=(dim, "time"), coords=lv.coords)


def volume_kernel(state: str, method: str = "central") -> tuple[float, float, float]:
    """Weights on F[m-1], F[m], F[m+1] that match flux totals to the storage change of ``state`` volumes."""
    if state == "end_of_month":
        return _END_KERNEL
    if state != "monthly_mean":
        raise InputError(f"volume state {state!r} is not one of {', '.join(VOLUME_STATES)}")
    _check(method)
    return KERNELS[method]


def volume_storage_change(volume: xr.DataArray, *, method: str = "central") -> xr.DataArray:
    """Storage change per month (m3/month) of water-body volumes (m3, time last or named ``time``).

    ``end_of_month`` volumes: ``dS[m] = V[m] - V[m-1]`` (``method`` is not used: the difference of
    two end states is the month's own change). ``monthly_mean`` volumes: `storage_change` with ``method``
    (central, backward, forward), as for TWSA. NaN where a needed month is missing.
    """
    state = _state(volume)
    if volume.attrs.get("units", "m3") != "m3":
        raise InputError(f"volume: units {volume.attrs.get('units')!r}, expected 'm3'")
    dims = [d for d in volume.dims if d != "time"] + ["time"]
    v = volume.transpose(*dims)
    if state == "end_of_month":
        ds = storage_change(v.values, "backward")
        how = "end_of_month"
    else:
        ds = storage_change(v.values, method)
        how = method
    return xr.DataArray(ds, dims=v.dims, coords=v.coords,
                        attrs={"units": "m3/month", "storage_change": how, "state": state,
                               "long_name": "water-body storage change"})


def match_volume_window(flux: xr.DataArray, *, state: str, method: str = "central") -> xr.DataArray:
    """Monthly flux totals (any unit per month, ``time`` dim) filtered with the window that matches
    `volume_storage_change` of ``state`` volumes (end-of-month: unchanged; monthly-mean: the TWSA kernel)."""
    w = volume_kernel(state, method)
    dims = [d for d in flux.dims if d != "time"] + ["time"]
    f = flux.transpose(*dims)
    return xr.DataArray(apply_kernel(f.values, w), dims=f.dims, coords=f.coords, attrs=dict(flux.attrs))


def state_storage_change(storage_mm, states, method: str = "central") -> np.ndarray:
    """Storage change (per month) of several units whose storage states differ (first axis: unit).

    ``storage_mm`` (unit, ..., time): storage of each unit (a depth or a volume); ``states``: one of
    `VOLUME_STATES` per unit. End-of-month rows are differenced month by month (``V[m] - V[m-1]``), monthly-mean
    rows with ``method``, exactly as `volume_storage_change` does for one state.
    """
    m = np.asarray(storage_mm, dtype=np.float64)
    out = np.empty(m.shape)
    for i, state in enumerate(states):
        out[i] = storage_change(m[i], "backward" if state == "end_of_month" else method)
        volume_kernel(state, method)  # refuses an unknown state
    return out


def match_state_window(flux, states, method: str = "central", *, matched: bool = True) -> np.ndarray:
    """Flux totals (unit, ..., time) filtered per unit with the window matching its storage state.

    End-of-month rows: the month itself (unchanged, whatever ``matched``); monthly-mean rows: the TWSA kernel of
    ``method`` where ``matched``, else unchanged (`volume_kernel`).
    """
    f = np.asarray(flux, dtype=np.float64)
    out = np.empty(f.shape)
    for i, state in enumerate(states):
        w = volume_kernel(state, method)
        out[i] = apply_kernel(f[i], w) if (matched and state != "end_of_month") else f[i]
    return out


def variance_kernels(state: str | None, method: str = "central", *,
                     matched: bool = True) -> tuple[tuple[float, float, float], tuple[float, float, float]]:
    """Weights on the error variances (mm2, or any squared unit) of months i-1, i, i+1 that give the variance of a
    balance term at month i, for errors independent between months.

    Parameters
    ----------
    state : None for a basin (TWSA monthly means), else a water body's storage state (`VOLUME_STATES`)
    method : storage-change method (central | backward | forward); an end-of-month state does not use it
    matched : fluxes window-matched (a basin or a monthly-mean water body only)

    Returns
    -------
    (flux, storage): squared flux weights (`match_window_variance` where matched, else (0, 1, 0)), and the
    weights of the storage difference (`storage_change_variance`; end-of-month: ``V[m] - V[m-1]``, (1, 1, 0)).
    """
    _check(method)
    if state is not None and state != "monthly_mean":
        volume_kernel(state, method)  # refuses an unknown state
        return (0.0, 1.0, 0.0), _DS_VARIANCE_KERNELS["backward"]
    flux = tuple(w * w for w in KERNELS[method]) if matched else (0.0, 1.0, 0.0)
    return flux, _DS_VARIANCE_KERNELS[method]


# what outputs say instead of the storage-change options where those options change nothing
END_OF_MONTH_NOTE = ("storage from end-of-month volumes, month-by-month differences "
                     "(storage-change options do not apply)")


def storage_note(state: str | None) -> str | None:
    """How the storage change of a unit in ``state`` is taken, where the storage-change options (method, window
    matching) do not apply to it: `END_OF_MONTH_NOTE` for end-of-month states, None where they apply (a basin:
    ``state`` None, or a monthly-mean water body)."""
    if state is None or state == "monthly_mean":
        return None
    volume_kernel(state)  # refuses an unknown state
    return END_OF_MONTH_NOTE
