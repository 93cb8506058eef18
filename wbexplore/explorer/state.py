"""The one shared state of the explorer (a `param.Parameterized`).

Widgets write to it, views read from it, nothing else holds state. Every number it
hands out comes from `wbexplore.balance` (memoised per selection, so switching back
and forth costs nothing and never re-reads grids: the series are extracted once).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import param

from ..balance import (METHODS, METRICS, UNIT_SYSTEMS, ClosureOptions, Selection, best_scores, compute_selection,
                       long_term_all, rank)
from ..balance.terms import SOURCE_COMPONENTS
from ..series import source_ids
from ..errors import InputError

__all__ = ["ClosureState"]


class ClosureState(param.Parameterized):
    """Basin, sources, period and options of the closure being explored."""

    series = param.Parameter(precedence=-1, doc="canonical basin series (xarray.Dataset)")
    incremental_series = param.Parameter(default=None, precedence=-1,
                                         doc="canonical series of the incremental units (``extract(..., "
                                             "incremental=True)``), or None where the catalog nests no basin")
    basins = param.Parameter(precedence=-1, doc="basin outlines (GeoDataFrame, EPSG:4326)")
    catalog_path = param.String(default="", precedence=-1)
    title = param.String(default="", precedence=-1, doc="catalog title (text from the catalog file)")

    basin = param.Selector(objects=[], doc="basin id")
    unit = param.Selector(objects=["whole", "incremental"], default="whole", label="Balance unit",
                          doc="the whole basin, or its incremental unit (the basin minus its upstream basins; "
                              "only for a basin with upstream basins: otherwise it falls back to whole)")
    P = param.Selector(objects=[], label="Precipitation (P)")
    ET = param.Selector(objects=[], label="Evapotranspiration (ET)")
    TWSA = param.Selector(objects=[], label="Storage anomaly (TWSA)")
    period = param.Tuple(default=("", ""), length=2, doc="first and last month, 'YYYY-MM' (inclusive)")
    storage_change = param.Selector(objects=list(METHODS), default="central", label="Storage change")
    matched = param.Boolean(default=True, label="Window-matched fluxes")
    unit_system = param.Selector(objects=list(UNIT_SYSTEMS), default="mm", label="Units")
    metric = param.Selector(objects=[m for m in METRICS if m != "n_valid"], default="rmse", label="Rank by")
    min_valid = param.Integer(default=24, bounds=(1, None), precedence=-1)

    def __init__(self, series, basins=None, *, memo: dict | None = None, **params):
        """`memo`: results computed from `series` by other states on the same series (a served page
        passes one dict to every session, so a visitor never recomputes what another one did; every
        key holds the full selection or options it was computed for)."""
        super().__init__(series=series, basins=basins, **params)
        self._memo: dict = {} if memo is None else memo
        ids = [str(b) for b in series["basin"].values]
        self.param.basin.objects = ids
        labels = {}
        for comp in SOURCE_COMPONENTS:
            opts = source_ids(series, comp)
            if not opts:
                raise InputError(f"the series hold no {comp} source")
            getattr(self.param, comp).objects = opts
            labels.update({s: str(series[s].attrs.get("long_name", s)) for s in opts})
        self.labels = labels
        n = series.sizes["time"]
        self.months = pd.DatetimeIndex(series["time"].values)
        with param.parameterized.discard_events(self):
            self.period = params.get("period", (f"{self.months[0]:%Y-%m}", f"{self.months[n - 1]:%Y-%m}"))
            self.basin = params.get("basin", ids[0])
            for comp in SOURCE_COMPONENTS:
                if comp not in params:
                    setattr(self, comp, getattr(self.param, comp).objects[0])
        if params.get("unit") == "incremental" and not self.has_incremental:
            raise InputError(f"basin {self.basin!r} has no upstream basin, so it has no incremental unit")
        self._check_period(self.period)
        self._last_period = self.period
        self.param.watch(self._unit_follows_basin, ["basin"])
        if "P" not in params:
            self.select_best()

    # ----------------------------------------------------------------- balance unit
    @property
    def has_incremental(self) -> bool:
        """Whether the current basin has an incremental unit (upstream basins in the catalog's nesting)."""
        inc = self.incremental_series
        return inc is not None and self.basin in set(map(str, inc["basin"].values))

    def _unit_follows_basin(self, event) -> None:
        if self.unit == "incremental" and not self.has_incremental:
            self.unit = "whole"

    @param.depends("unit", watch=True)
    def _unit_needs_upstream(self) -> None:
        if self.unit == "incremental" and not self.has_incremental:
            # the page's switch is disabled for such a basin; a script asking for it is told, not served the
            # whole basin under the name of an incremental unit
            self.unit = "whole"
            raise InputError(f"basin {self.basin!r} has no upstream basin: it has no incremental unit "
                             "(the unit stays 'whole')")

    def unit_series(self):
        """The canonical series of the chosen balance unit (whole basins or incremental units)."""
        return self.incremental_series if self.unit == "incremental" and self.has_incremental else self.series

    def upstream_of(self, basin: str | None = None) -> list[str]:
        """The basins upstream of ``basin`` (default the current one) that its incremental unit excludes."""
        b = self.basin if basin is None else basin
        inc = self.incremental_series
        if inc is None or b not in set(map(str, inc["basin"].values)) or "upstream_basins" not in inc.coords:
            return []
        return [u for u in str(inc["upstream_basins"].sel(basin=b).values).split(",") if u]

    # ----------------------------------------------------------------- period (months, not indices)
    def _check_period(self, period) -> None:
        first, last = f"{self.months[0]:%Y-%m}", f"{self.months[-1]:%Y-%m}"
        try:
            a, b = (pd.Period(str(v), freq="M") for v in period)
        except (TypeError, ValueError):
            raise InputError(f"explorer: period {period!r} is not two months 'YYYY-MM'") from None
        if not (f"{a}" == str(period[0]) and f"{b}" == str(period[1])):
            raise InputError(f"explorer: period {period!r} is not two months 'YYYY-MM'")
        if a > b or str(a) < first or str(b) > last:
            raise InputError(f"explorer: period {period[0]}..{period[1]} is not inside the series' {first}..{last}")

    @param.depends("period", watch=True)
    def _period_inside(self) -> None:
        try:
            self._check_period(self.period)
        except InputError:
            with param.parameterized.discard_events(self):
                self.period = self._last_period
            raise
        self._last_period = self.period

    # ----------------------------------------------------------------- derived selection
    @property
    def start(self) -> str:
        return str(self.period[0])

    @property
    def end(self) -> str:
        return str(self.period[1])

    def options(self) -> ClosureOptions:
        """The closure options the widgets set (one `ClosureOptions`, as the library and the CLI use)."""
        return ClosureOptions(start=self.start, end=self.end, storage_change=self.storage_change,
                              matched=self.matched, min_valid=self.min_valid)

    def selection(self) -> Selection:
        return Selection.from_options(self.basin, self.options(), **{c: getattr(self, c) for c in SOURCE_COMPONENTS})

    def _cached(self, key, fn):
        if key not in self._memo:
            if len(self._memo) > 512:
                self._memo.clear()
            self._memo[key] = fn()
        return self._memo[key]

    def result(self):
        """`SelectionResult` of the current selection, over the chosen balance unit."""
        sel = self.selection()
        ds = self.unit_series()
        unit = ds.attrs.get("unit", "whole")
        return self._cached(("result", unit, sel, self.min_valid),
                            lambda: compute_selection(ds, sel, min_valid=self.min_valid))

    def _rank_for(self, basin: str) -> pd.DataFrame:
        opts = self.options()
        ds = self.unit_series() if basin == self.basin else self.series
        key = ("rank", ds.attrs.get("unit", "whole"), basin, opts, self.metric)

        def run():
            try:
                return rank(ds, basin, opts, by=self.metric)
            except InputError as exc:
                df = pd.DataFrame(columns=["rank", *SOURCE_COMPONENTS, "scored", *METRICS])
                df.attrs["message"] = str(exc)
                return df

        return self._cached(key, run)

    def ranking(self) -> pd.DataFrame:
        """All combinations for the basin and period, best first."""
        return self._rank_for(self.basin)

    def basin_scores(self) -> pd.Series:
        """Best score of the ranking metric per basin (for the map)."""
        opts = self.options()
        key = ("scores", opts, self.metric)

        def run():
            try:
                return best_scores(self.series, opts, by=self.metric)
            except InputError:
                return pd.Series(np.nan, index=self.param.basin.objects)

        return self._cached(key, run)

    def multi_basin(self) -> pd.DataFrame:
        sel = self.selection()
        return self._cached(("multi", sel.replace(basin="")), lambda: long_term_all(self.series, sel))

    def select_best(self) -> None:
        """Set P, ET and TWSA to the first-ranked combination for the basin and period."""
        r = self.ranking()
        if len(r) and bool(r.iloc[0]["scored"]):
            self.param.update(P=r.iloc[0]["P"], ET=r.iloc[0]["ET"], TWSA=r.iloc[0]["TWSA"])

    def pick_basin_at(self, lon: float, lat: float) -> str | None:
        """The smallest basin containing a point (so nested basins stay clickable)."""
        if self.basins is None:
            return None
        import shapely

        pt = shapely.Point(lon, lat)
        hits = [(row["area_km2"], bid) for bid, row in self.basins.iterrows() if row.geometry.covers(pt)]
        if not hits:
            return None
        bid = str(min(hits)[1])
        if bid in self.param.basin.objects:
            self.basin = bid
        return bid

    def view_data(self) -> dict:
        """Everything the views draw, computed from `balance/` (used by tests and benchmarks)."""
        return {"result": self.result(), "ranking": self.ranking(), "scores": self.basin_scores(),
                "multi": self.multi_basin()}
