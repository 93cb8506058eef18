"""The invented demo scenario: the Quessary uplands, with a known truth.

Everything here is fictional: the region, its eight basins, two gauged flows and the
eight gridded products. The region sits on the WGS84 grid from 7 W to 5 E and 6 N to 16 N, so
a product stored with 0..360 longitudes really has to be read right.

Truth
-----
A grid-cell water-balance model on a 0.05 degree grid, monthly steps, constant
rates within a month. Each cell has a soil store (capacity 120..320 mm; ET is
limited by energy, the potential ET, and by water, a linear stress below half
capacity), a groundwater store fed by percolation and drained as baseflow, and
a channel store that takes saturation excess and baseflow and releases a share
of its content each month (a linear reservoir: slower on the flat northern
plains, so Q lags in the large basins). Basins are unions of whole model cells,
so basin truth is an exact area-weighted sum over member cells (cell areas from
`pyproj.Geod`, independent of wbexplore's spatial engine), and for every basin
and month ``P - ET - Q - dS = 0`` to round-off. TWSA is the monthly *mean* of
total storage (soil + groundwater + channel; piecewise linear in time) minus its
2001-2020 mean.

Nesting and flows
-----------------
Upper Velumbe drains into Velumbe and Upper Sarnelle into Sarnelle (``drains_to`` in the basin
file): both downstream basins also have an incremental unit (their area minus the upstream basin),
whose truth is summed over its own cells and written to ``truth_incremental.nc``. Below the upper
gauge of Sarnelle an irrigation canal abstracts water from the river (out, dry season, at most 60% of
the natural flow) and a small transfer from outside the region releases water into it (in): the gauged
outflow of Sarnelle is its natural outflow minus the abstraction plus the transfer, so for Sarnelle
``P - ET - Q - dS + in - out = 0``, whole and incremental. Both flows are gauged without error
(``irrigation.csv``, m3/s, wide; ``transfer.csv``, l/s, long). The two Sarnelle basins were added after
the first six: they are drawn from generators of their own and after every earlier draw, so the first six
basins and every product are bitwise what they were.

Products and their errors (also written in the catalog's labels/descriptions)
-----------------------------------------------------------------------------
See `PRODUCTS` below; `wbexplore demo` writes the table into the study README.

The reservoir (a water body; catalog block ``waterbodies``)
-----------------------------------------------------------
Talvaren reservoir (`RESERVOIR`, id TALV) fills one whole 0.5-degree block, 0.5 to 1.0 E and 12.5 to 13.0 N:
every cell of the 0.1- and 0.25-degree P and ET products is wholly inside or wholly outside it, so a product's
outline mean is an exact block mean; it lies north of 12 N, where kestrel is the truth, inside fennel's extent
and outside the eight basins (whose truth does not change). Two gauged streams flow in and a gauged release
flows out (`RESERVOIR_FLOWS`: daily, m3/s, ``reservoir_flows.csv``); a constant seepage loss of
`SEEPAGE_M3S` (6 m3/s, about 5.3 mm/month over the outline) leaves through the dam's foundation and no gauge
measures it. Its truth (``truth_waterbody.nc``) is built by daily steps with constant rates within each day::

    dV/day = (P - E) / days_in_month / 1000 * A_outline + (in1 + in2 - release - seepage) * 86400   (m3)

P and E are the truth P and ET fields averaged over the outline's truth cells (mm/month; for E the land ET
field stands for the open-water evaporation: an invented-world choice), A_outline the sum of those cells'
areas (pyproj.Geod; the engine's default reference area is the outline's geodesic area, the same to 1e-6);
the flows are used as written (rounded to 0.001 m3/s) and the release follows an operating rule towards a
seasonal target level, from the volume at the start of each day. Monthly sums of the days give, to round-off,
``dS = (P - E) * A_outline + in1 + in2 - release - seepage``. The storage curve (`reservoir_curve`) has an
area quadratic in the level, the volume its exact integral; ``reservoir_curve.csv`` samples it every 0.5 m from
250 to 282 m (the levels met stay within 271 to 274 m). The level gauge reads at noon: the level of the volume
half-way through the day, the curve inverted (Newton's method), written in mm (``reservoir_levels.csv``,
daily, wide). The gauges record from 2000-12-31 to 2021-01-01 so that both end states of every month of the
period can be read from the levels (on those two extra days P - E runs at the adjacent month's rate).
``truth_waterbody.nc``: P, E (mm/month over the outline), ``flow_<id>`` and ``seepage`` (m3/s, monthly means),
``volume`` (m3, end of month), ``dS`` (m3/month), ``level`` (m, end of month), time = month starts; attributes
``waterbody``, ``outline_area_m2`` and ``volume_start_m3`` (2001-01-01 00:00).

Expected ranking at the reservoir (rmse of P - E + in - out - dS over 2001-2020, mm/month, computed from the
written files in ``tests/test_demo_reservoir.py``): kestrel with tansy 9.7 (tansy is unbiased with 12%
monthly noise), heron with tansy 11.4, kestrel with fennel 15.5 (0.85 x truth), kestrel with sedge 27.2
(damped cycle: the reservoir's E has a strong seasonal cycle); plover (noise sd 0.35) last. The true terms'
residual is the seepage itself, so a ranking by |bias| rewards products whose errors offset it: rank by rmse.
The reservoir is drawn from a generator of its own after every earlier draw: the basins, every product,
``truth.nc`` and ``truth_incremental.nc`` are bitwise what they were before it.
"""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["write_demo", "copy_templates", "MARKER", "PRODUCTS", "BASINS", "DRAINS_TO", "FLOWS", "SEED", "DemoInfo",
           "REGION", "RESERVOIR", "RESERVOIR_FLOWS", "SEEPAGE_M3S", "reservoir_curve"]

SEED = 20260412
REGION = dict(lon0=-7.0, lon1=5.0, lat0=6.0, lat1=16.0)
RES = 0.05  # truth grid (degrees)
YEARS = (2001, 2020)
SPINUP_YEARS = 6

# Basin blobs: (id, name, centre lon, centre lat, radius deg, shape seed, climate note)
BASINS = [
    ("VEL", "Velumbe", -3.2, 9.2, 2.95, 1, "humid south-west, large"),
    ("VEU", "Upper Velumbe", -4.3, 10.1, 1.05, 2, "nested in Velumbe"),
    ("OSK", "Oskadra", -1.0, 14.2, 1.75, 3, "semi-arid north"),
    ("TIR", "Tiramo", 1.15, 7.2, 0.38, 4, "small, humid"),
    ("ZEF", "Zefron", 2.6, 10.9, 1.25, 5, "straddles the edge of one ET product"),
    ("ULK", "Ulkesh", 2.35, 14.4, 0.8, 6, "semi-arid north-east"),
    ("SAR", "Sarnelle", -5.1, 13.9, 1.15, 7, "semi-arid north-west; irrigation abstraction and a transfer in"),
    ("SAU", "Upper Sarnelle", -5.55, 14.3, 0.5, 8, "nested in Sarnelle, own gauge"),
]
# basin -> the basin it drains into (the basin file's `drains_to`; the catalog's downstream_field)
DRAINS_TO = {"VEU": "VEL", "SAU": "SAR"}
FIRST_BASINS = 6  # the original basins; later ones never overlap them
# the gauged flows (id, basin, direction, station, file, units, label); truth in truth.nc as flow_<id>
FLOWS = [
    ("irrigation", "SAR", "out", "IRR-K4", "irrigation.csv", "m3/s", "Kessaly irrigation canal (abstraction)"),
    ("transfer", "SAR", "in", "TRF-O2", "transfer.csv", "l/s", "Orvane transfer tunnel (release)"),
]

# id, component, label, description (the error by construction), form
PRODUCTS = [
    ("kestrel", "P", "Kestrel merged rain (0.1 deg)",
     "biased high by +15% south of 10 N, fading linearly to no bias at 12 N and north of it; "
     "otherwise exact. netCDF, mm/day rates, mid-month stamps, descending latitudes",
     "netCDF 0.1 deg"),
    ("plover", "P", "Plover radar-satellite rain (0.1 deg)",
     "unbiased but noisy: multiplicative log-normal noise, sd 0.35, spatially correlated over ~0.75 deg. "
     "One GeoTIFF per month (mm per month), date in the file name",
     "GeoTIFF series 0.1 deg"),
    ("heron", "P", "Heron reanalysis rain (0.25 deg)",
     "unbiased but smoothed: truth averaged to 0.25 deg then blurred (Gaussian, sd 0.5 deg), "
     "so sharp gradients bleed across basin edges. netCDF, mm per month totals",
     "netCDF 0.25 deg"),
    ("sedge", "ET", "Sedge energy-balance ET (0.25 deg)",
     "damped seasonal cycle: each month's departure from the cell's long-term mean is halved "
     "(long-term mean kept). netCDF in kg m-2 s-1 with 0..360 longitudes",
     "netCDF 0.25 deg"),
    ("fennel", "ET", "Fennel land-model ET (0.1 deg)",
     "biased low: 0.85 x truth everywhere; its extent stops at 3.5 E, cutting basin Zefron. "
     "Multi-band GeoTIFF (one band per month), mm per month",
     "GeoTIFF multi-band 0.1 deg"),
    ("tansy", "ET", "Tansy daily ET (0.25 deg)",
     "good but noisy: monthly totals multiplied by spatially correlated noise (sd 0.12), "
     "spread over days; daily netCDF in mm/day (packed int16); one day (2009-03-14) missing",
     "netCDF daily 0.25 deg"),
    ("quarry", "TWSA", "Quarry gravimetric storage anomaly (0.5 deg)",
     "truth averaged to 0.5 deg, then spatially smoothed (Gaussian, sd 1.2 cells: leakage "
     "damps small basins). netCDF in cm",
     "netCDF 0.5 deg"),
    ("cairn", "TWSA", "Cairn gravimetric storage anomaly (1 deg)",
     "truth averaged to 1 deg plus white noise (sd 12 mm per cell and month); "
     "an 11-month gap 2012-06..2013-04. zarr store in kg m-2",
     "zarr 1 deg"),
]


@dataclass
class DemoInfo:
    folder: Path
    catalog: Path
    truth: Path
    n_bytes: int


# --------------------------------------------------------------------------- helpers
def _smooth_noise(rng, shape, sigma_cells, n):
    """``n`` fields of unit-variance Gaussian noise smoothed over ``sigma_cells``."""
    from scipy.ndimage import gaussian_filter

    out = np.empty((n,) + shape)
    for i in range(n):
        f = gaussian_filter(rng.standard_normal(shape), sigma_cells, mode="wrap")
        out[i] = f / f.std()
    return out


def _cell_areas_geod(lat_edges, dlon):
    """Cell areas (m2) per row with pyproj.Geod (independent of wbexplore.spatial)."""
    from pyproj import Geod

    g = Geod(ellps="WGS84")
    out = []
    for a, b in zip(lat_edges[:-1], lat_edges[1:]):
        lo, hi = min(a, b), max(a, b)
        # densified rectangle: edges along parallels are not geodesics
        n = 64
        lons = np.concatenate([np.linspace(0, dlon, n), np.full(n, dlon), np.linspace(dlon, 0, n), np.zeros(n)])
        lats = np.concatenate([np.full(n, lo), np.linspace(lo, hi, n), np.full(n, hi), np.linspace(hi, lo, n)])
        area, _ = g.polygon_area_perimeter(lons, lats)
        out.append(abs(area))
    return np.asarray(out)


def _block_mean(field, k, row_w):
    """Area-weighted block mean of (t, ny, nx) by k x k cells (row weights ``row_w``)."""
    t, ny, nx = field.shape
    w = row_w[:, None] * np.ones(nx)[None, :]
    fw = (field * w[None]).reshape(t, ny // k, k, nx // k, k).sum(axis=(2, 4))
    ww = w.reshape(ny // k, k, nx // k, k).sum(axis=(1, 3))
    return fw / ww[None]


def _basin_masks(lon_c, lat_c, rng):
    """Rasterised star-shaped blobs, largest connected part, nested basin clipped to its parent."""
    from scipy.ndimage import label

    LON, LAT = np.meshgrid(lon_c, lat_c)
    masks = {}
    for bid, _name, cx, cy, rad, sseed, _note in BASINS:
        r2 = np.random.default_rng(SEED + sseed)
        k = np.arange(2, 7)
        amp = r2.uniform(0.03, 0.12, k.size) / k * 2
        ph = r2.uniform(0, 2 * np.pi, k.size)
        dx = (LON - cx) * np.cos(np.radians(cy))
        dy = LAT - cy
        th = np.arctan2(dy, dx)
        rr = np.hypot(dx, dy)
        rmax = rad * (1 + (amp[:, None, None] * np.cos(k[:, None, None] * th + ph[:, None, None])).sum(0))
        m = rr <= rmax
        lab, n = label(m)
        if n > 1:
            sizes = np.bincount(lab.ravel())[1:]
            m = lab == (1 + int(np.argmax(sizes)))
        masks[bid] = m
    masks["VEU"] &= masks["VEL"]
    first = np.logical_or.reduce([masks[b[0]] for b in BASINS[:FIRST_BASINS]])
    for bid, *_r in BASINS[FIRST_BASINS:]:
        masks[bid] &= ~first  # the later basins never overlap the first six
    masks["SAU"] &= masks["SAR"]
    return masks


def _mask_polygon(mask, lon_edges, lat_edges):
    """Exact outline (union of cell squares) of a boolean mask on the truth grid."""
    import rasterio.features
    import shapely
    from affine import Affine

    tr = Affine(RES, 0, lon_edges[0], 0, RES, lat_edges[0])  # rows south to north
    shapes = [shapely.geometry.shape(g) for g, v in rasterio.features.shapes(mask.astype(np.uint8), mask=mask, transform=tr)
              if v == 1]
    geom = shapely.union_all(shapes)
    return shapely.set_precision(geom, 1e-9)


# --------------------------------------------------------------------------- truth model
def _run_model(rng, lon_c, lat_c, months):
    ny, nx = lat_c.size, lon_c.size
    LON, LAT = np.meshgrid(lon_c, lat_c)
    nt = len(months)
    spin = SPINUP_YEARS * 12
    ntot = nt + spin
    # climate: humid south to semi-arid north, a little wetter in the west
    yfrac = (LAT - REGION["lat0"]) / (REGION["lat1"] - REGION["lat0"])
    p_ann = 2300.0 * np.exp(-2.05 * yfrac) * (1.0 + 0.08 * (-(LON + 1.0) / 6.0))
    p_ann *= np.exp(0.18 * _smooth_noise(rng, (ny, nx), 30, 1)[0])
    pet_ann = 1250.0 + 800.0 * yfrac
    kappa = 0.7 + 2.2 * yfrac  # seasonality sharpness
    moy = np.concatenate([np.tile(np.arange(1, 13), SPINUP_YEARS), months.month.values])
    shape = np.exp(kappa[None] * np.cos(2 * np.pi * (moy[:, None, None] - 8.0) / 12.0))
    shape /= np.mean(np.exp(kappa[None] * np.cos(2 * np.pi * (np.arange(1, 13)[:, None, None] - 8.0) / 12.0)), axis=0)[None]
    years = np.concatenate([np.full(spin, months.year[0]), months.year.values])
    uy = np.unique(years)
    ann_noise = _smooth_noise(rng, (ny, nx), 40, uy.size)
    ann = np.exp(0.16 * ann_noise - 0.5 * 0.16**2)
    yi = np.searchsorted(uy, years)
    wx = np.exp(0.30 * _smooth_noise(rng, (ny, nx), 16, ntot) - 0.5 * 0.30**2)
    P = p_ann[None] / 12.0 * shape * ann[yi] * wx
    P[:spin] = P[spin:spin + 12][np.arange(spin) % 12]  # spin-up repeats the first year
    PET = pet_ann[None] / 12.0 * (1.0 + 0.28 * np.cos(2 * np.pi * (moy[:, None, None] - 4.5) / 12.0))
    wmax = 120.0 + 200.0 * (1 - yfrac) + 20 * _smooth_noise(rng, (ny, nx), 25, 1)[0]
    kd, kg = 0.06, 0.05
    kc = 0.65 - 0.40 * yfrac  # channel release per month
    W = 0.5 * wmax
    G = np.full((ny, nx), 150.0)
    C = np.zeros((ny, nx))
    out_p, out_et, out_q, out_s = (np.empty((nt, ny, nx)) for _ in range(4))
    s_prev = W + G + C
    s_start = None
    for i in range(ntot):
        p = P[i]
        fast = 0.10 * p * (0.3 + 0.7 * np.minimum(1.0, W / wmax) ** 2)  # direct runoff (more from wet soils)
        w1 = W + p - fast
        et = np.minimum(PET[i] * np.minimum(1.0, w1 / (0.5 * wmax)), w1)
        w2 = w1 - et
        excess = np.maximum(0.0, w2 - wmax)
        w3 = w2 - excess
        d = kd * w3
        W = w3 - d
        g2 = G + d
        b = kg * g2
        G = g2 - b
        c2 = C + excess + b + fast
        q = kc * c2
        C = c2 - q
        s = W + G + C
        j = i - spin
        if j == -1:
            s_start = s.copy()
        if j >= 0:
            out_p[j], out_et[j], out_q[j], out_s[j] = p, et, q, s
        s_prev = s
    del s_prev
    return out_p, out_et, out_q, out_s, s_start


# --------------------------------------------------------------------------- flows and nesting
def _flow_truth(truth, basin_area, months):
    """Irrigation abstraction and transfer of Sarnelle (m3/s, as gauged) and the gauged outflow they leave.

    Changes ``truth`` in place: adds ``flow_<id>`` (mm/month over each basin; 0 where the flow does not
    enter) and turns Sarnelle's natural outflow into the gauged one, ``Q = Q_natural - out + in``. Flows
    are rounded to the digits written to their tables, so that the tables hold the truth exactly.
    Returns ``{flow id: m3/s}``.
    """
    ids = [b[0] for b in BASINS]
    frng = np.random.default_rng(SEED + 300)  # a generator of its own: earlier draws stay as they were
    secs = months.days_in_month.values * 86400.0
    out = {}
    for fid, bid, direction, *_r in FLOWS:
        i = ids.index(bid)
        natural = truth["Q"][i] / 1000.0 * basin_area[i] / secs  # m3/s
        if direction == "out":  # dry-season irrigation demand, at most 60% of what the river carries
            demand = 0.5 * natural.mean() * np.maximum(0.0, np.cos(2 * np.pi * (months.month.values - 2) / 12.0))
            flow = np.round(np.minimum(demand, 0.6 * natural), 6)
        else:  # a small, steady release (about 8% of the natural mean outflow), in l/s in its table
            flow = np.round(0.08 * natural.mean() * np.clip(1.0 + 0.1 * frng.standard_normal(months.size), 0.5, None)
                            * 1000.0, 3) / 1000.0
        out[fid] = flow
        mm = np.zeros((len(ids), months.size))
        mm[i] = flow * secs / basin_area[i] * 1000.0
        truth[f"flow_{fid}"] = mm
        truth["Q"][i] = truth["Q"][i] + (mm[i] if direction == "in" else -mm[i])
    return out


def _incremental_truth(masks, area2d, P, ET, Q, dS, M, truth, basin_area, months):
    """True series of the incremental units (downstream basin minus the basins draining into it): P, ET,
    dS and mean storage summed over the unit's own cells; the gauged outlet flow, each upstream basin's
    gauged outflow (``flow_upstream_<id>``) and the declared flows of the basin as depths over the unit."""
    import xarray as xr

    ids = [b[0] for b in BASINS]
    downs = [b for b in ids if b in DRAINS_TO.values()]
    nt = len(months)
    names = ["P", "ET", "Q", "dS", "TWSA", "S_mean"] + [k for k in truth if k.startswith("flow_")]
    names += [f"flow_upstream_{u}" for u in DRAINS_TO]
    inc = {k: np.zeros((len(downs), nt)) for k in names}
    area = []
    for j, d in enumerate(downs):
        ups = [u for u, dd in DRAINS_TO.items() if dd == d]
        cells = masks[d] & ~np.logical_or.reduce([masks[u] for u in ups])
        w = np.where(cells, area2d, 0.0)
        a = w.sum()
        area.append(a)
        for k, f in (("P", P), ("ET", ET), ("dS", dS), ("S_mean", M)):
            inc[k][j] = np.tensordot(f, w, axes=([1, 2], [0, 1])) / a
        inc["TWSA"][j] = inc["S_mean"][j] - inc["S_mean"][j].mean()
        i = ids.index(d)
        inc["Q"][j] = truth["Q"][i] * basin_area[i] / a  # the outlet's gauged flow over the unit
        for k in truth:
            if k.startswith("flow_"):
                inc[k][j] = truth[k][i] * basin_area[i] / a
        for u in ups:
            inc[f"flow_upstream_{u}"][j] = truth["Q"][ids.index(u)] * basin_area[ids.index(u)] / a
    ds = xr.Dataset(
        {k: (("basin", "time"), v, {"units": "mm" if k in ("TWSA", "S_mean") else "mm/month"}) for k, v in inc.items()},
        coords={"basin": downs, "time": months, "basin_area_km2": ("basin", np.asarray(area) / 1e6, {"units": "km2"}),
                "upstream_basins": ("basin", [",".join(u for u, dd in DRAINS_TO.items() if dd == d) for d in downs])},
        attrs={"title": "Quessary uplands demo: true series of the incremental units (invented data)",
               "unit": "incremental",
               "note": "P - ET - Q - dS + flows in - flows out = 0 per unit and month; flow_upstream_<id> are in"},
    )
    for fid, _b, direction, *_r in FLOWS:
        ds[f"flow_{fid}"].attrs["direction"] = direction
    for u in DRAINS_TO:
        ds[f"flow_upstream_{u}"].attrs["direction"] = "in"
    return ds


def _write_flow_tables(folder: Path, flows_m3s: dict, months) -> None:
    """The gauged flows as their operators export them: irrigation wide in m3/s, transfer long in l/s."""
    for fid, _b, _d, station, fname, units, _label in FLOWS:
        v = flows_m3s[fid]
        if units == "m3/s":
            pd.DataFrame({"date": months.strftime("%Y-%m"), station: [f"{x:.6f}" for x in v]}).to_csv(
                folder / fname, index=False)
        else:
            pd.DataFrame({"station": station, "month": months.strftime("%Y-%m"),
                          "flow_ls": [f"{x * 1000.0:.3f}" for x in v]}).to_csv(folder / fname, index=False)


def _flow_entries() -> list[dict]:
    out = []
    for fid, bid, direction, station, fname, units, label in FLOWS:
        e = {"id": fid, "basin": bid, "direction": direction, "path": fname}
        if units == "m3/s":
            e.update(layout="wide", time_field="date")
        else:
            e.update(layout="long", time_field="month", station_field="station", value_field="flow_ls")
        e.update(station=station, units=units, label=label)
        out.append(e)
    return out


# --------------------------------------------------------------------------- the reservoir (issue 15)
# Its outline is one whole 0.5-degree block: every cell of the 0.1- and 0.25-degree P and ET products is
# either wholly inside it or wholly outside, so the products' outline means are exact block means. North of
# 12 N (where kestrel is exact), west of 3.5 E (inside fennel's extent), away from the eight basins.
RESERVOIR = {"id": "TALV", "name": "Talvaren reservoir", "bounds": (0.5, 12.5, 1.0, 13.0),  # W, S, E, N (deg)
             "note": "dammed lake north of the basins; two gauged streams in, a gauged release, ungauged seepage"}
# the reservoir's gauged flows (id, water body, direction, station, label): reservoir_flows.csv, daily, m3/s
RESERVOIR_FLOWS = [
    ("ombrel", "TALV", "in", "OMB-2", "Ombrel stream at the upper gauge"),
    ("sivette", "TALV", "in", "SIV-5", "Sivette stream at the lake gauge"),
    ("talv_release", "TALV", "out", "TLV-R", "Talvaren dam release (outlet works and spillway)"),
]
SEEPAGE_M3S = 6.0  # the ungauged seepage loss through the dam's foundation (m3/s, constant)
# the storage curve: area A(h) = A_outline (a0 + a1 x + a2 x^2), x = (h - h0) / (h1 - h0), volume its integral
# from a dead storage at h0; the table is written every `step` m from h0 to h1
_CURVE = {"h0": 250.0, "h1": 282.0, "step": 0.5, "a": (0.12, 0.58, 0.30), "dead_m3": 2.0e9}
_LEVEL_START_M = 272.0  # level at 2001-01-01 00:00
_STREAMS_M3S = {"ombrel": 45.0, "sivette": 18.0}  # long-term mean inflows


def reservoir_curve(level_m, outline_m2: float) -> tuple[np.ndarray, np.ndarray]:
    """The demo reservoir's true storage curve: (surface area in m2, volume in m3) at ``level_m`` (m).

    The area is a quadratic in the level (a bowl that widens upwards, the outline's area at the top of the
    curve); the volume is its exact integral above a dead storage. The written table
    (``reservoir_curve.csv``) samples this curve; the truth is built on the curve itself.
    """
    h0, h1 = _CURVE["h0"], _CURVE["h1"]
    a0, a1, a2 = _CURVE["a"]
    x = (np.asarray(level_m, dtype=float) - h0) / (h1 - h0)
    area = outline_m2 * (a0 + a1 * x + a2 * x**2)
    vol = _CURVE["dead_m3"] + outline_m2 * (h1 - h0) * (a0 * x + a1 * x**2 / 2 + a2 * x**3 / 3)
    return area, vol


def _reservoir_level(volume_m3, outline_m2: float) -> np.ndarray:
    """Invert `reservoir_curve` (Newton's method; the volume is increasing and convex in the level)."""
    v = np.asarray(volume_m3, dtype=float)
    h = np.full(v.shape, _LEVEL_START_M)
    for _ in range(60):
        a, vv = reservoir_curve(h, outline_m2)
        step = (vv - v) / a
        h = h - step
        if np.abs(step).max() < 1e-11:
            break
    a, vv = reservoir_curve(h, outline_m2)
    assert np.abs(vv - v).max() <= 1e-6 * np.abs(v).max(), "level inversion did not converge"
    return h


def _as_written(x) -> np.ndarray:
    """Values as a table with three decimals holds them (the truth uses what the gauges' tables say)."""
    return np.array([float(f"{v:.3f}") for v in np.asarray(x, dtype=float).tolist()])


def _reservoir(P, ET, row_area, lat_e, lon_e, months):
    """The true daily water balance of the reservoir and its monthly truth.

    Days run from 2000-12-31 to 2021-01-01: the level gauge and the flow gauges record the day before and
    the day after the study period, so that both end states of every month of the period can be read from
    noon levels (on those two days P - E runs at the rate of the adjacent month). Each day has constant
    rates: ``dV = (P - E) / days_in_month * A_outline + (in1 + in2 - release - seepage) * 86400``, with P and
    E the truth fields averaged over the outline's truth cells (mm/month) and the flows as written (m3/s,
    rounded to the table's digits before use), so the monthly truth closes to round-off. The release
    follows an operating rule (towards a seasonal target level), from the volume at the start of the day.

    Returns ``(truth Dataset, daily frame, outline polygon, outline area m2)``.
    """
    import shapely
    import xarray as xr
    from scipy.signal import lfilter

    w_, s_, e_, n_ = RESERVOIR["bounds"]
    rows = (lat_e[:-1] >= s_ - 1e-9) & (lat_e[1:] <= n_ + 1e-9)
    cols = (lon_e[:-1] >= w_ - 1e-9) & (lon_e[1:] <= e_ + 1e-9)
    cell_area = row_area[rows][:, None] * np.ones(cols.sum())[None, :]
    area = float(cell_area.sum())
    p_mm = np.tensordot(P[:, rows][:, :, cols], cell_area, axes=([1, 2], [0, 1])) / area
    e_mm = np.tensordot(ET[:, rows][:, :, cols], cell_area, axes=([1, 2], [0, 1])) / area
    outline = shapely.box(w_, s_, e_, n_)

    days = pd.date_range(months[0] - pd.Timedelta(days=1), months[-1] + pd.offsets.MonthBegin(1), freq="D")
    nd = days.size
    mi = np.clip((days.year - months[0].year) * 12 + days.month - 1, 0, months.size - 1)  # month of each day
    pe = (p_mm - e_mm)[mi] / 1000.0 * area / months.days_in_month.values[mi]  # m3/day

    rrng = np.random.default_rng(SEED + 400)  # a generator of its own: every earlier draw stays as it was
    t = (days.day_of_year.values - 1) / 365.25
    season = np.exp(1.6 * np.cos(2 * np.pi * (t - 0.70)))  # streams peak in mid-September
    season /= season.mean()
    ann = (p_mm.reshape(-1, 12).sum(axis=1) / p_mm.reshape(-1, 12).sum(axis=1).mean()) ** 1.5
    ann_d = ann[np.clip(days.year.values - months[0].year, 0, ann.size - 1)]
    inflow = {}
    for fid, mean in _STREAMS_M3S.items():
        eps = rrng.standard_normal(nd)
        # AR(1) in log space, a week's memory: z[0] = eps[0], z[i] = 0.86 z[i-1] + sqrt(1 - 0.86^2) eps[i]
        z = np.concatenate([eps[:1], lfilter([np.sqrt(1 - 0.86**2)], [1.0, -0.86], eps[1:], zi=[0.86 * eps[0]])[0]])
        q = mean * season * ann_d * np.exp(0.25 * z - 0.5 * 0.25**2)
        inflow[fid] = _as_written(q)
    qin = sum(inflow.values())
    base = float(qin.mean() + pe.mean() / 86400.0 - SEEPAGE_M3S)
    target_h = 272.5 + 1.5 * np.cos(2 * np.pi * (t - 0.80))  # full in late October, drawn down by July
    target_v = reservoir_curve(target_h, area)[1]
    v_start = float(reservoir_curve(_LEVEL_START_M, area)[1])
    # the operating rule, day by day on Python floats (a loop with feedback: the release follows the volume)
    pe_l, qin_l, tv_l = pe.tolist(), qin.tolist(), target_v.tolist()
    rel = [0.0] * nd
    vb = [0.0] * (nd + 1)  # volume at 00:00 of each day (and after the last)
    vb[1] = v_start  # 2001-01-01 00:00
    for i in [*range(1, nd), 0]:  # the day before the period (0) is stepped back from the start volume
        v_now = v_start if i == 0 else vb[i]
        r = base + (v_now - tv_l[i]) / (240 * 86400.0)  # closes the gap to the target in about 8 months
        rel[i] = float(f"{min(max(r, 8.0), 600.0):.3f}")  # as written in the table
        dv = pe_l[i] + (qin_l[i] - rel[i] - SEEPAGE_M3S) * 86400.0
        if i == 0:
            vb[0] = v_start - dv
        else:
            vb[i + 1] = vb[i] + dv
    release, vb = np.asarray(rel), np.asarray(vb)
    dv_day = np.diff(vb)
    level_noon = np.round(_reservoir_level(vb[:-1] + 0.5 * dv_day, area), 3)  # the gauge reads at noon

    # monthly truth over 2001-01 .. 2020-12
    ends = np.searchsorted(days.values, (months + pd.offsets.MonthBegin(1)).values)  # day index of the 1st of next
    vol_end = vb[ends]
    dS = np.diff(np.concatenate([[v_start], vol_end]))
    in_period = (days >= months[0]) & (days < months[-1] + pd.offsets.MonthBegin(1))
    gauged = {fid: inflow.get(fid, release) for fid, *_r in RESERVOIR_FLOWS}  # m3/s per day, as written
    mdf = pd.DataFrame({"m": mi[in_period], **{k: v[in_period] for k, v in gauged.items()}}).groupby("m").mean()
    wid = RESERVOIR["id"]
    tv = {"P": (p_mm, "mm/month", "precipitation over the outline (truth field, outline's truth cells)"),
          "E": (e_mm, "mm/month", "evaporation over the outline (the truth ET field: an invented-world choice)"),
          "seepage": (np.full(months.size, SEEPAGE_M3S), "m3/s", "ungauged seepage loss (monthly mean)"),
          "volume": (vol_end, "m3", "volume at the end of the month"),
          "dS": (dS, "m3/month", "storage change over the month (end minus start volume)"),
          "level": (_reservoir_level(vol_end, area), "m", "level at the end of the month (curve inverted)")}
    for fid, _wb, direction, *_r in RESERVOIR_FLOWS:
        tv[f"flow_{fid}"] = (mdf[fid].to_numpy(), "m3/s", f"gauged flow ({direction}), monthly mean of the days")
    ds = xr.Dataset({k: ("time", v, {"units": u, "long_name": ln}) for k, (v, u, ln) in tv.items()},
                    coords={"time": months},
                    attrs={"title": "Quessary uplands demo: true water balance of the reservoir (invented data)",
                           "waterbody": wid, "waterbody_name": RESERVOIR["name"], "outline_area_m2": area,
                           "volume_start_m3": v_start,
                           "note": "dS = (P - E) / 1000 * outline_area_m2 + (sum of flows in - flows out - seepage)"
                                   " * seconds of the month, to round-off (daily steps, constant rates within a "
                                   "day); volume from 2001-01-01 00:00 (volume_start_m3)"})
    for fid, _wb, direction, station, _label in RESERVOIR_FLOWS:
        ds[f"flow_{fid}"].attrs.update(direction=direction, station=station, role="flow")
    daily = pd.DataFrame({"date": days.strftime("%Y-%m-%d"), "level": level_noon,
                          **{st: gauged[fid] for fid, _wb, _d, st, _l in RESERVOIR_FLOWS}})
    return ds, daily, outline, area


def _write_reservoir(folder: Path, ds, daily, outline) -> None:
    """Outline (GeoJSON), storage curve table, daily levels (wide, m) and daily flows (wide, m3/s)."""
    import geopandas as gpd

    wid = RESERVOIR["id"]
    area = ds.attrs["outline_area_m2"]
    gpd.GeoDataFrame([{"wb_id": wid, "name": RESERVOIR["name"], "note": RESERVOIR["note"]}], geometry=[outline],
                     crs="EPSG:4326").to_file(folder / "reservoir.geojson", driver="GeoJSON", COORDINATE_PRECISION=9)
    h = np.round(np.arange(_CURVE["h0"], _CURVE["h1"] + _CURVE["step"] / 2, _CURVE["step"]), 3)
    a, v = reservoir_curve(h, area)
    pd.DataFrame({"wb_id": wid, "level_m": [f"{x:.2f}" for x in h], "area_km2": [f"{x / 1e6:.6f}" for x in a],
                  "volume_hm3": [f"{x / 1e6:.6f}" for x in v]}).to_csv(folder / "reservoir_curve.csv", index=False)
    pd.DataFrame({"date": daily["date"], wid: [f"{x:.3f}" for x in daily["level"]]}).to_csv(
        folder / "reservoir_levels.csv", index=False)
    cols = {"date": daily["date"]}
    for _fid, _wb, _d, st, _l in RESERVOIR_FLOWS:
        cols[st] = [f"{x:.3f}" for x in daily[st]]
    pd.DataFrame(cols).to_csv(folder / "reservoir_flows.csv", index=False)


def _reservoir_readme(t) -> list[str]:
    """The study README's section on the reservoir (its files, flows, curve, seepage and truth)."""
    w, so, e, n = RESERVOIR["bounds"]
    lv = t["level"].values
    lines = ["", "## Reservoir (water body)", "",
             "| id | name | outline | outline area (km2) | level range 2001-2020 (m) | curve (m) | seepage (m3/s) |",
             "|---|---|---|---:|---|---|---:|",
             (f"| {RESERVOIR['id']} | {RESERVOIR['name']} | {w:g} to {e:g} E, {so:g} to {n:g} N (one 0.5-degree "
              f"block) | {t.attrs['outline_area_m2'] / 1e6:,.0f} | {lv.min():.2f} to {lv.max():.2f} (month ends) "
              f"| {_CURVE['h0']:g} to {_CURVE['h1']:g} every {_CURVE['step']:g} | {SEEPAGE_M3S:g} (ungauged) |"), "",
             "| flow id | direction | station (column of reservoir_flows.csv) | what |", "|---|---|---|---|"]
    for fid, _wb, direction, st, label in RESERVOIR_FLOWS:
        lines.append(f"| {fid} | {direction} | {st} | {label} |")
    lines += ["", ("Files: `reservoir.geojson` (outline), `reservoir_curve.csv` (level m -> area km2, volume hm3), "
                   "`reservoir_levels.csv` (daily noon levels, m, wide), `reservoir_flows.csv` (daily flows, m3/s, "
                   "wide; 2000-12-31 to 2021-01-01). The flows are gauged without error; the seepage is in no table."),
              "", ("`truth_waterbody.nc` holds the reservoir's true monthly balance: P and E over the outline "
              "(mm/month; E is the truth ET field, an invented-world choice), each flow `flow_<id>` and `seepage` "
              "(m3/s), `volume` (m3, end of month), `dS` (m3/month) and the end-of-month `level`; "
              "dS = (P - E) x outline area + inflows - release - seepage to round-off. Expected ranking there "
              "(by rmse): kestrel for P (exact north of 12 N), tansy for E (unbiased, noisy); "
              "the residual of the true terms is the seepage (so rank by rmse, not by |bias|).")]
    return lines


def _waterbody_entries() -> tuple[dict, list[dict]]:
    """The catalog's `waterbodies` block and the reservoir's `flows` entries."""
    block = {"path": "reservoir.geojson", "id_field": "wb_id", "name_field": "name",
             "level": {"path": "reservoir_levels.csv", "layout": "wide", "time_field": "date", "units": "m"},
             "storage_curve": {"path": "reservoir_curve.csv", "id_field": "wb_id", "level_field": "level_m",
                               "area_field": "area_km2", "volume_field": "volume_hm3", "area_units": "km2",
                               "volume_units": "hm3"}}
    flows = [{"id": fid, "basin": wb, "direction": direction, "path": "reservoir_flows.csv", "layout": "wide",
              "time_field": "date", "station": st, "units": "m3/s", "label": label}
             for fid, wb, direction, st, label in RESERVOIR_FLOWS]
    return block, flows


# --------------------------------------------------------------------------- writers
def _nc(ds, path):
    enc = {v: {"zlib": True, "complevel": 4, "shuffle": True} for v in ds.data_vars}
    for v in ds.data_vars:
        enc[v].update(ds[v].encoding)
    ds.to_netcdf(path, encoding=enc, format="NETCDF4")


def _lonlat_coords(lon, lat):
    import xarray as xr

    return {
        "lat": xr.DataArray(lat, dims="lat", attrs={"units": "degrees_north", "standard_name": "latitude", "axis": "Y"}),
        "lon": xr.DataArray(lon, dims="lon", attrs={"units": "degrees_east", "standard_name": "longitude", "axis": "X"}),
    }


def _write_geotiff(path, arr, lon_edges_w, lat_edge_n, res, *, descriptions=None, units="mm"):
    import rasterio
    from rasterio.transform import from_origin

    arr = np.asarray(arr, dtype=np.float32)
    if arr.ndim == 2:
        arr = arr[None]
    profile = dict(driver="GTiff", width=arr.shape[2], height=arr.shape[1], count=arr.shape[0], dtype="float32",
                   crs="EPSG:4326", transform=from_origin(lon_edges_w, lat_edge_n, res, res), nodata=np.nan,
                   compress="deflate", predictor=3, tiled=arr.shape[1] >= 256 and arr.shape[2] >= 256)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(arr)
        for b in range(arr.shape[0]):
            dst.set_band_unit(b + 1, units)
        dst.update_tags(units=units)


MARKER = ".wbexplore-demo"
_MARKER_HEAD = "wbexplore demo study: the files `wbexplore demo` wrote here (sha256, path)"


def copy_templates(folder: str | Path) -> Path:
    """Copy the template notebooks into ``folder``; return the path of the explorer notebook."""
    from importlib import resources

    folder = Path(folder)
    first = None
    tdir = resources.files("wbexplore") / "templates"
    for item in sorted(tdir.iterdir(), key=lambda p: p.name):
        if item.name.endswith(".ipynb"):
            dest = folder / item.name
            with resources.as_file(item) as src:
                shutil.copyfile(src, dest)
            if item.name == "explore_basin.ipynb":
                first = dest
    return first or folder


def _sha256(path: Path) -> str:
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _write_marker(folder: Path) -> None:
    """List every file of the study with its SHA-256: what a later ``--force`` may remove, and only if unchanged."""
    lines = [_MARKER_HEAD]
    for p in sorted(folder.rglob("*")):
        if p.is_file() and not p.is_symlink():
            lines.append(f"{_sha256(p)}  {p.relative_to(folder).as_posix()}")
    (folder / MARKER).write_text("\n".join(lines) + "\n")


def _demo_files(out: Path) -> list[Path]:
    """The files of an unchanged demo study at ``out`` (marker last), or InputError naming what is not one.

    ``--force`` replaces a study only when everything in it is a file the demo wrote, unchanged: a user's
    extra file, an edited notebook or anything else refuses the whole replacement. Refusing (rather than
    removing only the demo's files) keeps the user's work next to a study they still see, and never leaves
    a half-replaced folder.
    """
    from .errors import InputError

    marker = out / MARKER
    try:
        lines = marker.read_text(encoding="utf-8").splitlines() if marker.is_file() else []
    except (OSError, UnicodeDecodeError):
        lines = []
    if not lines or lines[0] != _MARKER_HEAD:
        raise InputError(f"{out}: folder is not a demo study wbexplore wrote (no {MARKER} marker); "
                         f"--force replaces only those: choose another --out")
    listed = {}
    for line in lines[1:]:
        digest, _, rel = line.partition("  ")
        listed[rel] = digest
    files = []
    for p in sorted(out.rglob("*")):
        rel = p.relative_to(out).as_posix()
        if p.is_symlink() or not (p.is_file() or p.is_dir()):
            raise InputError(f"{out}: holds {rel!r}, which the demo did not write; refused, even with --force")
        if p.is_dir() or rel == MARKER:
            continue
        if rel not in listed:
            raise InputError(f"{out}: holds {rel!r}, which the demo did not write; refused, even with --force "
                             f"(move it away first)")
        if _sha256(p) != listed[rel]:
            raise InputError(f"{out}: {rel!r} changed since the demo wrote it; refused, even with --force "
                             f"(move it away first)")
        files.append(p)
    return files + [marker]


def _remove_demo(out: Path, files: list[Path]) -> None:
    """Remove the listed files, then the folders they leave empty: ``rmdir`` fails on anything else."""
    for p in files:
        p.unlink()
    for d in sorted({q.parent for q in files}, key=lambda q: len(q.parts), reverse=True):
        while d != out and d.is_dir() and not any(d.iterdir()):
            d.rmdir()
            d = d.parent
    out.rmdir()


def write_demo(out: str | Path, *, overwrite: bool = False, progress: bool = False,
               templates: bool = False) -> DemoInfo:
    """Write the complete demo study folder (deterministic: fixed seed).

    Writes ``catalog.yaml`` (version 2: flows, nesting and a water body), ``basins.geojson``, ``discharge.csv``,
    ``irrigation.csv`` and ``transfer.csv`` (the gauged flows), ``grids/`` (the eight products),
    ``truth.nc`` (true basin series), ``truth_incremental.nc`` (true series of the incremental units),
    the reservoir's ``reservoir.geojson``, ``reservoir_curve.csv``, ``reservoir_levels.csv``,
    ``reservoir_flows.csv`` and ``truth_waterbody.nc`` (its true monthly balance),
    ``README.md`` (the error table),
    the template notebooks if ``templates``, and the marker ``.wbexplore-demo`` listing every
    file with its SHA-256.

    The study is written into a fresh temporary folder next to ``out`` and renamed onto it at the end:
    nothing that existed before is touched on failure. ``overwrite`` replaces only an unchanged demo
    study (its marker lists every file in it); a folder holding anything else is refused, and a file at
    ``out`` always is.
    """
    import tempfile

    from .errors import InputError

    out = Path(out)
    if out.is_symlink():
        raise InputError(f"{out}: is a symlink; give the study folder itself as --out")
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: exists and is not a folder; give a new or empty folder as --out")
    for up in out.parents:
        if up.exists():
            if not up.is_dir():
                raise InputError(f"{out}: {str(up)!r} is a file, not a folder")
            break
    old = None
    if out.exists() and any(out.iterdir()):
        if not overwrite:
            raise InputError(f"{out}: folder exists and is not empty (use --force to replace a demo study)")
        old = _demo_files(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        # a name of our own: a pre-existing "<out>.partial" (or anything else) is never removed
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent))
    except OSError as exc:
        raise InputError(f"{out}: cannot create the study folder ({exc.strerror or exc})") from None
    from .io.writers import terminate_unwinds

    try:
        with terminate_unwinds():
            _fill(tmp, out, old, progress=progress, templates=templates)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise InputError(f"{out}: cannot write the demo study ({exc.strerror or exc})") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    total = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
    return DemoInfo(folder=out, catalog=out / "catalog.yaml", truth=out / "truth.nc", n_bytes=total)


def _fill(tmp: Path, out: Path, old: list[Path] | None, *, progress: bool, templates: bool) -> None:
    """Write the study into ``tmp``, then remove the old study (``old``: its files) and rename ``tmp`` to ``out``."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o777 & ~umask)  # mkdtemp's private mode is not what a study folder wants
    (tmp / "grids" / "plover").mkdir(parents=True)
    _write(tmp, progress=progress)
    if templates:
        copy_templates(tmp)
    _write_marker(tmp)
    if old is not None:
        _remove_demo(out, old)
    os.rename(tmp, out)  # onto a missing or an empty folder


def _write(folder: Path, *, progress: bool):
    import geopandas as gpd
    import xarray as xr
    import yaml

    from .io.writers import CAUTION

    steps = iter(["climate and truth model", "basins", "truth series", "products", "reservoir", "catalog"])
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=6, desc="demo", unit="step")

    def tick():
        if bar is not None:
            bar.set_postfix_str(next(steps))
            bar.update(1)

    rng = np.random.default_rng(SEED)
    lon_e = np.round(np.arange(REGION["lon0"], REGION["lon1"] + RES / 2, RES), 6)
    lat_e = np.round(np.arange(REGION["lat0"], REGION["lat1"] + RES / 2, RES), 6)
    lon_c = np.round(0.5 * (lon_e[:-1] + lon_e[1:]), 6)
    lat_c = np.round(0.5 * (lat_e[:-1] + lat_e[1:]), 6)  # south to north
    months = pd.date_range(f"{YEARS[0]}-01-01", f"{YEARS[1]}-12-01", freq="MS")
    nt = len(months)
    P, ET, Q, S, s0 = _run_model(rng, lon_c, lat_c, months)
    tick()

    # --- basins
    masks = _basin_masks(lon_c, lat_c, rng)
    row_area = _cell_areas_geod(lat_e, RES)  # per row, south to north
    records, geoms = [], []
    for bid, name, *_rest in BASINS:
        geoms.append(_mask_polygon(masks[bid], lon_e, lat_e))
        records.append({"basin_id": bid, "name": name, "note": _rest[-1], "drains_to": DRAINS_TO.get(bid)})
    gdf = gpd.GeoDataFrame(records, geometry=geoms, crs="EPSG:4326")
    gdf.to_file(folder / "basins.geojson", driver="GeoJSON", COORDINATE_PRECISION=9)
    tick()

    # --- truth basin series: exact sums over member cells
    dS = np.diff(np.concatenate([s0[None], S], axis=0), axis=0)
    Sprev = np.concatenate([s0[None], S[:-1]], axis=0)
    M = 0.5 * (Sprev + S)  # monthly mean of a piecewise-linear storage
    area2d = np.broadcast_to(row_area[:, None], masks["VEL"].shape)
    truth = {k: np.empty((len(BASINS), nt)) for k in ("P", "ET", "Q", "dS", "TWSA", "S_mean")}
    basin_area = []
    for i, (bid, *_r) in enumerate(BASINS):
        w = np.where(masks[bid], area2d, 0.0)
        wsum = w.sum()
        basin_area.append(wsum)
        for k, f in (("P", P), ("ET", ET), ("Q", Q), ("dS", dS), ("S_mean", M)):
            truth[k][i] = np.tensordot(f, w, axes=([1, 2], [0, 1])) / wsum
        truth["TWSA"][i] = truth["S_mean"][i] - truth["S_mean"][i].mean()
    basin_area = np.asarray(basin_area)
    flows_m3s = _flow_truth(truth, basin_area, months)
    tds = xr.Dataset(
        {k: (("basin", "time"), v, {"units": "mm" if k in ("TWSA", "S_mean") else "mm/month"})
         for k, v in truth.items()},
        coords={"basin": [b[0] for b in BASINS], "time": months,
                "basin_area_km2": ("basin", basin_area / 1e6, {"units": "km2"})},
        attrs={"title": "Quessary uplands demo: true basin series (invented data)",
               "note": "P - ET - Q - dS + flows in - flows out = 0 per basin and month (flow_<id>, attribute "
                       "direction); Q is the gauged outflow; TWSA = monthly-mean storage minus its mean"},
    )
    for fid, _b, direction, station, *_r in FLOWS:
        tds[f"flow_{fid}"].attrs.update(direction=direction, station=station, role="flow")
    tds.to_netcdf(folder / "truth.nc")
    _incremental_truth(masks, area2d, P, ET, Q, dS, M, truth, basin_area, months).to_netcdf(
        folder / "truth_incremental.nc")
    tick()

    # --- products
    g = folder / "grids"
    anom = M - M.mean(axis=0, keepdims=True)
    yfrac_c = (lat_c - REGION["lat0"]) / (REGION["lat1"] - REGION["lat0"])
    del yfrac_c
    prng = np.random.default_rng(SEED + 100)

    # kestrel: 0.1 deg, +15% south of 10N fading to 1.0 at 12N, mm/day, mid-month, descending lat
    k01 = 2
    P01 = _block_mean(P, k01, row_area)
    lat01 = lat_e[::k01][:-1] + RES * k01 / 2
    lon01 = lon_e[::k01][:-1] + RES * k01 / 2
    fac = np.interp(lat01, [10.0, 12.0], [1.15, 1.0])
    kest = P01 * fac[None, :, None] / months.days_in_month.values[:, None, None]
    mid = months + pd.to_timedelta(months.days_in_month.values / 2.0 - 0.5, unit="D")
    c = _lonlat_coords(np.round(lon01, 6), np.round(lat01, 6))
    da = xr.DataArray(kest[:, ::-1, :].astype(np.float32), dims=("time", "lat", "lon"),
                      coords={"time": mid, "lat": c["lat"][::-1], "lon": c["lon"]},
                      attrs={"units": "mm/day", "long_name": "precipitation rate (monthly mean)"})
    _nc(xr.Dataset({"precip": da}, attrs={"title": "Kestrel merged rain (invented demo product)"}),
        g / "kestrel_p_0p1.nc")

    # plover: 0.1 deg GeoTIFF per month, noisy
    noise = np.exp(0.35 * _smooth_noise(prng, P01.shape[1:], 7.5, nt) - 0.5 * 0.35**2)
    plov = P01 * noise
    for i, m in enumerate(months):
        _write_geotiff(g / "plover" / f"plover_rain_{m:%Y-%m}.tif", plov[i][::-1], lon_e[0], lat_e[-1], 0.1)

    # heron: 0.25 deg, blurred, mm per month totals
    from scipy.ndimage import gaussian_filter

    k25 = 5
    P25 = _block_mean(P, k25, row_area)
    her = np.stack([gaussian_filter(f, 2.0, mode="nearest") for f in P25])
    lat25 = lat_e[::k25][:-1] + 0.125
    lon25 = lon_e[::k25][:-1] + 0.125
    c = _lonlat_coords(np.round(lon25, 6), np.round(lat25, 6))
    _nc(xr.Dataset({"tp": xr.DataArray(her.astype(np.float32), dims=("time", "lat", "lon"),
                                       coords={"time": months, **c}, attrs={"units": "mm"})},
                   attrs={"title": "Heron reanalysis rain (invented demo product)"}),
        g / "heron_p_0p25.nc")

    # sedge: 0.25 deg ET, damped cycle, kg m-2 s-1, 0..360 longitudes
    ET25 = _block_mean(ET, k25, row_area)
    mean25 = ET25.mean(axis=0, keepdims=True)
    clim_mean = mean25
    sed = clim_mean + 0.5 * (ET25 - clim_mean)
    sed_rate = sed / (months.days_in_month.values[:, None, None] * 86400.0)
    lon360 = np.mod(lon25, 360.0)
    order = np.argsort(lon360)
    c = _lonlat_coords(np.round(lon360[order], 6), np.round(lat25, 6))
    _nc(xr.Dataset({"evap": xr.DataArray(sed_rate[:, :, order].astype(np.float32), dims=("time", "lat", "lon"),
                                         coords={"time": months, **c}, attrs={"units": "kg m-2 s-1"})},
                   attrs={"title": "Sedge energy-balance ET (invented demo product)"}),
        g / "sedge_et_0p25.nc")

    # fennel: 0.1 deg multi-band GeoTIFF, 0.85 x truth, extent -7..3.5 E
    ET01 = _block_mean(ET, k01, row_area)
    ncol = int(round((3.5 - REGION["lon0"]) / 0.1))
    fen = 0.85 * ET01[:, :, :ncol]  # extent -7..3.5 E
    _write_geotiff(g / "fennel_et_0p1.tif", fen[:, ::-1, :], lon_e[0], lat_e[-1], 0.1, units="mm")

    # tansy: 0.25 deg daily, monthly noise, mm/day packed int16, one missing day
    tn = np.exp(0.12 * _smooth_noise(prng, ET25.shape[1:], 3.0, nt) - 0.5 * 0.12**2)
    tan_m = ET25 * tn
    days = pd.date_range(months[0], months[-1] + pd.offsets.MonthEnd(0), freq="D")
    mi = (days.year - months[0].year) * 12 + days.month - 1
    dom = days.day.values
    ndm = days.days_in_month.values
    wday = 1.0 + 0.25 * np.sin(2 * np.pi * (dom - 0.5) / ndm)  # sums to ndm within each month
    daily = tan_m[mi] / ndm[:, None, None] * wday[:, None, None]
    keep = days != pd.Timestamp("2009-03-14")
    c = _lonlat_coords(np.round(lon25, 6), np.round(lat25, 6))
    da = xr.DataArray(daily[keep].astype(np.float32), dims=("time", "lat", "lon"),
                      coords={"time": days[keep], **c}, attrs={"units": "mm/day"})
    da.encoding = {"dtype": "int16", "scale_factor": 0.005, "add_offset": 0.0, "_FillValue": -32768}
    _nc(xr.Dataset({"ET": da}, attrs={"title": "Tansy daily ET (invented demo product)"}), g / "tansy_et_daily_0p25.nc")

    # quarry: 0.5 deg, smoothed (leakage), cm, mid-month
    k50 = 10
    A50 = _block_mean(anom, k50, row_area)
    qua = np.stack([gaussian_filter(f, 1.2, mode="nearest") for f in A50]) / 10.0
    lat50 = lat_e[::k50][:-1] + 0.25
    lon50 = lon_e[::k50][:-1] + 0.25
    c = _lonlat_coords(np.round(lon50, 6), np.round(lat50, 6))
    _nc(xr.Dataset({"lwe_thickness": xr.DataArray(qua.astype(np.float32), dims=("time", "lat", "lon"),
                                                  coords={"time": mid, **c}, attrs={"units": "cm"})},
                   attrs={"title": "Quarry gravimetric storage anomaly (invented demo product)"}),
        g / "quarry_twsa_0p5.nc")

    # cairn: 1 deg, noise, gap, kg m-2, zarr
    k100 = 20
    A100 = _block_mean(anom, k100, row_area) + prng.normal(0.0, 12.0, (nt, (lat_c.size // k100), (lon_c.size // k100)))
    gap = (months >= "2012-06-01") & (months <= "2013-04-01")
    lat100 = lat_e[::k100][:-1] + 0.5
    lon100 = lon_e[::k100][:-1] + 0.5
    c = _lonlat_coords(np.round(lon100, 6), np.round(lat100, 6))
    ds = xr.Dataset({"twsa": xr.DataArray(A100[~gap].astype(np.float32), dims=("time", "lat", "lon"),
                                          coords={"time": months[~gap], **c}, attrs={"units": "kg m-2"})},
                    attrs={"title": "Cairn gravimetric storage anomaly (invented demo product)"})
    ds.to_zarr(g / "cairn_twsa_1deg.zarr", mode="w", consolidated=False)

    # discharge: m3/s with gauge error and missing months
    qrng = np.random.default_rng(SEED + 200)
    rows = []
    secs = months.days_in_month.values * 86400.0
    for i, (bid, *_r) in enumerate(BASINS):
        flow = truth["Q"][i] / 1000.0 * basin_area[i] / secs
        flow = flow * qrng.normal(1.0, 0.03, nt)
        miss = set(qrng.choice(nt, 5, replace=False).tolist())
        for j, m in enumerate(months):
            if j in miss:
                continue
            rows.append((f"{m:%Y-%m}", bid, f"{flow[j]:.4f}"))
    pd.DataFrame(rows, columns=["date", "basin_id", "q_m3s"]).to_csv(folder / "discharge.csv", index=False)
    _write_flow_tables(folder, flows_m3s, months)
    tick()

    # --- the reservoir: after every earlier draw, from a generator of its own
    res_truth, res_daily, res_outline, _area = _reservoir(P, ET, row_area, lat_e, lon_e, months)
    _write_reservoir(folder, res_truth, res_daily, res_outline)
    res_truth.to_netcdf(folder / "truth_waterbody.nc")
    tick()

    # --- catalog
    form = {
        "kestrel": {"path": "grids/kestrel_p_0p1.nc", "variable": "precip"},
        "plover": {"path": "grids/plover/plover_rain_*.tif", "units": "mm", "date_format": "%Y-%m"},
        "heron": {"path": "grids/heron_p_0p25.nc", "variable": "tp"},
        "sedge": {"path": "grids/sedge_et_0p25.nc", "variable": "evap"},
        "fennel": {"path": "grids/fennel_et_0p1.tif", "units": "mm", "time_start": "2001-01"},
        "tansy": {"path": "grids/tansy_et_daily_0p25.nc", "variable": "ET"},
        "quarry": {"path": "grids/quarry_twsa_0p5.nc", "variable": "lwe_thickness"},
        "cairn": {"path": "grids/cairn_twsa_1deg.zarr", "variable": "twsa"},
    }
    wb_block, wb_flows = _waterbody_entries()
    sources = []
    for sid, comp, label, desc, _f in PRODUCTS:
        sources.append({"id": sid, "component": comp, **form[sid], "label": label, "description": desc})
    catalog = {
        "catalog_version": 2,
        "title": "Quessary uplands demo study (invented data)",
        "description": "Eight fictional basins (two nested pairs), two gauged flows, three P, three ET and two TWSA "
                       "products with known errors; a reservoir with two gauged inflows, a gauged release and an "
                       "ungauged seepage loss. " + CAUTION,
        "basins": {"path": "basins.geojson", "id_field": "basin_id", "name_field": "name",
                   "downstream_field": "drains_to"},
        "discharge": {"path": "discharge.csv", "time_field": "date", "basin_field": "basin_id",
                      "value_field": "q_m3s", "units": "m3/s"},
        "sources": sources,
        "flows": _flow_entries() + wb_flows,
        "waterbodies": wb_block,
    }
    (folder / "catalog.yaml").write_text(
        "# wbexplore catalog, written by `wbexplore demo` (invented scenario; fixed seed %d)\n" % SEED
        + yaml.safe_dump(catalog, sort_keys=False, width=100, allow_unicode=True))
    lines = ["# Quessary uplands demo study", "", "Invented data: fictional region, basins and products.", "",
             CAUTION, "", "## Basins", "", "| id | name | area (km2) | character |", "|---|---|---:|---|"]
    for i, (bid, name, *_r) in enumerate(BASINS):
        lines.append(f"| {bid} | {name} | {basin_area[i] / 1e6:,.0f} | {_r[-1]} |")
    lines += ["", "## Products and their errors (by construction)", "", "| id | component | form | error |",
              "|---|---|---|---|"]
    for sid, comp, label, desc, f in PRODUCTS:
        lines.append(f"| {sid} | {comp} | {f} | {desc} |")
    lines += ["", "Nesting: " + "; ".join(f"{u} drains into {d}" for u, d in DRAINS_TO.items())
              + " (`drains_to`; each downstream basin also has an incremental unit).", "",
              "## Flows (gauged without error)", "", "| id | basin | direction | station | file | units | what |",
              "|---|---|---|---|---|---|---|"]
    for fid, bid, direction, station, fname, units, label in FLOWS:
        lines.append(f"| {fid} | {bid} | {direction} | {station} | {fname} | {units} | {label} |")
    lines += ["", "Discharge: m3/s at each outlet, multiplicative gauge error (sd 3%), 5 missing months per gauge.",
              "", "`truth.nc` holds the true basin series (P, ET, Q, dS, TWSA and each flow) for checking; "
              "`truth_incremental.nc` those of the incremental units."]
    lines += _reservoir_readme(res_truth)
    (folder / "README.md").write_text("\n".join(lines) + "\n")
    (folder / "scenario.json").write_text(json.dumps({"seed": SEED, "region": REGION, "truth_resolution_deg": RES,
                                                      "years": list(YEARS)}, indent=1))
    tick()
    if bar is not None:
        bar.close()
    return True
