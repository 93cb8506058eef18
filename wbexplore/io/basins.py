"""Basin outlines (any vector format geopandas reads, any CRS)."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from ..errors import InputError
from .catalog import BasinSpec

__all__ = ["read_basins", "BasinRepairWarning", "geodesic_area_m2"]


class BasinRepairWarning(UserWarning):
    """An invalid basin geometry was repaired with `shapely.make_valid`."""


def geodesic_area_m2(geoms_lonlat, *, max_segment_deg: float = 0.01) -> np.ndarray:
    """Area (m2) on the WGS84 ellipsoid of lon/lat geometries.

    Edges are taken as straight lines in longitude/latitude (as they are drawn on a
    lon/lat grid), so they are densified to ``max_segment_deg`` before the geodesic
    polygon area of `pyproj.Geod` (Karney 2013) is taken.
    """
    from pyproj import Geod

    geod = Geod(ellps="WGS84")
    out = []
    for g in np.atleast_1d(geoms_lonlat):
        if g is None or g.is_empty:
            out.append(0.0)
            continue
        dense = shapely.segmentize(g, max_segment_deg)
        area, _ = geod.geometry_area_perimeter(shapely.geometry.polygon.orient(dense, 1.0)
                                               if dense.geom_type == "Polygon" else _orient_multi(dense))
        out.append(abs(area))
    return np.asarray(out, dtype=float)


def _orient_multi(g):
    if g.geom_type == "MultiPolygon":
        return shapely.MultiPolygon([shapely.geometry.polygon.orient(p, 1.0) for p in g.geoms])
    if g.geom_type == "GeometryCollection":
        polys = [p for p in g.geoms if p.geom_type in ("Polygon", "MultiPolygon")]
        return _orient_multi(shapely.MultiPolygon([q for p in polys for q in getattr(p, "geoms", [p])]))
    return g


def read_basins(spec: BasinSpec) -> gpd.GeoDataFrame:
    """Read basins into a GeoDataFrame indexed by basin id (text), in EPSG:4326.

    Columns: ``name``, ``area_km2`` (geodesic, WGS84), ``geometry``.
    Invalid geometries are repaired with `shapely.make_valid` and a
    `BasinRepairWarning` naming the basin; empty geometries are refused.
    """
    path = spec.path
    try:
        gdf = gpd.read_file(path, layer=spec.layer) if spec.layer else gpd.read_file(path)
    except Exception as exc:
        raise InputError(f"{path}: cannot be read as a vector file ({exc.__class__.__name__})") from None
    if spec.id_field not in gdf.columns:
        raise InputError(f"{path}: field 'id_field': column {spec.id_field!r} not found (has: {', '.join(c for c in gdf.columns if c != 'geometry')})")
    if spec.name_field and spec.name_field not in gdf.columns:
        raise InputError(f"{path}: field 'name_field': column {spec.name_field!r} not found")
    if len(gdf) == 0:
        raise InputError(f"{path}: the basin file holds no features")
    ids = gdf[spec.id_field].astype(str).str.strip()
    if ids.duplicated().any():
        raise InputError(f"{path}: field 'id_field': duplicate basin id {ids[ids.duplicated()].iloc[0]!r}")
    if gdf.crs is None:
        if not spec.crs:
            raise InputError(f"{path}: the basin file has no CRS and the catalog declares none (add basins: crs: EPSG:...)")
        gdf = gdf.set_crs(spec.crs)
    elif spec.crs:
        gdf = gdf.set_crs(spec.crs, allow_override=True)
    geoms = gdf.geometry.values
    for i, g in enumerate(geoms):
        if g is None or g.is_empty:
            raise InputError(f"{path}: basin {ids.iloc[i]!r} has an empty geometry")
        if g.geom_type not in ("Polygon", "MultiPolygon"):
            raise InputError(f"{path}: basin {ids.iloc[i]!r} is a {g.geom_type}, not a polygon")
    invalid = ~shapely.is_valid(np.asarray(geoms))
    if invalid.any():
        fixed = np.asarray(geoms).copy()
        for i in np.flatnonzero(invalid):
            reason = shapely.is_valid_reason(fixed[i])
            fixed[i] = _polygonal(shapely.make_valid(fixed[i]))
            warnings.warn(f"{path}: basin {ids.iloc[i]!r} had an invalid geometry ({reason}); repaired with make_valid",
                          BasinRepairWarning, stacklevel=2)
        gdf = gdf.set_geometry(gpd.GeoSeries(fixed, crs=gdf.crs, index=gdf.index))
    gdf = gdf.to_crs("EPSG:4326")
    names = gdf[spec.name_field].astype(str) if spec.name_field else ids
    out = gpd.GeoDataFrame(
        {"name": names.values, "area_km2": geodesic_area_m2(gdf.geometry.values) / 1e6},
        geometry=gdf.geometry.values, crs="EPSG:4326", index=pd.Index(ids.values, name="basin"),
    )
    return out


def _polygonal(g):
    if g.geom_type in ("Polygon", "MultiPolygon"):
        return g
    polys = [p for p in getattr(g, "geoms", []) if p.geom_type in ("Polygon", "MultiPolygon")]
    parts = [q for p in polys for q in getattr(p, "geoms", [p])]
    return shapely.MultiPolygon(parts) if len(parts) > 1 else parts[0]
