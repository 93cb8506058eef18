"""Area-true extraction checked against outside references: Snyder's formula values, pyproj.Geod, exactextract."""

import warnings

import numpy as np
import pytest
import shapely
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pyproj import CRS, Geod, Transformer

from wbexplore.errors import InputError
from wbexplore.spatial import GridError, build_weights, cell_areas_m2, describe_grid, geographic_cell_areas_m2
from wbexplore.spatial.coverage import coverage_matrix
from wbexplore.spatial.zonal import apply_weights_numpy, zonal_mean

GEOD = Geod(ellps="WGS84")


def geod_area_lonlat(geom, step=0.01):
    """pyproj geodesic area of a lon/lat polygon with edges densified (straight in lon/lat)."""
    g = shapely.segmentize(shapely.geometry.polygon.orient(geom, 1.0), step)
    return abs(GEOD.geometry_area_perimeter(g)[0])


def cell_polygon_area(lon0, lon1, lat0, lat1):
    return geod_area_lonlat(shapely.box(lon0, lat0, lon1, lat1), 0.001)


# --------------------------------------------------------------------------- cell areas
def test_one_degree_cells_snyder_values():
    # values derived from Snyder (1987, USGS PP 1395) authalic-latitude formula, as quoted in the issue
    a = geographic_cell_areas_m2(np.array([0.0, 1.0]), 1.0)[0] / 1e6
    b = geographic_cell_areas_m2(np.array([60.0, 61.0]), 1.0)[0] / 1e6
    assert a == pytest.approx(12308.5, abs=0.05)
    assert b == pytest.approx(6123.1, abs=0.05)
    # cross-check: pyproj.Geod (Karney 2013) on a densified cell polygon
    assert a * 1e6 == pytest.approx(cell_polygon_area(0, 1, 0, 1), rel=1e-6)
    assert b * 1e6 == pytest.approx(cell_polygon_area(0, 1, 60, 61), rel=1e-6)


def test_global_grid_sums_to_wgs84_surface():
    # WGS84 ellipsoid surface area 510,065,622 km2 (e.g. NGA TR8350.2 derived constants, from memory)
    lon = np.arange(-179.5, 180, 1.0)
    lat = np.arange(-89.5, 90, 1.0)
    g = describe_grid(lon, lat, "EPSG:4326")
    assert cell_areas_m2(g).sum() / 1e6 == pytest.approx(510_065_622, rel=1e-6)


def test_projected_cell_areas_are_ellipsoidal():
    # UTM is conformal, not equal-area: true cell areas differ from dx*dy by the scale factor squared
    crs = CRS.from_epsg(32631)
    x = 300000 + 10000 * (np.arange(6) + 0.5)
    y = 5000000 + 10000 * (np.arange(4) + 0.5)
    g = describe_grid(x, y, crs)
    A = cell_areas_m2(g)
    tr = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    # reference: pyproj.Geod on the cell outline densified in UTM and mapped to lon/lat
    i, j = 1, 2  # normalised row 1 (north first), column 2
    x0, x1 = g.xmin + j * g.dx, g.xmin + (j + 1) * g.dx
    y1, y0 = g.ymax - i * g.dy, g.ymax - (i + 1) * g.dy
    n = 200
    xs = np.concatenate([np.linspace(x0, x1, n), np.full(n, x1), np.linspace(x1, x0, n), np.full(n, x0)])
    ys = np.concatenate([np.full(n, y0), np.linspace(y0, y1, n), np.full(n, y1), np.linspace(y1, y0, n)])
    lo, la = tr.transform(xs, ys)
    ref = abs(GEOD.polygon_area_perimeter(lo, la)[0])
    assert A[i, j] == pytest.approx(ref, rel=1e-6)
    assert abs(A[i, j] / 1e8 - 1) > 1e-5  # not the planar area (4.7e-5 off here, 47x the tolerance)


def test_equal_area_crs_keeps_planar_area():
    crs = CRS.from_proj4("+proj=laea +lat_0=45 +lon_0=10 +ellps=WGS84 +units=m")
    g = describe_grid(np.arange(5) * 1000.0, np.arange(3) * 1000.0, crs)
    np.testing.assert_allclose(cell_areas_m2(g), 1e6)


def test_irregular_grid_refused():
    with pytest.raises(GridError, match="irregular"):
        describe_grid(np.array([0, 1, 2, 4.0]), np.array([0, 1.0]), "EPSG:4326")


# --------------------------------------------------------------------------- coverage
def test_cell_ids_follow_file_order():
    # a basin covering exactly one cell must land on that cell, whatever the file's orientation
    lon = np.arange(0.5, 5, 1.0)
    lat = np.arange(10.5, 14, 1.0)
    poly = shapely.box(2, 12, 3, 13)  # cell lon 2.5, lat 12.5
    for lat_order in (lat, lat[::-1]):
        for lon_order in (lon, np.mod(lon - 3, 360)):
            g = describe_grid(lon_order, lat_order, "EPSG:4326")
            m = coverage_matrix(g, [poly if lon_order is lon else shapely.affinity.translate(poly, -3)])
            (idx,) = m.indices
            r, c = divmod(int(idx), lon.size)
            assert lat_order[r] == 12.5
            assert (lon_order[c] if lon_order is lon else (lon_order[c] + 3) % 360) == 2.5
            assert m.data[0] == pytest.approx(1.0)


def random_star(rng, cx, cy, radius, n=14):
    th = np.sort(rng.uniform(0, 2 * np.pi, n))
    r = radius * rng.uniform(0.45, 1.0, n)
    return shapely.Polygon(np.c_[cx + r * np.cos(th), cy + r * np.sin(th)]).buffer(0)


def test_exactextract_and_shapely_engines_agree():
    rng = np.random.default_rng(3)
    lon = np.arange(-4.95, 5, 0.1)
    lat = np.arange(40.05, 45, 0.1)
    g = describe_grid(lon, lat[::-1], "EPSG:4326")
    polys = [random_star(rng, rng.uniform(-3, 3), rng.uniform(41, 44), 0.8) for _ in range(5)]
    polys.append(shapely.MultiPolygon([shapely.box(-4, 41, -3.5, 41.5), shapely.box(3, 43, 3.3, 43.4)]))
    polys.append(shapely.box(-2, 41, 2, 44).difference(shapely.box(-1, 42, 1, 43)))  # a hole
    a = coverage_matrix(g, polys, engine="exactextract").toarray()
    b = coverage_matrix(g, polys, engine="shapely").toarray()
    np.testing.assert_allclose(a, b, atol=1e-9)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(lat=st.sampled_from([-62.0, -30.0, 0.0, 25.0, 48.0, 71.0]), seed=st.integers(0, 10_000),
       radius=st.floats(0.8, 3.0))
def test_basin_area_matches_geodesic_area(lat, seed, radius):
    # reference: pyproj.Geod geodesic polygon area (Karney 2013), edges densified in lon/lat
    rng = np.random.default_rng(seed)
    poly = random_star(rng, 10.0, lat, radius)
    res = 0.1
    lon_c = np.arange(10 - 4 + res / 2, 10 + 4, res)
    lat_c = np.arange(lat - 4 + res / 2, lat + 4, res)
    g = describe_grid(lon_c, lat_c, "EPSG:4326")
    ref = geod_area_lonlat(poly)
    w = build_weights(g, [poly], ["b"], [ref])
    assert w.matrix.nnz >= 100
    assert w.covered_area_m2[0] == pytest.approx(ref, rel=1e-3)


# --------------------------------------------------------------------------- zonal means
@pytest.fixture(scope="module")
def stack():
    rng = np.random.default_rng(11)
    res = 0.05
    lon = np.round(np.arange(-3 + res / 2, 3, res), 6)
    lat = np.round(np.arange(20 + res / 2, 27, res), 6)
    T = 6
    LON, LAT = np.meshgrid(lon, lat)
    data = np.stack([np.sin(LON + t) + 0.3 * LAT + rng.normal(0, 0.1, LAT.shape) for t in range(T)])
    polys = [random_star(rng, rng.uniform(-2, 2), rng.uniform(21.5, 25.5), rng.uniform(0.3, 1.4)) for _ in range(8)]
    return lon, lat, data, polys


def _exactextract_weighted(lon, lat, data, polys, weight_raster):
    import geopandas as gpd
    from exactextract import exact_extract
    from exactextract.raster import NumPyRasterSource

    res = lon[1] - lon[0]
    ext = (lon[0] - res / 2, lat[0] - res / 2, lon[-1] + res / 2, lat[-1] + res / 2)
    gdf = gpd.GeoDataFrame({"i": range(len(polys))}, geometry=polys, crs="EPSG:4326")
    out = []
    for t in range(data.shape[0]):
        v = NumPyRasterSource(data[t][::-1].copy(), *ext, srs_wkt=CRS.from_epsg(4326).to_wkt())
        w = NumPyRasterSource(weight_raster[::-1].copy(), *ext, srs_wkt=CRS.from_epsg(4326).to_wkt())
        r = exact_extract(v, gdf, "weighted_mean", weights=w, output="pandas")
        out.append(r["weighted_mean"].to_numpy())
    return np.array(out).T


def test_means_match_exactextract_weighted_mean(stack):
    # reference: exactextract (PyPI) weighted_mean with wbexplore's ellipsoidal cell areas as its weight raster
    lon, lat, data, polys = stack
    g = describe_grid(lon, lat, "EPSG:4326")
    area_rows = cell_areas_m2(g)[::-1]  # file order (south first)
    w = build_weights(g, polys, [f"b{i}" for i in range(len(polys))], [geod_area_lonlat(p) for p in polys])
    ours, vf = apply_weights_numpy(data, w)
    ref = _exactextract_weighted(lon, lat, data, polys, area_rows)
    np.testing.assert_allclose(ours, ref, rtol=1e-6)
    np.testing.assert_allclose(vf, 1.0, atol=2e-3)


def test_spherical_and_unweighted_means_differ(stack):
    """Show the size of two common shortcuts against area-true means."""
    lon, lat, data, polys = stack
    g = describe_grid(lon, lat, "EPSG:4326")
    ells = cell_areas_m2(g)[::-1]
    # exactextract's area_spherical_m2 uses a sphere of radius 6378137 m
    R = 6378137.0
    dl = np.radians(lon[1] - lon[0])
    edges = np.radians(np.r_[lat - 0.025, lat[-1] + 0.025])
    sph = np.broadcast_to((R * R * dl * np.diff(np.sin(edges)))[:, None], ells.shape)
    a = _exactextract_weighted(lon, lat, data[:1], polys, ells)
    b = _exactextract_weighted(lon, lat, data[:1], polys, np.ascontiguousarray(sph))
    rel = np.max(np.abs(a - b) / np.abs(a))
    assert 0 < rel < 1e-4  # sphere vs ellipsoid: shape of the weights barely changes
    # a basin spanning 5 degrees of latitude: unweighted-by-area mean vs area-true mean of a field = latitude
    tall = shapely.box(-1, 21, 1, 26)
    w = build_weights(g, [tall], ["t"], [geod_area_lonlat(tall)])
    LAT = np.broadcast_to(lat[:, None], (lat.size, lon.size))[None]
    true_mean, _ = apply_weights_numpy(LAT, w)
    plain = LAT[0][(lat > 21) & (lat < 26)].mean()
    diff = plain - true_mean[0, 0]
    # reference: on a sphere the area-true mean of latitude over 21..26 N is
    # int(phi cos phi) / int(cos phi) (scipy.integrate.quad); the ellipsoid changes it by < 1%
    from scipy.integrate import quad

    phi0, phi1 = np.radians(21), np.radians(26)
    sph_mean = np.degrees(quad(lambda p: p * np.cos(p), phi0, phi1)[0] / quad(np.cos, phi0, phi1)[0])
    assert diff == pytest.approx(23.5 - sph_mean, rel=0.03)  # about 0.016 degree of latitude
    assert diff > 0.01


def test_orientation_invariance_and_nan_renormalisation(stack):
    lon, lat, data, polys = stack
    ids = [f"b{i}" for i in range(len(polys))]
    areas = [geod_area_lonlat(p) for p in polys]
    g1 = describe_grid(lon, lat, "EPSG:4326")
    m1, _ = apply_weights_numpy(data, build_weights(g1, polys, ids, areas))
    g2 = describe_grid(np.mod(lon, 360.0)[np.argsort(np.mod(lon, 360))], lat[::-1], "EPSG:4326")
    d2 = data[:, ::-1, :][:, :, np.argsort(np.mod(lon, 360))]
    m2, _ = apply_weights_numpy(d2, build_weights(g2, polys, ids, areas))
    np.testing.assert_allclose(m1, m2, rtol=1e-12)
    # NaN cells drop out; a field constant on valid cells keeps its value, valid_fraction falls
    field = np.full(data.shape, 7.0)
    field[:, :, : lon.size // 2] = np.nan
    w = build_weights(g1, polys, ids, areas)
    m, vf = apply_weights_numpy(field, w)
    ok = np.isfinite(m)
    np.testing.assert_allclose(m[ok], 7.0)
    assert (vf < 0.999).any() and (vf > 0).any()


def test_dask_equals_numpy(stack):
    lon, lat, data, polys = stack
    g = describe_grid(lon, lat, "EPSG:4326")
    w = build_weights(g, polys, [f"b{i}" for i in range(len(polys))], [geod_area_lonlat(p) for p in polys])
    da = xr.DataArray(data, dims=("time", "y", "x"), coords={"time": np.arange(data.shape[0])})
    ref = zonal_mean(da, w)
    lazy = zonal_mean(da.chunk({"time": 2}), w)
    import dask.array as dsa

    assert isinstance(lazy["mean"].data, dsa.Array)
    xr.testing.assert_allclose(lazy.compute(), ref, rtol=1e-13)


@pytest.mark.cluster
def test_local_cluster_equals_local(tmp_path, demo_dir):
    from distributed import Client, LocalCluster

    from wbexplore.pipeline import CoverageWarning, extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        warnings.simplefilter("ignore", ResourceWarning)
        warnings.simplefilter("ignore", DeprecationWarning)
        local = extract(demo_dir / "catalog.yaml", sources=["kestrel", "tansy", "cairn"], cache_dir=tmp_path)
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cl, \
                Client(cl) as client:
            dist = extract(demo_dir / "catalog.yaml", sources=["kestrel", "tansy", "cairn"], client=client,
                           cache_dir=tmp_path)
    for v in ("kestrel", "tansy", "cairn"):
        np.testing.assert_allclose(dist[v].values, local[v].values, rtol=1e-12, equal_nan=True)


# --------------------------------------------------------------------------- cache and bad input
def test_weights_cache_is_keyed_by_geometry(tmp_path):
    from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
    from wbexplore.pipeline import extract

    lon, lat = lonlat_grid(0, 4, 0, 4, 0.25)
    write_nc(tmp_path / "p.nc", np.ones((3, lat.size, lon.size)), lon, lat, monthly("2001-01", 3), var="p",
             units="mm")
    box_basins(tmp_path / "basins.geojson", [(1, 1, 2, 2)])
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}])
    cache = tmp_path / "cache"
    a = extract(cat, cache_dir=cache)
    assert len(list(cache.glob("weights-*"))) == 1
    box_basins(tmp_path / "basins.geojson", [(1, 1, 3, 3)])  # the basin file changes
    b = extract(cat, cache_dir=cache)
    assert len(list(cache.glob("weights-*"))) == 2
    assert float(b.basin_area_km2[0]) == pytest.approx(4 * float(a.basin_area_km2[0]), rel=2e-3)


def test_basin_outside_grid_refused(tmp_path, capsys):
    from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
    from wbexplore.cli import main

    lon, lat = lonlat_grid(0, 4, 0, 4, 0.5)
    write_nc(tmp_path / "p.nc", np.ones((3, lat.size, lon.size)), lon, lat, monthly("2001-01", 3), var="p",
             units="mm")
    box_basins(tmp_path / "basins.geojson", [(1, 1, 2, 2), (20, 20, 21, 21)], ids=["in", "far"])
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}])
    rc = main(["extract", str(cat), "--out", str(tmp_path / "o.nc"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "basin 'far'" in err and "outside" in err and "p.nc" in err
    assert not (tmp_path / "o.nc").exists()


def test_scheduler_that_does_not_answer(tmp_path, capsys):
    from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
    from wbexplore.cli import main

    lon, lat = lonlat_grid(0, 4, 0, 4, 0.5)
    write_nc(tmp_path / "p.nc", np.ones((3, lat.size, lon.size)), lon, lat, monthly("2001-01", 3), var="p",
             units="mm")
    box_basins(tmp_path / "basins.geojson", [(1, 1, 2, 2)])
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["extract", str(cat), "--out", str(tmp_path / "o.nc"), "--quiet",
                   "--scheduler", "tcp://127.0.0.1:1"])
    err = capsys.readouterr().err
    assert rc == 2 and "tcp://127.0.0.1:1" in err and "does not answer" in err
    assert not (tmp_path / "o.nc").exists()


def test_extract_cli_writes_canonical_netcdf(demo_dir, tmp_path, capsys):
    from wbexplore.cli import main

    out = tmp_path / "series.nc"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["extract", str(demo_dir / "catalog.yaml"), "--out", str(out), "--quiet"]) == 0
    ds = xr.open_dataset(out)
    assert ds["kestrel"].dims == ("basin", "time")
    assert ds["kestrel"].attrs["units"] == "mm/month" and ds["kestrel"].attrs["component"] == "P"
    assert ds["quarry"].attrs["units"] == "mm"
    assert "valid_fraction_fennel" in ds and "basin_area_km2" in ds.coords
    assert "history" in ds.attrs and "method" in ds.attrs
    ds.close()


def test_irregular_grid_in_catalog_names_the_file(tmp_path, capsys):
    from utils import box_basins, monthly, write_catalog
    from wbexplore.cli import main

    lon = np.array([0.25, 0.75, 1.25, 2.0, 2.5])  # one uneven step
    lat = np.array([0.25, 0.75, 1.25])
    ds = xr.Dataset({"p": (("time", "lat", "lon"), np.ones((3, 3, 5)), {"units": "mm"})},
                    coords={"time": monthly("2001-01", 3), "lat": lat, "lon": lon})
    ds.to_netcdf(tmp_path / "p.nc")
    box_basins(tmp_path / "basins.geojson", [(0.2, 0.2, 1.0, 1.0)])
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}])
    rc = main(["extract", str(cat), "--out", str(tmp_path / "o.nc"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "p.nc" in err and "source 'p'" in err and "irregular" in err
    assert not (tmp_path / "o.nc").exists()


# --------------------------------------------------------------------------- antimeridian and poles
def _read_one(tmp_path, geom, crs, name="b.gpkg"):
    import geopandas as gpd

    from wbexplore.io.basins import read_basins
    from wbexplore.io.catalog import BasinSpec

    gpd.GeoDataFrame({"bid": ["X1"], "name": ["x"]}, geometry=[geom], crs=crs).to_file(tmp_path / name)
    return read_basins(BasinSpec(path=tmp_path / name, id_field="bid"))


def test_basin_across_the_antimeridian_gets_its_true_area(tmp_path):
    # written the usual way, lon 179 -> -179: its edges are longer than 180 degrees of longitude
    b = _read_one(tmp_path, shapely.Polygon([(179, -17), (-179, -17), (-179, -15), (179, -15)]), "EPSG:4326")
    # reference: pyproj.Geod (Karney 2013) on the geometry split at the antimeridian by hand
    ref = geod_area_lonlat(shapely.box(179, -17, 180, -15)) + geod_area_lonlat(shapely.box(-180, -17, -179, -15))
    assert float(b["area_km2"].iloc[0]) * 1e6 == pytest.approx(ref, rel=1e-6)
    x0, _, x1, _ = b.geometry.iloc[0].bounds
    assert x0 >= -180 and x1 <= 180
    # a cap drawn as a lon/lat box from -180 to 180 keeps its meaning (its full-turn edges are not jumps)
    cap = _read_one(tmp_path, shapely.box(-180, 60, 180, 90), "EPSG:4326", name="cap.gpkg")
    assert float(cap["area_km2"].iloc[0]) * 1e6 == pytest.approx(geod_area_lonlat(shapely.box(-180, 60, 180, 90)),
                                                                 rel=1e-6)


@pytest.mark.parametrize("epsg, pole", [(3031, -90), (3413, 90)])
def test_polar_cap_in_a_polar_projection_gets_its_true_area(tmp_path, epsg, pole):
    t = np.linspace(0, 2 * np.pi, 65)[:-1]
    cap = shapely.Polygon(np.c_[1.0e6 * np.cos(t), 1.0e6 * np.sin(t)])  # 64-gon, 1,000 km about the pole
    b = _read_one(tmp_path, cap, f"EPSG:{epsg}")
    # reference: pyproj.Geod polygon area of the ring densified in the projection (GeographicLib's polygon
    # area handles a ring that goes round a pole), and the planar area in a polar equal-area projection
    x, y = np.asarray(shapely.segmentize(cap, 1000.0).exterior.coords).T
    lon, lat = Transformer.from_crs(f"EPSG:{epsg}", "EPSG:4326", always_xy=True).transform(x, y)
    ref = abs(GEOD.polygon_area_perimeter(lon, lat)[0])
    laea = Transformer.from_crs("EPSG:4326", f"+proj=laea +lat_0={pole} +lon_0=0 +ellps=WGS84", always_xy=True)
    ref2 = shapely.Polygon(np.c_[laea.transform(lon, lat)]).area
    area = float(b["area_km2"].iloc[0]) * 1e6
    assert ref == pytest.approx(ref2, rel=1e-4)
    assert area == pytest.approx(ref, rel=1e-4)
    assert b.geometry.iloc[0].bounds[1 if pole < 0 else 3] == pole


def test_hole_around_a_pole_is_refused_naming_the_basin(tmp_path):
    t = np.linspace(0, 2 * np.pi, 65)[:-1]
    outer = shapely.Polygon(np.c_[2.0e6 * np.cos(t), 2.0e6 * np.sin(t)], [np.c_[1e6 * np.cos(t), 1e6 * np.sin(t)]])
    with pytest.raises(InputError, match="basin 'X1'.*hole.*pole"):
        _read_one(tmp_path, outer, "EPSG:3031")


@pytest.mark.parametrize("lons", ["-180..180", "170..190"])
def test_antimeridian_basin_extracts_over_both_halves(tmp_path, lons):
    from utils import monthly, write_catalog, write_nc
    from wbexplore.pipeline import extract

    import geopandas as gpd

    if lons == "-180..180":
        lon = np.arange(-179.75, 180, 0.5)
    else:  # a regional grid in 0..360 longitudes that stays 0..360
        lon = np.arange(170.25, 190, 0.5)
    lat = np.arange(-19.75, -12, 0.5)
    l180 = np.where(lon > 180, lon - 360, lon)
    # 1 just west of the antimeridian, 3 just east of it, 100 anywhere else (where a basin taken the long
    # way round would reach)
    row = np.where(l180 > 179, 1.0, np.where(l180 < -179, 3.0, 100.0))
    vals = row[None, None, :] * np.ones((2, lat.size, lon.size))
    write_nc(tmp_path / "p.nc", vals, lon, lat, monthly("2001-01", 2), var="p", units="mm")
    gpd.GeoDataFrame({"basin_id": ["X1"], "name": ["x"]},
                     geometry=[shapely.Polygon([(179, -17), (-179, -17), (-179, -15), (179, -15)])],
                     crs="EPSG:4326").to_file(tmp_path / "basins.geojson")
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p"}])
    ds = extract(cat, cache_dir=tmp_path / "cache")  # filterwarnings=error: a CoverageWarning would fail here
    # equal areas on both sides of the antimeridian (symmetric box): the mean of 1 and 3 (arithmetic)
    np.testing.assert_allclose(ds["p"].values, 2.0, rtol=1e-9)
    np.testing.assert_allclose(ds["valid_fraction_p"].values, 1.0, rtol=1e-6)
    assert float(ds["basin_area_km2"][0]) == pytest.approx(47_375, rel=1e-4)  # pyproj.Geod, test above


def test_polar_cap_extracts_on_a_polar_grid(tmp_path):
    import geopandas as gpd
    import pandas as pd

    from utils import write_catalog
    from wbexplore.pipeline import extract

    x = np.arange(-1.5e6 + 12500, 1.5e6, 25000.0)
    X, Y = np.meshgrid(x, x)
    # 1 out to 1,200 km from the pole (beyond the basin), 100 further out
    v = np.where(np.hypot(X, Y) < 1.2e6, 1.0, 100.0)[None] * np.ones((2, 1, 1))
    da = xr.DataArray(v.astype("float32"), dims=("time", "y", "x"), attrs={"units": "mm"},
                      coords={"time": pd.date_range("2001-01", periods=2, freq="MS"), "y": x, "x": x})
    xr.Dataset({"p": da}).to_netcdf(tmp_path / "p.nc")
    t = np.linspace(0, 2 * np.pi, 65)[:-1]
    cap = shapely.Polygon(np.c_[1.0e6 * np.cos(t), 1.0e6 * np.sin(t)])
    gpd.GeoDataFrame({"basin_id": ["C"], "name": ["c"]}, geometry=[cap], crs="EPSG:3031").to_file(tmp_path / "b.gpkg")
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "p.nc", "variable": "p", "crs": "EPSG:3031"}],
                        basins="b.gpkg")
    ds = extract(cat, cache_dir=tmp_path / "cache")
    np.testing.assert_allclose(ds["p"].values, 1.0, rtol=1e-9)
    # the grid's covered area (ellipsoidal cell areas) meets the basin's geodesic area
    np.testing.assert_allclose(ds["valid_fraction_p"].values, 1.0, atol=1e-4)
    # and that area is the cap's (pyproj.Geod, test_polar_cap_in_a_polar_projection_gets_its_true_area)
    assert float(ds["basin_area_km2"][0]) == pytest.approx(3_293_399, rel=1e-4)
