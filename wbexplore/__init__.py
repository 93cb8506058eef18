"""wbexplore: basin water-balance closure explorer for gridded P, ET and TWSA products.

Screening-level analysis: defer to gauged data, local codes and licensed practice
for water-allocation, flood or drought decisions.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import CatalogError, InputError, SelectionError, UnitError  # noqa: E402


def __getattr__(name):
    # the catalog module brings pandas and pint (about 0.4 s): imported when first used, so that
    # `wbexplore --help` and the command line's argument errors answer at once
    if name in ("Catalog", "open_catalog"):
        from .io import catalog

        return getattr(catalog, name)
    raise AttributeError(f"module 'wbexplore' has no attribute {name!r}")


def extract(catalog, **kwargs):
    """See `wbexplore.pipeline.extract`."""
    from .pipeline import extract as _extract

    return _extract(catalog, **kwargs)


def explore(catalog_or_path, **kwargs):
    """The live closure explorer for a JupyterLab cell. See `wbexplore.explorer.app.explore`."""
    from .explorer.app import explore as _explore

    return _explore(catalog_or_path, **kwargs)


def export_selection(catalog, selection, out, **kwargs):
    """Write a selection file that `wbexplore replay` reproduces. See `wbexplore.selection.export_selection`."""
    from .selection import export_selection as _export

    return _export(catalog, selection, out, **kwargs)


def load_series(catalog, **kwargs):
    """Canonical basin series of a catalog, cached on disk. See `wbexplore.pipeline.load_series`."""
    from .pipeline import load_series as _load

    return _load(catalog, **kwargs)


__all__ = ["__version__", "explore", "export_selection", "load_series", "open_catalog", "Catalog", "extract", "InputError", "CatalogError",
           "UnitError", "SelectionError"]
