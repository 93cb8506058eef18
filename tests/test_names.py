"""Issue 17, item 4: one table of display names (`wbexplore.names`) used by the explorer's controls, headers,
download and the report; the period held as months; the current combination marked in the ranking."""

import calendar
import io
import warnings

import numpy as np
import pandas as pd
import param
import pytest

from wbexplore.balance import METRICS, compute_selection
from wbexplore.errors import InputError
from wbexplore.names import METRIC_NAMES, OPTIONS, column_label, metric_label


@pytest.fixture
def explorer(demo_series, demo_dir):
    from wbexplore.explorer.app import Explorer
    from wbexplore.explorer.state import ClosureState
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    st = ClosureState(demo_series, basins=load_basins(open_catalog(demo_dir / "catalog.yaml")),
                      catalog_path=str(demo_dir / "catalog.yaml"))
    ex = Explorer(st)
    ex.panel()
    return ex


def test_every_metric_has_a_plain_name_units_and_help():
    assert set(METRIC_NAMES) == set(METRICS)
    for k, n in METRIC_NAMES.items():
        assert "_" not in n.name and n.name != k and n.help
        assert n.units == ("" if METRICS[k][1] == "-" else METRICS[k][1])  # units stay those of balance/
    assert metric_label("rmse") == "Residual RMSE (mm/month)" and metric_label("kge") == "Kling-Gupta efficiency"
    for k in ("central", "backward", "forward", "matched"):
        assert OPTIONS[k].help


def test_pbias_help_states_the_sign_hydroeval_gives(demo_series):
    """The help says PBIAS has the opposite sign of the mean residual; hydroeval's pbias (evaluation = gauged Q,
    simulation = P - ET - dS) is the outside reference for the sign."""
    import hydroeval

    assert "opposite" in METRIC_NAMES["pbias"].help
    from wbexplore.balance import Selection

    for et in ("sedge", "fennel", "tansy"):
        res = compute_selection(demo_series, Selection("VEL", "kestrel", et, "quarry"))
        f = res.frame[res.frame["valid"]]
        pb = float(hydroeval.pbias(f["Qhat"].values, f["Q"].values))
        assert np.sign(pb) == -np.sign(f["residual"].mean()) != 0


def test_rank_by_shows_plain_names_and_headers_follow(explorer):
    w = explorer.w_metric
    assert all("_" not in label for label in w.options) and set(w.options.values()) == set(explorer.state.param.metric.objects)
    explorer.state.metric = "pbias"
    assert w.value == "pbias" and "opposite" in w.description
    titles = explorer.table.titles
    assert titles["pbias"] == "Percent bias (%)" and titles["rmse"] == "Residual RMSE (mm/month)"
    assert titles["P"] == "Precipitation (P)"  # product ids in that column: no units
    assert explorer.table.header_tooltips["kge"] == METRIC_NAMES["kge"].help


def test_current_combination_is_highlighted(explorer):
    """The ranking's selected row is the combination on screen (and only it), after a source change too; a click
    on the marked row (which unselects it in the page) leaves it marked."""
    s = explorer.state
    view = explorer.table.value
    marked = list(explorer.table.selection)
    assert len(marked) == 1
    assert tuple(view.iloc[marked[0]][["P", "ET", "TWSA"]]) == (s.P, s.ET, s.TWSA)
    other = view.iloc[(marked[0] + 3) % len(view)]
    s.param.update(P=other["P"], ET=other["ET"], TWSA=other["TWSA"])
    marked = list(explorer.table.selection)
    assert [tuple(explorer.table.value.iloc[i][["P", "ET", "TWSA"]]) for i in marked] == [
        (other["P"], other["ET"], other["TWSA"])]
    explorer.table.selection = []
    assert list(explorer.table.selection) == marked


def test_download_headers_carry_plain_names_and_units(explorer):
    """The page's CSV in m3/s: headers name the units; the numbers follow from mm/month with the month's true
    length (stdlib calendar) and the basin area."""
    s = explorer.state
    s.unit_system = "m3/s"
    text = explorer._csv_bytes().getvalue().decode()
    f = pd.read_csv(io.StringIO(text), comment="#", index_col="month")
    assert "Precipitation (P) (m3/s)" in f.columns and "Storage anomaly (TWSA) (m3)" in f.columns
    assert "Residual (P - ET - Q - dS) (m3/s)" in f.columns and "1-sigma of Precipitation (P) (m3/s)" in f.columns
    res = s.result()
    mm = res.frame["P"].values
    days = np.array([calendar.monthrange(t.year, t.month)[1] for t in pd.DatetimeIndex(res.frame.index)])
    want = mm / 1000.0 * res.area_km2 * 1e6 / (days * 86400.0)
    np.testing.assert_allclose(f["Precipitation (P) (m3/s)"].values, want, rtol=1e-12)
    assert column_label("TWSA", "mm") == "Storage anomaly (TWSA) (mm)"


def test_period_is_held_as_months_and_one_slider_step_is_one_month(explorer):
    s = explorer.state
    assert s.period == ("2001-01", "2020-12")
    lo, hi = explorer.w_period.value

    def release(value):  # what the browser sends when a handle is let go (value_throttled is read-only to Python)
        with param.edit_constant(explorer.w_period):
            explorer.w_period.param.update(value=value, value_throttled=value)

    release((lo + 1, hi))  # one arrow-key step
    assert s.period == ("2001-02", "2020-12") and s.options().start == "2001-02"
    release((lo + 12, hi - 1))
    assert s.period == ("2002-01", "2020-11")
    s.period = ("2005-03", "2006-02")  # a script sets months; the slider follows
    y, m = divmod(explorer.w_period.value[0], 12)
    assert (y, m + 1) == (2005, 3)
    for bad in (("2000-01", "2001-05"), ("2005-13", "2006-01"), ("2006-01", "2005-01"), (3, 10)):
        with pytest.raises(InputError, match="period"):
            s.period = bad
        assert s.period == ("2005-03", "2006-02")  # unchanged


def test_report_names_metrics_plainly(explorer, tmp_path):
    from wbexplore.report import write_report

    s = explorer.state
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = write_report(s.catalog_path, s.series, s.selection(), tmp_path / "r.html", by="kge")
    text = out.read_text()
    assert "Residual RMSE (mm/month)" in text and "ranked by Kling-Gupta efficiency" in text
    assert "<td>rel_imbalance</td>" not in text
