"""Every command against malformed input: exit status 2, one line on stderr naming what is wrong, no
traceback, and no file left behind (DESIGN.md, "Command line contract").

The cases are a table: (command line, text the message must contain). Each runs in-process through
`wbexplore.cli.main`; an exception escaping `main` fails the case just as a traceback would.
"""

from __future__ import annotations

import os
import shutil
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
from wbexplore.cli import main


@pytest.fixture(scope="module")
def master(tmp_path_factory):
    """A small, complete study: one basin, two P, one ET, one TWSA, monthly discharge (4 years)."""
    d = tmp_path_factory.mktemp("cli-bad")
    lon, lat = lonlat_grid(-2, 2, 0, 4, 0.5)
    t = monthly("2001-01", 48)
    rng = np.random.default_rng(1)
    shape = (t.size, lat.size, lon.size)
    write_nc(d / "p1.nc", 3 + rng.random(shape), lon, lat, t, var="pr", units="mm/day")
    write_nc(d / "p2.nc", 3 + rng.random(shape), lon, lat, t, var="pr", units="mm/day")
    write_nc(d / "et.nc", 1 + rng.random(shape), lon, lat, t, var="et", units="mm/day")
    write_nc(d / "tws.nc", 10 * rng.standard_normal(shape), lon, lat, t, var="lwe", units="mm")
    box_basins(d / "basins.geojson", [(-1, 1, 1, 3)], ids=["B1"])
    q = pd.DataFrame({"date": [f"{m:%Y-%m-%d}" for m in t], "basin_id": "B1", "q": 50 + 10 * rng.random(t.size)})
    q.to_csv(d / "q.csv", index=False)
    cat = write_catalog(d, [
        {"id": "p1", "component": "P", "path": "p1.nc", "variable": "pr", "units": "mm/day"},
        {"id": "p2", "component": "P", "path": "p2.nc", "variable": "pr", "units": "mm/day"},
        {"id": "e1", "component": "ET", "path": "et.nc", "variable": "et", "units": "mm/day"},
        {"id": "t1", "component": "TWSA", "path": "tws.nc", "variable": "lwe", "units": "mm"},
    ], discharge={"path": "q.csv", "time_field": "date", "basin_field": "basin_id", "value_field": "q",
                  "units": "m3/s"})
    (d / "not_yaml.yaml").write_text("catalog_version: 1\nsources: [a, b\n")
    (d / "empty.yaml").write_text("")
    (d / "dup.yaml").write_text(cat.read_text() + "sources: []\n")
    (d / "binary.yaml").write_bytes(bytes(range(256)) * 4)
    (d / "a_file.txt").write_text("not a folder\n")
    pd.DataFrame({"date": [f"{m:%Y-%m-%d}" for m in t], "IRR": 1 + rng.random(t.size)}).to_csv(d / "flows.csv",
                                                                                              index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["export", str(cat), "--basin", "B1", "--P", "p1", "--ET", "e1", "--TWSA", "t1",
                     "--out", str(d / "good_selection.yaml")]) == 0
    return d


@pytest.fixture
def study(master, tmp_path):
    """A fresh copy per case, so that a case that destroys a file cannot hide the next one's failure."""
    dest = tmp_path / "study"
    shutil.copytree(master, dest)
    return dest


def _sel(study, edit):
    """A copy of the good selection file with one edit (a line-level text substitution)."""
    text = (study / "good_selection.yaml").read_text()
    old, new = edit
    assert old in text, old
    p = study / f"sel_{abs(hash(edit))}.yaml"
    p.write_text(text.replace(old, new, 1))
    return p


_LISTENING = []


def _busy_port() -> int:
    """A port another socket is listening on (kept open for the rest of the module)."""
    import socket

    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen()
    _LISTENING.append(sock)
    return sock.getsockname()[1]


@pytest.fixture(scope="module", autouse=True)
def _close_listening():
    yield
    while _LISTENING:
        _LISTENING.pop().close()


def _period_line(study):
    return "start: '2001-01'" if "start: '2001-01'" in (study / "good_selection.yaml").read_text() else "start: 2001-01"


_FLOW = {"id": "irr", "basin": "B1", "direction": "out", "path": "flows.csv", "layout": "wide", "time_field": "date",
         "station": "IRR", "units": "m3/s"}


def _flow_cat(study, *, flows=None, boxes=None, drains=None):
    """A copy of the study's catalog with ``flows`` and, with ``boxes``, a basin file nested by ``drains``."""
    import yaml

    doc = yaml.safe_load((study / C).read_text())
    doc["catalog_version"] = 2
    if flows is not None:
        doc["flows"] = flows
    if boxes is not None:
        import geopandas as gpd
        import shapely

        gdf = gpd.GeoDataFrame({"basin_id": list(boxes), "name": list(boxes),
                                "drains_to": [drains.get(b) for b in boxes]},
                               geometry=[shapely.box(*b) for b in boxes.values()], crs="EPSG:4326")
        gdf.to_file(study / "nested.geojson", driver="GeoJSON")
        doc["basins"].update(path="nested.geojson", downstream_field="drains_to")
    p = study / "flow_catalog.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


def _err_cat(study, *, error=None, third_p=False):
    """A copy of the study's catalog with a stated error on p1 (``error``: field -> value, YAML text) and,
    with ``third_p``, a third P product (p2's file again, so that collocation has three products)."""
    text = (study / C).read_text()
    if error:
        field, value = error
        text = text.replace("  variable: pr\n", f"  variable: pr\n  {field}: {value}\n", 1)
    if third_p:
        text = text.replace("sources:\n", "sources:\n- id: p3\n  component: P\n  path: p2.nc\n  variable: pr\n"
                                           "  units: mm/day\n", 1)
    p = study / "err_catalog.yaml"
    p.write_text(text)
    return p


def _estimate(cat, *extra, out="estimate.csv"):
    return ["estimate", str(cat), "--basin", "B1", "--P", "p1", "--TWSA", "t1", *extra, "--out", str(Path(cat).parent / out)]


_B1 = (-1, 1, 1, 3)

# a two-point storage curve per water body (level m, area km2, volume hm3), written low to high
_CURVE = [("RES1", 10.0, 1.0, 0.0), ("RES1", 20.0, 1.5, 12.0)]


def _wb_cat(study, *, lake_ids=("RES1",), levels=("RES1",), curve=_CURVE):
    """A copy of the study's catalog (version 2) with a ``waterbodies`` block: one small lake inside B1
    per id of ``lake_ids``, monthly levels (m) for each station of ``levels``, the curve rows ``curve``."""
    import yaml

    box_basins(study / "lakes.geojson", [(-0.2, 1.8, 0.2, 2.2)] * len(lake_ids), ids=list(lake_ids))
    t = monthly("2001-01", 12)
    pd.DataFrame({"date": t.strftime("%Y-%m-%d"), **{s: 15.0 for s in levels}}).to_csv(study / "levels.csv",
                                                                                         index=False)
    pd.DataFrame(curve, columns=["wb_id", "level", "area", "volume"]).to_csv(study / "curves.csv", index=False)
    doc = yaml.safe_load((study / C).read_text())
    doc["catalog_version"] = 2
    doc["waterbodies"] = {"path": "lakes.geojson", "id_field": "basin_id", "name_field": "name",
                          "level": {"path": "levels.csv", "layout": "wide", "time_field": "date", "units": "m"},
                          "storage_curve": {"path": "curves.csv", "id_field": "wb_id", "level_field": "level",
                                            "area_field": "area", "volume_field": "volume", "area_units": "km2",
                                            "volume_units": "hm3"}}
    p = study / "wb_catalog.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


# (id, argv builder taking the study folder, words the message must contain)
C = "catalog.yaml"
CASES = [
    # catalogs
    ("check missing catalog", lambda d: ["check", str(d / "nope.yaml")], ["nope.yaml"]),
    ("check catalog is a folder", lambda d: ["check", str(d)], ["{study}"]),
    ("check not yaml", lambda d: ["check", str(d / "not_yaml.yaml")], ["not_yaml.yaml"]),
    ("check empty catalog", lambda d: ["check", str(d / "empty.yaml")], ["empty.yaml"]),
    ("check binary catalog", lambda d: ["check", str(d / "binary.yaml")], ["binary.yaml"]),
    ("check duplicate key", lambda d: ["check", str(d / "dup.yaml")], ["sources"]),
    ("extract missing catalog", lambda d: ["extract", str(d / "nope.yaml"), "--out", str(d / "o.nc")], ["nope.yaml"]),
    ("rank missing catalog", lambda d: ["rank", str(d / "nope.yaml"), "--basin", "B1"], ["nope.yaml"]),
    ("export missing catalog", lambda d: ["export", str(d / "nope.yaml"), "--basin", "B1", "--P", "p1", "--ET", "e1",
                                          "--TWSA", "t1", "--out", str(d / "o.yaml")], ["nope.yaml"]),
    ("report missing catalog", lambda d: ["report", str(d / "nope.yaml"), "--basin", "B1", "--out", str(d / "o.html")],
     ["nope.yaml"]),
    # flows and nesting (catalog version 2)
    ("check flow of unknown basin", lambda d: ["check", str(_flow_cat(d, flows=[dict(_FLOW, basin="ZZ")]))],
     ["flow_catalog.yaml", "'basin'", "ZZ"]),
    ("extract flow of unknown basin", lambda d: ["extract", str(_flow_cat(d, flows=[dict(_FLOW, basin="ZZ")])),
                                                 "--out", str(d / "o.nc")], ["flow_catalog.yaml", "'basin'", "ZZ"]),
    ("check flow of unknown station", lambda d: ["check", str(_flow_cat(d, flows=[dict(_FLOW, station="NOPE")]))],
     ["flows.csv", "'station'", "NOPE"]),
    ("check flow direction", lambda d: ["check", str(_flow_cat(d, flows=[dict(_FLOW, direction="up")]))],
     ["'direction'", "'up'"]),
    ("check duplicate flow id", lambda d: ["check", str(_flow_cat(d, flows=[_FLOW, dict(_FLOW, direction="in")]))],
     ["'id'", "'irr'"]),
    ("check flow id is a source id", lambda d: ["check", str(_flow_cat(d, flows=[dict(_FLOW, id="p1")]))],
     ["'id'", "'p1'"]),
    ("check downstream cycle", lambda d: ["check", str(_flow_cat(d, boxes={"B1": _B1, "B2": (-0.5, 1.5, 0.5, 2.5)},
                                                                  drains={"B1": "B2", "B2": "B1"}))],
     ["nested.geojson", "'downstream_field'", "B1 -> B2 -> B1"]),
    ("check downstream unknown", lambda d: ["check", str(_flow_cat(d, boxes={"B1": _B1}, drains={"B1": "ZZ"}))],
     ["nested.geojson", "'downstream_field'", "'ZZ'"]),
    ("check upstream sticks out", lambda d: ["check", str(_flow_cat(d, boxes={"B1": _B1, "B2": (0.5, 1.5, 1.5, 2.5)},
                                                                     drains={"B2": "B1"}))],
     ["nested.geojson", "'downstream_field'", "'B2'", "km2", "50.0%"]),
    ("extract upstream sticks out", lambda d: ["extract", str(_flow_cat(d, boxes={"B1": _B1, "B2": (0.5, 1.5, 1.5,
                                                                                                    2.5)},
                                                                         drains={"B2": "B1"})), "--out",
                                               str(d / "o.nc")], ["'B2'", "50.0%"]),
    # water bodies (catalog version 2): the reader's refusals reach `check`
    ("check level of unknown waterbody", lambda d: ["check", str(_wb_cat(d, levels=("RES1", "RES9")))],
     ["levels.csv", "'RES9'", "not a water body of lakes.geojson"]),
    ("check curve repeats a level", lambda d: ["check", str(_wb_cat(d, curve=_CURVE + [("RES1", 20.0, 2.0, 15.0)]))],
     ["curves.csv", "line 4", "'RES1'", "repeats the level"]),
    ("check curve volume decreases", lambda d: ["check", str(_wb_cat(d, curve=_CURVE + [("RES1", 25.0, 2.0, 9.0)]))],
     ["curves.csv", "line 4", "'RES1'", "'volume' decreases"]),
    ("check waterbody id is a basin id", lambda d: ["check", str(_wb_cat(d, lake_ids=("B1",), levels=("B1",),
                                                                         curve=[("B1",) + r[1:] for r in _CURVE]))],
     ["lakes.geojson", "'B1'", "id of a basin"]),
    # extract
    ("extract out folder missing", lambda d: ["extract", str(d / C), "--out", str(d / "no" / "o.nc")], ["no"]),
    ("extract out is a folder", lambda d: ["extract", str(d / C), "--out", str(d), "--force"], ["{study}"]),
    ("extract workers 0", lambda d: ["extract", str(d / C), "--out", str(d / "o.nc"), "--workers", "0"], ["workers"]),
    ("extract cache dir is a file", lambda d: ["extract", str(d / C), "--out", str(d / "o.nc"), "--cache-dir",
                                              str(d / "a_file.txt")], ["a_file.txt"]),
    ("extract bad scheduler", lambda d: ["extract", str(d / C), "--out", str(d / "o.nc"), "--scheduler",
                                         "nonsense://x:1"], ["nonsense://x:1"]),
    # rank
    ("rank unknown basin", lambda d: ["rank", str(d / C), "--basin", "ZZ"], ["ZZ"]),
    ("rank bad month", lambda d: ["rank", str(d / C), "--basin", "B1", "--start", "2003-13"], ["2003-13"]),
    ("rank start after end", lambda d: ["rank", str(d / C), "--basin", "B1", "--start", "2004-01", "--end",
                                        "2002-01"], ["2004-01"]),
    ("rank unknown metric", lambda d: ["rank", str(d / C), "--basin", "B1", "--by", "accuracy"], ["accuracy"]),
    ("rank negative lag", lambda d: ["rank", str(d / C), "--basin", "B1", "--lag", "-5"], ["-5"]),
    ("rank huge lag", lambda d: ["rank", str(d / C), "--basin", "B1", "--lag", "1000"], ["1000"]),
    ("rank lag not a number", lambda d: ["rank", str(d / C), "--basin", "B1", "--lag", "x"], ["'x'"]),
    ("rank bad storage change", lambda d: ["rank", str(d / C), "--basin", "B1", "--storage-change", "sideways"],
     ["sideways"]),
    ("rank negative min-valid", lambda d: ["rank", str(d / C), "--basin", "B1", "--min-valid", "-3"], ["-3"]),
    # export
    ("export unknown source", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "zz", "--ET", "e1", "--TWSA",
                                         "t1", "--out", str(d / "o.yaml")], ["zz"]),
    ("export wrong component", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "e1", "--ET", "e1", "--TWSA",
                                          "t1", "--out", str(d / "o.yaml")], ["e1"]),
    ("export out equals series", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "p1", "--ET", "e1",
                                            "--TWSA", "t1", "--out", str(d / "o.yaml"), "--series",
                                            str(d / "o.yaml")], ["o.yaml"]),
    ("export series bad suffix", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "p1", "--ET", "e1",
                                            "--TWSA", "t1", "--out", str(d / "o.yaml"), "--series",
                                            str(d / "o.xls")], ["o.xls"]),
    ("export onto the catalog", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "p1", "--ET", "e1",
                                           "--TWSA", "t1", "--out", str(d / C), "--force"], [C]),
    ("export onto a product", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "p1", "--ET", "e1",
                                         "--TWSA", "t1", "--out", str(d / "p1.yaml"), "--series", str(d / "p2.nc"),
                                         "--force"], ["p2.nc"]),
    ("export period outside data", lambda d: ["export", str(d / C), "--basin", "B1", "--P", "p1", "--ET", "e1",
                                              "--TWSA", "t1", "--start", "1990-01", "--end", "1991-12", "--out",
                                              str(d / "o.yaml")], ["1990-01"]),
    # report
    ("report only P", lambda d: ["report", str(d / C), "--basin", "B1", "--P", "p1", "--out", str(d / "o.html")],
     ["--ET"]),
    ("report onto discharge", lambda d: ["report", str(d / C), "--basin", "B1", "--out", str(d / "q.csv"), "--force"],
     ["q.csv"]),
    # replay
    ("replay missing file", lambda d: ["replay", str(d / "nope.yaml")], ["nope.yaml"]),
    ("replay not yaml", lambda d: ["replay", str(d / "not_yaml.yaml")], ["not_yaml.yaml"]),
    ("replay a folder", lambda d: ["replay", str(d)], ["{study}"]),
    ("replay a catalog", lambda d: ["replay", str(d / C)], [C]),
    ("replay bad version", lambda d: ["replay", str(_sel(d, ("wbexplore_selection: 1", "wbexplore_selection: 7")))],
     ["wbexplore_selection"]),
    ("replay bad method", lambda d: ["replay", str(_sel(d, ("method: central", "method: sideways")))], ["sideways"]),
    ("replay lag text", lambda d: ["replay", str(_sel(d, ("discharge_lag_months: 0", "discharge_lag_months: soon")))],
     ["discharge_lag_months"]),
    ("replay lag huge", lambda d: ["replay", str(_sel(d, ("discharge_lag_months: 0",
                                                          "discharge_lag_months: 100000")))],
     ["discharge_lag_months"]),
    ("replay valid fraction > 1", lambda d: ["replay", str(_sel(d, ("min_valid_fraction: 0.5",
                                                                    "min_valid_fraction: 7.5")))],
     ["min_valid_fraction"]),
    ("replay water year 13", lambda d: ["replay", str(_sel(d, ("water_year_start_month: 1",
                                                               "water_year_start_month: 13")))],
     ["water_year_start_month"]),
    ("replay bad period", lambda d: ["replay", str(_sel(d, (_period_line(d), "start: '2001-13'")))], ["2001-13"]),
    ("replay sources not a mapping", lambda d: ["replay", str(_sel(d, ("sources:\n", "sources: 3\nold_sources:\n")))],
     ["sources"]),
    # serve (refused before any series are loaded or a server starts)
    ("serve port out of range", lambda d: ["serve", str(d / C), "--port", "99999"], ["99999"]),
    ("serve unknown address", lambda d: ["serve", str(d / C), "--address", "nowhere.invalid"], ["nowhere.invalid"]),
    ("serve port in use", lambda d: ["serve", str(d / C), "--port", str(_busy_port())], ["--port"]),
    # estimate by difference
    ("estimate unknown term", lambda d: _estimate(d / C, "--term", "Ev"), ["--term 'Ev'", "ET, Q, dS"]),
    ("estimate term P", lambda d: _estimate(d / C, "--term", "P"), ["--term 'P'", "ET, Q, dS"]),
    ("estimate out not csv or nc", lambda d: _estimate(d / C, "--term", "ET", out="e.xlsx"), ["e.xlsx", ".csv or .nc"]),
    ("estimate unknown uncertainty", lambda d: _estimate(d / C, "--term", "ET", "--uncertainty", "best"),
     ["--uncertainty 'best'"]),
    ("estimate stated asked, none stated", lambda d: _estimate(d / C, "--term", "ET", "--uncertainty", "stated"),
     ["'p1'", "no stated error"]),
    ("estimate collocation with two products", lambda d: _estimate(d / C, "--term", "ET", "--uncertainty", "collocation"),
     ["at least three P products", "there are 2 (p1, p2)"]),
    ("estimate stated error infinite", lambda d: _estimate(_err_cat(d, error=("absolute_error_mm", ".inf")), "--term", "ET"),
     ["p1", "absolute_error_mm", "inf", "positive finite"]),
    ("estimate stated error not a number", lambda d: _estimate(_err_cat(d, error=("relative_error", ".nan")), "--term", "ET"),
     ["p1", "relative_error", "nan", "positive finite"]),
    ("estimate stated error zero", lambda d: _estimate(_err_cat(d, error=("relative_error", "0")), "--term", "ET"),
     ["p1", "relative_error", "0", "positive finite"]),
    ("estimate stated error negative", lambda d: _estimate(_err_cat(d, error=("absolute_error_mm", "-2")), "--term", "ET"),
     ["p1", "absolute_error_mm", "-2", "positive finite"]),
    ("estimate period too short for collocation", lambda d: _estimate(_err_cat(d, third_p=True), "--term", "ET",
                                                                      "--start", "2002-01", "--end", "2002-12"),
     ["period too short", "12 months", "at least 24 needed"]),
    # demo
    ("demo out is a file", lambda d: ["demo", "--out", str(d / "a_file.txt"), "--no-launch"], ["a_file.txt"]),
]


def _listing(d: Path) -> dict:
    return {str(p.relative_to(d)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(d.rglob("*")) if not p.name.startswith("sel_")}


@pytest.mark.parametrize("argv, expect", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_input_exit_2_one_line_nothing_written(study, capsys, argv, expect):
    args = argv(study)
    before = _listing(study)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            rc = main(args)
        except SystemExit as exc:  # argparse
            rc = exc.code
    cap = capsys.readouterr()
    err = cap.err.strip()
    assert rc == 2, (rc, err)
    assert "Traceback" not in cap.err and "Traceback" not in cap.out
    assert len(err.splitlines()) == 1, err
    for word in expect:
        word = word.format(study=study.name)
        assert word in err, (word, err)
    assert _listing(study) == before, "a file was written, changed or removed"
    leftovers = [p for p in study.rglob("*") if p.name.endswith((".tmp", ".partial"))]
    assert not leftovers, leftovers
    assert os.path.isfile(study / C)


def test_the_waterbody_catalog_of_the_table_is_good_and_check_lists_it(study, capsys):
    """The rows above differ from this catalog by one edit each: unedited, `check` accepts it and lists the
    water body with its level period and the curve's ranges as written in curves.csv (m, hm3)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["check", str(_wb_cat(study))])
    cap = capsys.readouterr()
    assert rc == 0, cap.err
    assert "water bodies: 1 in lakes.geojson" in cap.out
    line = next(ln for ln in cap.out.splitlines() if ln.strip().startswith("RES1 "))
    assert "levels 2001-01 to 2001-12 (monthly)" in line and line.endswith("curve 10 to 20 m, 0 to 12 hm3"), line
