"""Implausible values are named, finite metrics or a reason, true areas at the antimeridian and the poles,
and long GeoTIFF globs under a low open-file limit."""

import subprocess
import sys
import textwrap
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
from wbexplore.balance.plausibility import BOUNDS, ImplausibleValueWarning
from wbexplore.pipeline import extract

LON, LAT = lonlat_grid(-3, 3, 10, 14, 0.5)
NT = 12


def _implausible_study(tmp_path):
    """P (mm per month) with, in basin B0 only: one negative month, one of 50,000 mm and one infinite;
    ET with one month of -5 mm in B1 and one of -0.3 mm (dew: within tolerance) in B0."""
    times = monthly("2001-01", NT)
    p = np.full((NT, LAT.size, LON.size), 80.0)
    west = LON < 0
    p[2][:, west] = -20.0
    p[5][:, west] = 50_000.0
    p[7][:, west] = np.inf
    et = np.full((NT, LAT.size, LON.size), 40.0)
    et[3][:, ~west] = -5.0
    et[4][:, west] = -0.3
    write_nc(tmp_path / "p.nc", p, LON, LAT, times, var="p", units="mm")
    write_nc(tmp_path / "et.nc", et, LON, LAT, times, var="et", units="mm")
    box_basins(tmp_path / "basins.geojson", [(-2.5, 10.5, -0.5, 13.5), (0.5, 10.5, 2.5, 13.5)])
    return write_catalog(tmp_path, [{"id": "rain", "component": "P", "path": "p.nc", "variable": "p"},
                                    {"id": "evap", "component": "ET", "path": "et.nc", "variable": "et"}])


def test_implausible_values_one_warning_per_source_naming_basin_and_count(tmp_path):
    cat = _implausible_study(tmp_path)
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        ds = extract(cat, cache_dir=tmp_path / "cache")
    msgs = [str(w.message) for w in rec if issubclass(w.category, ImplausibleValueWarning)]
    assert len(msgs) == 2, msgs  # one per source, not one per value
    rain = next(m for m in msgs if "'rain'" in m)
    evap = next(m for m in msgs if "'evap'" in m)
    # basin and month count for each kind, and the decision (masked) stated
    assert "3 implausible basin-month values masked as missing" in rain
    assert f"below {BOUNDS['P'][0]:g} mm/month in basin 'B0' 1 month" in rain
    assert f"above {BOUNDS['P'][1]:g} mm/month in basin 'B0' 1 month" in rain
    assert "non-finite in basin 'B0' 1 month" in rain
    assert "'B1'" not in rain
    assert "below -0.5 mm/month in basin 'B1' 1 month" in evap and "'B0'" not in evap
    # masked months are missing, the rest untouched, dew kept
    r = ds["rain"].sel(basin="B0").values
    assert np.isnan(r[[2, 5, 7]]).all() and np.isfinite(np.delete(r, [2, 5, 7])).all()
    assert np.isfinite(ds["rain"].sel(basin="B1").values).all()
    assert ds["evap"].sel(basin="B0").values[4] == pytest.approx(-0.3, abs=1e-6)
    assert np.isnan(ds["evap"].sel(basin="B1").values[3])
    assert ds["rain"].attrs["implausible_masked"] == 3


def test_clean_series_raise_no_plausibility_warning(tmp_path):
    times = monthly("2001-01", NT)
    write_nc(tmp_path / "p.nc", np.full((NT, LAT.size, LON.size), 9000.0), LON, LAT, times, var="p", units="mm")
    box_basins(tmp_path / "basins.geojson", [(-2.5, 10.5, -0.5, 13.5)])
    cat = write_catalog(tmp_path, [{"id": "rain", "component": "P", "path": "p.nc", "variable": "p"}])
    with warnings.catch_warnings():
        warnings.simplefilter("error", ImplausibleValueWarning)
        ds = extract(cat, cache_dir=tmp_path / "cache")
    assert np.isfinite(ds["rain"].values).all()
