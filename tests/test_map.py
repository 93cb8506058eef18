"""The basin map (`plots.MapPlot`, issue 17 item 3): its bokeh model, checked without a browser.

References named beside each check: bokeh's own palettes (ColorBrewer BrBG, Viridis), `balance.metrics.METRICS`
(units and which end is best), shapely (a label point inside its polygon), pyproj.Geod (how much shorter a degree
of longitude is than a degree of latitude). The page at three widths is tests/test_browser_map.py.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

from wbexplore import plots
from wbexplore.names import (
    COMPARABLE_METRICS,
    EFFICIENCY_METRICS,
    MAP_METRIC,
    SIGNED_METRICS,
    map_metric,
    map_note,
    metric_label,
    metric_scale,
)

RANKABLE = [m for m in __import__("wbexplore.balance.metrics", fromlist=["METRICS"]).METRICS if m != "n_valid"]


@pytest.fixture(scope="module")
def basins(demo_dir):
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return load_basins(open_catalog(demo_dir / "catalog.yaml"))


@pytest.fixture
def mapplot(basins):
    return plots.MapPlot(plots.basin_outlines(basins))


def _scores(basins, values):
    """Invented scores, one per basin (NaN for the last: a basin without a scored combination)."""
    v = np.resize(np.asarray(values, dtype=float), len(basins))
    v[-1] = np.nan
    return pd.Series(v, index=[str(b) for b in basins.index])


def test_colour_bar_is_present_and_its_title_follows_the_metric_with_units(mapplot, basins):
    from bokeh.models import ColorBar

    from wbexplore.balance.metrics import METRICS

    bars = mapplot.fig.select(type=ColorBar)
    assert len(bars) == 1 and bars[0] is mapplot.colorbar
    for m in RANKABLE:
        mapplot.update(_scores(basins, [0.5, -2.0, 3.0]), None, m)
        title = mapplot.colorbar.title
        assert metric_label(m) in title, (m, title)
        units = METRICS[m][1]  # the metric's units as balance/ states them
        assert (f"({units})" in title) == (units != "-"), (m, title)


def test_signed_metric_diverging_and_symmetric_about_zero(mapplot, basins):
    from bokeh.palettes import BrBG

    brbg = tuple(BrBG[11])  # ColorBrewer's diverging BrBG: blue-green ... pale middle ... brown
    for m in SIGNED_METRICS:
        values = [-4.0, 1.5, 2.5, -0.5]
        mapplot.update(_scores(basins, values), None, m)
        mp = mapplot.mapper
        top = np.nanmax(np.abs(_scores(basins, values).values))
        assert mp.low == -mp.high and mp.high == pytest.approx(top), m  # symmetric: 0 is the middle of the scale
        assert set(mp.palette) == set(brbg) and mp.palette[len(mp.palette) // 2] == brbg[5]
        # brown for "the balance gives less water than the gauge": the negative end of the residual's sign, the
        # positive end of PBIAS (Moriasi et al. 2007 sign)
        less_water_end = mp.palette[0] if SIGNED_METRICS[m] > 0 else mp.palette[-1]
        assert less_water_end == brbg[-1], m


def test_efficiencies_make_one_best_and_magnitudes_start_at_zero(mapplot, basins):
    from bokeh.palettes import Viridis256

    from wbexplore.balance.metrics import METRICS

    for m in EFFICIENCY_METRICS:
        mapplot.update(_scores(basins, [0.9, -3.0, 0.2]), None, m)
        assert (mapplot.mapper.low, mapplot.mapper.high) == (-1.0, 1.0)
        assert tuple(mapplot.mapper.palette) == tuple(Viridis256)  # 1 (METRICS: "higher" is better) the bright end
        assert METRICS[m][0] == "higher" and mapplot.colorbar.major_label_overrides == {-1.0: "-1 or less"}
    for m in ("rmse", "mae", "annual_rmse"):
        values = [2.0, 7.5, 3.0]
        mapplot.update(_scores(basins, values), None, m)
        assert mapplot.mapper.low == 0.0 and mapplot.mapper.high == pytest.approx(7.5)
        assert tuple(mapplot.mapper.palette) == tuple(Viridis256[::-1])  # 0 ("lower" is better) the bright end
        assert METRICS[m][0] == "lower" and mapplot.colorbar.major_label_overrides == {}


def test_which_metrics_are_signed_and_comparable_agree_with_the_metric_table():
    """`names` says it once; `balance.metrics.METRICS` (kind "abs" = best at zero, units) must agree."""
    from wbexplore.balance.metrics import METRICS

    assert set(SIGNED_METRICS) == {m for m, (kind, _, _) in METRICS.items() if kind == "abs"}
    assert set(EFFICIENCY_METRICS) <= {m for m, (kind, _, _) in METRICS.items() if kind == "higher"}
    # comparable across basins: no depth unit (dimensionless or percent)
    assert set(COMPARABLE_METRICS) == {m for m in RANKABLE if METRICS[m][1] in ("-", "%")}
    assert {metric_scale(m) for m in ("rmse", "mae", "annual_rmse")} == {"magnitude"}
    for m in RANKABLE:
        shown = map_metric(m)
        assert shown in COMPARABLE_METRICS and (shown == m) == (m in COMPARABLE_METRICS)
        assert bool(map_note(m)) == (shown != m)
    assert MAP_METRIC == "kge" and map_metric("rmse") == "kge"


def test_the_map_says_when_it_colours_by_another_metric_than_rank_by(mapplot, basins):
    from bokeh.models import Title

    mapplot.update(_scores(basins, [0.9, 0.1]), None, "kge", rank_by="rmse")
    note = mapplot.note.text
    assert mapplot.note in mapplot.fig.select(type=Title)
    assert "Kling-Gupta efficiency" in note and "Residual RMSE" in note and "mm/month" in note
    mapplot.update(_scores(basins, [0.9, 0.1]), None, "kge", rank_by="kge")
    assert mapplot.note.text == ""
    mapplot.update(_scores(basins, [0.9, 0.1]), None, "pbias")  # the report: no ranking metric given
    assert mapplot.note.text == ""


def test_labels_one_per_basin_inside_its_visible_part(mapplot, basins):
    """One label per basin (not per polygon part), at a point inside the basin and outside the basins nested in
    it (shapely's contains); the demo nests VEU in VEL and SAU in SAR (`demo.DRAINS_TO`)."""
    import shapely

    d = mapplot.label_src.data
    assert len(d["text"]) == len(basins) and sorted(d["text"]) == sorted(str(b) for b in basins.index)
    for b, x, y in zip(d["text"], d["x"], d["y"]):
        pt = shapely.Point(x, y)
        assert basins.geometry.loc[b].contains(pt), b
        nested = [str(o) for o in basins.index if str(basins.loc[o, "drains_to"] or "") == b]
        assert not any(basins.geometry.loc[o].contains(pt) for o in nested), (b, nested)
    assert {"VEU", "SAU"} <= {b for b in basins.index if basins.loc[b, "drains_to"]}


def test_nesting_dashed_and_water_bodies_drawn_labelled(demo_dir, basins):
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.waterbodies import read_waterbody_outlines

    lakes = plots.basin_outlines(read_waterbody_outlines(open_catalog(demo_dir / "catalog.yaml").waterbodies))
    m = plots.MapPlot(plots.basin_outlines(basins), waterbodies=lakes)
    dash = dict(zip(m.src.data["basin"], m.src.data["dash"]))
    assert {b for b, d in dash.items() if d == "dashed"} == {str(b) for b in basins.index if basins.loc[b, "drains_to"]}
    assert list(m.wb_src.data["waterbody"]) == list(lakes.basin) and list(m.wb_labels.source.data["text"]) == ["TALV"]
    # the water bodies' renderer sets the view too: a lake at the edge of the study area stays in the frame
    assert len(m.fig.x_range.renderers) == 2 and m.fig.x_range.renderers == m.fig.y_range.renderers


def test_view_follows_the_outlines_with_true_aspect(mapplot, basins):
    """Ranges are computed (bokehjs, after every layout) from the outlines alone with a margin, and widened so
    that east and north have the same ground scale at the middle latitude: aspect_scale = length of a degree of
    longitude / length of a degree of latitude there (pyproj.Geod on WGS84, within 1%)."""
    from bokeh.models import DataRange1d
    from pyproj import Geod

    fig = mapplot.fig
    assert fig.match_aspect is True
    assert isinstance(fig.x_range, DataRange1d) and isinstance(fig.y_range, DataRange1d)
    assert fig.x_range.renderers == fig.y_range.renderers and len(fig.x_range.renderers) == 1
    assert fig.x_range.renderers[0].data_source is mapplot.src
    assert fig.x_range.range_padding == fig.y_range.range_padding == pytest.approx(2 * plots.MapPlot.MARGIN)
    _, s, _, n = basins.total_bounds
    lat = (s + n) / 2
    geod = Geod(ellps="WGS84")
    east = geod.inv(0.0, lat, 0.01, lat)[2]
    north = geod.inv(0.0, lat - 0.005, 0.0, lat + 0.005)[2]
    assert fig.aspect_scale == pytest.approx(east / north, rel=0.01)


def test_demo_default_colouring_separates_basins_where_the_relative_imbalance_cannot(demo_series):
    """Why the map's default is KGE (`names.MAP_METRIC`), on the invented demo (a consistency check): the best
    relative imbalance over all combinations is near zero in every basin (a signed metric: some combination
    crosses zero), while the best KGE spreads the basins apart; RMSE in mm/month ranks a basin with
    negative KGE among the best."""
    from wbexplore.balance.combos import best_scores

    rel = best_scores(demo_series, by="rel_imbalance")
    kge = best_scores(demo_series, by="kge")
    rmse = best_scores(demo_series, by="rmse")
    assert float(rel.abs().max()) < 1.0  # percent
    assert float(kge.max()) > 0.9 and float(kge.min()) < -1.0
    assert float(kge[rmse.idxmin()]) < 0.0  # the smallest RMSE is a basin whose best KGE is below 0
