"""Cell areas on the ellipsoid.

Geographic grids: the area of a cell between latitudes phi1 < phi2 spanning
dlon radians on an ellipsoid of semi-major axis a and eccentricity e is
(Snyder 1987, USGS Professional Paper 1395, eq. 3-12 and the authalic latitude)

    A = (a^2 / 2) * dlon * [q(phi2) - q(phi1)],
    q(phi) = (1 - e^2) * [ sin(phi) / (1 - e^2 sin^2 phi)
                           - 1/(2e) * ln((1 - e sin phi) / (1 + e sin phi)) ].

Projected grids: the true (ellipsoidal) area of each cell polygon, found by
projecting the densified cell edges to a Lambert azimuthal equal-area projection
(ellipsoidal form, centred on the grid) and taking the planar area there; an
equal-area CRS keeps its planar dx * dy.
"""

from __future__ import annotations

import numpy as np
from pyproj import CRS, Transformer

from .grid import GridSpec

__all__ = ["authalic_q", "geographic_cell_areas_m2", "cell_areas_m2", "is_equal_area"]

_EQUAL_AREA_METHODS = (
    "lambert azimuthal equal area", "albers equal area", "lambert cylindrical equal area",
    "equal earth", "mollweide", "sinusoidal", "eckert iv", "eckert vi", "goode homolosine",
)


def authalic_q(phi_rad, e: float) -> np.ndarray:
    """Snyder's q(phi) (dimensionless) for eccentricity ``e``."""
    s = np.sin(np.asarray(phi_rad, dtype=np.float64))
    if e == 0:
        return 2.0 * s
    return (1 - e * e) * (s / (1 - e * e * s * s) - 1 / (2 * e) * np.log((1 - e * s) / (1 + e * s)))


def geographic_cell_areas_m2(lat_edges_deg, dlon_deg: float, *, a: float = 6378137.0,
                             f: float = 1 / 298.257223563) -> np.ndarray:
    """Area (m2) of the cells of one column between consecutive latitude edges (any order).

    Defaults are WGS84 (a = 6378137 m, 1/f = 298.257223563).
    """
    e = np.sqrt(f * (2 - f))
    q = authalic_q(np.radians(lat_edges_deg), e)
    return np.abs(a * a / 2.0 * np.radians(dlon_deg) * np.diff(q))


def is_equal_area(crs: CRS) -> bool:
    op = crs.coordinate_operation
    if op is None:
        return False
    name = (op.method_name or "").lower()
    return any(m in name for m in _EQUAL_AREA_METHODS)


def cell_areas_m2(grid: GridSpec, *, densify: int = 8) -> np.ndarray:
    """Area (m2) of every cell, shape (ny, nx), in the normalised order (rows north first)."""
    if grid.is_geographic:
        ellps = grid.crs.ellipsoid
        a = ellps.semi_major_metre
        f = 1 / ellps.inverse_flattening if ellps.inverse_flattening else 0.0
        col = geographic_cell_areas_m2(grid.y_edges(), grid.dx, a=a, f=f)
        return np.broadcast_to(col[:, None], grid.shape).copy()
    if is_equal_area(grid.crs):
        return np.full(grid.shape, grid.dx * grid.dy)
    return _projected_areas(grid, densify)


def _projected_areas(grid: GridSpec, k: int) -> np.ndarray:
    """Ellipsoidal cell areas by edge integrals of the shoelace formula in an equal-area plane."""
    xe = grid.x_edges()
    ye = grid.y_edges()[::-1]  # south to north here
    to_geo = Transformer.from_crs(grid.crs, grid.crs.geodetic_crs, always_xy=True)
    lon_c, lat_c = to_geo.transform(0.5 * (xe[0] + xe[-1]), 0.5 * (ye[0] + ye[-1]))
    laea = CRS.from_proj4(f"+proj=laea +lat_0={lat_c} +lon_0={lon_c} +x_0=0 +y_0=0 "
                          f"+a={grid.crs.ellipsoid.semi_major_metre} +rf={grid.crs.ellipsoid.inverse_flattening or 0} +units=m")
    tr = Transformer.from_crs(grid.crs, laea, always_xy=True)
    nx, ny = grid.nx, grid.ny
    # horizontal edges: ny+1 rows, each densified into nx*k segments
    xs_d = np.linspace(xe[0], xe[-1], nx * k + 1)
    hx, hy = np.meshgrid(xs_d, ye)
    HX, HY = tr.transform(hx, hy)
    ch = HX[:, :-1] * HY[:, 1:] - HX[:, 1:] * HY[:, :-1]
    H = ch.reshape(ny + 1, nx, k).sum(axis=2)  # +x direction
    ys_d = np.linspace(ye[0], ye[-1], ny * k + 1)
    vx, vy = np.meshgrid(xe, ys_d)
    VX, VY = tr.transform(vx, vy)
    cv = VX[:-1, :] * VY[1:, :] - VX[1:, :] * VY[:-1, :]
    V = cv.reshape(ny, k, nx + 1).sum(axis=1)  # +y direction
    A = 0.5 * (H[:-1, :] + V[:, 1:] - H[1:, :] - V[:, :-1])
    return np.abs(A)[::-1, :]  # back to north-first rows
