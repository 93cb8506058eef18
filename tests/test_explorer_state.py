"""The explorer's shared state without a browser: views' data equal what balance/ computes."""

import warnings

import pandas as pd
import pytest

from wbexplore.balance import Selection, compute_selection, long_term_all, rank
from wbexplore.explorer.state import ClosureState


@pytest.fixture
def state(demo_series, demo_dir):
    from wbexplore.pipeline import load_basins
    from wbexplore.io.catalog import open_catalog

    return ClosureState(demo_series, basins=load_basins(open_catalog(demo_dir / "catalog.yaml")),
                        catalog_path=str(demo_dir / "catalog.yaml"))


def test_initial_selection_is_the_best_combination(state, demo_series):
    r = rank(demo_series, state.basin)
    assert (state.P, state.ET, state.TWSA) == tuple(r.iloc[0][["P", "ET", "TWSA"]])


def test_state_changes_drive_views_data(state, demo_series):
    state.param.update(basin="ZEF", P="plover", ET="sedge", TWSA="cairn", storage_change="backward")
    state.period = (24, 200)
    d = state.view_data()
    sel = Selection("ZEF", "plover", "sedge", "cairn", start="2003-01", end="2017-09", storage_change="backward")
    ref = compute_selection(demo_series, sel)
    pd.testing.assert_frame_equal(d["result"].frame, ref.frame)
    assert d["result"].metrics == ref.metrics
    rr = rank(demo_series, "ZEF", start="2003-01", end="2017-09", storage_change="backward")
    pd.testing.assert_frame_equal(d["ranking"].reset_index(drop=True), rr)
    mb = long_term_all(demo_series, sel)
    pd.testing.assert_frame_equal(d["multi"], mb)
    # map colours: best score per basin under the same options
    assert d["scores"]["ZEF"] == pytest.approx(rr.iloc[0]["rmse"])


def test_switching_sources_never_rereads(state, monkeypatch):
    import wbexplore.io.grids as grids

    def boom(*a, **k):
        raise AssertionError("grid re-read")

    monkeypatch.setattr(grids, "open_source", boom)
    for et in state.param.ET.objects:
        state.ET = et
        state.view_data()


def test_nested_basin_is_clickable(state, demo_dir):
    import geopandas as gpd

    b = gpd.read_file(demo_dir / "basins.geojson").set_index("basin_id")
    pt = b.loc["VEU", "geometry"].representative_point()
    assert state.pick_basin_at(pt.x, pt.y) == "VEU" and state.basin == "VEU"
    outer = b.loc["VEL", "geometry"].difference(b.loc["VEU", "geometry"]).representative_point()
    assert state.pick_basin_at(outer.x, outer.y) == "VEL"
    assert state.pick_basin_at(-50.0, 0.0) is None


def test_no_valid_months_explained(state):
    state.param.update(TWSA="cairn")
    i0 = list(state.months).index(pd.Timestamp("2012-07-01"))
    state.period = (i0, i0 + 6)  # inside the cairn gap
    res = state.result()
    assert res.n_valid == 0 and "no month" in res.messages[0]
    from wbexplore.explorer import views

    for fn in (views.component_bars, views.residual_series, views.balance_scatter):
        el = fn(res).object  # same figure as with data, the explanation in the title
        title = el.title.text
        assert title.startswith("No valid month") and "no month" in title
    r = state.ranking()
    assert (~r[r["TWSA"] == "cairn"]["scored"]).all()


def test_bad_catalog_shows_message(tmp_path):
    from wbexplore.explorer.app import explore

    p = tmp_path / "c.yaml"
    p.write_text("catalog_version: 3\nbasins: {path: x, id_field: id}\nsources: []\n")
    page = explore(p)
    text = str(page.objects[1].object)
    assert "version 3" in text and "could not be opened" in text


def test_app_builds_and_row_click_selects(state):
    from wbexplore.explorer.app import Explorer

    ex = Explorer(state)
    ex.panel()
    row = 3
    target = ex.table.value.iloc[row]

    class E:  # the Tabulator click event carries the row index
        pass

    ev = E()
    ev.row = row
    ex._on_row(ev)
    assert (state.P, state.ET, state.TWSA) == (target["P"], target["ET"], target["TWSA"])
    assert ex.w_src["ET"].value == target["ET"]


def test_export_and_report_buttons_write_files(state, tmp_path):
    from wbexplore.explorer.app import Explorer
    from wbexplore.selection import replay

    ex = Explorer(state, export_dir=tmp_path / "out")
    ex._on_export(None)
    ex._on_report(None)
    sel = list((tmp_path / "out").glob("selection_*.yaml"))
    rep = list((tmp_path / "out").glob("report_*.html"))
    assert len(sel) == 1 and len(rep) == 1 and "Wrote" in ex.export_msg.object
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert replay(sel[0])["n_metrics"] > 10
    assert "Screening-level" in rep[0].read_text()
