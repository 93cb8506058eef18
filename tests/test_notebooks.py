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


def test_notebook_loader_asks_only_the_jupyter_server():
    """`explorer.notebook.loader_js` names no outside host, and every file it loads is one that panel's Jupyter
    server extension serves: bokeh's static folder (``bokeh.util.paths.static_path``) under
    ``panel-preview/static/`` and panel's dist folder under ``panel-preview/static/extensions/panel/``."""
    import re

    from bokeh.util.paths import static_path
    from panel.io.resources import DIST_DIR

    from wbexplore.explorer.notebook import loader_js

    import panel as pn

    pn.extension("tabulator")  # the explorer's table: its require.js paths too (classic notebook)
    js = loader_js()
    assert "cdn." not in js and not re.search(r"https?://(?!www\.w3\.org)", js)
    urls = re.findall(r"""__wbx_base \+ ["']/panel-preview/static/([^"'?]+)""", js)
    urls = [u if u.endswith((".js", ".css")) else u + ".js" for u in urls]  # require.js paths go without ".js"
    assert any(u.endswith("bokeh.min.js") for u in urls) and any(u.endswith("panel.min.js") for u in urls)
    assert any(u.endswith("tabulator.min.js") for u in urls)
    for u in urls:
        if u.startswith("extensions/panel/"):
            assert (DIST_DIR / u.removeprefix("extensions/panel/")).is_file(), u
        else:
            assert (Path(static_path()) / u).is_file(), u
