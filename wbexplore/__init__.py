"""wbexplore: basin water-balance closure explorer for gridded P, ET and TWSA products.

Screening-level analysis: defer to gauged data, local codes and licensed practice
for water-allocation, flood or drought decisions.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import CatalogError, InputError, SelectionError, UnitError  # noqa: E402
from .io.catalog import Catalog, open_catalog  # noqa: E402


def extract(catalog, **kwargs):
    """See `wbexplore.pipeline.extract`."""
    from .pipeline import extract as _extract

    return _extract(catalog, **kwargs)


__all__ = ["__version__", "open_catalog", "Catalog", "extract", "InputError", "CatalogError",
           "UnitError", "SelectionError"]
