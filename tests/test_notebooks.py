"""The template notebooks run top to bottom on the demo catalog under nbval."""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

TEMPLATES = Path(__file__).resolve().parent.parent / "notebooks_templates"


@pytest.mark.slow
def test_templates_run_under_nbval(demo_dir, tmp_path, _cache_dir):
    for nb in TEMPLATES.glob("*.ipynb"):
        shutil.copy(nb, tmp_path / nb.name)
    (tmp_path / "pytest.ini").write_text("[pytest]\n")  # keep this project's strict settings out of the kernels' run
    env = dict(os.environ, WBEXPLORE_CATALOG=str(demo_dir / "catalog.yaml"), WBEXPLORE_CACHE=str(_cache_dir))
    r = subprocess.run([sys.executable, "-m", "pytest", "--nbval-lax", "-q", "-p", "no:cacheprovider",
                        "-c", str(tmp_path / "pytest.ini"), str(tmp_path)],
                       capture_output=True, text=True, env=env, cwd=tmp_path, timeout=900)
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-2000:]
    assert "failed" not in r.stdout.splitlines()[-1]
    n = len(list(TEMPLATES.glob("*.ipynb")))
    assert n == 3


def test_templates_read_as_studies():
    import nbformat

    for nb in TEMPLATES.glob("*.ipynb"):
        book = nbformat.read(nb, as_version=4)
        md = " ".join(c.source for c in book.cells if c.cell_type == "markdown")
        assert "Screening-level" in md and "licensed professional practice" in md
        assert sum(c.cell_type == "markdown" for c in book.cells) >= 3
