"""Area-weighted basin means as one sparse matrix product per time chunk.

``W`` (basins x cells) holds the area (m2) of each cell covered by each basin.
For a block ``X`` (time x cells) with NaN for missing data:

    mean[b, t]  = sum_c W[b, c] X[t, c] / sum_c W[b, c] valid[t, c]
    valid_fraction[b, t] = sum_c W[b, c] valid[t, c] / A_b

where ``A_b`` is the basin's geodesic area, so a basin half outside the grid has
a valid fraction of at most 0.5. The weights of NaN cells drop out of the
denominator (renormalisation over the valid cells).

Accumulation is in float64: a float32 product drifts by ~4e-5 relative on a
240 x 600 x 600 stack (measured in ``benchmarks/extract.py``). Only the window
of rows and columns that any basin touches is read, so a continental file is
never loaded whole to serve one basin; the window is streamed in time chunks
with dask, and the same graph runs on a ``dask.distributed`` cluster.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import xarray as xr

import wbexplore._lazydask  # noqa: F401  (before xarray wraps an array)

from .areas import cell_areas_m2
from .coverage import coverage_matrix
from .grid import GridSpec

__all__ = ["TASK_BYTES", "BlockPlan", "Weights", "apply_weights_numpy", "build_weights", "plan_zonal_blocks",
           "zonal_mean", "zonal_mean_blocks"]

# Streaming task sizes, chosen on the benchmark stack (240 x 600 x 600 float32 netCDF, medians of 15
# interleaved runs against a 0.127 s bare read): tasks of 16 MiB read in pieces of 8 MiB 0.152 s,
# 32/8 MiB 0.184 s, 32/4 MiB 0.178 s, 16/16 MiB 0.160 s. A piece of 8 MiB is still in the shared L3
# cache (32 MiB) when it is accumulated; two tasks in flight overlap one's read with the other's sums.
TASK_BYTES = 16 * 2**20  # stored bytes one streaming task reads
READ_BYTES = 8 * 2**20  # one read inside a task


@dataclass
class Weights:
    """Covered area (m2) of each file cell by each basin, plus what it takes to use it."""

    matrix: sp.csr_matrix  # (n_basins, ny*nx), file order
    basin: np.ndarray  # basin ids
    basin_area_m2: np.ndarray  # geodesic area of each basin
    shape: tuple[int, int]  # (ny, nx) of the grid
    grid_signature: str = ""
    engine: str = ""
    _window: tuple | None = field(default=None, repr=False)
    _full: tuple | None = field(default=None, repr=False)
    _args_cache: dict = field(default_factory=dict, repr=False)  # kernel arguments of the window and of strips

    @property
    def covered_area_m2(self) -> np.ndarray:
        """Area of each basin inside the grid (m2)."""
        return np.asarray(self.matrix.sum(axis=1)).ravel()

    @property
    def grid_coverage(self) -> np.ndarray:
        """Share of each basin's area that the grid covers (0..1)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            c = self.covered_area_m2 / self.basin_area_m2
        return np.clip(c, 0.0, 1.0)

    def window(self):
        """Row and column slices (file order) that bound every covered cell, the weights of the
        used cells as CSR by cell (used cells x basins), and the used cells' window indices."""
        if self._window is None:
            ny, nx = self.shape
            csc = self.matrix.tocsc()
            counts = np.diff(csc.indptr)
            used = np.flatnonzero(counts)  # sorted; ~10x faster than np.unique of the indices
            if used.size == 0:
                rs = cs = slice(0, 0)
                self._window = (rs, cs, sp.csr_array((0, self.matrix.shape[0])), used)
                return self._window
            r, c = np.divmod(used, nx)
            rs = slice(int(r[0]), int(r[-1]) + 1)
            cs = slice(int(c.min()), int(c.max()) + 1)
            indptr = np.concatenate([[0], np.cumsum(counts[used])])
            wu_t = sp.csr_array((csc.data, csc.indices, indptr), shape=(used.size, self.matrix.shape[0]))
            wused = (r - rs.start) * (cs.stop - cs.start) + (c - cs.start)
            self._window = (rs, cs, wu_t, wused)
        return self._window

    def window_args(self) -> tuple:
        """`kernel_args` of the window (cached)."""
        if "window" not in self._args_cache:
            from ._kernel import kernel_args

            _, _, wu_t, wused = self.window()
            self._args_cache["window"] = kernel_args(wused, wu_t)
        return self._args_cache["window"]

    def used_rows_cols(self) -> tuple[np.ndarray, np.ndarray]:
        """Grid row and column (file order) of each used cell, in the order of `window`'s rows."""
        rs, cs, _, wused = self.window()
        r, c = np.divmod(wused, max(1, cs.stop - cs.start))
        return r + rs.start, c + cs.start

    def strips(self, rows: tuple[int, int], cols: tuple[int, int], rows_per_strip: int):
        """Kernel arguments per strip of rows for block reads: ``[(r0, r1, c0, c1, args), ...]``.

        Strips start at grid rows that are multiples of ``rows_per_strip`` (cut to ``rows``).

        ``rows`` and ``cols`` bound the block to read (file order; they must contain the
        basins' window); cells are numbered inside each (r1 - r0, c1 - c0) block.
        """
        key = (tuple(rows), tuple(cols), rows_per_strip)
        if key not in self._args_cache:
            from ._kernel import kernel_args

            rs, cs, wu_t, _ = self.window()
            out = []
            if rs.stop > rs.start:
                (ra, rb), (c0, c1) = rows, cols
                if ra > rs.start or rb < rs.stop or c0 > cs.start or c1 < cs.stop:
                    raise ValueError("the read block must contain the basins' window")
                r_used, c_used = self.used_rows_cols()
                for g0 in range(ra - ra % rows_per_strip, rb, rows_per_strip):  # at fixed grid rows
                    r0, r1 = max(ra, g0), min(rb, g0 + rows_per_strip)
                    lo, hi = np.searchsorted(r_used, [r0, r1])  # used cells are sorted by row
                    if hi == lo:
                        continue
                    cells = (r_used[lo:hi] - r0) * (c1 - c0) + (c_used[lo:hi] - c0)
                    out.append((r0, r1, c0, c1, kernel_args(cells, wu_t[lo:hi])))
            self._args_cache[key] = out
        return self._args_cache[key]


def build_weights(grid: GridSpec, geoms, basin_ids, basin_area_m2, *, engine: str = "auto") -> Weights:
    """Coverage fractions x ellipsoidal cell areas, as a sparse (basins x cells) matrix in m2.

    ``geoms`` must be in the grid's CRS. See `coverage_matrix` and `cell_areas_m2`.
    """
    frac = coverage_matrix(grid, geoms, engine=engine)
    area_norm = cell_areas_m2(grid)
    area_file = np.empty(grid.shape)
    area_file[np.ix_(grid.row_order, grid.col_order)] = area_norm
    W = frac.multiply(area_file.ravel()[None, :]).tocsr()
    return Weights(matrix=W, basin=np.asarray(basin_ids), basin_area_m2=np.asarray(basin_area_m2, float),
                   shape=grid.shape, grid_signature=grid.signature(),
                   engine=engine if engine != "auto" else ("exactextract" if _has_ee() else "shapely"))


def _has_ee():
    from .coverage import _has_exactextract

    return _has_exactextract()


def _aligned(sl: slice, block: int, n: int) -> tuple[int, int]:
    """Widen a slice to whole stored blocks: HDF5 reads a partly selected chunk whole and then
    copies the selection out (rows 5:594 of 600-row chunks: 0.14 s against 0.10 s for whole
    chunks on the benchmark stack)."""
    if sl.stop <= sl.start or block <= 1:
        return sl.start, sl.stop
    return sl.start // block * block, min(n, -(-sl.stop // block) * block)


def _read_accumulate(reader, t0, t1, r0, r1, c0, c1, args, sub, factor=None, jit=None):
    """One streaming task: read raw blocks of ``sub`` time steps and accumulate each while it is
    still in cache; only the (t, basins, 2) sums leave the task.

    ``factor`` (per stored month, canonical unit): also the (cells, 3) per-cell sums of `_kernel.cell_sums`
    of the strip's cells, from the same reads; the task then returns ``(sums, cell sums)``."""
    from ._kernel import _TB, accumulate, accumulate_with_cells

    out = np.empty((t1 - t0, args[-1], 2))
    # one (tiles, cells, 3) array for every read of the task: the kernel adds into it in place
    cell = None if factor is None else np.zeros((-(-min(sub, t1 - t0) // _TB), args[0].size, 3))
    mask = getattr(reader, "mask_args", {})
    for s0 in range(t0, t1, sub):
        s1 = min(t1, s0 + sub)
        X = reader.read(s0, s1, r0, r1, c0, c1)
        X2 = X.reshape(X.shape[0], -1)
        if cell is None:
            out[s0 - t0:s1 - t0] = accumulate(X2, None, None, reader.fill, args=args, **mask, jit=jit)
        else:  # the cell sums in the same kernel pass (each value read once)
            out[s0 - t0:s1 - t0] = accumulate_with_cells(X2, args, factor[s0:s1], reader.fill, **mask,
                                                         cell=cell, jit=jit)[0]
    return out if cell is None else (out, cell.sum(axis=0) if cell.shape[0] > 1 else cell[0])


def _sum_strips(*parts) -> np.ndarray:
    out = parts[0].copy()
    for p in parts[1:]:
        out += p
    return out


def _finish_packed(parts, covered, gc, scale, offset) -> np.ndarray:
    """``offset``: one number, or one per month (see `zonal_mean_blocks`)."""
    both = _finish_parts(parts, covered, gc)
    if scale != 1.0 or np.any(np.asarray(offset) != 0.0):
        both[0] = both[0] * scale + offset  # a mean is linear: unpacking the mean unpacks every value
    return both


def _month_spans(month_weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and end (exclusive) stored step of each month's non-zero weights; an incomplete month
    (NaN row) gets an empty span at the position of the month before it."""
    nm, nt = month_weights.shape
    s0 = np.zeros(nm, np.int64)
    s1 = np.zeros(nm, np.int64)
    pos = 0
    for m in range(nm):
        row = month_weights[m]
        nz = np.flatnonzero(row != 0) if not np.isnan(row).any() else np.zeros(0, np.int64)
        if nz.size:
            if nz[-1] - nz[0] + 1 != nz.size:
                raise ValueError("the periods of a month are not consecutive stored steps")
            s0[m], s1[m] = nz[0], nz[-1] + 1
            pos = s1[m]
        else:
            s0[m] = s1[m] = min(pos, nt)
    return s0, s1


def _month_tasks(month_weights: np.ndarray, steps: int, sub: int) -> list:
    """Whole months per task (about ``steps`` stored steps each) and per read inside a task (about
    ``sub``): ``[(t0, t1, plan), ...]`` with plan ``((m0, m1, r0, r1, w, s0, s1), ...)``: the months
    m0:m1 of one read of stored steps r0:r1, their weights and their spans relative to r0."""
    s0, s1 = _month_spans(month_weights)
    nm = len(s0)

    def groups(lo, hi, size):
        out, m = [], lo
        while m < hi:
            n = m + 1
            while n < hi and s1[n] - s0[m] <= size:
                n += 1
            out.append((m, n))
            m = n
        return out

    tasks = []
    for m0, m1 in groups(0, nm, steps):
        plan = []
        for a, b in groups(m0, m1, sub):
            r0, r1 = int(s0[a:b].min()), int(s1[a:b].max())
            plan.append((a, b, r0, r1, np.ascontiguousarray(month_weights[a:b, r0:r1]), s0[a:b] - r0, s1[a:b] - r0))
        tasks.append((min(p[2] for p in plan), max(p[3] for p in plan), tuple(plan)))
    return tasks


def _plan_months(plan) -> int:
    return plan[-1][1] - plan[0][0]


def _read_accumulate_months(reader, t0, t1, r0, r1, c0, c1, args, plan, factor=None, jit=None):
    """One streaming task of sub-monthly steps: read the periods of whole months and form each cell's
    monthly values while they are in cache; only the (months, basins, 2) sums leave the task.

    ``factor`` (per month, canonical unit): also the per-cell sums of each valid monthly value, formed in
    the same kernel call (`_kernel.accumulate_months`); the task then returns ``(sums, cell sums)``."""
    from ._kernel import accumulate_months

    m_first = plan[0][0]
    out = np.empty((_plan_months(plan), args[-1], 2))
    cell = None if factor is None else np.zeros((args[0].size, 3))
    mask = getattr(reader, "mask_args", {})
    for a, b, q0, q1, w, s0, s1 in plan:
        if q1 > q0:
            X = reader.read(q0, q1, r0, r1, c0, c1)
            out[a - m_first:b - m_first] = accumulate_months(
                X.reshape(X.shape[0], -1), args, w, s0, s1, reader.fill, **mask, cell=cell,
                factor=None if factor is None else factor[a:b], jit=jit)
        else:
            out[a - m_first:b - m_first] = 0.0  # incomplete months only
    return out if cell is None else (out, cell)


def _finish_cells(parts, los, n_used, scale, offset) -> np.ndarray:
    """(2, used cells) of [long-term mean in the canonical unit, valid months] from the per-cell sums of every
    task (``parts``: per task, one (cells, 3) array per strip; ``los``: each strip's first used cell)."""
    acc = np.zeros((n_used, 3))
    for task in parts:
        for lo, p in zip(los, task):
            acc[lo:lo + p.shape[0]] += p
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(acc[:, 2] > 0, (scale * acc[:, 0] + offset * acc[:, 1]) / acc[:, 2], np.nan)
    return np.stack([mean, acc[:, 2]])


@dataclass
class BlockPlan:
    """A streamed reduction of one product, planned as a plain task graph (dask's graph form: a key maps
    to a value or to a task ``(function, *arguments)``, arguments naming other keys).

    ``to_dataset()`` wraps it in dask arrays (for a cluster, or to combine it lazily with other dask
    work); ``compute()`` runs it in a pool of threads without importing dask (about 0.7 s of a
    command's start-up). Both run the same tasks in the same order of sums, so their numbers are
    identical to the last bit.
    """

    graph: dict
    key: tuple  # -> (2, basins, months): [mean, valid fraction]
    basin: np.ndarray
    time: np.ndarray
    cells_key: tuple | None = None  # -> (2, used cells): [cell mean, valid months] (``cell_factor`` given)

    def _dataset(self, stacked, cstack=None) -> xr.Dataset:
        out = xr.Dataset({"mean": (("basin", "time"), stacked[0]), "valid_fraction": (("basin", "time"), stacked[1])},
                         {"basin": self.basin, "time": np.asarray(self.time)})
        if cstack is not None:
            out["cell_mean"] = ("cell", cstack[0])
            out["cell_months"] = ("cell", cstack[1])
        return out

    def to_dataset(self) -> xr.Dataset:
        """The lazy (dask) Dataset of `zonal_mean`: ``mean``, ``valid_fraction`` (basin, time) and, with
        cell sums, ``cell_mean``, ``cell_months`` (cell)."""
        import dask.array as dsa

        nb, nt = len(self.basin), len(self.time)
        stacked = dsa.Array(self.graph, self.key[0], chunks=((2,), (nb,), (nt,)), dtype=np.float64)
        cstack = None
        if self.cells_key is not None:
            n = self.graph[self.cells_key][3]
            cstack = dsa.Array(self.graph, self.cells_key[0], chunks=((2,), (n,)), dtype=np.float64)
        return self._dataset(stacked, cstack)

    def compute(self, *, workers: int | None = None, progress=None) -> xr.Dataset:
        """The computed Dataset of `to_dataset`, from a pool of ``workers`` threads (default: one per
        core, as dask's threaded scheduler). ``progress``: a callable told of each finished task."""
        want = [self.key] + ([self.cells_key] if self.cells_key is not None else [])
        res = run_graph(self.graph, want, workers=workers, progress=progress)
        return self._dataset(res[self.key], res[self.cells_key] if self.cells_key is not None else None)

    @property
    def n_tasks(self) -> int:
        return sum(1 for v in self.graph.values() if _is_task(v))


def _is_task(v) -> bool:
    return isinstance(v, tuple) and bool(v) and callable(v[0])


def _refs(v, graph: dict) -> set:
    """Keys of ``graph`` that the value or task ``v`` names: itself, a task's arguments, items of lists (as
    `_resolve` replaces them; any other tuple is a literal)."""
    if isinstance(v, tuple):
        try:
            if v in graph:
                return {v}
        except TypeError:  # an unhashable tuple is no key
            pass
        return set().union(*(_refs(a, graph) for a in v[1:])) if _is_task(v) else set()
    if isinstance(v, list):
        return set().union(*(_refs(a, graph) for a in v)) if v else set()
    return set()


def _resolve(v, graph: dict, done: dict):
    if isinstance(v, tuple):
        try:
            if v in graph:
                return done[v]
        except TypeError:
            pass
        if _is_task(v):
            return v[0](*(_resolve(a, graph, done) for a in v[1:]))
        return v
    if isinstance(v, list):
        return [_resolve(a, graph, done) for a in v]
    return v


def run_graph(graph: dict, keys, *, workers: int | None = None, progress=None) -> dict:
    """Run the tasks of a plain task graph that ``keys`` need, in a pool of threads; key -> result.

    The graph's keys are tuples (as `plan_zonal_blocks` names them; a string argument is a literal here, not a
    key as it would be for dask), and it has no cycles.

    Ready tasks start in the order the graph lists them (the streaming tasks in time order), at most
    ``workers`` at a time; a result is dropped once every task that needs it has run. An exception in
    a task is raised here, after the running tasks finish, and no further task starts.
    """
    import os
    from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait

    need, stack = set(), list(keys)
    while stack:  # the tasks the keys depend on
        k = stack.pop()
        if k not in need:
            need.add(k)
            stack.extend(_refs(graph[k], graph))
    order = [k for k in graph if k in need]
    deps = {k: _refs(graph[k], graph) for k in order}
    users: dict = {k: 0 for k in order}
    for k in order:
        for d in deps[k]:
            users[d] += 1
    done: dict = {}
    waiting = {k: len(deps[k]) for k in order}
    dependents: dict = {k: [] for k in order}
    for k in order:
        for d in deps[k]:
            dependents[d].append(k)
    keep = set(keys)
    ready = [k for k in order if waiting[k] == 0]
    workers = max(1, workers or os.cpu_count() or 1)

    def finish(k, value):
        done[k] = value
        for d in deps[k]:
            users[d] -= 1
            if users[d] == 0 and d not in keep:
                done.pop(d, None)
        for u in dependents[k]:
            waiting[u] -= 1
            if waiting[u] == 0:
                ready.append(u)

    with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="wbx") as pool:
        running: dict = {}
        while ready or running:
            while ready and len(running) < workers:
                k = ready.pop(0)
                v = graph[k]
                if not _is_task(v):
                    finish(k, _resolve(v, graph, done))
                    continue
                running[pool.submit(_resolve, v, graph, done)] = k
            if not running:
                continue
            fin, _ = wait(running, return_when=FIRST_COMPLETED)
            for f in fin:
                k = running.pop(f)
                exc = f.exception()
                if exc is not None:
                    for g in running:
                        g.cancel()
                    wait(running)
                    raise exc
                finish(k, f.result())
                if progress is not None:
                    progress(k)
    return {k: done[k] for k in keys}


def zonal_mean_blocks(reader, weights: Weights, time, *, month_weights: np.ndarray | None = None,
                      task_bytes: int = TASK_BYTES, read_bytes: int = READ_BYTES,
                      cell_factor: np.ndarray | None = None) -> xr.Dataset:
    """`zonal_mean` straight from a `wbexplore.io.blocks.BlockReader`: the lazy (dask) Dataset of
    `plan_zonal_blocks` (see there)."""
    return plan_zonal_blocks(reader, weights, time, month_weights=month_weights, task_bytes=task_bytes,
                             read_bytes=read_bytes, cell_factor=cell_factor).to_dataset()


def plan_zonal_blocks(reader, weights: Weights, time, *, month_weights: np.ndarray | None = None,
                      task_bytes: int = TASK_BYTES, read_bytes: int = READ_BYTES,
                      cell_factor: np.ndarray | None = None) -> BlockPlan:
    """`zonal_mean` straight from a `wbexplore.io.blocks.BlockReader`, as a `BlockPlan` (lazy).

    Each dask task reads one block of stored values (a run of time steps, whole rows of the
    basins' window) and accumulates it, so no grid-sized array ever passes between tasks and
    the read of one block overlaps the accumulation of another. Stored fill values are
    skipped and packing is applied to the means; the result equals decoding every value first.

    Sub-monthly steps (days, pentads, dekads, N-day composites): ``month_weights`` is the
    (months x stored steps) matrix of `wbexplore.temporal.month_weights` (NaN rows: incomplete
    months) and ``time`` the months. Each cell's monthly value is formed inside the pass, in the
    kernel (`_kernel.accumulate_months`), and only then weighted into the basins, so a cell missing
    one day of a month drops out of that month exactly as when the months are formed on the grid
    first (the xarray path); summing per-step basin means instead would fill that day with the
    basin's other cells. Tasks and the reads inside them hold whole months: a period that spans two
    months at a task boundary (a composite) is read by both tasks, and no month is ever split, so
    its sums and its valid fraction never depend on where the tasks are cut.

    ``cell_factor`` (one per month of ``time``: decoded monthly value -> canonical unit, e.g. mm/day ->
    mm/month) adds one more reduction to the same reads: each used cell's long-term mean over its valid
    months, in the canonical unit (``cell_mean``, dim ``cell`` in the order of `Weights.window`), and the
    number of those months (``cell_months``). The basin sums are computed exactly as without it.
    """
    import operator

    from ._kernel import use_jit

    nt, ny, nx = reader.shape
    if (ny, nx) != weights.shape:
        raise ValueError(f"reader grid {(ny, nx)} does not match the weights' grid {weights.shape}")
    if month_weights is not None:
        if month_weights.shape != (len(time), nt):
            raise ValueError(f"month weights {month_weights.shape} for {len(time)} months and {nt} stored steps")
    elif len(time) != nt:
        raise ValueError(f"{len(time)} time stamps for {nt} stored steps")
    rs, cs, _, _ = weights.window()
    rows = _aligned(rs, reader.block_rows, ny)
    cols = _aligned(cs, reader.block_cols, nx)
    if cols[1] - cols[0] >= nx / 2:
        cols = (0, nx)  # whole rows: one contiguous run per row in the file
    wy = rows[1] - rows[0]
    row_bytes = (cols[1] - cols[0]) * np.dtype(reader.dtype).itemsize
    align = nt if reader.interleaved else max(1, reader.time_align)
    step_bytes = max(1, wy * row_bytes)
    steps = max(1, round(task_bytes / step_bytes / align)) * align  # whole stored chunks
    steps = min(steps, nt) if nt else 1
    # Strips of rows only where one run of whole stored chunks of the *whole grid* would be far
    # over the task size. Their height and boundaries are fixed by the grid and the file, never
    # by the basins' window, so a basin's sums are added in the same order whichever other
    # basins are extracted with it (a selection replayed on one basin is bitwise the full run).
    full_row = nx * np.dtype(reader.dtype).itemsize
    per = ny if align * ny * full_row <= 2 * task_bytes else max(1, task_bytes // (align * full_row))
    if reader.block_rows and per < ny:
        per = max(reader.block_rows, per // reader.block_rows * reader.block_rows)
    strips = weights.strips(rows, cols, max(1, int(per)))
    # reads within a task: whole stored chunks when they are compressed, else cache-sized pieces
    sub = steps if reader.time_align > 1 else max(1, min(steps, round(read_bytes / step_bytes)))
    nb = len(weights.basin)
    # the numba kernels only where their start-up pays off (`_kernel.use_jit`); both forms give the same sums
    jit = use_jit(nt * (rows[1] - rows[0]) * (cols[1] - cols[0]))
    # a plain task graph: the reader and each strip's weights enter it once, nothing is hashed
    # or copied into every task (dask.delayed spent 15 ms building the 20 tasks of the benchmark stack)
    name = f"wbx-zonal-{uuid.uuid4().hex}"
    dsk = {(name + "-reader",): reader}
    for i, (*_, args) in enumerate(strips):
        dsk[(name + "-weights", i)] = args
    if month_weights is None:
        tasks = [(t0, min(nt, t0 + steps), sub) for t0 in range(0, nt, steps)]
        n_out = nt
    else:
        tasks = _month_tasks(month_weights, steps, sub)
        n_out = len(time)
    cells = cell_factor is not None
    if cells:
        cell_factor = np.asarray(cell_factor, np.float64)
        if cell_factor.shape != (n_out,):
            raise ValueError(f"{cell_factor.size} cell factors for {n_out} months")
    parts = []
    cell_parts = []
    for j, (t0, t1, plan) in enumerate(tasks):
        keys = []
        task_cells = []
        for i, (r0, r1, c0, c1, _) in enumerate(strips):
            k = (name + "-part", j, i)
            fn = _read_accumulate if month_weights is None else _read_accumulate_months
            dsk[k] = (fn, (name + "-reader",), t0, t1, r0, r1, c0, c1, (name + "-weights", i), plan,
                      cell_factor if cells else None, jit)
            if cells:  # the task returns (basin sums, cell sums)
                dsk[(name + "-cells", j, i)] = (operator.getitem, k, 1)
                task_cells.append((name + "-cells", j, i))
                dsk[(name + "-basins", j, i)] = (operator.getitem, k, 0)
                k = (name + "-basins", j, i)
            keys.append(k)
        cell_parts.append(task_cells)
        if not keys:
            parts.append(np.zeros((t1 - t0 if month_weights is None else _plan_months(plan), nb, 2)))
        elif len(keys) == 1:
            parts.append(keys[0])
        else:
            dsk[(name + "-sum", j)] = (_sum_strips, *keys)
            parts.append((name + "-sum", j))
    # packing: sum_i w_i (s x_i + o) = s sum_i w_i x_i + o sum_i w_i, so a monthly value's offset is
    # the offset times its row of weights (days in the month for rates, 1 for states and amounts)
    offset = float(reader.offset) if month_weights is None else float(reader.offset) * month_weights.sum(axis=1)
    dsk[(name, 0, 0, 0)] = (_finish_packed, parts, weights.covered_area_m2, weights.grid_coverage,
                            float(reader.scale), offset)
    ckey = None
    if cells:
        r_used, _ = weights.used_rows_cols()
        los = [int(np.searchsorted(r_used, st[0])) for st in strips]
        ckey = (name + "-cellmeans", 0, 0)
        dsk[ckey] = (_finish_cells, cell_parts, los, int(r_used.size), float(reader.scale), float(reader.offset))
    return BlockPlan(graph=dsk, key=(name, 0, 0, 0), basin=weights.basin, time=np.asarray(time), cells_key=ckey)


def _block(X: np.ndarray, wu_t: sp.csr_matrix, used: np.ndarray, args: tuple | None = None) -> np.ndarray:
    """(t, wy, wx) block -> (t, basins, 2) array of [sum W x, sum W valid]; ``args``: cached `kernel_args`."""
    from ._kernel import accumulate, use_jit

    t = X.shape[0]
    if X.dtype.kind == "f":  # the numba form only where it pays (`_kernel.use_jit`): the same sums either way
        return accumulate(np.ascontiguousarray(X).reshape(t, -1), used, wu_t, args=args, jit=use_jit(X.size))
    return _block_scipy(X, wu_t, used)


def _block_scipy(X: np.ndarray, wu_t, used: np.ndarray) -> np.ndarray:
    """The same with scipy.sparse only (several passes; see `_kernel`)."""
    t = X.shape[0]
    Xu = X.reshape(t, -1)[:, used]  # gather: a copy we may modify
    nan = np.isnan(Xu)
    out = np.empty((t, wu_t.shape[1], 2))
    if nan.any():
        Xu[nan] = 0
        out[:, :, 1] = np.asarray((~nan).astype(np.float64) @ wu_t)
    else:
        out[:, :, 1] = np.asarray(wu_t.sum(axis=0)).ravel()[None, :]
    out[:, :, 0] = np.asarray(Xu.astype(np.float64, copy=False) @ wu_t)
    return out


def apply_weights_numpy(X: np.ndarray, weights: Weights) -> tuple[np.ndarray, np.ndarray]:
    """In-memory form: X (time, ny, nx) -> (mean, valid_fraction), each (basins, time).

    Indexes the full grid directly (no window copy) when X is C-contiguous.
    """
    if X.flags.c_contiguous:
        if weights._full is None:
            from ._kernel import kernel_args

            _, _, wu_t, _ = weights.window()
            r, c = weights.used_rows_cols()
            used = r * weights.shape[1] + c  # file cell index of each CSR row
            weights._full = (wu_t, used, kernel_args(used, wu_t))
        wu_t, used, args = weights._full
        return _finish(_block(X, wu_t, used, args), weights)
    rs, cs, wu_t, used = weights.window()
    blk = _block(np.ascontiguousarray(X[:, rs, cs]), wu_t, used, weights.window_args())
    return _finish(blk, weights)


def _finish(blk: np.ndarray, weights: Weights):
    mean, vf = _finish_parts([blk], weights.covered_area_m2, weights.grid_coverage)
    return mean, vf


def _finish_parts(parts, covered, gc) -> np.ndarray:
    blk = np.concatenate(parts, axis=0) if parts else np.zeros((0, covered.size, 2))
    num, den = blk[:, :, 0].T, blk[:, :, 1].T
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(den > 0, num / den, np.nan)
        vf = np.where(covered[:, None] > 0, den / covered[:, None], 0.0) * gc[:, None]
    return np.stack([mean, vf])


def _cell_means_array(arr, used: np.ndarray, factor: np.ndarray, xp):
    """(2, used cells): long-term mean of ``arr`` (time, wy, wx) x ``factor`` (per month) over each cell's
    valid months, and their number; ``xp`` is numpy or dask.array (then lazy, on the same chunks)."""
    t = arr.shape[0]
    flat = arr.reshape(t, -1)[:, used]
    valid = ~xp.isnan(flat)
    s = xp.where(valid, flat * factor[:, None], 0.0).sum(axis=0)
    n = valid.sum(axis=0).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = xp.where(n > 0, s / xp.where(n > 0, n, 1.0), np.nan)
    return xp.stack([mean, n])


def zonal_mean(data: xr.DataArray, weights: Weights, *, cell_factor: np.ndarray | None = None) -> xr.Dataset:
    """Area-weighted, NaN-aware basin means of ``data`` (dims ``time, y, x``; numpy or dask).

    Returns a Dataset with ``mean`` and ``valid_fraction`` (dims ``basin, time``).
    With dask input the result is lazy: call ``.compute()`` (locally or on a
    distributed client). ``cell_factor``: also ``cell_mean`` and ``cell_months`` (dim ``cell``), as in
    `zonal_mean_blocks`, from the same chunks.
    """
    if data.dims != ("time", "y", "x"):
        data = data.transpose("time", "y", "x")
    if data.shape[1:] != weights.shape:
        raise ValueError(f"data grid {data.shape[1:]} does not match the weights' grid {weights.shape}")
    rs, cs, wu_t, used = weights.window()
    sub = data.isel(y=rs, x=cs)
    arr = sub.data
    nb = len(weights.basin)
    try:
        import dask.array as dsa

        is_dask = isinstance(arr, dsa.Array)
    except ImportError:  # pragma: no cover
        is_dask = False
    coords = {"basin": weights.basin, "time": data["time"].values}
    if cell_factor is not None:
        cell_factor = np.asarray(cell_factor, np.float64)
    if not is_dask:
        X = np.asarray(arr)
        mean, vf = _finish(_block(X, wu_t, used, weights.window_args()), weights)
        out = xr.Dataset({"mean": (("basin", "time"), mean), "valid_fraction": (("basin", "time"), vf)}, coords)
        if cell_factor is not None:
            cm = _cell_means_array(X.astype(np.float64, copy=False), used, cell_factor, np)
            out["cell_mean"], out["cell_months"] = ("cell", cm[0]), ("cell", cm[1])
        return out
    import dask
    import dask.array as dsa

    if any(len(c) > 1 for c in arr.chunks[1:]):
        arr = arr.rechunk({1: -1, 2: -1})
    w_d = dask.delayed(wu_t, pure=True)
    u_d = dask.delayed(used, pure=True)
    a_d = dask.delayed(weights.window_args(), pure=True)
    parts = [dask.delayed(_block, pure=True)(blk, w_d, u_d, a_d)
             for blk in arr.to_delayed(optimize_graph=False).ravel()]
    # one small task finishes everything: fewer graph operations than elementwise dask arrays
    both = dask.delayed(_finish_parts, pure=True)(parts, weights.covered_area_m2, weights.grid_coverage)
    nt = int(sum(arr.chunks[0]))
    stacked = dsa.from_delayed(both, shape=(2, nb, nt), dtype=np.float64)
    mean, vf = stacked[0], stacked[1]
    out = xr.Dataset({"mean": (("basin", "time"), mean), "valid_fraction": (("basin", "time"), vf)}, coords)
    if cell_factor is not None:  # the same chunk keys as the basin sums: each chunk is read once
        cm = _cell_means_array(arr.astype(np.float64), used, cell_factor, dsa)
        out["cell_mean"], out["cell_months"] = ("cell", cm[0]), ("cell", cm[1])
    return out
