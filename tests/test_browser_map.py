"""The basin map in a real browser (issue 17, item 3): first render at 1024, 1600 and 1920 px.

Each width is a fresh page load at that viewport (not a resize). Read from bokehjs (`Bokeh.index`, the plot's view):
the frame's box, every outline vertex mapped to pixels by the view's own scales, the colour bar's box. Checked:
every outline (basins and water bodies) inside the frame, the colour bar drawn inside the canvas with the metric's
title, the canvas inside the window, and no squeeze (pixels per kilometre east = pixels per kilometre north at the
middle latitude, kilometres from pyproj.Geod, within 2%). Screenshots: artifacts/explorer_map_<width>.png.
"""

from __future__ import annotations

import pytest
from test_browser import browser, open_page, server, study  # noqa: F401 - the fixtures of the served page

pytestmark = pytest.mark.browser
WIDTHS = (1024, 1600, 1920)

_PROBE = """() => {
  const v = Bokeh.index.query_one(v => v.model.css_classes != null && v.model.css_classes.includes('wbx-map')
                                       && v.frame != null);
  if (v == null) return null;
  const f = v.frame.bbox, sx = v.frame.x_scale, sy = v.frame.y_scale;
  let x0 = Infinity, x1 = -Infinity, y0 = Infinity, y1 = -Infinity, n = 0, lat0 = Infinity, lat1 = -Infinity;
  for (const r of v.model.renderers) {
    const d = r.data_source.data;
    if (!('xs' in d)) continue;
    for (let i = 0; i < d.xs.length; i++) {
      n += 1;
      for (const x of d.xs[i]) { const p = sx.compute(x); x0 = Math.min(x0, p); x1 = Math.max(x1, p); }
      for (const y of d.ys[i]) { const p = sy.compute(y); y0 = Math.min(y0, p); y1 = Math.max(y1, p);
                                 lat0 = Math.min(lat0, y); lat1 = Math.max(lat1, y); }
    }
  }
  const lat = (lat0 + lat1) / 2;
  const bars = [...v.renderer_views.values()].filter(rv => rv.model.constructor.__name__ === 'ColorBar');
  const cb = bars.map(rv => ({box: [rv.bbox.left, rv.bbox.top, rv.bbox.right, rv.bbox.bottom],
                              title: rv.model.title}));
  const r = v.el.getBoundingClientRect();
  return {frame: [f.left, f.top, f.right, f.bottom], outlines: [x0, y0, x1, y1], parts: n, lat: lat,
          px_per_deg_x: Math.abs(sx.compute(1) - sx.compute(0)), px_per_deg_y: Math.abs(sy.compute(lat + 0.5) - sy.compute(lat - 0.5)),
          canvas: [v.bbox.width, v.bbox.height], colorbars: cb, page: [r.left, r.right, window.innerWidth]};
}"""


def test_map_at_three_widths_keeps_every_basin_in_the_frame_with_its_legend(browser, server, study, artifacts):  # noqa: F811
    from pyproj import Geod

    from wbexplore.names import map_metric, metric_label

    pg = open_page(browser, server)
    geod = Geod(ellps="WGS84")
    seen = {}
    try:
        for w in WIDTHS:
            pg.set_viewport_size({"width": w, "height": 1200})
            pg.goto(server)  # a first render at this width
            pg.wait_for_selector(".wbx-summary", timeout=90_000)
            pg.wait_for_timeout(1500)
            pg.locator(".wbx-map").first.scroll_into_view_if_needed()
            pg.screenshot(path=str(artifacts / f"explorer_map_{w}.png"))
            m = pg.evaluate(_PROBE)
            seen[w] = m
            assert m is not None and m["parts"] >= 9, m  # eight demo basins and the reservoir
            fl, ft, fr, fb = m["frame"]
            x0, y0, x1, y1 = m["outlines"]
            assert fl <= x0 and x1 <= fr and ft <= y0 and y1 <= fb, (w, m)  # every outline inside the frame
            assert fr - fl > 150 and fb - ft > 150, (w, m)  # a map, not a sliver
            # the legend: one colour bar, inside the canvas, titled with the map's metric (KGE for Rank by RMSE)
            assert len(m["colorbars"]) == 1, m
            cb = m["colorbars"][0]
            cw, ch = m["canvas"]
            assert 0 <= cb["box"][0] < cb["box"][2] <= cw and 0 <= cb["box"][1] < cb["box"][3] <= ch, (w, cb, m)
            assert cb["title"].startswith(f"best {metric_label(map_metric('rmse'))}"), cb
            left, right, inner = m["page"]
            assert 0 <= left and right <= inner, (w, m)  # not cut by the window
            # no squeeze: the same ground distance east and north spans the same number of pixels
            lat = m["lat"]
            km_x = geod.inv(0.0, lat, 1.0, lat)[2] / 1000
            km_y = geod.inv(0.0, lat - 0.5, 0.0, lat + 0.5)[2] / 1000
            assert m["px_per_deg_x"] / km_x == pytest.approx(m["px_per_deg_y"] / km_y, rel=0.02), (w, m)
        assert pg.errors == []
    finally:
        pg.close()
    # wider pages give a wider frame: the map follows the width (responsive), not a fixed drawing
    assert seen[1024]["frame"][2] - seen[1024]["frame"][0] < seen[1920]["frame"][2] - seen[1920]["frame"][0]
