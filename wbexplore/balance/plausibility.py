"""Implausible values in canonical basin series: named, counted and masked, never passed on silently.

A basin mean that no climate can produce (a month of 50,000 mm of rain, ET well below zero,
an infinite value from a broken scale factor) would otherwise flow into every metric and
ranking without a trace. `screen_implausible` finds them per source and basin, and returns
the series with those months set to missing (NaN) together with one `Implausible` record per
source; the caller warns once per source with `ImplausibleValueWarning` (the message says
that the months were masked). NaN itself is missing data, not an implausible value.

Bounds, in the canonical units (P, ET and discharge in mm per calendar month, TWSA in mm):

P
    below -0.01 mm/month: precipitation cannot be negative; the tolerance only absorbs
    round-off of packed or regridded values.
    above 9,300 mm/month: about the highest calendar-month rainfall ever observed at a gauge
    (from memory, order of magnitude of the published world record); a basin *mean* above a
    point record is not physical.
ET
    below -0.5 mm/month: dew and hoar-frost deposition make small negative monthly ET real
    (condensation onto the surface), a few tenths of a mm at most over a basin month.
    above 400 mm/month: the energy limit of evaporation. With net radiation at most about
    300 W m-2 as a monthly mean, 300 J s-1 m-2 * 86,400 s = 25.9 MJ m-2 per day, divided by
    the latent heat of vaporisation 2.45 MJ kg-1 gives 10.6 kg m-2 = 10.6 mm per day, or
    about 330 mm in a 31-day month; 400 leaves about 20 % for heat advected from drier
    surroundings (oasis effect).
TWSA
    |TWSA| above 3,000 mm: the largest storage anomalies reported for whole basins (large
    reservoirs filling, ice and glacier loss over decades) are of order one to two metres of
    water (from memory); three metres about a climatology is no basin's storage.
discharge (Q)
    below -0.01 mm/month: a gauged outlet's monthly mean flow leaves the basin; a negative
    month means a sign or unit error.
    above 9,300 mm/month: runoff cannot exceed the largest monthly rainfall bound.
every term
    non-finite (+-inf).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import xarray as xr

__all__ = ["ImplausibleValueWarning", "Implausible", "BOUNDS", "screen_implausible", "implausible_message"]

# component -> (lowest plausible value, highest plausible value), canonical units; see the module docstring
BOUNDS: dict[str, tuple[float, float]] = {
    "P": (-0.01, 9300.0),
    "ET": (-0.5, 400.0),
    "TWSA": (-3000.0, 3000.0),
    "Q": (-0.01, 9300.0),
}


class ImplausibleValueWarning(UserWarning):
    """A source holds values outside physical bounds or non-finite values; those months are masked."""


@dataclass
class Implausible:
    """Implausible months of one source: per kind (``"below"``, ``"above"``, ``"non-finite"``),
    the number of months per basin id."""

    variable: str
    component: str
    units: str
    counts: dict[str, dict[str, int]] = field(default_factory=dict)

    @property
    def total(self) -> int:
        return sum(sum(v.values()) for v in self.counts.values())


def _describe(kind: str, comp: str, units: str) -> str:
    lo, hi = BOUNDS[comp]
    if kind == "below":
        return f"below {lo:g} {units}"
    if kind == "above":
        return f"above {hi:g} {units}"
    return "non-finite"


def implausible_message(rec: Implausible, limit: int = 5) -> str:
    """One line: the source, what was found in which basins (month counts), and that it was masked."""
    parts = []
    for kind, per_basin in rec.counts.items():
        items = sorted(per_basin.items(), key=lambda kv: (-kv[1], kv[0]))
        shown = ", ".join(f"{b!r} {n} month{'s' if n != 1 else ''}" for b, n in items[:limit])
        more = f" and {len(items) - limit} more basins" if len(items) > limit else ""
        parts.append(f"{_describe(kind, rec.component, rec.units)} in basin {shown}{more}")
    what = "discharge" if rec.component == "Q" else f"source {rec.variable!r} ({rec.component})"
    return (f"{what}: {rec.total} implausible basin-month value{'s' if rec.total != 1 else ''} masked as missing: "
            + "; ".join(parts))


def screen_implausible(ds: xr.Dataset) -> tuple[xr.Dataset, list[Implausible]]:
    """Mask implausible values of every source and of discharge.

    Parameters
    ----------
    ds : canonical series (basin, time): variables with a ``component`` attribute of
        P, ET, TWSA (sources) or Q (discharge); P, ET, Q in mm/month, TWSA in mm.

    Returns
    -------
    (dataset, records): a copy of ``ds`` where implausible months are NaN, each masked
    variable carrying ``implausible_masked`` (number of basin-months) and
    ``implausible_note`` (the message) attributes; one `Implausible` per variable that had any.
    """
    out = ds.copy()
    records = []
    for name, v in ds.data_vars.items():
        comp = v.attrs.get("component")
        if comp not in BOUNDS:
            continue
        if set(v.dims) != {"basin", "time"}:
            raise ValueError(f"variable {name!r} ({comp}) has dims {v.dims}, not (basin, time): cannot screen it")
        v = v.transpose("basin", "time")  # any order screened alike (never skipped)
        a = np.asarray(v.values, dtype=np.float64)
        lo, hi = BOUNDS[comp]
        with np.errstate(invalid="ignore"):
            kinds = {"below": np.isfinite(a) & (a < lo), "above": np.isfinite(a) & (a > hi),
                     "non-finite": np.isinf(a)}
        bad = kinds["below"] | kinds["above"] | kinds["non-finite"]
        if not bad.any():
            continue
        basins = [str(b) for b in ds["basin"].values]
        rec = Implausible(variable=str(name), component=comp, units=str(v.attrs.get("units", "")))
        for kind, m in kinds.items():
            per = m.sum(axis=-1)
            if per.any():
                rec.counts[kind] = {basins[i]: int(per[i]) for i in np.flatnonzero(per)}
        records.append(rec)
        out[name] = v.where(~xr.DataArray(bad, dims=v.dims, coords={d: v[d] for d in v.dims}))
        out[name].attrs = dict(v.attrs, implausible_masked=int(bad.sum()), implausible_note=implausible_message(rec))
    return out, records
