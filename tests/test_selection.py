"""Selection export and exact replay, series export (CSV, CF netCDF), HTML report, atomic writes."""

import re
import subprocess
import sys
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

from conftest import copy_demo
from wbexplore.balance import Selection, compute_selection
from wbexplore.cli import main
from wbexplore.selection import series_dataset, write_series_csv, write_series_netcdf


@pytest.fixture
def study(demo_dir, tmp_path):
    return copy_demo(demo_dir, tmp_path)


def _export(study, out, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return main(["export", str(study / "catalog.yaml"), "--basin", "VEL", "--P", "heron", "--ET", "tansy",
                     "--TWSA", "quarry", "--start", "2003-01", "--end", "2018-12", "--out", str(out), *kw.get("extra", [])])


def _replay(path, capsys):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["replay", str(path)])
    return rc, capsys.readouterr()


def test_round_trip_exact(study, tmp_path, capsys):
    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    doc = yaml.safe_load(out.read_text())
    assert doc["wbexplore_selection"] == 1
    assert doc["sources"]["P"]["id"] == "heron" and len(doc["sources"]["P"]["files"][0]["sha256"]) == 64
    assert doc["period"] == {"start": "2003-01", "end": "2018-12"}
    assert "Screening-level" in doc["caution"] and doc["versions"]["wbexplore"]
    rc, cap = _replay(out, capsys)
    assert rc == 0, cap.err
    assert "reproduced" in cap.out
    # the recorded metrics are the engine's numbers for the selection
    from wbexplore.pipeline import extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = extract(study / "catalog.yaml", sources=["heron", "tansy", "quarry"])
    m = compute_selection(ds, Selection("VEL", "heron", "tansy", "quarry", start="2003-01", end="2018-12")).metrics
    assert doc["metrics"]["rmse"] == m["rmse"] and doc["metrics"]["kge"] == m["kge"]


def test_edited_grid_fails_naming_source(study, tmp_path, capsys):
    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    p = study / "grids" / "heron_p_0p25.nc"
    ds = xr.open_dataset(p).load()
    ds["tp"] = ds["tp"] * 1.01
    p.unlink()
    ds.to_netcdf(p)
    rc, cap = _replay(out, capsys)
    assert rc == 1
    assert "source heron" in cap.out and "sha256 changed" in cap.out
    assert re.search(r"metric rmse", cap.out)


def test_unknown_source_id_exits_2(study, tmp_path, capsys):
    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    text = out.read_text().replace("id: tansy", "id: tansy_v9")
    out.write_text(text)
    rc, cap = _replay(out, capsys)
    assert rc == 2 and "'tansy_v9'" in cap.err and len(cap.err.strip().splitlines()) == 1


@pytest.mark.parametrize("edit, expect", [
    (lambda d: d.pop("metrics"), "'metrics' is missing"),
    (lambda d: d.update(wbexplore_selection=7), "version 7"),
    (lambda d: d["period"].update(start="2040-01", end="2041-01"), "outside the data"),
    (lambda d: d["catalog"].update(path="elsewhere/catalog.yaml"), "not found (moved?)"),
])
def test_bad_selection_files(study, tmp_path, capsys, edit, expect):
    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    doc = yaml.safe_load(out.read_text())
    edit(doc)
    out.write_text(yaml.safe_dump(doc))
    rc, cap = _replay(out, capsys)
    assert rc == 2 and expect in cap.err


def test_catalog_changed_is_named(study, tmp_path, capsys):
    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    cat = study / "catalog.yaml"
    cat.write_text(cat.read_text() + "\n# edited\n")
    rc, cap = _replay(out, capsys)
    assert rc == 1 and "catalog" in cap.out and "sha256 changed" in cap.out


def test_refuses_overwrite_and_missing_folder(study, tmp_path, capsys):
    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    before = out.read_bytes()
    assert _export(study, out) == 2
    assert "exists" in capsys.readouterr().err
    assert out.read_bytes() == before
    missing = tmp_path / "no" / "such" / "sel.yaml"
    assert _export(study, missing) == 2
    assert "does not exist" in capsys.readouterr().err and not missing.parent.exists()
    assert _export(study, out, extra=["--force"]) == 0


def test_failure_leaves_no_partial_file(study, tmp_path, capsys):
    out = tmp_path / "sel.yaml"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["export", str(study / "catalog.yaml"), "--basin", "VEL", "--P", "heron", "--ET", "tansy",
                   "--TWSA", "quarry", "--start", "2030-01", "--out", str(out), "--series", str(tmp_path / "s.csv")])
    assert rc == 2
    assert list(tmp_path.iterdir()) == [study]


@pytest.fixture(scope="module")
def result(demo_series):
    return compute_selection(demo_series, Selection("VEL", "heron", "tansy", "quarry"))


def test_csv_reads_back_identically(result, tmp_path):
    for units in ("mm", "m3", "m3/s"):
        p = tmp_path / f"s_{units.replace('/', '')}.csv"
        write_series_csv(result, p, unit_system=units)
        back = pd.read_csv(p, comment="#", index_col="month")
        from wbexplore.selection import _series_frame

        ref = _series_frame(result, units)
        pd.testing.assert_frame_equal(back, ref, check_dtype=False, rtol=0, atol=0)


def test_netcdf_is_cf_and_reads_back(result, tmp_path):
    import cf_xarray  # noqa: F401  (registers .cf)
    import netCDF4

    p = tmp_path / "s.nc"
    write_series_netcdf(result, p)
    ref = series_dataset(result)
    with xr.open_dataset(p) as back:
        back = back.load()
    xr.testing.assert_allclose(back.drop_attrs(deep=False), ref.drop_attrs(deep=False), rtol=0, atol=0)
    for v in ref.data_vars:
        for k, val in ref[v].attrs.items():
            assert np.all(back[v].attrs[k] == val), (v, k)
    # CF decoding by cf-xarray: standard names, bounds and cell methods are found
    assert "lwe_thickness_of_precipitation_amount" in back.cf.standard_names
    assert back.cf["lwe_thickness_of_precipitation_amount"].name == "P"
    assert back.cf.bounds["time"] == ["time_bnds"]
    assert back["P"].attrs["cell_methods"].startswith("time: sum")
    # the netCDF4 library reads the same numbers
    with netCDF4.Dataset(p) as nc:
        np.testing.assert_array_equal(np.ma.filled(nc["residual"][:], np.nan), ref["residual"].values)
        assert nc.Conventions == "CF-1.8" and nc["P"].units == "mm"


def test_report_cli_writes_self_contained_html(study, tmp_path, capsys):
    out = tmp_path / "r.html"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["report", str(study / "catalog.yaml"), "--basin", "ZEF", "--out", str(out)])
    assert rc == 0
    text = out.read_text()
    assert "Screening-level" in text and "Every combination" in text and "Method notes" in text
    # issue 16: the source is named. In Zefron heron's collocation error variance (3.5 mm2) is within 1.645 of
    # its sampling standard errors (7.0 mm2) of zero: P falls back to the spread and says why (review of issue
    # 16; it was used before); ET keeps collocation, and the text says it sees random error only
    assert "Used here: P spread (spread of kestrel, plover, heron (collocation cannot separate heron" in text
    assert "ET collocation (triple collocation with" in text and "random error only" in text
    assert not re.search(r'<script[^>]+src="(?!data:)', text)  # no external or relative scripts
    assert not re.search(r'<link[^>]+href="http', text)


def test_core_import_does_not_pull_widgets():
    code = ("import sys, wbexplore.balance, wbexplore.spatial, wbexplore.pipeline, wbexplore.selection; "
            "bad = [m for m in ('panel', 'hvplot', 'ipywidgets', 'holoviews', 'bokeh') if m in sys.modules]; "
            "print(bad); sys.exit(1 if bad else 0)")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert r.returncode == 0, r.stdout + r.stderr
