"""Pure computation on grids: grid description, cell areas, coverage weights, zonal means."""

from .areas import cell_areas_m2, geographic_cell_areas_m2
from .coverage import coverage_matrix
from .grid import GridError, GridSpec, describe_grid
from .zonal import Weights, build_weights, zonal_mean

__all__ = [
    "GridSpec", "GridError", "describe_grid", "cell_areas_m2", "geographic_cell_areas_m2",
    "coverage_matrix", "Weights", "build_weights", "zonal_mean",
]
