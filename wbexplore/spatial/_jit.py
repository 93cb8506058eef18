"""The numba forms of `wbexplore.spatial._kernel`'s accumulations (imported only where they pay off).

Importing numba and loading these compiled functions from its cache costs about 0.65 s of a command
(import 0.32 to 0.39 s, first call 0.3 s, measured with pyinstrument on this 2-core machine); the numpy
forms in `_kernel` give the same sums bit for bit, so the choice is one of speed (see `_kernel.use_jit`).
"""

from __future__ import annotations

import numba
import numpy as np

_TB = 32  # time steps per tile (16: 0.052 s, 32: 0.044 s, 64: 0.048 s on the benchmark stack)


@numba.njit(inline="always")
def _is_data(v, nodata, vmin, vmax, codes, ncode, clo, chi):
    """``v`` is a value (not NaN, not the fill, inside the valid range, not one of the further no-data
    ``codes``); the codes (sorted) are looked up only between the lowest and the highest, so data rarely pay
    for them."""
    if not (v == v and v != nodata and v >= vmin and v <= vmax):
        return False
    if ncode and v >= clo and v <= chi:
        for q in range(ncode):
            if v == codes[q]:
                return False
    return True


@numba.njit(cache=True, nogil=True, parallel=True)
def _accumulate(X, cells, indptr, indices, data, nb, nodata, vmin, vmax, codes, f, cell):  # noqa: D401
    t = X.shape[0]
    out = np.zeros((t, nb, 2))
    ncode = codes.size
    clo = codes[0] if ncode else 0.0
    chi = codes[ncode - 1] if ncode else 0.0
    ntile = (t + _TB - 1) // _TB
    per_cell = cell.shape[1] == cells.size  # the per-cell sums are wanted (else ``cell`` is empty)
    for tile in numba.prange(ntile):
        t0 = tile * _TB
        t1 = min(t, t0 + _TB)
        for j in range(cells.size):
            c = cells[j]
            if per_cell:  # the tile's values of this cell, read here once more from L1 for the basins
                s = 0.0
                sf = 0.0
                n = 0.0
                for i in range(t0, t1):
                    v = X[i, c]
                    if _is_data(v, nodata, vmin, vmax, codes, ncode, clo, chi):
                        s += f[i] * np.float64(v)
                        sf += f[i]
                        n += 1.0
                cell[tile, j, 0] += s
                cell[tile, j, 1] += sf
                cell[tile, j, 2] += n
            for k in range(indptr[j], indptr[j + 1]):
                w = data[k]
                b = indices[k]
                for i in range(t0, t1):
                    v = X[i, c]
                    if _is_data(v, nodata, vmin, vmax, codes, ncode, clo, chi):
                        out[i, b, 0] += w * np.float64(v)
                        out[i, b, 1] += w
    return out


# not parallel: a streaming task hands it one or a few months, and dask already runs a task per core
@numba.njit(cache=True, nogil=True)
def _accumulate_months(X, cells, indptr, indices, data, nb, nodata, vmin, vmax, codes, w, s0, s1,
                       fm, ow, cell):  # noqa: D401
    nm = w.shape[0]
    out = np.zeros((nm, nb, 2))
    per_cell = cell.shape[0] == cells.size  # the per-cell sums are wanted (else ``cell`` is empty)
    ncode = codes.size
    clo = codes[0] if ncode else 0.0
    chi = codes[ncode - 1] if ncode else 0.0
    nc = cells.size
    for m in range(nm):
        a = s0[m]
        b = s1[m]
        if b <= a:
            continue  # an incomplete month: empty
        acc = np.zeros(nc)
        good = np.ones(nc, np.bool_)
        for i in range(a, b):  # one period after the other: rows read in memory order
            wi = w[m, i]
            for j in range(nc):
                v = X[i, cells[j]]
                if _is_data(v, nodata, vmin, vmax, codes, ncode, clo, chi):
                    acc[j] += wi * np.float64(v)
                else:  # the month of this cell is incomplete: its sum is not used
                    good[j] = False
        for j in range(nc):
            if good[j]:  # the cell has a valid value for every period of the month
                for k in range(indptr[j], indptr[j + 1]):
                    out[m, indices[k], 0] += data[k] * acc[j]
                    out[m, indices[k], 1] += data[k]
                if per_cell:  # one more reduction of the same monthly value (basin sums untouched)
                    cell[j, 0] += fm[m] * acc[j]
                    cell[j, 1] += fm[m] * ow[m]
                    cell[j, 2] += 1.0
    return out
