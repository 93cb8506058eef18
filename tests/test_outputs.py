"""Outputs that cannot destroy inputs (issue 11, item 2).

Every writer (extract, export, report, demo) refuses, even with ``--force``, a target that is an input of
the catalog or that is not a regular file; bad targets end in one line on stderr and exit status 2, with
nothing written. Reference: POSIX file types and identity (``st_dev``, ``st_ino``) as ``os.stat`` reports
them, and common practice for atomic replacement (write a temporary file, rename it on success).
"""

from __future__ import annotations

import errno
import hashlib
import os
import stat
from pathlib import Path

import pytest

from conftest import copy_demo
from utils import run_cli

SEL = ["--basin", "VEL", "--start", "2003-01", "--end", "2018-12"]
TRIPLE = ["--P", "heron", "--ET", "tansy", "--TWSA", "quarry"]


@pytest.fixture
def study(demo_dir, tmp_path):
    return copy_demo(demo_dir, tmp_path)


def _tree(root: Path) -> dict[str, str]:
    """Every entry under ``root``: a regular file by its SHA-256, anything else by its kind (no following)."""
    out = {}
    for dirpath, dirs, files in os.walk(root):
        for name in dirs + files:
            p = Path(dirpath) / name
            st = os.lstat(p)
            if stat.S_ISREG(st.st_mode):
                out[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
            elif stat.S_ISLNK(st.st_mode):
                out[str(p.relative_to(root))] = "link->" + os.readlink(p)
            else:
                out[str(p.relative_to(root))] = f"mode {stat.S_IFMT(st.st_mode):o}"
    return out


def _run(argv, capsys):
    rc, _, err = run_cli(argv, capsys)
    return rc, err


def _assert_one_line_refusal(rc, err):
    assert rc == 2, err
    assert "Traceback" not in err
    assert len(err.strip().splitlines()) == 1, err


def _device_node(tmp_path: Path) -> Path:
    """A character device with /dev/null's numbers, made where replacing it harms nothing (needs privilege);
    without the privilege, /dev/null itself, which an unprivileged process cannot replace either."""
    node = tmp_path / "null-device"
    try:
        os.mknod(node, stat.S_IFCHR | 0o666, os.makedev(1, 3))
    except (PermissionError, AttributeError):
        return Path("/dev/null")
    return node


def _target(kind: str, study: Path, tmp_path: Path) -> Path:
    if kind == "catalog":
        return study / "catalog.yaml"
    if kind == "discharge":
        return study / "discharge.csv"
    if kind == "basins":
        return study / "basins.geojson"
    if kind == "product":
        return study / "grids" / "heron_p_0p25.nc"
    if kind == "file-in-zarr-store":
        store = study / "grids" / "cairn_twsa_1deg.zarr"
        return next(p for p in sorted(store.rglob("*")) if p.is_file())
    if kind == "new-file-in-zarr-store":
        return study / "grids" / "cairn_twsa_1deg.zarr" / "out.nc"
    if kind == "new-file-matching-a-product-glob":
        return study / "grids" / "plover" / "plover_rain_2099-01.tif"
    if kind == "new-sidecar-of-a-geotiff-product":
        return study / "grids" / "fennel_et_0p1.tif.aux.xml"
    if kind == "symlink-to-catalog":
        link = tmp_path / "link.out"
        link.symlink_to(study / "catalog.yaml")
        return link
    if kind == "hardlink-to-product":
        link = tmp_path / "hard.out"
        os.link(study / "grids" / "heron_p_0p25.nc", link)
        return link
    if kind == "hardlink-into-zarr-store":
        store = study / "grids" / "cairn_twsa_1deg.zarr"
        link = tmp_path / "hardz.out"
        os.link(next(p for p in sorted(store.rglob("*")) if p.is_file()), link)
        return link
    if kind == "fifo":
        fifo = tmp_path / "pipe.out"
        os.mkfifo(fifo)
        return fifo
    if kind == "device":
        return _device_node(tmp_path)
    if kind == "symlink-to-device":
        link = tmp_path / "devlink.out"
        link.symlink_to(_device_node(tmp_path))
        return link
    if kind == "folder":
        d = tmp_path / "a-folder.out"
        d.mkdir()
        (d / "keep.txt").write_text("user data\n")
        return d
    if kind == "symlink-to-folder":
        d = tmp_path / "other-folder"
        d.mkdir()
        link = tmp_path / "dirlink.out"
        link.symlink_to(d)
        return link
    raise AssertionError(kind)


KINDS = ["catalog", "discharge", "basins", "product", "file-in-zarr-store", "new-file-in-zarr-store",
         "new-file-matching-a-product-glob", "new-sidecar-of-a-geotiff-product", "symlink-to-catalog", "hardlink-to-product",
         "hardlink-into-zarr-store", "fifo", "device", "symlink-to-device", "folder", "symlink-to-folder"]


def _argv(command: str, study: Path, out: Path):
    cat = study / "catalog.yaml"
    if command == "extract":
        return ["extract", cat, "--out", out, "--force", "--quiet"]
    if command == "export":
        return ["export", cat, *SEL, *TRIPLE, "--out", out, "--force"]
    if command == "export-series":
        return ["export", cat, *SEL, *TRIPLE, "--out", study.parent / "sel.yaml", "--series", out, "--force"]
    if command == "report":
        return ["report", cat, *SEL, *TRIPLE, "--out", out, "--force"]
    if command == "estimate":
        return ["estimate", cat, *SEL, *TRIPLE, "--term", "ET", "--out", out, "--force"]
    raise AssertionError(command)


@pytest.mark.parametrize("command", ["extract", "export", "export-series", "report", "estimate"])
@pytest.mark.parametrize("kind", KINDS)
def test_force_never_replaces_an_input_or_a_non_file(command, kind, study, tmp_path, capsys):
    out = _target(kind, study, tmp_path)
    if command in ("export-series", "estimate") and out.suffix not in (".csv", ".nc"):
        # the series refusal must not be the suffix check: give the same target a series suffix by a link
        link = tmp_path / "series-link.csv"
        link.symlink_to(out)
        out = link
    before = _tree(tmp_path)
    dev = os.stat(out, follow_symlinks=True) if out.exists() else None
    rc, err = _run(_argv(command, study, out), capsys)
    _assert_one_line_refusal(rc, err)
    assert _tree(tmp_path) == before  # the input unchanged, and no file added or left behind
    if dev is not None:
        after = os.stat(out)
        assert (after.st_dev, after.st_ino, after.st_mode) == (dev.st_dev, dev.st_ino, dev.st_mode)


def test_dev_null_is_refused(study, tmp_path, capsys):
    before = os.stat("/dev/null")
    rc, err = _run(["extract", study / "catalog.yaml", "--out", "/dev/null", "--force", "--quiet"], capsys)
    _assert_one_line_refusal(rc, err)
    after = os.stat("/dev/null")
    assert stat.S_ISCHR(after.st_mode) and (after.st_ino, after.st_rdev) == (before.st_ino, before.st_rdev)


@pytest.mark.parametrize("spelling", ["same", "dot-segment", "symlink"])
def test_out_equal_to_series_is_refused_before_writing(spelling, study, tmp_path, capsys):
    out = tmp_path / "sel.csv"
    series = {"same": out, "dot-segment": tmp_path / "." / "sel.csv", "symlink": tmp_path / "alias.csv"}[spelling]
    if spelling == "symlink":
        series.symlink_to(out)
    before = _tree(tmp_path)
    rc, err = _run(["export", study / "catalog.yaml", *SEL, *TRIPLE, "--out", out, "--series", series], capsys)
    _assert_one_line_refusal(rc, err)
    assert _tree(tmp_path) == before


def test_out_equal_to_existing_series_with_force(study, tmp_path, capsys):
    out = tmp_path / "sel.csv"
    out.write_text("month,P\n")
    before = _tree(tmp_path)
    rc, err = _run(["export", study / "catalog.yaml", *SEL, *TRIPLE, "--out", out, "--series", out, "--force"],
                   capsys)
    _assert_one_line_refusal(rc, err)
    assert _tree(tmp_path) == before


def test_full_disk_is_one_line_and_leaves_nothing(study, tmp_path, capsys, monkeypatch):
    import xarray as xr

    def full(self, path=None, *a, **k):
        with open(path, "wb") as fh:  # a partial temporary file, as a real full disk leaves it
            fh.write(b"\x89HDF")
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    monkeypatch.setattr(xr.Dataset, "to_netcdf", full)
    out = tmp_path / "series.nc"
    before = _tree(tmp_path)
    rc, err = _run(["extract", study / "catalog.yaml", "--out", out, "--quiet"], capsys)
    _assert_one_line_refusal(rc, err)
    assert str(out) in err and "No space left" in err
    assert _tree(tmp_path) == before


def test_full_disk_on_a_text_output(study, tmp_path, capsys, monkeypatch):
    real_write_text = Path.write_text

    def full(self, *a, **k):
        if self.name.startswith(".sel.yaml."):
            real_write_text(self, "partial")
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_write_text(self, *a, **k)

    monkeypatch.setattr(Path, "write_text", full)
    out = tmp_path / "sel.yaml"
    before = _tree(tmp_path)
    rc, err = _run(["export", study / "catalog.yaml", *SEL, *TRIPLE, "--out", out], capsys)
    _assert_one_line_refusal(rc, err)
    assert str(out) in err
    assert _tree(tmp_path) == before


# --------------------------------------------------------------------------- demo


def test_demo_force_refuses_a_folder_it_did_not_write(tmp_path, capsys):
    d = tmp_path / "thesis"
    (d / "chapters").mkdir(parents=True)
    (d / "chapters" / "one.md").write_text("months of work\n")
    (d / "catalog.yaml").write_text("catalog_version: 1\n")
    before = _tree(tmp_path)
    rc, err = _run(["demo", "--out", d, "--force", "--no-launch"], capsys)
    _assert_one_line_refusal(rc, err)
    assert _tree(tmp_path) == before


@pytest.mark.parametrize("change", ["extra-file", "edited-file", "no-marker"])
def test_demo_force_refuses_a_changed_demo_study(change, demo_dir, tmp_path, capsys):
    study = copy_demo(demo_dir, tmp_path)
    if change == "extra-file":
        (study / "grids" / "my_notes.txt").write_text("mine\n")
    elif change == "edited-file":
        with open(study / "README.md", "a") as fh:
            fh.write("my edit\n")
    else:
        (study / ".wbexplore-demo").unlink()
    before = _tree(tmp_path)
    rc, err = _run(["demo", "--out", study, "--force", "--no-launch"], capsys)
    _assert_one_line_refusal(rc, err)
    assert _tree(tmp_path) == before


def test_demo_force_replaces_its_study_and_keeps_a_partial_folder(demo_dir, tmp_path, capsys):
    study = copy_demo(demo_dir, tmp_path)
    partial = tmp_path / "study.partial"
    partial.mkdir()
    (partial / "keep.txt").write_text("not the demo's\n")
    (study / "README.md").touch()  # a newer mtime, same content: still the demo's file
    rc, err = _run(["demo", "--out", study, "--force", "--no-launch"], capsys)
    assert rc == 0, err
    assert (partial / "keep.txt").read_text() == "not the demo's\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study", "study.partial"]  # no temporary folder left
    from wbexplore.demo import MARKER

    listed = (study / MARKER).read_text().splitlines()[1:]
    assert "explore_basin.ipynb" in {line.split("  ", 1)[1] for line in listed}
    on_disk = {p.relative_to(study).as_posix() for p in study.rglob("*") if p.is_file()} - {MARKER}
    assert on_disk == {line.split("  ", 1)[1] for line in listed}


def test_demo_onto_a_file_is_one_line(tmp_path, capsys):
    f = tmp_path / "notes.txt"
    f.write_text("keep\n")
    for out, extra in ((f, []), (f, ["--force"]), (f / "study", [])):
        rc, err = _run(["demo", "--out", out, "--no-launch", *extra], capsys)
        _assert_one_line_refusal(rc, err)
        assert f.read_text() == "keep\n" and [p.name for p in tmp_path.iterdir()] == ["notes.txt"]


# --------------------------------------------------------------------------- library writers (the explorer's path)


def test_library_writers_refuse_inputs_even_when_overwriting(study, demo_series):
    """The explorer's export and report buttons call these with overwrite=True: inputs stay untouched."""
    from wbexplore.balance import Selection, compute_selection
    from wbexplore.errors import InputError
    from wbexplore.io.catalog import open_catalog
    from wbexplore.report import write_report
    from wbexplore.selection import export_selection, write_series_csv, write_series_netcdf

    cat = open_catalog(study / "catalog.yaml")
    sel = Selection("VEL", "heron", "tansy", "quarry", start="2003-01", end="2018-12")
    before = _tree(study)
    with pytest.raises(InputError, match="input of catalog"):
        export_selection(cat.path, sel, study / "catalog.yaml", overwrite=True, ds=demo_series)
    with pytest.raises(InputError, match="input of catalog"):
        export_selection(cat.path, sel, study / "sel.yaml", overwrite=True, series=str(study / "discharge.csv"),
                         ds=demo_series)
    with pytest.raises(InputError, match="input of catalog"):
        write_report(cat.path, demo_series, sel, study / "basins.geojson", overwrite=True)
    res = compute_selection(demo_series, sel)
    with pytest.raises(InputError, match="input of catalog"):
        write_series_csv(res, study / "discharge.csv", overwrite=True, protect=cat)
    with pytest.raises(InputError, match="input of catalog"):
        write_series_netcdf(res, study / "grids" / "quarry_twsa_0p5.nc", overwrite=True, protect=cat)
    assert _tree(study) == before


# --------------------------------------------------------------------------- interrupted writes

_TERM_WRITER = """
import os, signal, sys
from wbexplore.io.writers import atomic_path
with atomic_path(sys.argv[1]) as tmp:
    tmp.write_text("half an output")
    os.kill(os.getpid(), signal.SIGTERM)
"""

_TERM_DEMO = """
import os, signal, sys
import wbexplore.demo as demo
def _write(folder, progress):
    (folder / "catalog.yaml").write_text("half a study")
    os.kill(os.getpid(), signal.SIGTERM)
demo._write = _write
demo.write_demo(sys.argv[1])
"""


@pytest.mark.parametrize("script", ["writer", "demo"])
def test_sigterm_leaves_no_temporary_file(script, tmp_path):
    """SIGTERM (what a batch system or ``kill`` sends) ends the run with status 128 + 15, the temporary gone."""
    import subprocess
    import sys

    code = {"writer": _TERM_WRITER, "demo": _TERM_DEMO}[script]
    target = tmp_path / ("out.nc" if script == "writer" else "study")
    proc = subprocess.run([sys.executable, "-c", code, str(target)], capture_output=True, text=True, timeout=120)
    assert proc.returncode in (143, -15), proc.stderr
    assert list(tmp_path.iterdir()) == []
