"""Strict reading of YAML, selection files and station tables; exit statuses that mean what they say.

Each test here reproduced a failure of the code before it (silently wrong numbers, a traceback, a hang
or the wrong exit status). References: the YAML 1.1/1.2 specifications say keys of a mapping are unique
("JSON-like" duplicate keys are an error, YAML 1.2 section 3.2.1.1); POSIX shells report a pipeline's
failure through the status of its members (common practice: `set -o pipefail`).
"""

from __future__ import annotations

import io
import math
import os
import time
import warnings
from pathlib import Path

import pandas as pd
import pytest
import yaml

from utils import one_line_error, run_cli
from wbexplore.cli import main
from wbexplore.errors import InputError


# --------------------------------------------------------------------------- helpers
_run = run_cli
_one_line_error = one_line_error


def _catalog_doc(demo_dir: Path) -> dict:
    """The demo catalog with absolute paths (so that edited copies can live anywhere)."""
    doc = yaml.safe_load((demo_dir / "catalog.yaml").read_text())
    doc["basins"]["path"] = str(demo_dir / doc["basins"]["path"])
    doc["discharge"]["path"] = str(demo_dir / doc["discharge"]["path"])
    for s in doc["sources"]:
        s["path"] = str(demo_dir / s["path"])
    for f in doc.get("flows", []):
        f["path"] = str(demo_dir / f["path"])
    wb = doc.get("waterbodies")
    if wb is not None:  # the reservoir: outline, levels and storage curve
        for d in (wb, wb["level"], wb["storage_curve"]):
            d["path"] = str(demo_dir / d["path"])
    return doc


def _write_catalog(demo_dir, tmp_path, *, append: str = "", doc=None, name="catalog.yaml") -> Path:
    doc = doc or _catalog_doc(demo_dir)
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False) + append)
    return p


# --------------------------------------------------------------------------- YAML read strictly
def test_duplicate_key_refused_naming_key_and_line(demo_dir, tmp_path, capsys):
    cat = _write_catalog(demo_dir, tmp_path, append="title: a second title\n")
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    n = len(cat.read_text().splitlines())
    assert "duplicate key 'title'" in line and f"line {n}" in line


def test_second_sources_key_refused(demo_dir, tmp_path, capsys):
    # last-wins would silently drop every earlier source
    doc = _catalog_doc(demo_dir)
    extra = yaml.safe_dump({"sources": [doc["sources"][0]]}, sort_keys=False)
    cat = _write_catalog(demo_dir, tmp_path, append=extra)
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert "duplicate key 'sources'" in line and str(cat) in line


def _bomb(levels: int, width: int = 10) -> str:
    parts = ["&l0 [" + ", ".join(["lol"] * width) + "]"]
    for i in range(1, levels):
        parts.append(f"&l{i} [" + ", ".join([f"*l{i - 1}"] * width) + "]")
    return "[" + ", ".join(parts) + "]"


def test_alias_bomb_refused_fast(demo_dir, tmp_path, capsys):
    # 10**9 leaves once expanded: the old reader expanded them when it turned the description into text
    cat = _write_catalog(demo_dir, tmp_path, append=f"description: {_bomb(9)}\n")
    t0 = time.perf_counter()
    rc, _, err = _run(["check", cat], capsys)
    took = time.perf_counter() - t0
    line = _one_line_error(rc, err)
    assert "alias" in line and "line" in line and "write the value out" in line
    assert took < 2.0


def test_deep_nesting_refused(demo_dir, tmp_path, capsys):
    cat = _write_catalog(demo_dir, tmp_path, append="description: " + "[" * 20000 + "]" * 20000 + "\n")
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert "nested" in line


def test_yaml_reader_unit():
    from wbexplore.io.yamlsafe import load_yaml

    assert load_yaml("a: 1\nb: [x, {c: 2}]\n", source="s.yaml") == {"a": 1, "b": ["x", {"c": 2}]}
    assert load_yaml(b"a: .inf\n", source="s.yaml") == {"a": math.inf}
    with pytest.raises(InputError, match=r"s.yaml: line 2: duplicate key 'a' \(first on line 1\)"):
        load_yaml("a: 1\na: 2\n", source="s.yaml")
    with pytest.raises(InputError, match="line 1: key 1 is not text"):
        load_yaml("1: x\n", source="s.yaml")
    with pytest.raises(InputError, match="tag"):
        load_yaml("a: !!python/name:os.system x\n", source="s.yaml")
    with pytest.raises(InputError, match="merge key"):
        load_yaml("a: {<<: {b: 1}}\n", source="s.yaml")
    # the bound is on depth, not on size: 50 levels are fine, 51 are not
    assert load_yaml("[" * 50 + "]" * 50, source="s.yaml") is not None
    with pytest.raises(InputError, match="nested deeper than 50"):
        load_yaml("[" * 51 + "]" * 51, source="s.yaml")


# --------------------------------------------------------------------------- selection files
@pytest.fixture(scope="module")
def exported(demo_dir, tmp_path_factory):
    """A selection file exported once from the demo catalog (read-only use of the demo)."""
    d = tmp_path_factory.mktemp("sel")
    out = d / "sel.yaml"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["export", str(demo_dir / "catalog.yaml"), "--basin", "VEL", "--P", "heron", "--ET", "tansy",
                   "--TWSA", "quarry", "--start", "2003-01", "--end", "2018-12", "--out", str(out)])
    assert rc == 0
    return out


def _mutated(exported: Path, name: str, edits: dict) -> Path:
    doc = yaml.safe_load(exported.read_text())
    for dotted, value in edits.items():
        node = doc
        keys = dotted.split(".")
        for k in keys[:-1]:
            node = node[int(k)] if isinstance(node, list) else node[k]
        node[keys[-1]] = value
    p = exported.parent / f"{name}.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


_HEX = "0" * 64
MALFORMED = [
    # (field named in the message, edits)
    ("wbexplore_selection", {"wbexplore_selection": True}),
    ("catalog.path", {"catalog.path": ["catalog.yaml"]}),
    ("catalog.sha256", {"catalog.sha256": "abc"}),
    ("basin.id", {"basin.id": 17}),
    ("period.start", {"period.start": "2003-13"}),
    ("period.end", {"period.end": "2018/12"}),
    ("period", {"period.start": "2010-01", "period.end": "2009-12"}),
    ("sources.P.id", {"sources.P.id": ["heron"]}),
    ("sources.ET", {"sources.ET": "tansy"}),
    ("storage_change.method", {"storage_change.method": "sideways"}),
    ("storage_change.window_matched", {"storage_change.window_matched": "no"}),
    ("storage_change.fill_gaps", {"storage_change.fill_gaps": "yes"}),
    ("discharge_lag_months", {"discharge_lag_months": 2.5}),
    ("discharge_lag_months", {"discharge_lag_months": -1}),
    ("discharge_lag_months", {"discharge_lag_months": 13}),
    ("discharge_lag_months", {"discharge_lag_months": True}),
    ("min_valid_fraction", {"min_valid_fraction": 1.5}),
    ("min_valid_fraction", {"min_valid_fraction": "half"}),
    ("water_year_start_month", {"water_year_start_month": 13}),
    ("water_year_start_month", {"water_year_start_month": 1.5}),
    ("q_relative_error", {"q_relative_error": -0.1}),
    ("q_relative_error", {"q_relative_error": math.inf}),
    ("q_relative_error", {"q_relative_error": math.nan}),
    ("metrics", {"metrics": [1, 2]}),
    ("metrics.rmse", {"metrics.rmse": "small"}),
    ("metrics.rmse", {"metrics.rmse": True}),
    ("provenance", {"provenance": ["x"]}),
    ("provenance.extra", {"provenance.extra": {}}),
    ("provenance.sources", {"provenance.sources": "heron"}),
    ("provenance.sources.heron.sha256", {"provenance.sources.heron.sha256": "zz"}),
    ("provenance.sources.heron.files", {"provenance.sources.heron.files": 0}),
    ("provenance.sources.heron.files", {"provenance.sources.heron.files": "one"}),
    ("provenance.inputs.basins", {"provenance.inputs.basins": "basins.geojson"}),
    ("provenance.uncertainty_sources.kestrel.sha256", {"provenance.uncertainty_sources.kestrel.sha256": None}),
]
# the spelling before compact provenance (one {path, sha256} per file), still read: checked on a file of that writer
OLD_SPELLING = [
    ("sources.P.files.0.path", {"sources.P.files.0.path": 5}),
    ("sources.P.files.0.sha256", {"sources.P.files.0.sha256": "zz"}),
    ("sources.TWSA.files", {"sources.TWSA.files": "quarry.nc"}),
    ("inputs.basins", {"inputs.basins": "basins.geojson"}),
    ("inputs.discharge.sha256", {"inputs.discharge.sha256": 12}),
    ("uncertainty_sources", {"uncertainty_sources": ["x"]}),
    ("inputs", {"inputs": []}),
]


@pytest.fixture(scope="module")
def exported_old(exported):
    """The saved file of the writer before compact provenance (tests/fixtures), naming the demo's catalog."""
    doc = yaml.safe_load((Path(__file__).parent / "fixtures" / "selection_v1_before_compact.yaml").read_text())
    doc["catalog"]["path"] = yaml.safe_load(exported.read_text())["catalog"]["path"]
    p = exported.parent / "old_writer.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


def _refused_before_extraction(exported, name, field, edits, capsys, monkeypatch):
    """Replay of ``exported`` with ``edits`` is refused in one line naming the file and ``field``, before any
    computation."""
    import wbexplore.selection as selmod

    def no_extract(*a, **k):  # a malformed file must be refused before any computation
        raise AssertionError("extraction started")

    monkeypatch.setattr(selmod, "_extract_for", no_extract)
    p = _mutated(exported, name, edits)
    line = _one_line_error(*_run(["replay", p], capsys)[::2])
    assert str(p) in line and f"field '{field}'" in line


@pytest.mark.parametrize("i", range(len(MALFORMED)), ids=[f"{f}-{i}" for i, (f, _) in enumerate(MALFORMED)])
def test_malformed_selection_field(exported, i, capsys, monkeypatch):
    _refused_before_extraction(exported, f"bad{i}", *MALFORMED[i], capsys, monkeypatch)


@pytest.mark.parametrize("i", range(len(OLD_SPELLING)), ids=[f"{f}-{i}" for i, (f, _) in enumerate(OLD_SPELLING)])
def test_malformed_old_spelling_field(exported_old, i, capsys, monkeypatch):
    _refused_before_extraction(exported_old, f"old_bad{i}", *OLD_SPELLING[i], capsys, monkeypatch)


def test_nonfinite_metrics_compare_equal():
    from wbexplore.selection import _clean_metrics, _close

    inf, nan = math.inf, math.nan
    assert _close(inf, inf) and _close(-inf, -inf) and _close(None, nan) and _close(nan, None)
    assert not _close(inf, -inf) and not _close(inf, 1.0) and not _close(None, 1.0) and not _close(1.0, -inf)
    clean = _clean_metrics({"a": inf, "b": -inf, "c": nan, "d": 2})
    assert clean == {"a": inf, "b": -inf, "c": None, "d": 2}
    back = yaml.safe_load(yaml.safe_dump(clean))
    assert back["a"] == inf and back["b"] == -inf and back["c"] is None


def test_replay_never_opens_paths_outside_the_catalog(exported_old, demo_dir, capsys, monkeypatch):
    # paths are recorded only in the spelling before compact provenance: a file of that writer
    exported = exported_old
    import wbexplore.selection as selmod

    real = selmod.file_sha256
    seen = []

    def recording(path):
        seen.append(Path(path).resolve())
        if Path(path).resolve() in (Path("/"), Path("/etc/passwd")):
            return _HEX  # what the old code would have computed by reading (or walking) it
        return real(path)

    monkeypatch.setattr(selmod, "file_sha256", recording)
    doc = yaml.safe_load(exported.read_text())
    n_up = len(Path(demo_dir).resolve().parts) + 2
    for name, bad in (("passwd", "../" * n_up + "etc/passwd"), ("root", "/")):
        p = _mutated(exported, name, {"sources.P.files.0.path": bad, "sources.P.files.0.sha256": _HEX})
        rc, out, err = _run(["replay", p], capsys)
        assert rc == 1, err
        assert "not a file of the catalog" in out and bad in out
        assert "Traceback" not in err
    allowed = {Path(demo_dir).resolve()} | {q.resolve() for q in Path(demo_dir).rglob("*")}
    assert seen and all(s in allowed for s in seen), [s for s in seen if s not in allowed]
    assert doc  # the original file is untouched


def test_replay_exits_1_on_a_closed_pipe(exported, monkeypatch, capsys):
    # `wbexplore replay FILE | head -1`: the reader has gone when the table is written
    p = _mutated(exported, "changed", {"metrics.rmse": 12345.0})
    r, w = os.pipe()
    os.close(r)
    closed = io.TextIOWrapper(os.fdopen(w, "wb"), line_buffering=True)
    monkeypatch.setattr("sys.stdout", closed)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rc = main(["replay", str(p)])
    finally:
        try:
            closed.close()
        except BrokenPipeError:  # the old code left the pipe as it was
            pass
    assert rc == 1
    assert "1 difference" in capsys.readouterr().err


# --------------------------------------------------------------------------- exit statuses
@pytest.mark.parametrize("lag", ["-5", "1000", "13"])
def test_rank_lag_validated_like_export(demo_dir, lag, capsys, monkeypatch):
    import wbexplore.cli as cli

    monkeypatch.setattr(cli, "_series", lambda args: pytest.fail("lag must be checked before loading"))
    line = _one_line_error(*_run(["rank", demo_dir / "catalog.yaml", "--basin", "VEL", "--lag", lag], capsys)[::2])
    assert f"lag {lag} must be between 0 and 12 months" in line
    line2 = _one_line_error(*_run(["export", demo_dir / "catalog.yaml", "--basin", "VEL", "--P", "heron", "--ET",
                                   "tansy", "--TWSA", "quarry", "--lag", lag, "--out",
                                   demo_dir.parent / "never.yaml"], capsys)[::2])
    assert line2 == line
    assert not (demo_dir.parent / "never.yaml").exists()
    line3 = _one_line_error(*_run(["report", demo_dir / "catalog.yaml", "--basin", "VEL", "--lag", lag, "--out",
                                   demo_dir.parent / "never.html"], capsys)[::2])
    assert line3 == line and not (demo_dir.parent / "never.html").exists()


@pytest.mark.parametrize("address", ["foo", "tcp://", "nonsense://x:1", "tcp://127.0.0.1:1", "tcp://host:port"])
def test_bad_scheduler_address(demo_dir, tmp_path, address, capsys):
    out = tmp_path / "x.nc"
    t0 = time.perf_counter()
    line = _one_line_error(*_run(["extract", demo_dir / "catalog.yaml", "--out", out, "--scheduler", address,
                                  "--quiet"], capsys)[::2])
    assert "--scheduler" in line and repr(address) in line
    assert time.perf_counter() - t0 < 6.0  # the old code waited for its 8 s connect timeout, or crashed
    assert not out.exists() and not list(tmp_path.iterdir())


# --------------------------------------------------------------------------- station tables
def _discharge_catalog(demo_dir, tmp_path, rows: pd.DataFrame | None = None, text: str | None = None):
    q = tmp_path / "q.csv"
    if text is not None:
        q.write_text(text)
    else:
        rows.to_csv(q, index=False)
    doc = _catalog_doc(demo_dir)
    doc["discharge"]["path"] = str(q)
    return _write_catalog(demo_dir, tmp_path, doc=doc), q


def _read(cat):
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.discharge import read_discharge
    from wbexplore.pipeline import load_basins

    c = open_catalog(cat)
    return read_discharge(c.discharge, load_basins(c)["area_km2"])


def test_identical_duplicate_row_collapses_with_warning(demo_dir, tmp_path):
    from wbexplore.io.discharge import DuplicateRowsWarning

    rows = pd.read_csv(demo_dir / "discharge.csv", dtype=str)
    (tmp_path / "ref").mkdir()
    ref_cat, _ = _discharge_catalog(demo_dir, tmp_path / "ref", rows)
    ref = _read(ref_cat)
    dup = pd.concat([rows, rows.iloc[[7]]], ignore_index=True)
    cat, q = _discharge_catalog(demo_dir, tmp_path, dup)
    with pytest.warns(DuplicateRowsWarning) as rec:
        got = _read(cat)
    msg = str(rec[0].message)
    assert str(q) in msg and "1 duplicated row" in msg and rows.iloc[7]["basin_id"] in msg
    assert rows.iloc[7]["date"] in msg
    # the duplicate changes nothing: every basin keeps its discharge (the old reader emptied them all)
    assert int(got.notnull().sum()) == int(ref.notnull().sum()) > 0
    assert got.equals(ref)


def test_conflicting_duplicate_refused_naming_both_values(demo_dir, tmp_path, capsys):
    rows = pd.read_csv(demo_dir / "discharge.csv", dtype=str)
    other = rows.iloc[[7]].copy()
    old = rows.iloc[7]["q_m3s"]
    other["q_m3s"] = "999.5"
    cat, q = _discharge_catalog(demo_dir, tmp_path, pd.concat([rows, other], ignore_index=True))
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert str(q) in line and rows.iloc[7]["basin_id"] in line and rows.iloc[7]["date"] in line
    assert old in line and "999.5" in line


def test_header_only_table_refused(demo_dir, tmp_path, capsys):
    cat, q = _discharge_catalog(demo_dir, tmp_path, text="date,basin_id,q_m3s\n")
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert str(q) in line and "no rows" in line


def test_missing_column_does_not_echo_the_header(demo_dir, tmp_path, capsys):
    text = "date,basin_id,q_m3,secret_token_abc\n2003-01,VEL,1.0,x\n"
    cat, q = _discharge_catalog(demo_dir, tmp_path, text=text)
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert "'q_m3s'" in line and "did you mean 'q_m3'" in line
    assert "secret_token_abc" not in line and "has:" not in line


def test_daily_and_monthly_decided_per_station_by_spacing(demo_dir, tmp_path):
    # one station daily, the others monthly: the daily one is averaged, the monthly ones kept as they are
    rows = pd.read_csv(demo_dir / "discharge.csv", dtype=str)
    bid = rows["basin_id"].iloc[0]
    monthly_rows = rows[rows["basin_id"] != bid]
    days = pd.date_range("2003-01-01", "2003-02-28", freq="D")
    daily = pd.DataFrame({"date": [f"{d:%Y-%m-%d}" for d in days], "basin_id": bid,
                          "q_m3s": ["2.0" if d.month == 1 else "4.0" for d in days]})
    daily = daily[daily["date"] != "2003-02-10"]  # February misses a day
    cat, _ = _discharge_catalog(demo_dir, tmp_path, pd.concat([monthly_rows, daily], ignore_index=True))
    got = _read(cat)
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    area = load_basins(open_catalog(cat))["area_km2"][bid] * 1e6
    # 2 m3/s over 31 days as depth over the basin (arithmetic)
    assert float(got.sel(basin=bid, time="2003-01-01")) == pytest.approx(2.0 * 86400 * 31 / area * 1000)
    assert math.isnan(float(got.sel(basin=bid, time="2003-02-01")))
    other = monthly_rows["basin_id"].iloc[0]
    assert int(got.sel(basin=other).notnull().sum()) == len(monthly_rows[monthly_rows["basin_id"] == other])


# --------------------------------------------------------------------------- every command, bad input
def _bad_catalogs(demo_dir, folder: Path) -> dict:
    """Malformed catalogs (and station tables) by name -> (catalog, file the message must name)."""
    good = yaml.safe_dump(_catalog_doc(demo_dir), sort_keys=False)
    out = {
        "duplicate key": good + "title: again\n",
        "alias": good + "description: &d x\nlabel_copy: *d\n",
        "nesting": good + "description: " + "{a: " * 60 + "1" + "}" * 60 + "\n",
        "not YAML": good + "description: [unclosed\n",
        "tag": good + "description: !!python/object/apply:os.system [echo hi]\n",
        "not text key": good.replace("title:", "1:"),
    }
    paths = {}
    for name, text in out.items():
        p = folder / (name.replace(" ", "_") + ".yaml")
        p.write_bytes(text.encode())
        paths[name] = (p, p)
    rows = pd.read_csv(demo_dir / "discharge.csv", dtype=str)
    for name, table in (("conflicting rows", pd.concat([rows, rows.iloc[[3]].assign(q_m3s="0.5")])),
                        ("header only", rows.iloc[:0])):
        sub = folder / name.replace(" ", "_")
        sub.mkdir()
        paths[name] = _discharge_catalog(demo_dir, sub, table)  # (catalog, the file at fault)
    return paths


_COMMANDS = {
    "check": lambda c, o: ["check", c],
    "extract": lambda c, o: ["extract", c, "--out", o / "x.nc", "--quiet"],
    "rank": lambda c, o: ["rank", c, "--basin", "VEL"],
    "export": lambda c, o: ["export", c, "--basin", "VEL", "--P", "heron", "--ET", "tansy", "--TWSA", "quarry",
                            "--out", o / "s.yaml", "--series", o / "s.csv"],
    "report": lambda c, o: ["report", c, "--basin", "VEL", "--out", o / "r.html"],
}
# reading a station table needs the series first for rank, export and report: check and extract stand for them
_TABLE_CASES = ("conflicting rows", "header only")


def test_every_command_refuses_bad_catalogs(demo_dir, tmp_path, capsys):
    cats = _bad_catalogs(demo_dir, tmp_path)
    seen = 0
    for name, (cat, at_fault) in cats.items():
        for cmd, argv in _COMMANDS.items():
            if name in _TABLE_CASES and cmd not in ("check", "extract"):
                continue
            out = tmp_path / f"out-{cmd}"
            out.mkdir(exist_ok=True)
            rc, _, err = _run(argv(cat, out), capsys)
            lines = [ln for ln in err.splitlines() if ln.strip() and not ln.startswith("wbexplore: warning:")]
            assert rc == 2 and len(lines) == 1 and lines[0].startswith("wbexplore: error: "), (name, cmd, rc, err)
            assert "Traceback" not in err and str(at_fault) in lines[0], (name, cmd, err)
            assert not list(out.iterdir()), (name, cmd, list(out.iterdir()))
            seen += 1
    assert seen == 6 * 5 + 2 * 2


def test_glob_longer_than_the_descriptor_limit_is_read(tmp_path, capsys):
    """Files are opened a bounded number at a time (the glob reader closes each after its metadata), so a
    series of more files than the process may hold open is read; before, file number ~N was blamed."""
    import resource

    from utils import box_basins, lonlat_grid, write_catalog, write_tif

    lon, lat = lonlat_grid(0, 4, 0, 4, 0.5)
    (tmp_path / "t").mkdir()
    for m in pd.date_range("2000-01", periods=120, freq="MS"):
        write_tif(tmp_path / "t" / f"p_{m:%Y-%m}.tif", [[1.0] * lon.size] * lat.size, lon, lat)
    box_basins(tmp_path / "basins.geojson", [(1, 1, 2, 2)])
    cat = write_catalog(tmp_path, [{"id": "p", "component": "P", "path": "t/p_*.tif", "date_format": "%Y-%m",
                                    "units": "mm"}])
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    # room for what is open now plus a few dozen: fewer than the 120 files of the series
    resource.setrlimit(resource.RLIMIT_NOFILE, (len(os.listdir("/proc/self/fd")) + 40, hard))
    try:
        rc, out, err = _run(["check", cat], capsys)
    finally:
        resource.setrlimit(resource.RLIMIT_NOFILE, (soft, hard))
    assert rc == 0, err
    assert "2000-01..2009-12" in out and "ok: 1 sources validate" in out
