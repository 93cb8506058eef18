"""`wbexplore rank CATALOG --all`, `--incremental` refusals and option plumbing on the command line.

References: the per-basin `rank --basin ID` output (the batch table must hold exactly its rows), the
stdlib csv and json readers; the bad-input contract (exit 2, one line, nothing written).
"""

from __future__ import annotations

import io
import json

import pandas as pd
import pytest
import yaml

from conftest import copy_demo
from utils import one_line_error, run_cli


@pytest.fixture
def study(demo_dir, tmp_path):
    return copy_demo(demo_dir, tmp_path)


def test_rank_all_is_every_basins_ranking(study, capsys):
    cat = study / "catalog.yaml"
    rc, out, err = run_cli(["rank", cat, "--all", "--format", "csv", "--storage-change", "backward"], capsys)
    assert rc == 0, err
    table = pd.read_csv(io.StringIO(out), dtype={"basin": str})
    assert list(table.columns[:5]) == ["basin", "rank", "P", "ET", "TWSA"]
    assert list(table["basin"]) == sorted(table["basin"])  # by basin ...
    basins = list(dict.fromkeys(table["basin"]))
    assert len(basins) >= 2
    for b in basins:
        rc, one, err = run_cli(["rank", cat, "--basin", b, "--format", "csv", "--storage-change", "backward"], capsys)
        assert rc == 0, err
        ref = pd.read_csv(io.StringIO(one))
        part = table[table["basin"] == b].drop(columns="basin").reset_index(drop=True)
        pd.testing.assert_frame_equal(part, ref)  # ... then rank, the very rows of rank --basin
    rc, out, err = run_cli(["rank", cat, "--all", "--format", "json"], capsys)
    doc = json.loads(out)
    assert doc["basins"] == basins and {r["basin"] for r in doc["rows"]} == set(basins)
    rc, out, err = run_cli(["rank", cat, "--all"], capsys)
    assert rc == 0 and out.splitlines()[1].split()[:2] == ["basin", "rank"]


@pytest.mark.parametrize("argv, match", [
    ([], "one of the arguments --basin --all is required"),
    (["--all", "--basin", "VEL"], "not allowed with argument"),
    (["--all", "--incremental"], "--incremental goes with --basin"),
    (["--basin", "VEL", "--incremental"], "basin 'VEL' has no upstream basin"),
    (["--basin", "VEL", "--water-year-start", "0"], "--water-year-start"),
    (["--basin", "VEL", "--min-valid-fraction", "1.5"], "--min-valid-fraction"),
])
def test_rank_refusals(study, capsys, argv, match):
    try:
        rc, out, err = run_cli(["rank", study / "catalog.yaml", *argv], capsys)
    except SystemExit as exc:  # argparse's refusal: its own one line (cli._Parser), exit 2
        cap = capsys.readouterr()
        rc, out, err = exc.code, cap.out, cap.err
        assert rc == 2 and len(err.strip().splitlines()) == 1 and match in err, err
    else:
        assert match in one_line_error(rc, err)
    assert out == ""


def test_incremental_refused_everywhere_before_writing(study, tmp_path, capsys):
    cat = study / "catalog.yaml"
    sel = tmp_path / "sel.yaml"
    rc, out, err = run_cli(["export", cat, "--basin", "VEL", "--P", "kestrel", "--ET", "tansy", "--TWSA", "quarry",
                            "--out", sel, "--water-year-start", "10", "--min-valid-fraction", "0.8"], capsys)
    assert rc == 0, err
    doc = yaml.safe_load(sel.read_text())
    assert doc["water_year_start_month"] == 10 and doc["min_valid_fraction"] == 0.8  # options reach the file
    for argv, target in (
            (["export", cat, "--basin", "VEL", "--P", "kestrel", "--ET", "tansy", "--TWSA", "quarry",
              "--out", tmp_path / "x.yaml", "--incremental"], tmp_path / "x.yaml"),
            (["report", cat, "--basin", "VEL", "--out", tmp_path / "x.html", "--incremental"], tmp_path / "x.html"),
            (["replay", sel, "--incremental"], None)):
        rc, out, err = run_cli(argv, capsys)
        assert "basin 'VEL' has no upstream basin" in one_line_error(rc, err)
        assert target is None or not target.exists()
    rc, out, err = run_cli(["replay", sel], capsys)
    assert rc == 0, err
