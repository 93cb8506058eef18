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
    assert list(table.columns[:6]) == ["basin", "unit", "rank", "P", "ET", "TWSA"]
    key = list(zip(table["basin"], table["unit"] == "incremental"))
    assert key == sorted(key)  # by basin, whole before incremental ...
    basins = list(dict.fromkeys(table["basin"]))
    assert len(basins) >= 2
    # the demo nests VEU in VEL and SAU in SAR: exactly those two have incremental rows
    assert sorted(set(table.loc[table["unit"] == "incremental", "basin"])) == ["SAR", "VEL"]
    units = [(b, u) for b, u in dict.fromkeys(zip(table["basin"], table["unit"]))]
    for b, u in units:
        rc, one, err = run_cli(["rank", cat, "--basin", b, "--format", "csv", "--storage-change", "backward",
                                *(["--incremental"] if u == "incremental" else [])], capsys)
        assert rc == 0, err
        ref = pd.read_csv(io.StringIO(one))
        part = table[(table["basin"] == b) & (table["unit"] == u)].drop(columns=["basin", "unit"])
        pd.testing.assert_frame_equal(part.reset_index(drop=True), ref)  # ... then rank: the rows of rank --basin
    rc, out, err = run_cli(["rank", cat, "--all", "--format", "json"], capsys)
    doc = json.loads(out)
    assert doc["basins"] == basins and {r["basin"] for r in doc["rows"]} == set(basins)
    # the JSON carries every option that changes the numbers, and the caution
    rc, out, err = run_cli(["rank", cat, "--basin", "SAR", "--format", "json", "--lag", "1",
                            "--water-year-start", "10"], capsys)
    doc = json.loads(out)
    assert doc["options"]["lag"] == 1 and doc["options"]["water_year_start"] == 10
    assert "Screening-level" in doc["caution"]
    rc, out, err = run_cli(["rank", cat, "--all"], capsys)
    assert rc == 0 and out.splitlines()[1].split()[:3] == ["basin", "unit", "rank"]


@pytest.mark.parametrize("argv, match", [
    ([], "one of the arguments --basin --all is required"),
    (["--all", "--basin", "VEL"], "not allowed with argument"),
    (["--all", "--incremental"], "--incremental goes with --basin"),
    (["--basin", "VEU", "--incremental"], "basin 'VEU' has no upstream basin"),  # the innermost of a pair
    (["--basin", "TIR", "--incremental"], "basin 'TIR' has no upstream basin"),  # not nested at all
    (["--basin", "NOPE", "--incremental"], "--basin 'NOPE' is neither a basin"),
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


def _without_nesting(study):
    """The same study with the catalog's ``basins: downstream_field`` removed (a catalog without nesting)."""
    doc = yaml.safe_load((study / "catalog.yaml").read_text())
    del doc["basins"]["downstream_field"]
    (study / "flat.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    return study / "flat.yaml"


@pytest.mark.parametrize("where", ["innermost", "no_nesting"])
def test_incremental_refused_everywhere_before_writing(study, tmp_path, capsys, where):
    # an innermost basin (VEU, inside VEL) has no upstream basin; with no downstream_field, no basin has
    cat, basin = (study / "catalog.yaml", "VEU") if where == "innermost" else (_without_nesting(study), "VEL")
    sel = tmp_path / "sel.yaml"
    rc, out, err = run_cli(["export", cat, "--basin", basin, "--P", "kestrel", "--ET", "tansy", "--TWSA", "quarry",
                            "--out", sel, "--water-year-start", "10", "--min-valid-fraction", "0.8"], capsys)
    assert rc == 0, err
    doc = yaml.safe_load(sel.read_text())
    assert doc["water_year_start_month"] == 10 and doc["min_valid_fraction"] == 0.8  # options reach the file
    assert "unit" not in doc  # a whole basin's file stays as it was
    for argv, target in (
            (["export", cat, "--basin", basin, "--P", "kestrel", "--ET", "tansy", "--TWSA", "quarry",
              "--out", tmp_path / "x.yaml", "--incremental"], tmp_path / "x.yaml"),
            (["report", cat, "--basin", basin, "--out", tmp_path / "x.html", "--incremental"], tmp_path / "x.html"),
            (["rank", cat, "--basin", basin, "--incremental"], None),
            (["replay", sel, "--incremental"], None)):
        rc, out, err = run_cli(argv, capsys)
        assert f"basin '{basin}' has no upstream basin" in one_line_error(rc, err)
        assert out == "" and (target is None or not target.exists())
    rc, out, err = run_cli(["replay", sel], capsys)
    assert rc == 0, err
