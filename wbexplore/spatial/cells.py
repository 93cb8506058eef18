"""Per-cell long-term means of a product over the cells that touch each basin (the disagreement map).

The extraction's single pass over a product's blocks forms one more reduction beside the basin sums:
each used cell's mean over its valid months, in the canonical unit (`zonal.zonal_mean_blocks`,
``cell_factor``). This module cuts those used-cell values into one small 2-D array per basin (the
rows and columns, file order, that bound the cells the basin touches) with each cell's coverage
fraction of the basin, from the weights the basin means use.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from .areas import cell_areas_m2
from .grid import GridSpec

__all__ = ["CellMeans", "basin_cell_means", "difference_from_others"]


@dataclass(frozen=True)
class CellMeans:
    """Long-term mean of one product in each grid cell that touches one basin.

    Arrays are (rows, columns) of the basin's window in the file's own order; cells the basin does not
    touch have ``coverage`` 0 and ``mean`` NaN.

    Attributes
    ----------
    basin, source, component : str
        Basin id, product id and component (P, ET or TWSA).
    units : str
        ``mm/month`` for fluxes (the mean monthly total), ``mm`` for TWSA (the mean anomaly).
    mean : ndarray (rows, cols)
        Long-term mean over the cell's valid months, in ``units``; NaN where the cell has none.
    months : ndarray (rows, cols)
        Number of valid months behind ``mean``.
    coverage : ndarray (rows, cols)
        Share of the cell's area inside the basin (0..1, exact coverage fraction: the weight of the
        basin mean divided by the cell's ellipsoidal area, m2 / m2).
    x, y : ndarray (cols,), (rows,)
        Cell centres of the window in the grid's CRS (longitudes as the grid was normalised).
    dx, dy : float
        Cell size in the grid's CRS; ``crs``: its WKT; ``lon_offset``: subtracted from geographic longitudes
        to meet the basins (`GridSpec.lon_offset`).
    row0, col0 : int
        File row and column of the window's first cell.
    period : tuple of str
        First and last month of the product (``YYYY-MM``): the means of different products may span
        different periods.
    """

    basin: str
    source: str
    component: str
    units: str
    mean: np.ndarray = field(repr=False)
    months: np.ndarray = field(repr=False)
    coverage: np.ndarray = field(repr=False)
    x: np.ndarray = field(repr=False)
    y: np.ndarray = field(repr=False)
    dx: float = 0.0
    dy: float = 0.0
    crs: str = "EPSG:4326"
    lon_offset: float = 0.0
    row0: int = 0
    col0: int = 0
    period: tuple[str, str] = ("", "")

    @property
    def touched(self) -> np.ndarray:
        """Mask of the cells the basin covers (coverage > 0)."""
        return self.coverage > 0

    @cached_property
    def _corners(self) -> tuple[np.ndarray, np.ndarray]:
        return _corners_lonlat(self.x, self.y, self.dx, self.dy, self.crs, self.lon_offset)

    @property
    def lon(self) -> np.ndarray:
        """(rows, cols, 4) corner longitudes (deg E, EPSG:4326), counter-clockwise from the lower left corner
        in the grid's CRS; computed when first asked (drawing), never during the extraction."""
        return self._corners[0]

    @property
    def lat(self) -> np.ndarray:
        """(rows, cols, 4) corner latitudes (deg N, EPSG:4326), in the order of `lon`."""
        return self._corners[1]


def _corners_lonlat(x, y, dx, dy, crs, lon_offset) -> tuple[np.ndarray, np.ndarray]:
    """Cell corners (rows, cols, 4) in degrees EPSG:4326 from centres ``x`` (cols) and ``y`` (rows)."""
    from pyproj import CRS

    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    hx, hy = dx / 2.0, dy / 2.0
    shape = (y.size, x.size, 4)
    X = np.broadcast_to(np.stack([x - hx, x + hx, x + hx, x - hx], axis=-1)[None, :, :], shape)
    Y = np.ascontiguousarray(np.broadcast_to(np.stack([y - hy, y - hy, y + hy, y + hy], axis=-1)[:, None, :], shape))
    crs = CRS.from_user_input(crs)
    if crs.is_geographic:
        return X - lon_offset, Y
    from pyproj import Transformer

    tr = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(np.ascontiguousarray(X), Y)
    return np.asarray(lon), np.asarray(lat)


def basin_cell_means(grid: GridSpec, weights, cell_mean: np.ndarray, cell_months: np.ndarray, *, source: str,
                     component: str, units: str, period: tuple[str, str] = ("", "")) -> dict[str, CellMeans]:
    """One `CellMeans` per basin of ``weights`` from the used cells' means.

    Parameters
    ----------
    grid : GridSpec
        The product's grid (the one ``weights`` were built on).
    weights : wbexplore.spatial.zonal.Weights
        Covered area (m2) of each cell by each basin.
    cell_mean, cell_months : ndarray (used cells,)
        Long-term mean (``units``) and valid months of each used cell, in the order of `Weights.window`.
    source, component, units : str
        Product id, component and canonical unit (mm/month or mm).
    period : tuple of str, optional
        First and last month of the product.

    Returns
    -------
    dict
        Basin id -> `CellMeans` (the arrays of different basins may share memory: do not write to them).
    """
    cell_mean = np.asarray(cell_mean, np.float64)
    cell_months = np.asarray(cell_months, np.float64)
    rs, cs, wu_t, _ = weights.window()
    r_used, c_used = weights.used_rows_cols()
    if cell_mean.shape != r_used.shape:
        raise ValueError(f"{cell_mean.size} cell means for {r_used.size} used cells")
    if r_used.size == 0:
        return {}
    # the window of every used cell, once per product: basins take slices of it
    shape = (rs.stop - rs.start, cs.stop - cs.start)
    mean_w = np.full(shape, np.nan)
    months_w = np.zeros(shape)
    mean_w[r_used - rs.start, c_used - cs.start] = cell_mean
    months_w[r_used - rs.start, c_used - cs.start] = cell_months
    x_w = np.asarray(grid.x, np.float64)[cs]
    if grid.is_geographic and grid.x.max() > 180.0 and grid.lon_offset == 0.0:
        x_w = np.where(x_w >= 180.0, x_w - 360.0, x_w)  # as `describe_grid` normalised it
    y_w = np.asarray(grid.y, np.float64)[rs]
    crs = grid.crs.to_wkt()
    area_w = np.empty(grid.shape)
    area_w[np.ix_(grid.row_order, grid.col_order)] = cell_areas_m2(grid)
    area_used = area_w[r_used, c_used]
    by_basin = wu_t.tocsc()  # (used cells x basins): column b holds basin b's cells
    out = {}
    for b, bid in enumerate(weights.basin):
        lo, hi = by_basin.indptr[b], by_basin.indptr[b + 1]
        idx = by_basin.indices[lo:hi]
        w = by_basin.data[lo:hi]
        keep = w > 0
        idx, w = idx[keep], w[keep]
        if idx.size == 0:
            continue
        r, c = r_used[idx] - rs.start, c_used[idx] - cs.start
        r0, r1, c0, c1 = int(r.min()), int(r.max()) + 1, int(c.min()), int(c.max()) + 1
        cov = np.zeros((r1 - r0, c1 - c0))
        cov[r - r0, c - c0] = np.clip(w / area_used[idx], 0.0, 1.0)
        touched = cov > 0
        win = (slice(r0, r1), slice(c0, c1))
        out[str(bid)] = CellMeans(basin=str(bid), source=source, component=component, units=units,
                                  mean=np.where(touched, mean_w[win], np.nan), months=np.where(touched, months_w[win], 0.0),
                                  coverage=cov, x=x_w[c0:c1], y=y_w[r0:r1], dx=grid.dx, dy=grid.dy, crs=crs,
                                  lon_offset=grid.lon_offset, row0=rs.start + r0, col0=cs.start + c0,
                                  period=tuple(period))
    return out


def _polygons(cm: CellMeans):
    """Shapely polygons (lon/lat) of the touched cells of ``cm`` and their flat indices."""
    import shapely

    idx = np.flatnonzero(cm.touched.ravel())
    lon = cm.lon.reshape(-1, 4)[idx]
    lat = cm.lat.reshape(-1, 4)[idx]
    rings = np.stack([lon, lat], axis=-1)
    return shapely.polygons(rings), idx


def difference_from_others(cells: dict[str, CellMeans]) -> dict[str, np.ndarray]:
    """Each product's cell means minus the mean of the other products over the same cell.

    Products may sit on different grids: another product's value over a cell is the mean of its cells
    weighted by their overlap with that cell (intersection area in degrees, a conservative remapping in
    lon/lat; exact where the grids are the same). The mean of the others is the plain mean of the products
    that have a value there; a cell where no other product has one is NaN.

    Parameters
    ----------
    cells : dict
        Product id -> `CellMeans` of one basin and one component (same units).

    Returns
    -------
    dict
        Product id -> (rows, cols) array like its ``mean``, in its ``units``; NaN outside the touched cells.
    """
    import shapely

    ids = list(cells)
    units = {cells[s].units for s in ids}
    if len(units) > 1:
        raise ValueError(f"cell means in different units: {sorted(units)}")
    polys = {s: _polygons(cells[s]) for s in ids}
    out = {}
    for s in ids:
        pa, ia = polys[s]
        others = []
        for o in ids:
            if o == s:
                continue
            pb, ib = polys[o]
            vb = cells[o].mean.ravel()[ib]
            same = cells[o].lon.shape == cells[s].lon.shape and cells[o].row0 == cells[s].row0 \
                and cells[o].col0 == cells[s].col0 and np.array_equal(cells[o].lon, cells[s].lon) \
                and np.array_equal(cells[o].lat, cells[s].lat)
            if same:  # the same grid: cell for cell
                full = np.full(cells[s].mean.size, np.nan)
                full[ib] = vb
                others.append(full[ia])
                continue
            tree = shapely.STRtree(pb)
            a, b = tree.query(pa, predicate="intersects")
            area = shapely.area(shapely.intersection(pa[a], pb[b]))
            ok = np.isfinite(vb[b]) & (area > 0)
            num = np.bincount(a[ok], weights=area[ok] * vb[b][ok], minlength=pa.size)
            den = np.bincount(a[ok], weights=area[ok], minlength=pa.size)
            with np.errstate(invalid="ignore", divide="ignore"):
                others.append(np.where(den > 0, num / den, np.nan))
        diff = np.full(cells[s].mean.size, np.nan)
        if others:
            stack = np.stack(others)
            n = np.isfinite(stack).sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                mean_others = np.where(n > 0, np.nansum(stack, axis=0) / np.maximum(n, 1), np.nan)
            diff[ia] = cells[s].mean.ravel()[ia] - mean_others
        out[s] = diff.reshape(cells[s].mean.shape)
    return out
