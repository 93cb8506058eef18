"""Description of a regular grid from its cell centres, in a normalised order.

The *normalised* order has columns west to east and rows north to south (the
layout of a raster), with geographic longitudes brought into one contiguous range.
The data are never reordered: `GridSpec.row_order` / `col_order` map a normalised
row/column to the file's own index, so weights are built in the normalised order
and applied to the data as stored (descending or ascending latitudes, 0..360 or
-180..180 longitudes alike).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np
from pyproj import CRS

from ..errors import InputError

__all__ = ["GridSpec", "GridError", "describe_grid"]


class GridError(InputError):
    """A grid wbexplore cannot describe (irregular spacing, a single row or column)."""


@dataclass(frozen=True)
class GridSpec:
    """A regular grid. Lengths in CRS units (degrees for geographic grids)."""

    x: np.ndarray = field(repr=False)  # centres, file order
    y: np.ndarray = field(repr=False)
    crs: CRS
    dx: float  # > 0
    dy: float  # > 0
    xmin: float  # west edge of the normalised grid
    ymax: float  # north edge
    col_order: np.ndarray = field(repr=False)  # normalised column -> file column
    row_order: np.ndarray = field(repr=False)  # normalised row (north first) -> file row
    lon_offset: float = 0.0  # add to basin longitudes to meet this grid (0 or 360)

    @property
    def nx(self) -> int:
        return int(self.x.size)

    @property
    def ny(self) -> int:
        return int(self.y.size)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.ny, self.nx)

    @property
    def xmax(self) -> float:
        return self.xmin + self.nx * self.dx

    @property
    def ymin(self) -> float:
        return self.ymax - self.ny * self.dy

    @property
    def is_geographic(self) -> bool:
        return bool(self.crs.is_geographic)

    def x_edges(self) -> np.ndarray:
        """Column edges of the normalised grid, west to east (nx + 1)."""
        return self.xmin + self.dx * np.arange(self.nx + 1)

    def y_edges(self) -> np.ndarray:
        """Row edges of the normalised grid, north to south (ny + 1)."""
        return self.ymax - self.dy * np.arange(self.ny + 1)

    def file_index(self, norm_flat: np.ndarray) -> np.ndarray:
        """Flat index in the file's (y, x) layout of flat indices in the normalised layout."""
        r, c = np.divmod(np.asarray(norm_flat, dtype=np.int64), self.nx)
        return self.row_order[r] * self.nx + self.col_order[c]

    def signature(self) -> str:
        """A short hash that changes with any coordinate or the CRS."""
        h = hashlib.sha256()
        h.update(np.ascontiguousarray(self.x, dtype=np.float64).tobytes())
        h.update(np.ascontiguousarray(self.y, dtype=np.float64).tobytes())
        h.update(self.crs.to_wkt().encode())
        return h.hexdigest()[:20]


def _spacing(c: np.ndarray, what: str, rtol: float = 1e-4) -> float:
    if c.size < 2:
        raise GridError(f"the grid has a single {what}; cell spacing cannot be derived from its centres")
    d = np.diff(c)
    step = float(np.median(d))
    if step == 0 or np.any(np.abs(d - step) > rtol * abs(step) + 1e-9):
        raise GridError(
            f"the grid's {what} spacing is irregular (steps {d.min():g} to {d.max():g}); "
            "irregular grids are not supported: regrid to a regular grid first"
        )
    return step


def describe_grid(x, y, crs) -> GridSpec:
    """Describe a regular grid from 1-D cell-centre coordinates and its CRS.

    Parameters
    ----------
    x, y : array-like
        Cell centres in CRS units, in the file's order (either direction).
    crs : pyproj.CRS or anything `pyproj.CRS.from_user_input` takes.

    Raises
    ------
    GridError
        For irregular spacing or a single row/column.
    """
    crs = CRS.from_user_input(crs)
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    lon_offset = 0.0
    if crs.is_geographic:
        xs = np.sort(x)
        try:
            step = abs(_spacing(xs, "longitude"))
            xw = None
        except GridError:
            xw = None
            step = None
        if x.max() > 180.0:
            # 0..360 longitudes: try bringing them to -180..180 where that keeps the grid contiguous
            wrapped = np.where(x >= 180.0, x - 360.0, x)
            try:
                _spacing(np.sort(wrapped), "longitude")
                xw = wrapped
            except GridError:
                if step is None:
                    raise
                lon_offset = 360.0  # stays 0..360: basins west of the prime meridian are shifted east
        xn = xw if xw is not None else x
    else:
        xn = x
    col_order = np.argsort(xn, kind="stable")
    xs = xn[col_order]
    dx = abs(_spacing(xs, "x" if not crs.is_geographic else "longitude"))
    row_order = np.argsort(-y, kind="stable")  # north first
    ys = y[row_order]
    dy = abs(_spacing(ys, "y" if not crs.is_geographic else "latitude"))
    xmin = float(xs[0] - dx / 2)
    ymax = float(ys[0] + dy / 2)
    if crs.is_geographic and ymax > 90 + 1e-9 or crs.is_geographic and ymax - ys.size * dy < -90 - 1e-9:
        raise GridError("latitude edges fall outside -90..90")
    return GridSpec(x=x, y=y, crs=crs, dx=dx, dy=dy, xmin=xmin, ymax=ymax,
                    col_order=col_order, row_order=row_order, lon_offset=lon_offset)
