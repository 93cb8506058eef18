"""Exact coverage of grid cells by basin polygons.

The fractions come from exactextract's ``cell_id`` and ``coverage`` operations
(exact polygon/cell intersection in C++). Shapely 2's vectorised intersection is
the fallback when exactextract is not importable. Basin edges are straight lines
in the grid's CRS (as drawn on the grid). Basins must already be in the grid's CRS.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import shapely

from .grid import GridSpec

__all__ = ["coverage_matrix", "ENGINES"]

ENGINES = ("exactextract", "shapely")


def _has_exactextract() -> bool:
    try:
        import exactextract  # noqa: F401
    except ImportError:
        return False
    return True


def coverage_matrix(grid: GridSpec, geoms, *, engine: str = "auto") -> sp.csr_matrix:
    """Fraction (0..1) of each cell covered by each basin.

    Parameters
    ----------
    grid : GridSpec
    geoms : sequence of shapely (Multi)Polygons in the grid's CRS
    engine : {"auto", "exactextract", "shapely"}

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n_basins, ny * nx), columns in the *file's* flat (y, x) order.
    """
    geoms = list(geoms)
    if grid.is_geographic:
        geoms = [_wrap_to_grid(g, grid) for g in geoms]
    if engine == "auto":
        engine = "exactextract" if _has_exactextract() else "shapely"
    if engine == "exactextract":
        rows, cols, vals = _exactextract(grid, geoms)
    elif engine == "shapely":
        rows, cols, vals = _shapely(grid, geoms)
    else:
        raise ValueError(f"engine must be one of {ENGINES} or 'auto', got {engine!r}")
    cols = grid.file_index(cols)
    m = sp.csr_matrix((vals, (rows, cols)), shape=(len(geoms), grid.ny * grid.nx))
    m.sum_duplicates()
    m.eliminate_zeros()
    return m


def _wrap_to_grid(g, grid: GridSpec):
    """A lon/lat geometry with the parts that lie a full turn (360 degrees) away from the grid's longitudes
    brought onto them: a basin split at the antimeridian onto a 0..360 grid, a basin crossing the prime
    meridian onto a 0..360 grid, or a basin written in 0..360 onto a -180..180 grid. A geometry with
    nothing a turn away is returned unchanged."""
    x0, _, x1, _ = g.bounds
    window = shapely.box(grid.xmin, -90.0, grid.xmax, 90.0)
    shifted = []
    for k in (-360.0, 360.0):
        if x1 + k > grid.xmin and x0 + k < grid.xmax:
            part = shapely.intersection(shapely.transform(g, lambda c, k=k: c + np.array([k, 0.0])), window)
            if not part.is_empty and part.area > 0:
                shifted.append(part)
    if not shifted:
        return g
    inside = shapely.intersection(g, window)
    out = shapely.union_all([p for p in [inside, *shifted] if not p.is_empty])
    if out.geom_type == "GeometryCollection":
        out = shapely.MultiPolygon([q for p in out.geoms if p.geom_type in ("Polygon", "MultiPolygon")
                                    for q in getattr(p, "geoms", [p])])
    return out


def _exactextract(grid: GridSpec, geoms):
    import geopandas as gpd
    from exactextract import exact_extract
    from exactextract.raster import NumPyRasterSource

    wkt = grid.crs.to_wkt()
    rast = NumPyRasterSource(np.zeros(grid.shape, dtype=np.uint8), grid.xmin, grid.ymin, grid.xmax, grid.ymax,
                             srs_wkt=wkt)
    gdf = gpd.GeoDataFrame({"_i": np.arange(len(geoms))}, geometry=geoms, crs=wkt)
    res = exact_extract(rast, gdf, ["cell_id", "coverage"], include_cols=["_i"], output="pandas")
    rows, cols, vals = [], [], []
    for i, cid, cov in zip(res["_i"], res["cell_id"], res["coverage"]):
        cid = np.asarray(cid, dtype=np.int64)
        rows.append(np.full(cid.size, i, dtype=np.int64))
        cols.append(cid)
        vals.append(np.asarray(cov, dtype=np.float64))
    if not rows:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
    return np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)


def _shapely(grid: GridSpec, geoms):
    rows, cols, vals = [], [], []
    cell_area = grid.dx * grid.dy
    for i, g in enumerate(geoms):
        x0, y0, x1, y1 = g.bounds
        c0 = max(0, int(np.floor((x0 - grid.xmin) / grid.dx)))
        c1 = min(grid.nx - 1, int(np.floor((x1 - grid.xmin) / grid.dx)))
        r0 = max(0, int(np.floor((grid.ymax - y1) / grid.dy)))
        r1 = min(grid.ny - 1, int(np.floor((grid.ymax - y0) / grid.dy)))
        if c1 < c0 or r1 < r0:
            continue
        rr, cc = np.meshgrid(np.arange(r0, r1 + 1), np.arange(c0, c1 + 1), indexing="ij")
        rr, cc = rr.ravel(), cc.ravel()
        boxes = shapely.box(grid.xmin + cc * grid.dx, grid.ymax - (rr + 1) * grid.dy,
                            grid.xmin + (cc + 1) * grid.dx, grid.ymax - rr * grid.dy)
        shapely.prepare(g)
        frac = shapely.area(shapely.intersection(boxes, g)) / cell_area
        keep = frac > 0
        rows.append(np.full(keep.sum(), i, dtype=np.int64))
        cols.append(rr[keep] * grid.nx + cc[keep])
        vals.append(np.minimum(frac[keep], 1.0))
    if not rows:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
    return np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)
