"""File formats: catalog, grids, basins, discharge, atomic writers."""
