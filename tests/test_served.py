"""The served page is safe: text from files is escaped, paths are study-relative, exports go to one fixed folder.

Outside reference: the OWASP XSS prevention rules (escape & < > " ' before text enters HTML; never let
data choose markup) and CommonMark (raw HTML inside Markdown is passed through, so Markdown panes
need their own escaping). The rendering of Markdown is checked with markdown-it, the parser panel uses.
"""

import json
import warnings
from pathlib import Path

import pytest

from conftest import copy_demo

EVIL = "<img src=x onerror=alert(1)>"
RAW = "<img src=x onerror"
ESC = "&lt;img src=x onerror=alert(1)&gt;"


def _render_md(text: str) -> str:
    """Markdown to HTML the way panel's Markdown pane does it (markdown-it, gfm-like: raw HTML allowed)."""
    from markdown_it import MarkdownIt

    return MarkdownIt("gfm-like").render(text)


@pytest.fixture
def evil_series(demo_series):
    """The demo series with a basin name, a source label and the basin ids' names injected."""
    ds = demo_series.copy()
    names = [str(n) for n in ds["basin_name"].values]
    names[0] = EVIL
    ds = ds.assign_coords(basin_name=("basin", names))
    p0 = [v for v in ds.data_vars if ds[v].attrs.get("component") == "P"][0]
    ds[p0].attrs = dict(ds[p0].attrs, long_name=EVIL)
    return ds


@pytest.fixture
def evil_state(evil_series, demo_dir):
    from wbexplore.explorer.state import ClosureState
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    return ClosureState(evil_series, basins=load_basins(open_catalog(demo_dir / "catalog.yaml")),
                        catalog_path=str(demo_dir / "catalog.yaml"))


def _panes(layout):
    """Every pane of a panel layout (depth first)."""
    out = [layout]
    for o in getattr(layout, "objects", []):
        out.extend(_panes(o))
    return out


def _pane(layout, css):
    return next(p for p in _panes(layout) if css in (getattr(p, "css_classes", None) or []))


def test_summary_escapes_basin_name(evil_state):
    from wbexplore.explorer import views

    html = views.summary_html(evil_state.result())
    assert "&lt;img src=x onerror=alert(1)&gt;" in html and RAW not in html


def test_warnings_pane_renders_no_markup_from_messages(evil_state, monkeypatch):
    from wbexplore import texts  # the warnings' text lives there (shared with the report); views re-exports it
    from wbexplore.explorer.app import Explorer

    monkeypatch.setattr(texts, "warnings_for", lambda res, ds: [f"gauge note {EVIL} [x](javascript:alert(2))"])
    page = Explorer(evil_state).panel()
    text = _pane(page, "wbx-warnings").object
    text = text() if callable(text) else text
    html = _render_md(str(text))
    assert "&lt;img" in html and RAW not in html and "<a " not in html


def test_header_shows_catalog_title_escaped(evil_state):
    from wbexplore.explorer.app import Explorer

    evil_state.param.update(title=f"Study {EVIL}")
    html = _render_md(str(_pane(Explorer(evil_state).panel(), "wbx-header").object))
    assert "Study &lt;img" in html and RAW not in html


def test_select_options_are_plain_text(evil_state):
    """Bokeh's Select and AutocompleteInput put labels in text nodes: the raw name is what must be shown,
    unescaped (escaping it would show '&lt;' to the reader); the browser test checks that nothing runs."""
    from bokeh.models import AutocompleteInput, Select

    from wbexplore.explorer.app import Explorer

    ex = Explorer(evil_state)
    assert any(EVIL in k for k in ex.w_basin.options) and any(EVIL in k for k in ex.w_src["P"].options)
    # panel's CustomSelect only adds disabled options to bokeh's Select view
    assert issubclass(ex.w_basin._widget_type, Select) and issubclass(ex.w_search._widget_type, AutocompleteInput)


def test_ranking_cells_never_render_html(evil_state):
    from wbexplore.explorer.app import Explorer

    ex = Explorer(evil_state)
    # Tabulator's "plaintext" formatter escapes the value; without a formatter a column may be given an
    # "html" one by a later panel default
    assert {c: f.get("type") for c, f in ex.table.formatters.items()} == {c: "plaintext" for c in ex.table.value.columns}


def test_report_escapes_title_and_name(evil_series, demo_dir, tmp_path):
    from wbexplore.balance import Selection
    from wbexplore.io.catalog import open_catalog
    from wbexplore.report import report_html

    study = copy_demo(demo_dir, tmp_path)
    _inject(study)
    bid = str(evil_series["basin"].values[0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        html = report_html(open_catalog(study / "catalog.yaml"), evil_series, Selection(bid, "kestrel", "sedge", "cairn"))
    assert RAW not in html
    # the page's text is HTML (no longer a bokeh Div's JSON): escaped once, so the reader sees the name as text
    assert f"wbexplore report: {ESC}" in html and f"Catalog: {ESC}" in html
    assert f"<b>Verdict.</b> {ESC}" in html  # the verdict names the basin too, as text


def _bad_discharge_study(demo_dir, tmp_path) -> Path:
    study = copy_demo(demo_dir, tmp_path)
    secret = study / "private.csv"
    secret.write_text("SECRET-LINE-ONE,account-number-42\n1,2\n")
    text = (study / "catalog.yaml").read_text().replace("path: discharge.csv", f"path: {secret}")
    (study / "catalog.yaml").write_text(text)
    return study


def test_error_page_hides_absolute_paths_and_file_contents(demo_dir, tmp_path):
    from wbexplore.errors import InputError
    from wbexplore.explorer.app import explore

    study = _bad_discharge_study(demo_dir, tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        page = explore(study / "catalog.yaml", cache_dir=tmp_path / "cache")
    text = str(page.objects[1].object)
    assert "could not be opened" in text and "private" in text  # still names the file, relative to the study
    assert str(tmp_path) not in text and "SECRET-LINE-ONE" not in text and "account-number" not in text
    # the reader itself names the missing column, never the file's header line
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_series

    with pytest.raises(InputError, match="column 'date' not found") as info:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            load_series(open_catalog(study / "catalog.yaml"), cache_dir=tmp_path / "cache")
    assert "SECRET-LINE-ONE" not in str(info.value) and "account-number" not in str(info.value)


def test_error_page_escapes_markup_in_message(tmp_path):
    from wbexplore.explorer.app import explore

    p = tmp_path / "c.yaml"
    p.write_text(f"catalog_version: 1\ntitle: x\nbasins: {{path: '{EVIL}.geojson', id_field: id}}\nsources: []\n")
    text = str(explore(p).objects[1].object)
    html = _render_md(text)
    assert RAW not in html and str(tmp_path) not in text


def test_page_has_no_export_folder_box_and_writes_to_the_fixed_folder(evil_series, demo_dir, tmp_path):
    import panel as pn

    from wbexplore.explorer.app import Explorer
    from wbexplore.explorer.state import ClosureState

    # a basin id that reads like a path cannot steer the files out of the folder
    study = copy_demo(demo_dir, tmp_path)
    ids = [str(b) for b in evil_series["basin"].values]
    ids[0] = "../../escape/" + EVIL
    ds = evil_series.assign_coords(basin=ids)
    state = ClosureState(ds, catalog_path=str(study / "catalog.yaml"), basin=ids[0])
    fixed = tmp_path / "fixed"
    ex = Explorer(state, export_dir=fixed)
    page = ex.panel()
    assert not [p for p in _panes(page) if isinstance(p, pn.widgets.TextInput)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ex._on_export(None)
    written = sorted(fixed.iterdir())
    assert [p.suffix for p in written] == [".csv", ".yaml"], ex.export_msg.object
    assert all(set(p.name) <= set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_.-")
               for p in written)
    assert not (tmp_path / "escape").exists() and not list(tmp_path.glob("*/escape"))
    assert "/" not in ex._csv_name()
    msg = ex.export_msg.object
    assert str(tmp_path) not in msg and "Wrote" in msg and RAW not in _render_md(msg)


def test_export_folder_shown_relative_to_the_study(evil_state, demo_dir):
    from wbexplore.explorer.app import Explorer

    page = Explorer(evil_state).panel()
    text = str(_pane(page, "wbx-export-dir").object)
    assert "exports" in text and str(demo_dir) not in text
    shown = _render_md(text)  # escaped text outside code spans (inside them escapes would show literally)
    assert "<code>" not in shown and "\\" not in shown and "&amp;" not in shown


def test_sessions_share_computed_results(evil_series, monkeypatch):
    """A second session on the same server reuses what the first computed (the ranking of every
    combination is the costly part of opening a page)."""
    import wbexplore.explorer.state as st

    memo = {}
    first = st.ClosureState(evil_series, memo=memo)
    first.view_data()
    calls = []
    for name in ("rank", "best_scores", "compute_selection", "long_term_all"):
        orig = getattr(st, name)
        monkeypatch.setattr(st, name, lambda *a, _o=orig, _n=name, **k: calls.append(_n) or _o(*a, **k))
    second = st.ClosureState(evil_series, memo=memo)
    second.view_data()
    assert calls == [] and (second.P, second.ET, second.TWSA) == (first.P, first.ET, first.TWSA)


def test_serve_cli_has_export_dir_and_refuses_a_file(tmp_path, capsys):
    from wbexplore.cli import main

    f = tmp_path / "afile"
    f.write_text("x")
    assert main(["serve", str(tmp_path / "nope.yaml"), "--export-dir", str(f)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--export-dir" in err[0] and "Traceback" not in err[0]


def test_escape_helpers():
    from wbexplore.escape import md_text, public_message, safe_filename

    assert safe_filename("../../etc/passwd", EVIL) .count("/") == 0
    assert not safe_filename("..", ".hidden").startswith(".")
    html = _render_md(md_text("# heading\n- item *em* [a](javascript:x) " + EVIL))
    assert "<h1" not in html and "<em>" not in html and "<a " not in html and RAW not in html
    msg = public_message("/study/a/q.csv: column 'q' not found (has: secret, columns)", "/study/a")
    assert msg == "q.csv: column 'q' not found (contents not shown)"
    assert "/etc" not in public_message("see /etc/shadow for details", "/study/a")


# ----------------------------------------------------------------------------- in the browser
def _served(study, cache, *extra):
    import os
    import subprocess
    import sys

    from test_browser import _free_port, _wait_http

    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "wbexplore.cli", "serve", str(study / "catalog.yaml"), "--port",
                             str(port), "--cache-dir", str(cache), *extra], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True, env=dict(os.environ, PYTHONWARNINGS="ignore"))
    url = f"http://127.0.0.1:{port}/"
    try:
        _wait_http(url, proc)
    except BaseException:
        from test_browser import _stop

        _stop(proc)  # closes its pipe too (else an unraisable ResourceWarning fails a later test)
        raise
    return proc, url


def _inject(study: Path):
    text = (study / "catalog.yaml").read_text()
    (study / "catalog.yaml").write_text(text.replace("title: Quessary uplands demo study (invented data)",
                                                     f"title: '{EVIL}'"))
    b = json.loads((study / "basins.geojson").read_text())
    b["features"][0]["properties"]["name"] = EVIL
    (study / "basins.geojson").write_text(json.dumps(b))


@pytest.mark.browser
def test_served_page_runs_no_injected_script_and_exports_to_the_fixed_folder(demo_dir, tmp_path, artifacts):
    import time

    from playwright.sync_api import sync_playwright

    from test_browser import ARGS, CHROMIUM, _deep_text, _stop

    study = copy_demo(demo_dir, tmp_path)
    _inject(study)
    fixed = tmp_path / "fixed_exports"
    proc, url = _served(study, tmp_path / "cache", "--export-dir", str(fixed))
    try:
        with sync_playwright() as p:
            b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
            pg = b.new_page(viewport={"width": 1500, "height": 1700})
            dialogs, errors = [], []
            pg.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            pg.on("pageerror", lambda e: errors.append(str(e)))
            pg.goto(url)
            pg.wait_for_selector(".wbx-summary", timeout=120_000)
            pg.wait_for_selector(".wbx-map canvas", timeout=120_000)
            pg.wait_for_timeout(2000)
            # open the basin list and the search box's completions too: every place the name appears
            pg.locator("input[placeholder='type an id or a name']").fill("img")
            pg.wait_for_timeout(1000)
            pg.screenshot(path=str(artifacts / "served_injected.png"), full_page=True)
            assert dialogs == [] and errors == []
            assert EVIL in _deep_text(pg, ".wbx-summary-pane") and EVIL in _deep_text(pg, ".wbx-header")
            assert EVIL in pg.locator("select").first.locator("option:checked").inner_text()
            # no box to type a folder into: the only text input is the basin search
            texts = pg.locator("input[type='text']")
            assert [texts.nth(i).get_attribute("placeholder") for i in range(texts.count())] == [
                "type an id or a name"]
            assert "Export folder" not in _deep_text(pg, "body")
            assert str(tmp_path) not in _deep_text(pg, "body")
            pg.get_by_text("Export selection + CSV").click()
            t0 = time.time()
            while time.time() - t0 < 60 and not list(fixed.glob("selection_*.yaml")):
                pg.wait_for_timeout(300)
            pg.wait_for_timeout(500)
            assert len(list(fixed.glob("selection_*.yaml"))) == 1 and not (study / "exports").exists()
            msg = _deep_text(pg, ".wbx-export-msg")
            assert "Wrote" in msg and str(tmp_path) not in msg
            assert dialogs == [] and errors == []
            b.close()
    finally:
        _stop(proc)


@pytest.mark.browser
def test_error_page_runs_no_injected_script(tmp_path, artifacts):
    from playwright.sync_api import sync_playwright

    from test_browser import ARGS, CHROMIUM, _deep_text, _stop

    study = tmp_path / "study"
    study.mkdir()
    (study / "catalog.yaml").write_text(f"catalog_version: 1\ntitle: x\nbasins: {{path: '{EVIL}.geojson', "
                                        "id_field: id}\nsources: []\n")
    proc, url = _served(study, tmp_path / "cache")
    try:
        with sync_playwright() as p:
            b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
            pg = b.new_page()
            dialogs = []
            pg.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            pg.goto(url)
            pg.wait_for_selector(".wbx-error", timeout=60_000)
            pg.wait_for_timeout(1500)
            pg.screenshot(path=str(artifacts / "served_error_injected.png"))
            text = _deep_text(pg, ".wbx-error")
            assert dialogs == [] and "could not be opened" in text and str(tmp_path) not in text
            b.close()
    finally:
        _stop(proc)


def test_public_message_study_folder_with_a_space():
    """A study folder whose name holds a space is still made relative, whole (seen: the folder was called
    '<outside the study>' and the rest of the absolute path was shown)."""
    from wbexplore.escape import public_message

    msg = public_message("/home/ann/My Study/secret/q.csv: column 'x' not found", "/home/ann/My Study")
    assert msg == "secret/q.csv: column 'x' not found"
    assert "/home/ann" not in public_message("/home/ann/My Study: folder not writable", "/home/ann/My Study")
