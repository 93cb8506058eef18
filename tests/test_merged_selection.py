"""A merged source exported, replayed and reported (issue 16, item 2: "the merged series is a source like any
other (rankable, exportable, ...)").

Outside references: the inverse-variance weighted mean of independent estimates (weights 1/v_k, variance
1/sum(1/v_k); e.g. Cochran 1954, Biometrics 10:101) computed here with numpy for one month where the closure
constraint moves nothing the test relies on; SHA-256 from the standard library's `hashlib` for the recorded
digests. The rest checks that the file replays what the library computes (consistency: common practice).
"""

from __future__ import annotations

import hashlib
import json
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

from conftest import copy_demo
from wbexplore.balance import Selection, compute_selection
from wbexplore.balance.merge import merge_form, merge_products, merged_label, with_merged
from wbexplore.cli import main

# stated absolute errors (mm) of the demo's products: the merge weighs by them (collocation cannot separate the
# demo's scaled-copy products from zero and refuses, which is right: see test_merge_refusal_is_one_line)
ERRORS = {"kestrel": 9.0, "plover": 6.0, "heron": 12.0, "sedge": 5.0, "fennel": 7.0, "tansy": 9.0,
          "quarry": 10.0, "cairn": 14.0}


@pytest.fixture
def study(demo_dir, tmp_path):
    dest = copy_demo(demo_dir, tmp_path)
    cat = dest / "catalog.yaml"
    doc = yaml.safe_load(cat.read_text())
    for s in doc["sources"]:
        if s["id"] in ERRORS:
            s["absolute_error_mm"] = ERRORS[s["id"]]
    cat.write_text(yaml.safe_dump(doc, sort_keys=False))
    return dest


def _cli(args, capsys):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main([str(a) for a in args])
    return rc, capsys.readouterr()


def _export(study, out, capsys, *extra, P="merged_P", ET="sedge", TWSA="quarry"):
    return _cli(["export", study / "catalog.yaml", "--basin", "VEL", "--P", P, "--ET", ET, "--TWSA", TWSA,
                 "--start", "2004-01", "--end", "2015-12", "--out", out, *extra], capsys)


def _series(study):
    from wbexplore.pipeline import extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return extract(study / "catalog.yaml", basins=["VEL"])


def test_merged_export_records_the_merge_and_replays(study, tmp_path, capsys):
    """The file names the variant, the closure form, the products merged per component and where their errors
    came from; every product merged has its digest (sha256 of its files, as `sha256sum` lists them); the
    recorded metrics are those of the library's merged series; replay rebuilds the merge and reproduces them."""
    out = tmp_path / "merged.yaml"
    rc, cap = _export(study, out, capsys, "--series", tmp_path / "merged.csv")
    assert rc == 0, cap.err
    doc = yaml.safe_load(out.read_text())
    assert doc["sources"]["P"] == {"id": "merged_P", "label": f"{merged_label('ckf')} P"}
    m = doc["merge"]
    assert m["method"] == "ckf" and "Kalman" in m["variant"]
    assert (m["storage_change"], m["window_matched"]) == ("central", True)
    assert m["products"] == {"P": ["kestrel", "plover", "heron"], "ET": ["sedge", "fennel", "tansy"],
                             "TWSA": ["quarry", "cairn"]}
    assert m["error_variance_source"] == {"P": "stated", "ET": "stated", "TWSA": "stated"}
    assert list(doc).index("merge") == list(doc).index("sources") + 1  # read as configuration: the choice first
    # a digest for each product merged that is not itself chosen (the chosen ones are under `sources`)
    prov = doc["provenance"]
    assert sorted(prov["merged_from"]) == ["cairn", "fennel", "heron", "kestrel", "plover", "tansy"]
    kestrel = study / "grids" / "kestrel_p_0p1.nc"
    line = f"{hashlib.sha256(kestrel.read_bytes()).hexdigest()}  grids/kestrel_p_0p1.nc\n"
    assert prov["merged_from"]["kestrel"] == {"files": 1, "sha256": hashlib.sha256(line.encode()).hexdigest()}
    assert doc["uncertainty_source"]["P"] == "posterior"
    # the metrics are the library's (merge in the selection's form, then the closure of the merged source)
    ds = _series(study)
    sel = Selection("VEL", "merged_P", "sedge", "quarry", start="2004-01", end="2015-12")
    merged = merge_products(ds, method="ckf", basins=["VEL"], options=merge_form("central", True))
    res = compute_selection(with_merged(ds, merged), sel)
    assert doc["metrics"]["rmse"] == pytest.approx(res.metrics["rmse"], rel=1e-12)
    assert doc["metrics"]["kge"] == pytest.approx(res.metrics["kge"], rel=1e-12)
    # the series written beside it are the merged P's (window-matched as the balance takes it), not a product's
    csv = pd.read_csv(tmp_path / "merged.csv", comment="#", index_col=0)
    assert np.allclose(csv["P"].to_numpy(), res.frame["P"].to_numpy(), equal_nan=True)
    own = compute_selection(ds, Selection("VEL", "plover", "sedge", "quarry", start="2004-01", end="2015-12"))
    assert not np.allclose(csv["P"].to_numpy(), own.frame["P"].to_numpy(), equal_nan=True)
    rc, cap = _cli(["replay", out], capsys)
    assert rc == 0, cap.err + cap.out
    assert "reproduced" in cap.out


def test_merged_p_is_the_inverse_variance_mean_where_closure_moves_it_little(study, tmp_path, capsys):
    """Outside formula: with stated errors 9, 6 and 12 mm the unconstrained merged P is
    (x1/81 + x2/36 + x3/144) / (1/81 + 1/36 + 1/144); the closure then moves it by its share of the residual,
    a few times its prior standard error at most. The merged P a selection file records (built in the
    selection's form) against numpy on the products' basin means."""
    from wbexplore.selection import with_merge

    full = _series(study)
    sel = Selection("VEL", "merged_P", "sedge", "quarry")
    one, block = with_merge(full, sel, method="ckf")
    assert block["products"]["P"] == ["kestrel", "plover", "heron"]
    ds = full.sel(basin="VEL")
    x = np.stack([ds[s].to_numpy() for s in ("kestrel", "plover", "heron")])
    w = 1 / np.array([81.0, 36.0, 144.0])[:, None]
    ivm = (x * w).sum(0) / w.sum(0)
    se_prior = np.sqrt(1 / w.sum())  # 4.65 mm: the prior standard error of the merged P
    moved = np.abs(one["merged_P"].sel(basin="VEL").to_numpy() - ivm)
    ok = np.isfinite(moved)
    assert ok.sum() > 100
    assert np.median(moved[ok]) < 2 * se_prior  # the constraint moves a month by its share of the residual
    assert not np.allclose(moved[ok], 0)  # and it does move it: the budget is forced to close


def test_a_changed_product_that_was_merged_is_a_difference(study, tmp_path, capsys):
    """A product the merged P was built from, not itself chosen, changed on disk: replay exits 1 and names it."""
    out = tmp_path / "merged.yaml"
    assert _export(study, out, capsys)[0] == 0
    f = study / "grids" / "kestrel_p_0p1.nc"
    with xr.open_dataset(f) as g:
        g = g.load()
    g["precip"] = g["precip"] * 1.01
    f.unlink()
    g.to_netcdf(f)
    rc, cap = _cli(["replay", out], capsys)
    assert rc == 1
    assert "source kestrel (merged)" in cap.out and "sha256 changed" in cap.out


def test_another_variant_is_recorded_and_named(study, tmp_path, capsys):
    out = tmp_path / "pr.yaml"
    rc, cap = _export(study, out, capsys, "--merge-method", "pr", "--series", tmp_path / "pr.nc", ET="merged_ET")
    assert rc == 0, cap.err
    doc = yaml.safe_load(out.read_text())
    assert doc["merge"]["method"] == "pr" and doc["sources"]["ET"]["label"] == f"{merged_label('pr')} ET"
    assert "proportional" in doc["merge"]["variant"]
    with xr.open_dataset(tmp_path / "pr.nc") as nc:  # the series file names the variant too
        assert nc.attrs["merge_method"] == "pr" and json.loads(nc.attrs["merge"]) == doc["merge"]
    rc, cap = _cli(["replay", out], capsys)
    assert rc == 0, cap.err + cap.out


@pytest.mark.parametrize("edit, words", [
    (lambda d: d["merge"].update(method="average"), ["merge.method", "'average'"]),
    (lambda d: d.pop("merge"), ["sources.P.id", "no 'merge' block"]),
    (lambda d: d["sources"]["P"].update(id="merged_ET"), ["sources.P.id", "merged_P"]),
    (lambda d: d["merge"]["products"].update(P="kestrel"), ["merge.products.P", "list of product ids"]),
    (lambda d: d["merge"].update(window_matched="yes"), ["merge.window_matched"]),
])
def test_a_malformed_merge_block_is_one_line(study, tmp_path, capsys, edit, words):
    out = tmp_path / "merged.yaml"
    assert _export(study, out, capsys)[0] == 0
    doc = yaml.safe_load(out.read_text())
    edit(doc)
    out.write_text(yaml.safe_dump(doc, sort_keys=False))
    rc, cap = _cli(["replay", out], capsys)
    assert rc == 2 and len(cap.err.strip().splitlines()) == 1, cap.err
    assert all(w in cap.err for w in words), cap.err


def test_merge_refusal_is_one_line_and_writes_nothing(demo_dir, tmp_path, capsys):
    """On the demo as generated (no stated errors) collocation cannot separate a scaled-copy product's error
    from zero: the export of a merged source says so in one line, exit 2, and writes nothing. A merged id of
    another component is refused the same way."""
    study = copy_demo(demo_dir, tmp_path)
    out = tmp_path / "m.yaml"
    rc, cap = _export(study, out, capsys, "--series", tmp_path / "m.nc")
    assert rc == 2 and len(cap.err.strip().splitlines()) == 1 and "collocation" in cap.err, cap.err
    rc, cap = _export(study, out, capsys, P="merged_ET")
    assert rc == 2 and "the merged P source is 'merged_P'" in cap.err, cap.err
    assert not out.exists() and not (tmp_path / "m.nc").exists()


def test_report_of_a_merged_source_names_it_and_its_variant(study, tmp_path, capsys):
    out = tmp_path / "r.html"
    rc, cap = _cli(["report", study / "catalog.yaml", "--basin", "VEL", "--P", "merged_P", "--ET", "merged_ET",
                    "--TWSA", "quarry", "--merge-method", "pr", "--out", out], capsys)
    assert rc == 0, cap.err
    html = out.read_text()
    assert "Merged P [merged_P]" in html and "Merged ET [merged_ET]" in html
    assert "proportional redistribution of the residual (pr)" in html


def test_page_export_and_report_of_a_merged_source(study, tmp_path):
    """The explorer's buttons write what the command line writes, and the file replays (before: refused)."""
    from wbexplore.explorer.app import Explorer, load_state
    from wbexplore.selection import replay

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        s = load_state(study / "catalog.yaml")
    ex = Explorer(s, export_dir=tmp_path / "out")
    s.param.update(basin="VEL", P="merged_P", ET="sedge", TWSA="quarry", merge_method="pr")
    ex._on_export(None)
    assert ex.export_msg.object.startswith("Wrote"), ex.export_msg.object
    files = sorted((tmp_path / "out").glob("selection_*.yaml"))
    assert len(files) == 1
    doc = yaml.safe_load(files[0].read_text())
    assert doc["merge"]["method"] == "pr"
    assert doc["metrics"]["rmse"] == pytest.approx(s.result().metrics["rmse"], rel=1e-12)
    assert replay(files[0])["n_metrics"] == len(doc["metrics"])
    ex._on_report(None)
    assert ex.export_msg.object.startswith("Wrote"), ex.export_msg.object
    assert "Merged P [merged_P]" in next((tmp_path / "out").glob("report_*.html")).read_text()


def test_a_product_added_to_the_catalog_changes_the_merge_and_is_a_difference(study, tmp_path, capsys):
    """A fourth P product in the catalog after the export: the merge would now weigh it in, so replay exits 1
    naming the component's products as recorded and now (never a silently different merge)."""
    out = tmp_path / "merged.yaml"
    assert _export(study, out, capsys)[0] == 0
    cat = study / "catalog.yaml"
    doc = yaml.safe_load(cat.read_text())
    extra = dict(next(s for s in doc["sources"] if s["id"] == "plover"), id="wren", label="Wren rain")
    doc["sources"].append(extra)
    cat.write_text(yaml.safe_dump(doc, sort_keys=False))
    rc, cap = _cli(["replay", out], capsys)
    assert rc == 1, cap.err + cap.out
    assert "merge P products" in cap.out and "kestrel, plover, heron, wren" in cap.out
