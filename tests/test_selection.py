"""Selection export and exact replay, series export (CSV, CF netCDF), HTML report, atomic writes."""

import hashlib
import re
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

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
    assert doc["sources"]["P"]["id"] == "heron" and len(doc["provenance"]["sources"]["heron"]["sha256"]) == 64
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


# --------------------------------------------------------------------------- compact selection files (issue 17, item 8)
# the choice and its options first, then what it gave, then provenance (a file of the demo's whole basin with flows)
WHOLE_BASIN_KEYS = ["wbexplore_selection", "basin", "sources", "period", "storage_change", "discharge_lag_months",
                    "min_valid_fraction", "water_year_start_month", "q_relative_error", "unit_system", "flows",
                    "metrics", "uncertainty_source", "uncertainty_notes", "caution", "catalog", "provenance",
                    "created", "versions"]
OLD_FIXTURE = Path(__file__).parent / "fixtures" / "selection_v1_before_compact.yaml"


def _manifest_sha256(folder, relpaths):
    """hashlib: SHA-256 of the lines GNU `sha256sum` prints (`<hex>  <path>`), files sorted by path."""
    lines = "".join(f"{hashlib.sha256((folder / r).read_bytes()).hexdigest()}  {r}\n" for r in sorted(relpaths))
    return hashlib.sha256(lines.encode()).hexdigest()


def _scale_netcdf(path, variable, factor=1.01):
    ds = xr.open_dataset(path).load()
    ds[variable] = ds[variable] * factor
    path.unlink()
    ds.to_netcdf(path)


def test_file_reads_as_configuration(study, tmp_path):
    from wbexplore.io.yamlsafe import load_yaml
    from wbexplore.selection import KEY_ORDER

    out = tmp_path / "sel.yaml"
    assert _export(study, out) == 0
    text = out.read_text()
    doc = load_yaml(text, source=out)  # the project's strict loader reads it
    assert list(doc) == WHOLE_BASIN_KEYS and [k for k in KEY_ORDER if k in doc] == WHOLE_BASIN_KEYS
    # was 33 057 bytes (one line per file, every product of the catalog): under 4 KB now
    assert len(out.read_bytes()) < 4096
    assert "Screening-level" in doc["caution"] and "licensed professional practice" in doc["caution"]
    prov = doc["provenance"]
    assert set(prov["sources"]) == {"heron", "tansy", "quarry"}
    # every component's uncertainty here is collocation or the spread: all the other products are needed
    assert set(doc["uncertainty_source"].values()) <= {"collocation", "spread", "gauge"}
    assert set(prov["uncertainty_sources"]) == {"kestrel", "plover", "sedge", "fennel", "cairn"}
    # digests checked with hashlib (stdlib) over the files on disk
    assert prov["sources"]["heron"] == {"files": 1, "sha256": _manifest_sha256(study, ["grids/heron_p_0p25.nc"])}
    plover = [p.relative_to(study).as_posix() for p in (study / "grids" / "plover").glob("plover_rain_*.tif")]
    assert len(plover) == 240
    assert prov["uncertainty_sources"]["plover"] == {"files": 240, "sha256": _manifest_sha256(study, plover)}
    assert prov["inputs"]["discharge"]["sha256"] == _manifest_sha256(study, ["discharge.csv"])
    assert doc["catalog"]["sha256"] == hashlib.sha256((study / "catalog.yaml").read_bytes()).hexdigest()
    if shutil.which("sha256sum"):  # GNU coreutils gives the same digest (same lines, same order)
        listing = subprocess.run(["sha256sum", *sorted(plover)], cwd=study, capture_output=True, check=True).stdout
        assert hashlib.sha256(listing).hexdigest() == prov["uncertainty_sources"]["plover"]["sha256"]


def test_changed_unused_product_is_no_difference(study, tmp_path, capsys):
    # a stated P error (catalog field absolute_error_mm): P's uncertainty needs no other P product
    doc = yaml.safe_load((study / "catalog.yaml").read_text())
    next(s for s in doc["sources"] if s["id"] == "heron")["absolute_error_mm"] = 4.0
    (study / "stated.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    out = tmp_path / "sel.yaml"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["export", str(study / "stated.yaml"), "--basin", "VEL", "--P", "heron", "--ET", "tansy",
                     "--TWSA", "quarry", "--start", "2003-01", "--end", "2018-12", "--out", str(out)]) == 0
    sel = yaml.safe_load(out.read_text())
    assert sel["uncertainty_source"]["P"] == "stated"
    assert set(sel["provenance"]["uncertainty_sources"]) == {"sedge", "fennel", "cairn"}
    # kestrel and plover are used by nothing: changing one is no difference
    _scale_netcdf(study / "grids" / "kestrel_p_0p1.nc", "precip")
    rc, cap = _replay(out, capsys)
    assert rc == 0 and "reproduced" in cap.out, cap.out + cap.err
    # a product the ET collocation uses, and a flow's station table (never hashed before: a bug), are
    _scale_netcdf(study / "grids" / "sedge_et_0p25.nc", "evap")
    irr = pd.read_csv(study / "irrigation.csv")
    irr.loc[50, "IRR-K4"] = irr.loc[50, "IRR-K4"] * 2 + 1
    irr.to_csv(study / "irrigation.csv", index=False)
    rc, cap = _replay(out, capsys)
    assert rc == 1
    assert re.search(r"source sedge \(uncertainty\) +1 file\(s\) +sha256 changed", cap.out), cap.out
    assert re.search(r"flow irrigation +1 file\(s\) +sha256 changed", cap.out), cap.out
    assert "kestrel" not in cap.out


def test_file_of_the_previous_writer_still_replays(study, capsys):
    # written by the writer before compact provenance (tests/fixtures, saved before the change): one line per file
    old = study / "old_selection.yaml"
    shutil.copy(OLD_FIXTURE, old)
    assert "provenance" not in yaml.safe_load(old.read_text())
    rc, cap = _replay(old, capsys)
    assert rc == 0 and "reproduced" in cap.out, cap.out + cap.err
    _scale_netcdf(study / "grids" / "tansy_et_daily_0p25.nc", "ET")  # a used file: named, file by file
    rc, cap = _replay(old, capsys)
    assert rc == 1 and re.search(r"source tansy +grids/tansy_et_daily_0p25.nc +sha256 changed", cap.out), cap.out


def test_water_body_file_of_the_previous_writer_still_replays(study, capsys):
    old = study / "old_selection.yaml"
    shutil.copy(OLD_FIXTURE.with_name("selection_v1_before_compact_waterbody.yaml"), old)
    rc, cap = _replay(old, capsys)
    assert rc == 0 and "reproduced" in cap.out, cap.out + cap.err


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


def test_a_flow_without_its_recorded_digest_is_a_difference(study, tmp_path, capsys):
    """A selection file whose provenance lacks a flow's station table cannot vouch for it: replay names it (as it
    does a product whose files were not recorded) instead of skipping it (found by review)."""
    out = tmp_path / "sel.yaml"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["export", str(study / "catalog.yaml"), "--basin", "VEL", "--P", "heron", "--ET", "tansy",
                     "--TWSA", "quarry", "--out", str(out)]) == 0
    doc = yaml.safe_load(out.read_text())
    assert "irrigation" in doc["provenance"]["flows"]
    del doc["provenance"]["flows"]["irrigation"]
    out.write_text(yaml.safe_dump(doc, sort_keys=False))
    rc, cap = _replay(out, capsys)
    assert rc == 1 and re.search(r"flow irrigation .*its station table was not recorded", cap.out), cap.out
