"""Basin outlines (any vector format geopandas reads, any CRS)."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from ..errors import InputError
from .catalog import BasinSpec

__all__ = ["read_basins", "incremental_basins", "representative_points", "BasinRepairWarning", "geodesic_area_m2",
           "unwrap_lonlat", "MAX_OUTSIDE_SHARE"]


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


MAX_OUTSIDE_SHARE = 0.05  # an upstream basin may stick out of its downstream basin by this share of its area
# two upstream basins of one basin may share digitising slivers, not water: above this share of the
# smaller one's area their overlap is refused (common practice: 1% is well above a sliver; judgement, no source)
MAX_SIBLING_OVERLAP = 0.01


def read_basins(spec: BasinSpec) -> gpd.GeoDataFrame:
    """Read basins into a GeoDataFrame indexed by basin id (text), in EPSG:4326.

    Columns: ``name``, ``area_km2`` (geodesic, WGS84), ``geometry``; with ``downstream_field`` also
    ``drains_to`` (the downstream basin's id, or None) and ``outside_km2`` (area of the basin outside the
    basin it drains to, clipped from its incremental unit; 0 for a basin that drains nowhere).
    Invalid geometries are repaired with `shapely.make_valid` and a
    `BasinRepairWarning` naming the basin; empty geometries are refused. The nesting is checked:
    a downstream id not in the file, a cycle, or an upstream basin more than 5% of whose area lies
    outside its downstream basin are refused.
    """
    native, ids, names = _read_native(spec)
    nest = _nesting(spec, native, ids) if spec.downstream_field else None
    geoms = _to_lonlat(spec, native, ids)
    out = gpd.GeoDataFrame(
        {"name": names, "area_km2": geodesic_area_m2(geoms) / 1e6},
        geometry=geoms, crs="EPSG:4326", index=pd.Index(ids, name="basin"),
    )
    if nest is not None:
        drains, outside = nest
        out["drains_to"] = pd.Series([drains.get(b) for b in ids], index=out.index, dtype=object)
        out["outside_km2"] = [outside.get(b, 0.0) for b in ids]
    return out


def representative_points(gdf: gpd.GeoDataFrame) -> pd.DataFrame:
    """A point inside each basin (`shapely.point_on_surface` of its lon/lat outline), in degrees.

    The position CF asks of each time series (`wbexplore.io.writers.cf_ready`); not a centroid, which may
    lie outside a crescent-shaped basin. Returns a frame indexed like ``gdf`` with columns ``lat``, ``lon``.
    """
    geoms = gdf.to_crs("EPSG:4326").geometry.values if gdf.crs is not None else gdf.geometry.values
    pts = shapely.point_on_surface(np.asarray(geoms, dtype=object))
    return pd.DataFrame({"lat": shapely.get_y(pts), "lon": shapely.get_x(pts)}, index=gdf.index)


def incremental_basins(spec: BasinSpec) -> gpd.GeoDataFrame:
    """The incremental balance units: each basin with upstream basins, minus those basins.

    The difference is taken exactly (`shapely.difference`) in the basin file's own CRS, then taken to
    lon/lat as `read_basins` does; the area is the same geodesic area (`geodesic_area_m2`). The part of an
    upstream basin outside its downstream basin (at most 5% of its area) has nothing to subtract from.

    Returns
    -------
    geopandas.GeoDataFrame
        Indexed by the downstream basin's id (``basin``), in file order; columns ``name``, ``area_km2``
        (incremental, km2), ``whole_area_km2``, ``upstream`` (the upstream basin ids, joined with ","),
        ``geometry`` (EPSG:4326). Empty when no basin has upstream basins.

    Raises
    ------
    InputError
        Without ``downstream_field``; as `read_basins` for a bad nesting; for an incremental unit that
        is empty (upstream basins covering their downstream basin whole).
    """
    if not spec.downstream_field:
        raise InputError(f"{spec.path}: basins have no 'downstream_field' in the catalog: no basin has an "
                         "incremental unit")
    native, ids, names = _read_native(spec)
    drains, _ = _nesting(spec, native, ids)
    pos = {b: i for i, b in enumerate(ids)}
    geoms = np.asarray(native.geometry.values)
    rows, inc, ups = [], [], []
    for b in ids:
        up = [u for u in ids if drains.get(u) == b]
        if not up:
            continue
        g = shapely.difference(geoms[pos[b]], shapely.union_all([geoms[pos[u]] for u in up]))
        g = _polygonal(g) if not g.is_empty and g.geom_type not in ("Polygon", "MultiPolygon") else g
        if g.is_empty or g.area <= 0:
            raise InputError(f"{spec.path}: field 'downstream_field': basins {', '.join(up)} cover basin {b!r} "
                             "whole; its incremental unit is empty")
        rows.append(b)
        inc.append(g)
        ups.append(",".join(up))
    sub = gpd.GeoDataFrame(geometry=inc, crs=native.crs, index=pd.Index(rows, name="basin"))
    lonlat = _to_lonlat(spec, sub, rows) if rows else []
    whole = geodesic_area_m2(_to_lonlat(spec, native.loc[rows], rows)) / 1e6 if rows else []
    return gpd.GeoDataFrame(
        {"name": [names[pos[b]] for b in rows], "area_km2": geodesic_area_m2(lonlat) / 1e6 if rows else [],
         "whole_area_km2": whole, "upstream": ups},
        geometry=list(lonlat), crs="EPSG:4326", index=pd.Index(rows, name="basin", dtype=object),
    )


def _read_native(spec: BasinSpec) -> tuple[gpd.GeoDataFrame, list[str], list[str]]:
    """The basin file in its own CRS (indexed by id, invalid geometries repaired), ids and names."""
    path = spec.path
    try:
        gdf = gpd.read_file(path, layer=spec.layer) if spec.layer else gpd.read_file(path)
    except Exception as exc:
        raise InputError(f"{path}: cannot be read as a vector file ({exc.__class__.__name__})") from None
    if spec.id_field not in gdf.columns:
        raise InputError(f"{path}: field 'id_field': column {spec.id_field!r} not found (has: {', '.join(c for c in gdf.columns if c != 'geometry')})")
    if spec.name_field and spec.name_field not in gdf.columns:
        raise InputError(f"{path}: field 'name_field': column {spec.name_field!r} not found")
    if spec.downstream_field and spec.downstream_field not in gdf.columns:
        raise InputError(f"{path}: field 'downstream_field': column {spec.downstream_field!r} not found")
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
                          BasinRepairWarning, stacklevel=3)
        gdf = gdf.set_geometry(gpd.GeoSeries(fixed, crs=gdf.crs, index=gdf.index))
    names = gdf[spec.name_field].astype(str) if spec.name_field else ids
    gdf = gdf.set_index(pd.Index(ids.values, name="basin"))
    return gdf, [str(b) for b in ids.values], [str(n) for n in names.values]


def _to_lonlat(spec: BasinSpec, gdf: gpd.GeoDataFrame, ids) -> list:
    """Geometries of ``gdf`` (in the file's CRS) in lon/lat, densified and unwrapped as basins are."""
    if not gdf.crs.is_geographic:
        # densify in the file's CRS first: an edge is straight there, and a long straight edge of a
        # polar projection is a curve in lon/lat (a coarse circle about a pole would otherwise
        # become a band along one parallel)
        gdf = gdf.set_geometry(gpd.GeoSeries([_densify(g) for g in gdf.geometry.values], crs=gdf.crs,
                                             index=gdf.index))
    gdf = gdf.to_crs("EPSG:4326")
    fixed = []
    for i, g in enumerate(gdf.geometry.values):
        try:
            fixed.append(unwrap_lonlat(g))
        except ValueError as exc:
            raise InputError(f"{spec.path}: basin {ids[i]!r}: {exc}") from None
    return fixed


def _nesting(spec: BasinSpec, native: gpd.GeoDataFrame, ids: list[str]) -> tuple[dict, dict]:
    """basin -> the basin it drains to (only those that drain into one), and basin -> km2 outside it.

    Refused, naming the file, ``downstream_field`` and the value: a downstream id not in the file, a
    cycle (listed), and an upstream basin sticking out of its downstream basin by more than 5% of its
    area (the area outside, km2 and %, is geodesic as every basin area).
    """
    path, field = spec.path, spec.downstream_field
    drains: dict[str, str] = {}
    for b, v in zip(ids, native[field].values):
        if v is None or (isinstance(v, float) and np.isnan(v)) or str(v).strip() == "":
            continue
        d = str(v).strip()
        if d not in native.index:
            raise InputError(f"{path}: field 'downstream_field': basin {b!r} drains to {d!r}, "
                             "which is not in the basin file")
        drains[b] = d
    for b in ids:
        chain = [b]
        while chain[-1] in drains:
            nxt = drains[chain[-1]]
            if nxt in chain:
                cycle = chain[chain.index(nxt):] + [nxt]
                raise InputError(f"{path}: field 'downstream_field': basins drain in a cycle: {' -> '.join(cycle)}")
            chain.append(nxt)
    outside: dict[str, float] = {}
    for u, d in drains.items():
        gu, gd = native.geometry.loc[u], native.geometry.loc[d]
        part = shapely.difference(gu, gd)
        if part.is_empty or part.area <= 0:
            outside[u] = 0.0
            continue
        a_out, a_u = _areas_km2(spec, native, [part, gu], [u, u])
        outside[u] = float(a_out)
        share = a_out / a_u if a_u > 0 else 1.0
        if share > MAX_OUTSIDE_SHARE:
            raise InputError(f"{path}: field 'downstream_field': basin {u!r} drains to {d!r} but sticks out of it "
                             f"by {a_out:,.1f} km2 ({100 * share:.1f}% of its area; at most "
                             f"{100 * MAX_OUTSIDE_SHARE:g}% is accepted and clipped)")
    _siblings_apart(spec, native, drains)
    return drains, outside


def _areas_km2(spec: BasinSpec, native: gpd.GeoDataFrame, geoms, ids) -> np.ndarray:
    """Geodesic areas (km2) of shapes in the basin file's CRS (pieces of basins: a difference or an
    intersection may hold lines or points, which are dropped); ``ids`` name them in messages."""
    sub = gpd.GeoDataFrame(geometry=[_polygonal(g) for g in geoms], crs=native.crs, index=list(ids))
    return geodesic_area_m2(_to_lonlat(spec, sub, list(ids))) / 1e6


def _siblings_apart(spec: BasinSpec, native: gpd.GeoDataFrame, drains: dict) -> None:
    """Refuse two basins that drain into the same basin and overlap by more than `MAX_SIBLING_OVERLAP`
    of the smaller one's area: the incremental unit adds each upstream basin's gauged outflow, so the
    overlap's water would enter twice (usually ``downstream_field`` names the outlet basin where it
    should name the next basin down: a basin inside another upstream basin must drain into that one)."""
    into: dict[str, list[str]] = {}
    for u, d in drains.items():
        into.setdefault(d, []).append(u)
    for d, ups in into.items():
        for i, a in enumerate(ups):
            for b in ups[i + 1:]:
                ga, gb = native.geometry.loc[a], native.geometry.loc[b]
                both = shapely.intersection(ga, gb)
                if both.is_empty or both.area <= 0:
                    continue
                a_both, a_a, a_b = _areas_km2(spec, native, [both, ga, gb], [a, a, b])
                share = a_both / min(a_a, a_b) if min(a_a, a_b) > 0 else 1.0
                if share > MAX_SIBLING_OVERLAP:
                    raise InputError(
                        f"{spec.path}: field 'downstream_field': basins {a!r} and {b!r} both drain to {d!r} but "
                        f"overlap by {a_both:,.1f} km2 ({100 * share:.1f}% of the smaller; at most "
                        f"{100 * MAX_SIBLING_OVERLAP:g}% is accepted): their outflows would enter {d!r}'s "
                        "incremental unit twice; a basin inside another should drain into that one")


def _densify(g, parts: int = 512):
    """``g`` with no edge longer than 1/``parts`` of its bounding box diagonal (CRS units)."""
    x0, y0, x1, y1 = g.bounds
    diag = float(np.hypot(x1 - x0, y1 - y0))
    return shapely.segmentize(g, diag / parts) if diag > 0 else g


def _continuous(lon: np.ndarray) -> np.ndarray:
    """Longitudes made continuous along a ring: a step of more than 180 degrees is taken the short way."""
    d = np.diff(lon)
    d = d - 360.0 * np.round(d / 360.0)
    return np.concatenate([lon[:1], lon[0] + np.cumsum(d)])


def _jumps(coords: np.ndarray) -> bool:
    """Whether a ring has an edge longer than 180 degrees of longitude; an edge of a full turn (-180 to 180,
    as in a lon/lat box round a pole drawn on a plate carree map) is what it says and not a jump."""
    d = np.abs(np.diff(coords[:, 0])) if coords.shape[0] > 1 else np.zeros(0)
    return bool(np.any((d > 180.0) & (d < 360.0 - 1e-9)))


def unwrap_lonlat(g):
    """A lon/lat (Multi)Polygon whose edges cross the antimeridian or whose ring goes round a pole,
    as the area it means, split at +-180 degrees into parts within -180..180.

    A ring with an edge longer than 180 degrees of longitude is read as crossing the antimeridian
    (the short way round, as any basin outline is drawn); a ring whose continuous longitudes end
    360 degrees from where they start goes round a pole, the one on the side of its mean latitude,
    and the polygon is closed along that pole. Geometries without such edges are returned unchanged.

    Raises
    ------
    ValueError
        For a hole that goes round a pole (no basin is a ring around the pole with the pole cut out
        of a cap; such a file is refused, not guessed).
    """
    if g.geom_type == "MultiPolygon":
        parts = list(g.geoms)
    elif g.geom_type == "Polygon":
        parts = [g]
    else:
        return g
    if not any(_jumps(np.asarray(r.coords)) for p in parts for r in (p.exterior, *p.interiors)):
        return g
    pieces = []
    for p in parts:
        ext = np.asarray(p.exterior.coords)[:, :2]
        if not any(_jumps(np.asarray(r.coords)) for r in (p.exterior, *p.interiors)):
            pieces.append(p)
            continue
        lon = _continuous(ext[:, 0])
        shell = np.column_stack([lon, ext[:, 1]])
        if abs(lon[-1] - lon[0]) > 180.0:
            pole = 90.0 if float(np.mean(ext[:, 1])) > 0 else -90.0
            shell = np.vstack([shell, [[lon[-1], pole], [lon[0], pole]]])
        lo, hi = float(shell[:, 0].min()), float(shell[:, 0].max())
        holes = []
        for r in p.interiors:
            h = np.asarray(r.coords)[:, :2]
            hl = _continuous(h[:, 0])
            if abs(hl[-1] - hl[0]) > 180.0:
                raise ValueError("a hole of the polygon goes round a pole; split the basin into parts that do not")
            mid = 0.5 * (hl.min() + hl.max())
            k = np.round((0.5 * (lo + hi) - mid) / 360.0)
            holes.append(np.column_stack([hl + 360.0 * k, h[:, 1]]))
        poly = shapely.Polygon(shell, holes)
        if not poly.is_valid:
            poly = _polygonal(shapely.make_valid(poly))
        for k in (-1, 0, 1):
            win = shapely.box(-180.0 + 360.0 * k, -90.0, 180.0 + 360.0 * k, 90.0)
            piece = shapely.intersection(poly, win)
            if not piece.is_empty and piece.area > 0:
                piece = _polygonal(piece) if piece.geom_type not in ("Polygon", "MultiPolygon") else piece
                pieces.append(shapely.transform(piece, lambda c, k=k: c - np.array([360.0 * k, 0.0])))
    out = shapely.union_all(pieces) if pieces else shapely.Polygon()
    if out.is_empty or out.area <= 0:
        raise ValueError("its outline, read across the antimeridian or round a pole, encloses no area")
    return _polygonal(out) if out.geom_type not in ("Polygon", "MultiPolygon") else out


def _polygonal(g):
    if g.geom_type in ("Polygon", "MultiPolygon"):
        return g
    polys = [p for p in getattr(g, "geoms", []) if p.geom_type in ("Polygon", "MultiPolygon")]
    parts = [q for p in polys for q in getattr(p, "geoms", [p])]
    return shapely.MultiPolygon(parts) if len(parts) > 1 else parts[0]
