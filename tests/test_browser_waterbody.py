"""The demo reservoir in a real browser (issue 15): chosen in `wbexplore serve`, and its HTML report offline.

The served page's numbers are checked against `wbexplore.balance` (compute_selection, unmeasured_exchange) for
the selection the page shows; screenshots land in artifacts/ (look at them after a UI change).
"""

from __future__ import annotations

import re
import warnings

import pytest
from test_browser import _deep_text, browser, open_page, open_report, server, study  # noqa: F401 - the fixtures of the served page

pytestmark = pytest.mark.browser
WID = "TALV"


@pytest.fixture(scope="module")
def page(browser, server):  # noqa: F811
    pg = open_page(browser, server, height=1900)
    yield pg
    pg.close()


def test_choosing_the_reservoir_shows_exchange_levels_and_volumes(page, study, artifacts):  # noqa: F811
    from wbexplore.balance import Selection, compute_selection
    from wbexplore.balance.waterbody import unmeasured_exchange
    from wbexplore.pipeline import load_series

    basin = page.locator("select").first
    label = next(o for o in basin.locator("option").all_inner_texts() if o.startswith(f"{WID} - "))
    basin.select_option(label=label)
    page.wait_for_selector(".wbx-unmeasured-exchange", state="attached", timeout=30_000)
    page.wait_for_timeout(2500)
    page.screenshot(path=str(artifacts / "explorer_waterbody.png"), full_page=True)
    assert page.errors == []
    shown = page.locator(".wbx-unmeasured-exchange").first.inner_text()
    texts = [s.locator("option:checked").inner_text() for s in page.locator("select").all()[:4]]
    P, ET, TW = (re.search(r"\[(\w+)\]", t).group(1) for t in texts[1:4])
    assert TW == "levels"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = load_series(study / "catalog.yaml", waterbodies=True)
    res = compute_selection(ds, Selection(WID, P, ET, "levels"))
    ex = unmeasured_exchange(res, surface_area_km2=ds["surface_area_km2"].sel(basin=WID))
    assert shown == f"{ex.mean['m3/s']:.2f} ± {ex.standard_error['m3/s']:.2f} m3/s"
    assert page.locator(".wbx-levels").first.is_visible() and page.locator(".wbx-exchange").first.is_visible()
    assert not page.locator(".wbx-scatter").first.is_visible()
    assert "positive = unmeasured loss" in _deep_text(page, ".wbx-waterbody-summary")


def test_reservoir_report_opens_offline(browser, study, tmp_path, artifacts):  # noqa: F811
    from wbexplore.cli import main

    out = tmp_path / "report_talv.html"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["report", str(study / "catalog.yaml"), "--basin", WID, "--out", str(out)]) == 0
    pg, requests, errors = open_report(browser, out)
    pg.screenshot(path=str(artifacts / "report_waterbody.png"), full_page=True)
    assert [r for r in requests if r != out.as_uri()] == []
    assert errors == []
    assert pg.locator("canvas").count() >= 4  # map, bars, exchange, level and volume
    body = _deep_text(pg, "body")  # bokeh's Divs render inside shadow roots
    assert "Unmeasured exchange" in body and "discharge" not in body
    pg.close()
