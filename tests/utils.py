"""Small synthetic inputs the tests write themselves."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
import yaml


def lonlat_grid(lon0, lon1, lat0, lat1, res):
    lon = np.round(np.arange(lon0 + res / 2, lon1, res), 9)
    lat = np.round(np.arange(lat0 + res / 2, lat1, res), 9)
    return lon, lat


def write_nc(path, values, lon, lat, times, *, var="v", units="mm/day", descending=False, lon360=False,
             attrs=None):
    lat_c = lat[::-1] if descending else lat
    vals = values[:, ::-1, :] if descending else values
    lon_c = lon
    if lon360:
        lon_c = np.mod(lon, 360.0)
        order = np.argsort(lon_c)
        lon_c = lon_c[order]
        vals = vals[:, :, order]
    da = xr.DataArray(vals.astype(np.float32), dims=("time", "lat", "lon"),
                      coords={"time": times, "lat": lat_c, "lon": lon_c}, attrs={"units": units, **(attrs or {})})
    da["lat"].attrs = {"units": "degrees_north", "standard_name": "latitude"}
    da["lon"].attrs = {"units": "degrees_east", "standard_name": "longitude"}
    xr.Dataset({var: da}).to_netcdf(path)
    return path


def write_tif(path, values, lon, lat, *, units="mm", crs="EPSG:4326"):
    import rasterio
    from rasterio.transform import from_origin

    res = float(lon[1] - lon[0])
    arr = np.asarray(values, dtype=np.float32)
    if arr.ndim == 2:
        arr = arr[None]
    arr = arr[:, ::-1, :]  # north first
    with rasterio.open(path, "w", driver="GTiff", width=arr.shape[2], height=arr.shape[1], count=arr.shape[0],
                       dtype="float32", crs=crs, transform=from_origin(lon[0] - res / 2, lat[-1] + res / 2, res, res),
                       nodata=np.nan) as dst:
        dst.write(arr)
        dst.update_tags(units=units)
    return path


def box_basins(path, boxes, *, crs="EPSG:4326", ids=None):
    import geopandas as gpd
    import shapely

    ids = ids or [f"B{i}" for i in range(len(boxes))]
    gdf = gpd.GeoDataFrame({"basin_id": ids, "name": [f"Basin {i}" for i in ids]},
                           geometry=[shapely.box(*b) for b in boxes], crs=crs)
    gdf.to_file(path, driver="GeoJSON")
    return path


def write_catalog(folder: Path, sources, *, basins="basins.geojson", discharge=None, extra=None, name="catalog.yaml"):
    cat = {"catalog_version": 1, "title": "test", "basins": {"path": basins, "id_field": "basin_id",
                                                              "name_field": "name"}, "sources": sources}
    if discharge:
        cat["discharge"] = discharge
    if extra:
        cat.update(extra)
    p = Path(folder) / name
    p.write_text(yaml.safe_dump(cat, sort_keys=False))
    return p


def monthly(start, n, how="start"):
    m = pd.date_range(start, periods=n, freq="MS")
    if how == "mid":
        return m + pd.to_timedelta(14, unit="D")
    if how == "end":
        return m + pd.offsets.MonthEnd(0)
    return m


def run_cli(argv, capsys):
    """`wbexplore.cli.main` in-process with warnings silenced; returns (status, stdout, stderr)."""
    import warnings

    from wbexplore.cli import main

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def one_line_error(rc, err):
    """Assert the command-line contract for bad input (exit 2, one line, no traceback); return the line."""
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert rc == 2, err
    assert "Traceback" not in err
    assert len(lines) == 1 and lines[0].startswith("wbexplore: error: "), err
    return lines[0]


def v1_study(folder: Path) -> Path:
    """A small version-1 study (two basins, a netCDF and a GeoTIFF product, daily discharge with a gap):
    the input of the regression fixture ``tests/data/v1_series.nc``, written by the code before flows and
    nested basins (catalog version 2) were added. Returns the catalog path."""
    folder = Path(folder)
    lon, lat = lonlat_grid(-2, 2, 0, 3, 0.25)
    t = monthly("2003-01", 18)
    rng = np.random.default_rng(20261203)
    write_nc(folder / "rain.nc", 1 + 4 * rng.random((t.size, lat.size, lon.size)), lon, lat, t, var="pr",
             units="mm/day")
    write_tif(folder / "et.tif", 30 + 60 * rng.random((t.size, lat.size, lon.size)), lon, lat, units="mm")
    write_nc(folder / "tws.nc", 20 * rng.standard_normal((t.size, lat.size, lon.size)), lon, lat, t, var="lwe",
             units="cm")
    box_basins(folder / "basins.geojson", [(-1.6, 0.3, 0.2, 2.7), (0.1, 0.6, 1.7, 2.2)], ids=["A", "B"])
    days = pd.date_range("2003-01-01", "2004-06-30", freq="D")
    q = pd.DataFrame({"date": days.strftime("%Y-%m-%d"), "A": 40 + 20 * rng.random(days.size),
                      "B": 9 + 3 * rng.random(days.size)})
    q.loc[40:44, "A"] = np.nan
    q.to_csv(folder / "q.csv", index=False)
    return write_catalog(folder, [
        {"id": "rain", "component": "P", "path": "rain.nc", "variable": "pr"},
        {"id": "evap", "component": "ET", "path": "et.tif", "units": "mm", "time_start": "2003-01"},
        {"id": "tws", "component": "TWSA", "path": "tws.nc", "variable": "lwe"},
    ], discharge={"path": "q.csv", "layout": "wide", "time_field": "date", "units": "m3/s", "min_coverage": 0.8})


def canonical_series(nb=3, nt=96, *, flows=(("up", "in", 20.0), ("irr", "out", 8.0)), seed=1, close=True):
    """A canonical series whose truth closes exactly (window-matched) with ``flows`` (id, direction, mean
    mm/month): sources P0, P1 (truth, truth + noise), ET0, ET1, TWSA0 (truth monthly means), TWSA1 (noisy)."""
    rng = np.random.default_rng(seed)
    t = pd.date_range("2001-01-01", periods=nt, freq="MS")
    season = np.sin(2 * np.pi * (t.month.values - 3) / 12)
    P = 90 + 60 * season[None] + rng.normal(0, 15, (nb, nt))
    ET = 55 + 30 * season[None] + rng.normal(0, 8, (nb, nt))
    fl = {}
    net = np.zeros((nb, nt))
    for fid, direction, mean in flows:
        v = mean * (1 + 0.3 * np.cos(2 * np.pi * t.month.values / 12))[None] + rng.normal(0, 2, (nb, nt))
        v[-1] = 0.0  # the last basin: the flow does not enter it
        fl[fid] = (direction, v)
        net += v if direction == "in" else -v
    Q = 0.35 * np.clip(P - ET, 1, None)
    F = P - ET - Q + (net if close else 0.0)
    S = np.cumsum(F, axis=1)
    S0 = np.concatenate([np.zeros((nb, 1)), S[:, :-1]], axis=1)
    M = 0.5 * (S0 + S)
    ds = xr.Dataset(coords={"basin": [f"B{i}" for i in range(nb)], "time": t,
                            "basin_area_km2": ("basin", np.linspace(1e3, 5e3, nb))})
    for comp, base in (("P", P), ("ET", ET), ("TWSA", M)):
        for j in range(2):
            v = base if j == 0 else base + rng.normal(0, 5, base.shape)
            ds[f"{comp}{j}"] = (("basin", "time"), v, {"role": "source", "component": comp})
            ds[f"valid_fraction_{comp}{j}"] = (("basin", "time"), np.ones_like(v))
    ds["discharge"] = (("basin", "time"), Q, {"role": "discharge", "component": "Q", "units": "mm/month"})
    for fid, (direction, v) in fl.items():
        ds[f"flow_{fid}"] = (("basin", "time"), v, {"role": "flow", "flow_id": fid, "direction": direction,
                                                    "label": f"flow {fid}", "units": "mm/month",
                                                    "component": "flow"})
    return ds, {"P": P, "ET": ET, "Q": Q, "M": M, "net": net, "flows": fl}
