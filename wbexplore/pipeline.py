"""Catalog -> canonical basin series: the orchestration of io/ and spatial/.

The canonical form (DESIGN.md): an `xarray.Dataset` with dims ``(basin, time)``,
monthly (month-start stamps), one variable per source (P and ET in mm/month,
TWSA in mm; attributes ``component``, ``units``, ``long_name``), the gauged
discharge as variable ``discharge`` (component ``Q``, mm/month), each source's
share of basin area with data as ``valid_fraction_<id>``, for each daily gauging station the share
of each month's days with a record as ``coverage_<station>`` (time; 0..1), and coordinates
``basin_name`` and ``basin_area_km2``.
"""

from __future__ import annotations

import dataclasses
import os
import warnings
from contextlib import contextmanager
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from . import __version__
from . import cache as _cache
from .balance.plausibility import ImplausibleValueWarning, screen_implausible
from .cache import default_cache_dir, load_basins, load_incremental_basins
from .errors import InputError, LevelOutsideCurveWarning
from .io.catalog import Catalog, SourceSpec, open_catalog
from .io.blocks import release_handles
from .io.grids import SourceGrid, open_source
from .io.stations import read_discharge_series, read_flow_series

if TYPE_CHECKING:
    from .spatial.zonal import Weights

# spatial/ (scipy.sparse, shapely: 0.25 to 0.65 s of start-up on 2 shared cores) is imported where weights are
# built or applied: a warm `rank --all` reads the series cache only and never needs it

__all__ = ["extract", "load_series", "check_scheduler", "weights_for", "source_means", "CoverageWarning", "LOW_COVERAGE",
           "source_vars", "valid_var", "default_cache_dir", "load_basins", "load_incremental_basins", "warn_implausible",
           "ImplausibleValueWarning", "flow_vars", "waterbody_series", "load_cell_means"]

LOW_COVERAGE = 0.9  # warn when a grid covers less than this share of a basin


class CoverageWarning(UserWarning):
    """A product's grid covers too little of a basin."""


def valid_var(source_id: str) -> str:
    return f"valid_fraction_{source_id}"


def source_vars(ds: xr.Dataset, component: str | None = None) -> list[str]:
    """Names of the source variables of a canonical dataset (optionally of one component)."""
    out = []
    for name, v in ds.data_vars.items():
        if v.attrs.get("role") == "source" and (component is None or v.attrs.get("component") == component):
            out.append(str(name))
    return out


def flow_vars(ds: xr.Dataset, direction: str | None = None) -> list[str]:
    """Names of the flow variables (``flow_<id>``, attribute ``role="flow"``) of a canonical dataset."""
    return [str(n) for n, v in ds.data_vars.items()
            if v.attrs.get("role") == "flow" and (direction is None or v.attrs.get("direction") == direction)]


def weights_for(src: SourceGrid, basins, *, cache_dir: str | os.PathLike | None = None,
                use_cache: bool = True, engine: str = "auto") -> Weights:
    """Weights of ``basins`` (GeoDataFrame in EPSG:4326) on the grid of ``src``, cached on disk
    under a key made of the grid, the basin ids, areas and geometries and the engine (`wbexplore.cache`)."""
    from .spatial.grid import GridError, describe_grid
    from .spatial.zonal import build_weights

    try:
        grid = describe_grid(src.x, src.y, src.crs)
    except GridError as exc:
        raise InputError(f"{src.spec.paths[0]}: source {src.spec.id!r}: {exc}") from None
    geoms = basins.to_crs(src.crs).geometry.values if not src.crs.equals("EPSG:4326") else basins.geometry.values
    ids = basins.index.values.astype(str)
    areas_m2 = basins["area_km2"].values * 1e6
    key = _cache.weights_key(grid.signature(), ids, geoms, areas_m2, engine)
    return _cache.cached_weights(key, ids, lambda: build_weights(grid, geoms, ids, areas_m2, engine=engine),
                                 cache_dir=cache_dir, use_cache=use_cache)


def source_means(src: SourceGrid, weights: Weights, *, keep_open: bool = True, cells: bool = False,
                 plan: bool = False):
    """Lazy basin means of one source: streamed from its stored blocks where a direct reader
    decodes it exactly (`SourceGrid.blocks`), else through its xarray/dask array.

    ``plan=True``: a streamed source comes back as its `wbexplore.spatial.zonal.BlockPlan` (run by
    `_compute` in local threads, without dask) instead of a dask-backed Dataset.

    ``keep_open=False`` opens the file in every task (for workers of a distributed cluster, which
    would otherwise hold product files open after the run); locally the handles are kept until
    `wbexplore.io.blocks.release_handles`. ``cells=True`` adds, from the same reads, each used cell's
    long-term mean in the canonical unit (``cell_mean``, ``cell_months``; see `zonal_mean_blocks`).
    """
    from .spatial.zonal import plan_zonal_blocks, zonal_mean

    factor = src.factor if cells else None
    if src.blocks is not None:
        blocks = src.blocks if keep_open else dataclasses.replace(src.blocks, keep_open=False)
        p = plan_zonal_blocks(blocks, weights, src.months.values, month_weights=src.step_weights, cell_factor=factor)
        return p if plan else p.to_dataset()
    return zonal_mean(src.data, weights, cell_factor=factor)


def _cell_means(src: SourceGrid, w: Weights, zm: xr.Dataset) -> dict:
    """Basin id -> `wbexplore.spatial.cells.CellMeans` of one product, from its computed reduction."""
    from .spatial.cells import basin_cell_means
    from .spatial.grid import describe_grid

    grid = describe_grid(src.x, src.y, src.crs)
    m = src.months
    period = (f"{m[0]:%Y-%m}", f"{m[-1]:%Y-%m}") if len(m) else ("", "")
    return basin_cell_means(grid, w, zm["cell_mean"].values, zm["cell_months"].values, source=src.spec.id,
                            component=src.spec.component, units=src.canonical_units, period=period)


def check_scheduler(address) -> str:
    """Refuse a malformed or unreachable scheduler address with one line, in a few seconds at most.

    A TCP address (``tcp://host:port`` or ``host:port``) is tried with one plain connection first
    (3 s at most): a refused port fails at once instead of after the client's connect timeout.
    """
    from distributed.comm.addressing import parse_address, parse_host_port
    from distributed.comm.registry import get_backend

    if not isinstance(address, str) or not address.strip():
        raise InputError(f"--scheduler {address!r}: not an address (e.g. tcp://host:8786)")
    try:
        scheme, loc = parse_address(address, strict=False)
        get_backend(scheme)
        host, port = parse_host_port(loc) if scheme in ("tcp", "tls") else (None, None)
    except (ValueError, TypeError) as exc:
        raise InputError(f"--scheduler {address!r}: not a scheduler address ({exc})") from None
    if scheme == "tcp":
        import socket

        try:
            socket.create_connection((host, port), timeout=3).close()
        except (OSError, OverflowError) as exc:
            reason = exc.strerror or exc.__class__.__name__ if isinstance(exc, OSError) else "port out of range"
            raise InputError(f"--scheduler {address!r}: the scheduler does not answer ({reason})") from None
    return address


@contextmanager
def _client(scheduler: str | None, workers: int | None):
    """A client of the scheduler at ``scheduler``, else of a new LocalCluster of ``workers``."""
    from distributed import Client, LocalCluster

    if scheduler is not None:
        try:
            client = Client(scheduler, timeout="8s")
        except (OSError, TimeoutError, ValueError, TypeError) as exc:
            # distributed raises ValueError/TypeError for addresses it cannot use, OSError when nobody answers
            raise InputError(f"--scheduler {scheduler!r}: the scheduler does not answer "
                             f"({exc.__class__.__name__})") from None
        try:
            yield client
        finally:
            client.close()
        return
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None) as cl, \
            Client(cl) as client:
        yield client


def extract(catalog: Catalog | str | os.PathLike, *, sources: list[str] | None = None,
            basins: list[str] | None = None, scheduler: str | None = None, workers: int | None = None,
            client=None, progress: bool = False, cache_dir: str | os.PathLike | None = None,
            use_cache: bool = True, engine: str = "auto", incremental: bool = False,
            waterbodies: bool = False, cell_means: bool = False):
    """Every source of a catalog over every basin (or every water body), in the canonical form.

    Parameters
    ----------
    catalog : Catalog or path
    sources, basins : lists of ids, optional
        Restrict to these (default: all).
    scheduler : str, optional
        Address of a running ``dask.distributed`` scheduler.
    workers : int, optional
        Start a ``distributed.LocalCluster`` with this many worker processes.
    client : distributed.Client, optional
        An existing client to compute on.
    progress : bool
        Show a progress bar (tqdm).
    cache_dir : path, optional
        Where weights are cached (default `default_cache_dir`).
    incremental : bool
        The incremental units of nested basins instead of whole basins (`load_incremental_basins`):
        each basin with upstream basins, minus them. The same schema; ``basin_area_km2`` is the
        incremental area, the outlet's discharge and every flow of the basin are depths over it, each
        upstream basin's gauged outflow enters as the inflow ``flow_upstream_<id>``; coordinates
        ``upstream_basins`` and ``whole_area_km2``; ``attrs["unit"] == "incremental"``.
    waterbodies : bool
        The catalog's water bodies (lakes, reservoirs) instead of its basins, in the same schema with
        ``attrs["unit"] == "waterbody"`` (``basins`` then names water-body ids). The ``basin`` dimension holds
        the water-body ids, ``basin_name`` their names and ``basin_area_km2`` the outline area (geodesic), the
        *reference area* of every depth. P and ET products are averaged over the outlines exactly as over
        basins (same weights and streaming path), in mm/month; where ``evaporation_source`` is set it is the
        only ET source. TWSA products are not used: the storage is the pseudo-source ``levels`` (component
        TWSA): the volume from the levels and the storage curve as a depth over the reference area
        (volume / area, mm), with its state per water body in the coordinate ``storage_state``
        ("end_of_month" from daily levels, "monthly_mean" otherwise; `wbexplore.balance.storage`). Flows whose
        ``basin`` is a water body are ``flow_<id>`` depths over its reference area. No ``discharge``.
        ``surface_area_km2`` (basin, time) is the surface area at the month's mean level (storage curve),
        used by ``ClosureOptions(area="surface")``. A level outside the curve leaves that month's storage
        (and surface area) empty with a `LevelOutsideCurveWarning`.
    cell_means : bool
        Also return, from the same single pass over each product's blocks, the long-term mean of every
        product in each cell that touches each basin (`wbexplore.spatial.cells.CellMeans`, converted like
        the series: mm/month for P and ET, mm for TWSA), with each cell's coverage fraction of the basin
        (`load_cell_means` caches them with the series). Water bodies get none.

    Returns
    -------
    xarray.Dataset (basin, time); see module docstring. With ``cell_means=True``: ``(series, cells)``, cells as
    basin id -> product id -> `CellMeans`.
    """
    if scheduler is not None and client is None:
        check_scheduler(scheduler)  # before any reading: a wrong address fails in seconds
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    if use_cache:
        _cache.check_root_for(cat, _cache.cache_root(cache_dir))
    if waterbodies:
        if incremental:
            raise InputError(f"{cat.path}: a water body has no incremental unit (--incremental is for nested basins)")
        return _extract_waterbodies(cat, sources=sources, ids=basins, scheduler=scheduler, workers=workers,
                                    client=client, progress=progress, cache_dir=cache_dir, use_cache=use_cache,
                                    engine=engine, cells=cell_means)
    gdf = load_incremental_basins(cat) if incremental else load_basins(cat)
    if incremental and len(gdf) == 0:
        raise InputError(f"{cat.basins.path}: field 'downstream_field': no basin has upstream basins, so there is "
                         "no incremental unit")
    if basins is not None:
        missing = [b for b in basins if b not in gdf.index]
        if missing:
            if incremental and missing[0] in load_basins(cat).index:
                raise InputError(f"{cat.basins.path}: basin {missing[0]!r} has no upstream basin "
                                 "(field 'downstream_field'), so it has no incremental unit")
            raise InputError(f"{cat.basins.path}: basin {missing[0]!r} not found")
        gdf = gdf.loc[list(basins)]
    specs: list[SourceSpec] = [cat.source(s) for s in sources] if sources else list(cat.sources)
    # flows are read before any product: a flow naming an unknown basin or station fails at once
    basin_flows = split_flows(cat)[0]
    flows = read_flow_series(basin_flows, load_basins(cat)["area_km2"], catalog=cat.path) if basin_flows else None
    return _extract_on(cat, gdf, specs, scheduler=scheduler, workers=workers, client=client, progress=progress,
                       cache_dir=cache_dir, use_cache=use_cache, engine=engine, incremental=incremental, flows=flows,
                       cells=cell_means)


def _extract_on(cat, gdf, specs, *, scheduler, workers, client, **kwargs) -> xr.Dataset:
    """`_extract` on the given client, or on a cluster started (or a scheduler connected) for it."""
    if workers is not None and workers < 1:
        raise InputError(f"--workers must be at least 1, got {workers}")
    from contextlib import ExitStack

    with ExitStack() as stack:
        if client is None and (scheduler is not None or workers is not None):
            # connect (or start the cluster) first: a scheduler that does not answer fails fast
            client = stack.enter_context(_client(scheduler, workers))
        return _extract(cat, gdf, specs, client=client, **kwargs)


def _extract_waterbodies(cat: Catalog, *, sources, ids, scheduler, workers, client, progress, cache_dir, use_cache,
                         engine, cells=False):
    """`extract(..., waterbodies=True)`: the water bodies' P and ET over their outlines, storage from levels."""
    from .io.waterbodies import read_waterbodies

    if cat.waterbodies is None:
        raise InputError(f"{cat.path}: the catalog has no 'waterbodies'")
    wbs = read_waterbodies(cat, basin_ids=load_basins(cat).index)
    gdf = wbs.outlines
    if ids is not None:
        missing = [w for w in ids if w not in gdf.index]
        if missing:
            raise InputError(f"{cat.waterbodies.path}: water body {missing[0]!r} not found")
        gdf = gdf.loc[list(ids)]
    evap = wbs.evaporation_source
    specs = [s for s in cat.sources if s.component == "P"
             or (s.component == "ET" and (evap is None or s.id == evap))]
    if sources:
        specs = [s for s in specs if s.id in set(sources)]
    for comp in ("P", "ET"):
        if not any(s.component == comp for s in specs):
            raise InputError(f"{cat.path}: field 'sources': no {comp} product for the water bodies")
    wb_flows = split_flows(cat)[1]
    flows = read_flow_series(wb_flows, wbs.outlines["area_km2"], catalog=cat.path) if wb_flows else None
    return _extract_on(cat, gdf, specs, scheduler=scheduler, workers=workers, client=client, progress=progress,
                       cache_dir=cache_dir, use_cache=use_cache, engine=engine, flows=flows, waterbodies=wbs,
                       cells=cells)


def _extract(cat, gdf, specs, *, client, progress, cache_dir, use_cache, engine, incremental=False,
             flows=None, waterbodies=None, cells=False):
    """The series; with ``cells=True`` ``(series, cell means)``, the cell means as basin id -> product id ->
    `wbexplore.spatial.cells.CellMeans` (basins only: water bodies get none)."""
    lazy = {}
    meta = {}
    remote = client is not None
    iterator = specs
    if progress:
        from tqdm.auto import tqdm

        iterator = tqdm(specs, desc="weights", unit="source", leave=False)
    for spec in iterator:
        src = open_source(spec)
        w = weights_for(src, gdf, cache_dir=cache_dir, use_cache=use_cache, engine=engine)
        cover = w.grid_coverage
        outside = np.flatnonzero(cover <= 0)
        noun = "basin" if waterbodies is None else "water body"
        if outside.size:
            raise InputError(f"{spec.paths[0]}: source {spec.id!r}: {noun} {str(w.basin[outside[0]])!r} lies entirely "
                             "outside the grid")
        for i in np.flatnonzero(cover < LOW_COVERAGE):
            warnings.warn(f"source {spec.id!r} covers only {cover[i]:.0%} of {noun} {str(w.basin[i])!r}",
                          CoverageWarning, stacklevel=2)
        zm = source_means(src, w, keep_open=not remote, cells=cells and waterbodies is None, plan=not remote)
        lazy[spec.id] = zm
        meta[spec.id] = (src, w)
    try:
        computed = _compute(lazy, client=client, progress=progress)
    finally:
        release_handles()  # leave no product file open (HDF5 would refuse to rewrite it)
    if waterbodies is not None:
        ds, _ = screen_implausible(_assemble_waterbodies(cat, gdf, specs, computed, meta, waterbodies, flows))
        warn_implausible(ds)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", LevelOutsideCurveWarning)
            ds = _add_level_storage(ds, gdf, waterbodies)  # after the screen: a lake's storage is no anomaly
        notes = [str(w.message) for w in caught if issubclass(w.category, LevelOutsideCurveWarning)]
        for w in caught:
            if not issubclass(w.category, LevelOutsideCurveWarning):
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        if notes:  # kept in the series: a cached series names them again when loaded (`warn_level_outside`)
            ds["levels"].attrs["level_outside_curve"] = "\n".join(dict.fromkeys(notes))
        warn_level_outside(ds)
        return (ds, {}) if cells else ds
    ds, _ = screen_implausible(_assemble(cat, gdf, specs, computed, meta, incremental=incremental,
                                                flows=flows))
    warn_implausible(ds)
    if not cells:
        return ds
    by_basin: dict = {str(b): {} for b in gdf.index}
    for spec in specs:
        src, w = meta[spec.id]
        for b, cm in _cell_means(src, w, computed[spec.id]).items():
            by_basin[b][spec.id] = cm
    return ds, by_basin


def warn_implausible(ds: xr.Dataset) -> None:
    """One `ImplausibleValueWarning` per source (and for discharge) whose implausible months were masked
    (`wbexplore.balance.plausibility.screen_implausible` left the note in the variable's attributes, so a
    cached series warns again when it is loaded)."""
    for v in ds.data_vars.values():
        note = v.attrs.get("implausible_note")
        if note:
            warnings.warn(str(note), ImplausibleValueWarning, stacklevel=3)


def warn_level_outside(ds: xr.Dataset) -> None:
    """One `LevelOutsideCurveWarning` per note the water bodies' series keep (levels outside the storage curve:
    those months are empty), so that a series loaded from the cache names them again."""
    if "levels" not in ds.variables:
        return
    for note in filter(None, str(ds["levels"].attrs.get("level_outside_curve", "")).split("\n")):
        warnings.warn(note, LevelOutsideCurveWarning, stacklevel=3)


def _compute(lazy: dict, *, client, progress):
    """Computed Datasets of the lazy ones: `BlockPlan`s in local threads, without importing dask (one plan
    after the other, each on every core), and dask-backed Datasets through dask (on ``client`` if given)."""
    from .spatial.zonal import BlockPlan

    plans = {k: v for k, v in lazy.items() if isinstance(v, BlockPlan)}
    out = {}
    if plans:
        bar = None
        if progress:
            from tqdm.auto import tqdm

            bar = tqdm(total=sum(p.n_tasks for p in plans.values()), desc="extract", unit="task", leave=False)
        try:
            for k, p in plans.items():
                out[k] = p.compute(progress=None if bar is None else (lambda _key: bar.update()))
        finally:
            if bar is not None:
                bar.close()
    rest = {k: v for k, v in lazy.items() if k not in plans}
    if rest:
        out.update(_compute_dask(rest, client=client, progress=progress))
    return {k: out[k] for k in lazy}


def _compute_dask(lazy: dict, *, client, progress):
    import dask
    from dask.threaded import get as threads  # named by the function: the name "threads" makes dask
    # import distributed (about 0.6 s) to look for a client that a local run never has

    keys = list(lazy)
    objs = [lazy[k] for k in keys]
    if client is not None:
        futures = client.compute(objs)
        if progress:
            from distributed import as_completed
            from tqdm.auto import tqdm

            for _ in tqdm(as_completed(futures), total=len(futures), desc="extract", unit="source"):
                pass
        results = client.gather(futures)
    elif progress:
        from tqdm.dask import TqdmCallback

        with TqdmCallback(desc="extract", leave=False):
            results = dask.compute(*objs, scheduler=threads)
    else:
        results = dask.compute(*objs, scheduler=threads)
    return dict(zip(keys, results))


def _assemble(cat: Catalog, gdf, specs, computed, meta, *, incremental: bool = False,
              flows: xr.Dataset | None = None) -> xr.Dataset:
    """The canonical series from the computed basin means; ``flows``: `read_flow_series` over whole basins."""
    months = set()
    for sid, zm in computed.items():
        months.update(pd.DatetimeIndex(zm["time"].values))
    q = None
    whole = load_basins(cat)
    if cat.discharge is not None:
        qds, _table = read_discharge_series(cat.discharge, whole["area_km2"])
        if incremental:
            q = _over_units(qds["discharge"], whole, gdf)
        else:
            q = qds["discharge"].reindex(basin=gdf.index.values)
        months.update(pd.DatetimeIndex(q["time"].values))
    full = pd.date_range(min(months), max(months), freq="MS") if months else pd.DatetimeIndex([])
    ds = xr.Dataset(coords={"basin": ("basin", gdf.index.values.astype(str)), "time": ("time", full)})
    ds["basin_name"] = ("basin", gdf["name"].values.astype(str))
    ds["basin_area_km2"] = ("basin", gdf["area_km2"].values)
    ds = ds.set_coords(["basin_name", "basin_area_km2"])
    ds["basin"].attrs = {"long_name": "basin identifier", "cf_role": "timeseries_id"}
    ds["basin_area_km2"].attrs = {"units": "km2", "long_name": "basin area (geodesic, WGS84)"}
    ds["time"].attrs = {"long_name": "calendar month (month start)"}
    _add_sources(ds, specs, computed, meta, full)
    if q is not None:
        ds["discharge"] = q.reindex(time=full)
        ds["discharge"].attrs = dict(q.attrs, role="discharge")
        # per station: share of each month's days with a record (months accepted with gaps are < 1)
        for name in qds.data_vars:
            if name != "discharge":
                ds[name] = qds[name].reindex(time=full, fill_value=0.0)
                ds[name].attrs = dict(qds[name].attrs)
    if flows is None and split_flows(cat)[0]:
        flows = read_flow_series(split_flows(cat)[0], whole["area_km2"], catalog=cat.path)
    if incremental:
        _incremental_terms(ds, cat, whole, gdf, qds["discharge"] if q is not None else None, full, flows)
    elif flows is not None:
        _add_flows(ds, _downstream(flows, whole).reindex(basin=gdf.index.values), full)
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": cat.title,
        "source": f"wbexplore {__version__} extraction of catalog {cat.path.name}",
        "catalog_sha256": cat.sha256,
        "wbexplore_version": __version__,
        "method": ("area-weighted basin means with exact cell coverage fractions (exactextract) times "
                   "WGS84 ellipsoidal cell areas (Snyder 1987 authalic formula); NaN cells renormalised; "
                   "rates converted to calendar-month totals with the true number of days"),
        "history": f"{pd.Timestamp.now(tz='UTC'):%Y-%m-%dT%H:%M:%SZ} wbexplore extract",
    }
    if incremental:
        ds.attrs["unit"] = "incremental"
    return ds


def _add_sources(ds: xr.Dataset, specs, computed, meta, full) -> None:
    """Each product's unit means (mm/month; TWSA mm) and valid fractions onto the series' months."""
    for spec in specs:
        src, w = meta[spec.id]
        zm = computed[spec.id]
        mean = zm["mean"] * xr.DataArray(src.factor, dims="time", coords={"time": zm["time"].values})
        mean = mean.reindex(time=full)
        vf = zm["valid_fraction"].reindex(time=full, fill_value=0.0)
        comp = spec.component
        ds[spec.id] = mean.astype(np.float64)
        ds[spec.id].attrs = {
            "role": "source", "component": comp, "units": "mm" if comp == "TWSA" else "mm/month",
            "long_name": spec.display, "source_id": spec.id, "source_units": src.native_units,
            "source_step": src.native_step, "incomplete_months": int(src.incomplete_months),
            "description": spec.description or "",
            "cell_methods": "area: mean time: mean" if comp == "TWSA" else "area: mean time: sum",
        }
        if spec.relative_error is not None:
            ds[spec.id].attrs["relative_error"] = spec.relative_error
        if spec.absolute_error_mm is not None:
            ds[spec.id].attrs["absolute_error_mm"] = spec.absolute_error_mm
        ds[valid_var(spec.id)] = vf
        ds[valid_var(spec.id)].attrs = {"role": "valid_fraction", "source_id": spec.id, "units": "1",
                                        "long_name": f"share of basin area with data in {spec.id}"}


def _assemble_waterbodies(cat: Catalog, gdf, specs, computed, meta, wbs, flows) -> xr.Dataset:
    """The water bodies' series (see `extract` with ``waterbodies=True``), before the storage from levels."""
    months = set(pd.DatetimeIndex(wbs.level_mean["time"].values))
    if wbs.pan is not None:
        months.update(pd.DatetimeIndex(wbs.pan["time"].values))
    for zm in computed.values():
        months.update(pd.DatetimeIndex(zm["time"].values))
    full = pd.date_range(min(months), max(months), freq="MS")
    ids = gdf.index.values.astype(str)
    ds = xr.Dataset(coords={"basin": ("basin", ids), "time": ("time", full)})
    ds["basin_name"] = ("basin", gdf["name"].values.astype(str))
    ds["basin_area_km2"] = ("basin", gdf["area_km2"].values)
    ds = ds.set_coords(["basin_name", "basin_area_km2"])
    ds["basin"].attrs = {"long_name": "water-body identifier", "cf_role": "timeseries_id"}
    ds["basin_area_km2"].attrs = {"units": "km2", "long_name": "water-body outline area (geodesic, WGS84): the "
                                                             "reference area of every depth"}
    ds["time"].attrs = {"long_name": "calendar month (month start)"}
    _add_sources(ds, specs, computed, meta, full)
    if wbs.pan is not None:  # a third way to E: pan readings x coefficient (`balance.waterbody`)
        from .balance.waterbody import pan_to_lake_evaporation

        lake = pan_to_lake_evaporation(wbs.pan, coefficient=wbs.pan_coefficient)
        ds["pan"] = (("basin", "time"), lake.reindex(waterbody=list(ids), time=full).values)
        ds["pan"].attrs = {"role": "source", "component": "ET", "units": "mm/month", "source_id": "pan",
                           "long_name": f"lake evaporation: pan x {wbs.pan_coefficient:g}",
                           "pan_coefficient": wbs.pan_coefficient, "source_units": wbs.pan.attrs["source_units"],
                           "description": "evaporation-pan station series times the pan coefficient "
                                          "(0.7 by default: common practice)",
                           "cell_methods": "time: sum"}
    if flows is not None:
        _add_flows(ds, flows.reindex(basin=ids), full)
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": cat.title,
        "source": f"wbexplore {__version__} extraction of catalog {cat.path.name} (water bodies)",
        "catalog_sha256": cat.sha256,
        "wbexplore_version": __version__,
        "method": ("area-weighted means over the water-body outlines with exact cell coverage fractions "
                   "(exactextract) times WGS84 ellipsoidal cell areas; storage from levels through the storage "
                   "curve (monotone cubic), as a depth over the outline area"),
        "history": f"{pd.Timestamp.now(tz='UTC'):%Y-%m-%dT%H:%M:%SZ} wbexplore extract (water bodies)",
        "unit": "waterbody",
    }
    return ds


def _add_level_storage(ds: xr.Dataset, gdf, wbs) -> xr.Dataset:
    """The storage from levels (pseudo-source ``levels``, mm over the outline area), its state per water body
    (``storage_state``) and the surface area at each month's mean level (``surface_area_km2``)."""
    from .balance.storage import level_volumes
    from .balance.waterbody import surface_area_at_level
    from .series import LEVELS, STORAGE_STATE, SURFACE_AREA

    ids = [str(i) for i in gdf.index]
    full = ds["time"].values
    curves = wbs.curve_callables()
    depth = np.full((len(ids), full.size), np.nan)
    state_of = {}
    for state, levels in wbs.levels_by_state().items():
        keep = [w for w in levels["waterbody"].values if str(w) in ids]
        if not keep:
            continue
        vol = level_volumes(levels.sel(waterbody=keep), curves).reindex(time=full)
        for w in keep:
            i = ids.index(str(w))
            depth[i] = vol.sel(waterbody=w).values / (float(gdf["area_km2"].iloc[i]) * 1e6) * 1000.0
            state_of[str(w)] = state
    ds = ds.copy()
    ds[LEVELS] = (("basin", "time"), depth)
    ds[LEVELS].attrs = {"role": "source", "component": "TWSA", "units": "mm", "source_id": LEVELS,
                        "long_name": "storage from levels (volume / outline area)", "label": "Storage from levels",
                        "description": "water level through the storage curve (m3), as a depth over the outline",
                        "cell_methods": "area: mean"}
    ds.coords[STORAGE_STATE] = ("basin", [state_of[w] for w in ids])
    ds[STORAGE_STATE].attrs = {"long_name": "state the storage is read at: end_of_month (daily levels) or "
                                            "monthly_mean (monthly levels)"}
    mean = wbs.level_mean.sel(waterbody=ids).reindex(time=full)
    area = surface_area_at_level(mean.assign_attrs(wbs.level_mean.attrs),
                                 {wb: c.area for wb, c in wbs.curves.items()})
    ds[SURFACE_AREA] = (("basin", "time"), area.values / 1e6)
    ds[SURFACE_AREA].attrs = {"role": "surface_area", "units": "km2",
                              "long_name": "water surface area at the month's mean level (storage curve)"}
    return ds


def _over_units(da: xr.DataArray, whole, units) -> xr.DataArray:
    """Depths (mm/month) over whole basins ``da`` (basin, time) as depths over ``units`` (GeoDataFrame of
    incremental units, indexed by the basin whose outlet they share): the same volume over the smaller
    area, ``depth * whole area / unit area``."""
    ids = units.index.values.astype(str)
    ratio = xr.DataArray(whole["area_km2"].loc[ids].values / units["area_km2"].values, dims="basin",
                         coords={"basin": ids})
    return (da.reindex(basin=ids) * ratio).assign_attrs(da.attrs)


def _downstream(fds: xr.Dataset, whole) -> xr.Dataset:
    """Flows over whole basins: a flow that enters a basin enters every basin it drains into too (their
    areas hold it), as the same volume over each one's area. Attribute ``downstream_basins`` lists them."""
    if "drains_to" not in whole.columns:
        return fds
    fds = fds.copy()
    area = whole["area_km2"]
    for name, v in list(fds.data_vars.items()):
        if v.attrs.get("role") != "flow":
            continue
        chain, b = [], v.attrs["basin"]
        while whole.loc[b, "drains_to"] is not None:
            b = whole.loc[b, "drains_to"]
            chain.append(b)
        if not chain:
            continue
        src = v.sel(basin=v.attrs["basin"])
        vals = v.values.copy()
        for d in chain:
            vals[list(v["basin"].values).index(d)] = (src * float(area.loc[v.attrs["basin"]]) / float(area.loc[d])).values
        fds[name] = v.copy(data=vals)
        fds[name].attrs["downstream_basins"] = ",".join(chain)
    return fds


def _add_flows(ds: xr.Dataset, fds: xr.Dataset, full) -> None:
    """Flow variables onto the series' months: 0.0 stays 0.0 for basins a flow does not enter; months
    beyond a gauge's record are NaN for the basins it enters (no data), coverage 0."""
    for name, v in fds.data_vars.items():
        if v.attrs.get("role") == "flow":
            entered = [v.attrs["basin"], *filter(None, v.attrs.get("downstream_basins", "").split(","))]
            out = v.reindex(time=full)
            out = out.where(out["basin"].isin(entered), 0.0)
            ds[name] = out
        else:
            ds[name] = v.reindex(time=full, fill_value=0.0)
        ds[name].attrs = dict(v.attrs)


def _incremental_terms(ds: xr.Dataset, cat: Catalog, whole, units, q_whole, full, fds) -> None:
    """Flows of an incremental series: each declared flow of the basin, and each upstream basin's gauged
    outflow as the inflow ``flow_upstream_<id>``, as depths over the incremental area; coordinates
    ``upstream_basins`` and ``whole_area_km2``."""
    ids = units.index.values.astype(str)
    ds.coords["upstream_basins"] = ("basin", units["upstream"].values.astype(str))
    ds["upstream_basins"].attrs = {"long_name": "basins draining into this one (comma-separated ids), "
                                                "subtracted from its area"}
    ds.coords["whole_area_km2"] = ("basin", whole["area_km2"].loc[ids].values)
    ds["whole_area_km2"].attrs = {"units": "km2", "long_name": "area of the whole basin (geodesic, WGS84)"}
    ds["basin_area_km2"].attrs = {"units": "km2", "long_name": "incremental area: the basin minus its upstream "
                                                             "basins (geodesic, WGS84)"}
    declared = {f"flow_{f.id}" for f in cat.flows}
    if fds is not None:
        flows = xr.Dataset({n: _over_units(v, whole, units) if v.attrs.get("role") == "flow" else v
                            for n, v in fds.data_vars.items()})
        _add_flows(ds, flows, full)
    ups = sorted({u for up in units["upstream"] for u in up.split(",")}, key=list(whole.index).index)
    for u in ups:
        name = f"flow_upstream_{u}"
        if name in declared:
            raise InputError(f"{cat.path}: flow 'upstream_{u}': field 'id': the name is taken by the inflow "
                             f"from upstream basin {u!r} of an incremental unit; choose another id")
        if q_whole is None:
            raise InputError(f"{cat.path}: field 'discharge' is missing: the incremental unit below basin {u!r} "
                             "needs its gauged outflow")
        if not bool(q_whole.sel(basin=u).notnull().any()):
            raise InputError(f"{cat.discharge.path}: basin {u!r} drains into another basin (field "
                             "'downstream_field') but has no gauged discharge: its outflow cannot enter the "
                             "incremental balance below it")
        target = [b for b, up in zip(ids, units["upstream"]) if u in up.split(",")][0]
        vol = q_whole.sel(basin=u) * float(whole["area_km2"].loc[u])  # mm/month x km2
        per_unit = xr.DataArray(np.where(ids == target, 1.0, 0.0) / units["area_km2"].values, dims="basin",
                                coords={"basin": ids})
        v = (vol * per_unit).transpose("basin", "time").reindex(time=full)
        v = v.where(v["basin"] == target, 0.0)
        station = _station_of(cat, u)
        ds[name] = v
        ds[name].attrs = {"role": "flow", "component": "flow", "flow_id": f"upstream_{u}", "direction": "in",
                          "label": f"outflow of upstream basin {whole.loc[u, 'name']}",
                          "long_name": f"outflow of upstream basin {whole.loc[u, 'name']}", "units": "mm/month",
                          "station": station, "basin": target, "upstream_basin": u,
                          "source_units": cat.discharge.units}


def split_flows(cat: Catalog) -> tuple[tuple, tuple]:
    """`wbexplore.io.waterbodies.split_flows`: (basin flows, water-body flows); imported when called."""
    if cat.waterbodies is None:
        return tuple(cat.flows), ()
    from .io.waterbodies import split_flows as split

    return split(cat)


def _station_of(cat: Catalog, basin: str) -> str:
    """The discharge station of a basin (the `stations:` mapping, else the basin id itself)."""
    mapping = cat.discharge.station_map if cat.discharge is not None else None
    if mapping:
        for st, b in mapping.items():
            if b == basin:
                return st
    return basin


def load_series(catalog: Catalog | str | os.PathLike, *, cache_dir: str | os.PathLike | None = None,
                use_cache: bool = True, progress: bool = False, **kwargs) -> xr.Dataset:
    """`extract` with the result cached on disk, keyed by the catalog text and the content of every
    input file (`wbexplore.cache`); a damaged cache file is rebuilt with a `CacheRebuiltWarning`.
    ``waterbodies=True`` (the water bodies' series) and ``incremental=True`` are part of the key."""
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    # options that change the result are part of the key; scheduler, workers, client do not
    options = _series_options(kwargs)
    built = []

    def build():
        built.append(True)  # extract warns of implausible values itself
        return extract(cat, cache_dir=cache_dir, use_cache=use_cache, progress=progress, cell_means=True, **kwargs)

    ds = _cache.cached_extraction(cat, build, want="series", cache_dir=cache_dir, use_cache=use_cache,
                                  options=options)
    if not built:
        warn_implausible(ds)  # a cache hit names the masked values again, from their attributes
        warn_level_outside(ds)
    return ds


def _series_options(kwargs: dict) -> dict:
    """The options of `load_series` that change its result (the cache key's part)."""
    options = {"sources": kwargs.get("sources"), "basins": kwargs.get("basins"), "engine": kwargs.get("engine", "auto")}
    if kwargs.get("incremental"):
        options["incremental"] = True  # other polygons, other series (the weights key has the geometries)
    if kwargs.get("waterbodies"):
        options["waterbodies"] = True  # the water bodies' series: other polygons, other terms
    return options


def load_cell_means(catalog: Catalog | str | os.PathLike, *, cache_dir: str | os.PathLike | None = None,
                    use_cache: bool = True, progress: bool = False, **kwargs) -> dict:
    """The per-cell long-term means of every product over the cells touching each basin, as `load_series`
    caches them beside the series (same key, same options; one extraction makes both).

    Returns
    -------
    dict
        Basin id -> product id -> `wbexplore.spatial.cells.CellMeans` (mm/month for P and ET, mm for TWSA).
    """
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)

    def build():
        return extract(cat, cache_dir=cache_dir, use_cache=use_cache, progress=progress, cell_means=True, **kwargs)

    return _cache.cached_extraction(cat, build, want="cells", cache_dir=cache_dir, use_cache=use_cache,
                                    options=_series_options(kwargs))


def waterbody_series(catalog: Catalog | str | os.PathLike, *, method: str = "central") -> xr.Dataset:
    """The catalog's water bodies as monthly series of level, volume and storage change (no P or E yet).

    Each water body's storage comes from the levels `wbexplore.io.waterbodies.Waterbodies.levels_by_state`
    gives it: end-of-month levels where its level series is daily, monthly-mean levels otherwise. Levels go
    through its storage curve (`wbexplore.balance.storage.level_volumes`) and the volumes into
    `wbexplore.balance.storage.volume_storage_change`, the one place that knows storage-change methods.

    Parameters
    ----------
    catalog : Catalog or path
        A catalog with a ``waterbodies`` block.
    method : {"central", "backward", "forward"}
        Storage-change method for water bodies with monthly-mean levels (end-of-month volumes are always
        differenced month by month: the difference of two end states is the month's own change).

    Returns
    -------
    xarray.Dataset
        Dims ``(waterbody, time)``, month-start stamps: ``level`` (m), ``volume`` (m3) and ``storage_change``
        (m3/month). Coordinates ``state`` (waterbody: "end_of_month" or "monthly_mean"),
        ``storage_change_method`` (waterbody: "end_of_month" or ``method``), ``waterbody_name`` and
        ``waterbody_area_km2`` (outline, geodesic). The variables' ``state`` and ``storage_change`` attributes
        hold the common value, or "per water body" when the water bodies differ (see the coordinates).

    Raises
    ------
    InputError
        Everything `wbexplore.io.waterbodies.read_waterbodies` refuses; an unknown ``method``.

    Warns
    -----
    LevelOutsideCurveWarning
        A level outside its curve: that month's volume (and the storage changes that need it) are empty.
    """
    from .balance.storage import level_volumes, volume_kernel, volume_storage_change
    from .io.waterbodies import read_waterbodies

    volume_kernel("monthly_mean", method)  # refuses an unknown method even where every series is daily
    cat = catalog if isinstance(catalog, Catalog) else open_catalog(catalog)
    wb = read_waterbodies(cat)
    curves = wb.curve_callables()
    parts = []
    for state, levels in wb.levels_by_state().items():
        vol = level_volumes(levels, curves)
        dS = volume_storage_change(vol, method=method)
        n = levels.sizes["waterbody"]
        parts.append(xr.Dataset(
            {"level": levels, "volume": vol, "storage_change": dS},
            coords={"state": ("waterbody", [state] * n),
                    "storage_change_method": ("waterbody", [dS.attrs["storage_change"]] * n)}))
    ds = xr.concat(parts, dim="waterbody", join="outer", combine_attrs="drop")
    ids = [str(w) for w in wb.outlines.index]
    ds = ds.reindex(waterbody=ids)
    ds = ds.assign_coords(waterbody_name=("waterbody", [str(n) for n in wb.outlines["name"]]),
                          waterbody_area_km2=("waterbody", wb.outlines["area_km2"].to_numpy(float)))
    states = sorted(set(ds["state"].values.tolist()))
    methods = sorted(set(ds["storage_change_method"].values.tolist()))
    state = states[0] if len(states) == 1 else "per water body"
    how = methods[0] if len(methods) == 1 else "per water body"
    ds["level"].attrs = {"units": "m", "state": state, "long_name": "water level the volume is read at"}
    ds["volume"].attrs = {"units": "m3", "state": state, "long_name": "water-body volume from level"}
    ds["storage_change"].attrs = {"units": "m3/month", "state": state, "storage_change": how,
                                  "long_name": "water-body storage change"}
    ds["waterbody_area_km2"].attrs = {"units": "km2"}
    ds.attrs = {"title": cat.title, "wbexplore_version": __version__}
    return ds
