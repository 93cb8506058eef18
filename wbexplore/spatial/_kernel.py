"""Fused NaN-aware sparse accumulation: one pass over the data, float64 accumulators.

For a block X (t, cells) and weights by *cell*, each value is read once, in memory order,
NaN-tested once, and added to every basin that covers its cell. The scipy path (gather the used
columns, mask NaN, cast to float64, two sparse products) makes about six passes over the block.

Each basin's sums add its cells in cell order whatever other basins the weights hold, so a
basin's mean is bitwise the same when it is extracted alone (a split of single-basin cells into
a flat pass was 27% faster per block but made the order, and the last bit, depend on the other
basins; a selection replayed on one basin must equal the full extraction exactly).

The time axis is tiled (32 steps): each weight is read once per tile while the tile's values of
a cell sit in one cache line, so the index arrays (larger than L2 for a continent) are not
streamed again for every time step. Measured side by side on this kind of 2-core machine
(240 x 600 x 600 float32, 6% NaN, 100 basins, 147,000 weights, medians of 5): scipy path 0.27 s,
untiled kernel 0.073 s, tiled kernel 0.044 s, numpy ``arr.sum()`` 0.017 s.

Two forms of each accumulation give the same sums bit for bit: the numba kernels (`_jit`) and numpy /
scipy forms here. Importing numba and loading its kernels costs a command about 0.65 s, more than
the numpy forms lose below a few hundred million values, so a reduction uses the kernels only above
`JIT_MIN_VALUES` values read, or once this process has loaded them (`use_jit`); without numba the
numpy forms serve every call.
"""

from __future__ import annotations

import numpy as np

_TB = 32  # time steps per tile, as in `_jit` (the numpy forms keep its tiles so that the sums are the same)


def have_numba() -> bool:
    """numba can be imported (it is a dependency; without it the numpy forms serve every call)."""
    import importlib.util

    return importlib.util.find_spec("numba") is not None


# Below this many stored values read, a command runs the numpy forms: numba's start-up (0.65 s) is more
# than they lose. Measured side by side (whole `wbexplore extract` processes, numba or not, medians, this
# 2-core machine): 240 x 600 x 600 monthly (86 M values) 2.35 to 2.64 s with numpy against 2.89 to 2.97 s;
# 10 years of daily 240 x 300 (263 M values) 3.45 to 4.16 s against 3.58 to 4.60 s (even); the numpy forms
# cost about 3 ns more a value (0.27 s against 0.044 s on the monthly stack, see above).
JIT_MIN_VALUES = 300_000_000


def use_jit(values: int) -> bool:
    """Whether a reduction reading ``values`` stored values should run the numba forms: above
    `JIT_MIN_VALUES`, or whenever this process has loaded them already (its start-up is paid)."""
    import sys

    return (values >= JIT_MIN_VALUES or "wbexplore.spatial._jit" in sys.modules) and have_numba()


def kernel_args(used: np.ndarray, wu_t) -> tuple:
    """The kernel's view of weights in CSR by cell: (cells, indptr, indices, data, n_basins)."""
    wu_t = wu_t.tocsr() if hasattr(wu_t, "tocsr") else wu_t
    return (np.ascontiguousarray(used, dtype=np.int64), wu_t.indptr.astype(np.int64),
            wu_t.indices.astype(np.int64), wu_t.data.astype(np.float64), int(wu_t.shape[1]))


_NO_CODES = np.zeros(0, np.float64)


def _mask_args(codes, vmin, vmax) -> tuple[np.ndarray, float, float]:
    """The codes sorted as float64 without NaN (NaN is always missing; sorted last it hid every code from the
    kernel's range test), and a NaN bound as no bound, so that both forms read one mask."""
    c = np.asarray(codes, np.float64) if len(codes) else _NO_CODES
    c = np.sort(c[~np.isnan(c)]) if c.size else _NO_CODES
    vmin, vmax = float(vmin), float(vmax)
    return c, (-np.inf if np.isnan(vmin) else vmin), (np.inf if np.isnan(vmax) else vmax)


def _jit(jit: bool | None) -> bool:
    return have_numba() if jit is None else bool(jit)


def accumulate(X2: np.ndarray, used: np.ndarray, wu_t, nodata: float = np.nan, *, args: tuple | None = None,
               valid_min: float = -np.inf, valid_max: float = np.inf, codes=(), jit: bool | None = None) -> np.ndarray:
    """(t, cells) block -> (t, basins, 2) of [sum W x, sum W valid] over the used cells.

    Values equal to ``nodata`` (stored fill values of packed or integer data), outside the inclusive
    stored range [``valid_min``, ``valid_max``] or equal to one of ``codes`` count as missing, as NaN
    always does (CF meanings, compared with stored values). ``args`` are precomputed `kernel_args`.
    ``jit``: the numba form (default: where numba is installed) or the numpy form; the sums are the same.
    """
    c, valid_min, valid_max = _mask_args(codes, valid_min, valid_max)
    args = args or kernel_args(used, wu_t)
    if _jit(jit):
        from ._jit import _accumulate

        return _accumulate(X2, *args, np.float64(nodata), np.float64(valid_min), np.float64(valid_max), c,
                           _NO_CODES, _NO_TILES)
    return _accumulate_numpy(X2, args, (nodata, valid_min, valid_max, c))


def accumulate_with_cells(X2: np.ndarray, args: tuple, factor: np.ndarray, nodata: float = np.nan, *,
                          valid_min: float = -np.inf, valid_max: float = np.inf, codes=(),
                          cell: np.ndarray | None = None, jit: bool | None = None) -> tuple:
    """`accumulate` plus, in the same pass, each used cell's sums [sum f x, sum f, valid steps]
    (``factor`` (t,): decoded monthly value -> canonical unit; see `cell_sums`). The basin sums are those of
    `accumulate`, bit for bit: the cell sums are separate accumulators.

    ``cell``: a (tiles, cells, 3) array to add the sums into (one slice per tile of 32 steps, at least as
    many as the block has), so that a streaming task adds every read into one array instead of allocating
    one per read; default a new one. Returns ``(basin sums, cell)``; sum ``cell`` over its first axis.
    """
    c, valid_min, valid_max = _mask_args(codes, valid_min, valid_max)
    cells = args[0]
    ntile = (X2.shape[0] + _TB - 1) // _TB
    if cell is None:
        cell = np.zeros((max(1, ntile), cells.size, 3))
    if ntile == 0:  # no steps: nothing to add
        return accumulate(X2, None, None, nodata, args=args, valid_min=valid_min, valid_max=valid_max,
                          codes=codes, jit=False), cell
    if cell.shape[0] < ntile or cell.shape[1:] != (cells.size, 3):
        raise ValueError(f"cell sums of shape {cell.shape} for {ntile} tiles of {cells.size} cells")
    f = np.ascontiguousarray(factor, np.float64)
    if _jit(jit):
        from ._jit import _accumulate

        out = _accumulate(X2, *args, np.float64(nodata), np.float64(valid_min), np.float64(valid_max), c, f, cell)
        return out, cell
    return _accumulate_numpy(X2, args, (nodata, valid_min, valid_max, c), f, cell), cell


def accumulate_months(X2: np.ndarray, args: tuple, w: np.ndarray, s0: np.ndarray, s1: np.ndarray,
                      nodata: float = np.nan, *, valid_min: float = -np.inf, valid_max: float = np.inf,
                      codes=(), cell: np.ndarray | None = None, factor: np.ndarray | None = None,
                      jit: bool | None = None) -> np.ndarray:
    """(t, cells) block of periods -> (months, basins, 2) of [sum W m, sum W valid] over the used cells.

    ``m`` is each cell's monthly value ``sum_i w[month, i] x[i, cell]`` over the periods
    ``s0[month]:s1[month]`` of the block (the non-zero weights of `wbexplore.temporal.month_weights`);
    a cell counts in a month only when every one of those values is valid (same mask as `accumulate`).
    A month with ``s1 <= s0`` is empty (incomplete). Each basin still adds its cells in cell order.

    ``cell`` (cells, 3), optional, is added to in place, per cell and valid month: ``factor[month] * m``,
    ``factor[month] * sum_i w[month, i]`` (what the packing offset adds to that sum) and 1 (see `cell_sums`).
    """
    c, valid_min, valid_max = _mask_args(codes, valid_min, valid_max)
    w = np.ascontiguousarray(w, np.float64)
    if cell is None:
        cell, fm, ow = _NO_CELLS, _NO_CODES, _NO_CODES
    else:
        fm = np.ascontiguousarray(factor, np.float64)
        ow = w.sum(axis=1)
    if _jit(jit):
        from ._jit import _accumulate_months

        return _accumulate_months(X2, *args, np.float64(nodata), np.float64(valid_min), np.float64(valid_max), c,
                                  w, np.asarray(s0, np.int64), np.asarray(s1, np.int64), fm, ow, cell)
    return _accumulate_months_numpy(X2, args, w, s0, s1, nodata, valid_min, valid_max, c, cell, fm, ow)


_NO_CELLS = np.zeros((0, 3), np.float64)
_NO_TILES = np.zeros((0, 0, 3), np.float64)


def cell_sums(X2: np.ndarray, cells: np.ndarray, factor: np.ndarray, nodata: float = np.nan, *,
              valid_min: float = -np.inf, valid_max: float = np.inf, codes=()) -> np.ndarray:
    """(t, cells) block of monthly stored values -> (cells, 3) of [sum f x, sum f, valid months] per used cell.

    ``factor`` (t,) turns a decoded monthly value into the canonical unit (mm/month; mm for TWSA); the second
    column is what the packing offset adds (``decoded = scale * x + offset``), so that the cell's long-term
    mean is ``(scale * s[0] + offset * s[1]) / s[2]``. Same mask as `accumulate`. Plain numpy masked sums over
    all steps at once (not tiled, so equal to `accumulate_with_cells`'s to rounding): the tests' reference.
    """
    c, valid_min, valid_max = _mask_args(codes, valid_min, valid_max)
    f = np.asarray(factor, np.float64)
    Xu = X2[:, np.asarray(cells, np.int64)].astype(np.float64)  # compared as float64, as the kernels compare
    bad = np.isnan(Xu) | (Xu == float(nodata)) | (Xu < valid_min) | (Xu > valid_max) | np.isin(Xu, c)
    good = ~bad
    return np.stack([(np.where(good, Xu.astype(np.float64), 0.0) * f[:, None]).sum(axis=0),
                     (good * f[:, None]).sum(axis=0), good.sum(axis=0).astype(np.float64)], axis=1)


# ---- numpy forms, bit for bit the numba ones: the same products, added in the same order.
# Basin sums: scipy's sparse product adds each basin's cells in cell order (its CSC loop runs over cells, as the
# kernel does); a missing value enters as +0.0, which leaves any sum that is not -0.0 unchanged, and no sum that
# starts at +0.0 becomes -0.0. Cell and monthly sums: one step added after the other, in a loop, as the kernel
# adds them (``sum(axis=0)`` sums pairwise wherever that axis is the contiguous one, as it is after a column
# gather; a matrix product lets BLAS regroup the additions: both were tried and differed in the last bit).
# Checked against the kernels, bit for bit, in tests/test_kernel.py.

def _masked(X2: np.ndarray, cells: np.ndarray, nodata, vmin, vmax, codes) -> tuple[np.ndarray, np.ndarray]:
    """The used cells' values as float64 with 0 where missing, and the valid mask (the kernel's `_is_data`).

    Compared as float64, as the kernel compares: a float32 file's fill of -3.4e+38 (not a float32) must not match
    the stored float32 value here when it does not there (found by review)."""
    # rows of steps contiguous (the gather leaves columns so)
    Xf = np.ascontiguousarray(X2[:, np.asarray(cells, np.int64)], dtype=np.float64)
    good = ~np.isnan(Xf)
    nodata = float(nodata)
    if not np.isnan(nodata):
        good &= Xf != nodata
    if vmin > -np.inf:
        good &= Xf >= vmin
    if vmax < np.inf:
        good &= Xf <= vmax
    if len(codes):
        good &= ~np.isin(Xf, codes)
    Xf[~good] = 0.0
    return Xf, good


def _weights_csr(args):
    import scipy.sparse as sp

    cells, indptr, indices, data, nb = args
    return sp.csr_array((data, indices, indptr), shape=(cells.size, nb))


def _accumulate_numpy(X2, args, mask: tuple, f: np.ndarray | None = None, cell: np.ndarray | None = None):
    """`_jit._accumulate` in numpy, one tile of `_TB` steps at a time (the float64 copies stay a tile's size:
    a whole read at once took a streamed extraction's peak allocations from 1.8 to 2.3 times its block)."""
    wu_t = _weights_csr(args)
    t = X2.shape[0]
    out = np.empty((t, args[-1], 2))
    for tile in range(-(-t // _TB)):
        sl = slice(tile * _TB, min(t, (tile + 1) * _TB))
        Xf, good = _masked(X2[sl], args[0], *mask)
        out[sl, :, 0] = Xf @ wu_t
        out[sl, :, 1] = good.astype(np.float64) @ wu_t
        if cell is not None:
            _tile_cells(Xf, good, f[sl], cell[tile])
    return out


def _tile_cells(Xf: np.ndarray, good: np.ndarray, f: np.ndarray, into: np.ndarray) -> None:
    """Add each used cell's [sum f x, sum f, valid steps] over one tile into ``into`` (cells, 3), as the kernel
    forms them: the sums step after step. Only ``sum f x`` needs a pass per step: ``sum f`` is the same running
    sum for every cell valid at every step (computed once) and is formed per step only for the other cells
    (usually none but the never-valid ones); the count is an integer, exact in any order. One read of 6 steps x
    300,000 cells and 100 basins (medians of 15): basin sums 33.4 ms; with the cell sums 39.5 ms (46.6 ms with
    five passes per step)."""
    n = Xf.shape[1]
    s = np.zeros(n)
    finite = bool(np.isfinite(f).all())
    for i in range(Xf.shape[0]):  # a missing value is +0.0 in Xf: it adds f * 0 = (+/-)0.0, which changes no sum
        s += f[i] * Xf[i] if finite else np.where(good[i], f[i] * Xf[i], 0.0)  # (not so for an infinite f)
    count = np.count_nonzero(good, axis=0)
    run = 0.0
    for v in f:  # the running sum of a cell valid at every step, added as the kernel adds it
        run += float(v)
    sf = np.where(count == len(f), run, 0.0)
    some = np.flatnonzero((count > 0) & (count < len(f)))
    if some.size:
        part = np.zeros(some.size)
        for i in range(Xf.shape[0]):
            part += np.where(good[i, some], f[i], 0.0)
        sf[some] = part
    into[:, 0] += s
    into[:, 1] += sf
    into[:, 2] += count


def _accumulate_months_numpy(X2, args, w, s0, s1, nodata, vmin, vmax, codes, cell, fm, ow):
    """`_jit._accumulate_months` in numpy, one month's periods at a time."""
    cells, nb = args[0], args[-1]
    wu_t = _weights_csr(args)
    out = np.zeros((w.shape[0], nb, 2))
    per_cell = cell.shape[0] == cells.size
    for m in range(w.shape[0]):
        a, b = int(s0[m]), int(s1[m])
        if b <= a:
            continue  # an incomplete month: empty
        acc = np.zeros(cells.size)
        good = np.ones(cells.size, bool)  # the cell has a valid value for every period of the month
        for i in range(a, b):  # one period after the other, as the kernel adds them; a row at a time keeps
            # the float64 copy one step's size (a month at once: peak allocations 2.3 times a task's block)
            xf, ok = _masked(X2[i:i + 1], cells, nodata, vmin, vmax, codes)
            acc += w[m, i] * xf[0]
            good &= ok[0]
        v = np.where(good, acc, 0.0)
        out[m, :, 0] = v @ wu_t
        out[m, :, 1] = good.astype(np.float64) @ wu_t
        if per_cell:
            cell[:, 0] += np.where(good, fm[m] * acc, 0.0)
            cell[:, 1] += np.where(good, fm[m] * ow[m], 0.0)
            cell[:, 2] += good
    return out
