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
from ..balance.engine import is_merged
from ..balance.estimate import TERMS as ESTIMATE_TERMS
from ..balance.merge import DEFAULT_METHOD, MERGE_METHODS, merge_form, merge_products, merged_label, merged_name, with_merged
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
    waterbody_series = param.Parameter(default=None, precedence=-1,
                                       doc="canonical series of the water bodies (``load_series(..., waterbodies=True)``)"
                                           ", or None where the catalog has none")
    waterbody_levels = param.Parameter(default=None, precedence=-1,
                                       doc="level (m) and volume (m3) per water body (`pipeline.waterbody_series`)")
    waterbodies = param.Parameter(default=None, precedence=-1, doc="water-body outlines (GeoDataFrame, EPSG:4326)")
    catalog_path = param.String(default="", precedence=-1)
    title = param.String(default="", precedence=-1, doc="catalog title (text from the catalog file)")

    basin = param.Selector(objects=[], doc="the basin or water body whose balance is shown (a click on the map picks "
                                           "one too)")
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
    estimate_term = param.Selector(objects=list(ESTIMATE_TERMS), default="ET", label="Estimate by difference",
                                   doc="the term estimated from the others: ET for a check on the ET products, Q for an "
                                       "ungauged outlet, dS for a check on the storage products")
    merge_method = param.Selector(objects=list(MERGE_METHODS), default=DEFAULT_METHOD, precedence=-1,
                                  doc="variant of the merged sources offered beside the products "
                                      "(`balance.merge.MERGE_METHODS`)")

    def __init__(self, series, basins=None, *, memo: dict | None = None, **params):
        """`memo`: results computed from `series` by other states on the same series (a served page
        passes one dict to every session, so a visitor never recomputes what another one did; every
        key holds the full selection or options it was computed for)."""
        super().__init__(series=series, basins=basins, **params)
        self._memo: dict = {} if memo is None else memo
        ids = [str(b) for b in series["basin"].values]
        self._basin_ids = list(ids)
        wbs = self.waterbody_series
        self._waterbody_ids = [str(w) for w in wbs["basin"].values] if wbs is not None else []
        ids = ids + self._waterbody_ids  # ids are unique across both (the catalog reader refuses a shared one)
        self.param.basin.objects = ids
        labels = {}
        for comp in SOURCE_COMPONENTS:
            opts = source_ids(series, comp)
            if not opts:
                raise InputError(f"the series hold no {comp} source")
            getattr(self.param, comp).objects = opts
            labels.update({s: str(series[s].attrs.get("long_name", s)) for s in opts})
        labels.update({merged_name(c): merged_label(self.merge_method) for c in SOURCE_COMPONENTS})
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
        # the basins' source choices while a water body is shown (restored when a basin is chosen again)
        self._basin_choice = {c: getattr(self, c) for c in (*SOURCE_COMPONENTS, "unit_system")}
        self._sources_of = {"basin": {c: source_ids(series, c) for c in SOURCE_COMPONENTS},
                            "waterbody": {c: source_ids(wbs, c) for c in SOURCE_COMPONENTS} if wbs is not None else {}}
        self._shown_kind = "basin"
        self._last_product = {c: getattr(self, c) for c in SOURCE_COMPONENTS}  # the products a merged choice left
        if self.is_waterbody:
            self._switch_kind()
        self.param.watch(self._kind_follows_basin, ["basin"])
        self._follow_merged()
        self.param.watch(self._follow_merged, ["basin", "unit", "storage_change", "matched"])
        self.param.watch(self._merge_method_changed, ["merge_method"])
        self.param.watch(self._remember_product, list(SOURCE_COMPONENTS))
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
        """The canonical series of the chosen balance unit (whole basins, incremental units or water bodies)."""
        if self.is_waterbody:
            return self.waterbody_series
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

    # ----------------------------------------------------------------- water bodies
    @property
    def is_waterbody(self) -> bool:
        """Whether the chosen id is a lake or reservoir of the catalog's ``waterbodies`` (not a basin)."""
        return self.basin in self._waterbody_ids

    def names(self) -> dict:
        """Id -> name of every basin, then every water body (for pickers)."""
        out = {}
        for ds in (self.series, self.waterbody_series):
            if ds is not None:
                names = ds["basin_name"].values if "basin_name" in ds.coords else ds["basin"].values
                out.update({str(b): str(n) for b, n in zip(ds["basin"].values, names)})
        return out

    def _kind_follows_basin(self, event) -> None:
        if self._kind != self._shown_kind:
            self._switch_kind()

    def _switch_kind(self) -> None:
        """Between a basin and a water body: the source choices of the other series (a water body's storage is
        its ``levels``), volume units (hm3/month) by default for a water body; a basin gets its choices back."""
        to_wb = self.is_waterbody
        if to_wb:
            self._basin_choice = {c: getattr(self, c) for c in (*SOURCE_COMPONENTS, "unit_system")}
        new = {}
        for comp in SOURCE_COMPONENTS:
            new[comp] = self._source(comp)
            # a copy: a Selector without check_on_set appends a value set outside its objects to this list
            getattr(self.param, comp).objects = self._offered(comp)
        if to_wb and self.unit_system == "mm":
            new["unit_system"] = "hm3"
        elif not to_wb and self.unit_system == "hm3":
            new["unit_system"] = self._basin_choice.get("unit_system", "mm")
        self._shown_kind = "waterbody" if to_wb else "basin"
        self.param.update(**new)

    @property
    def _kind(self) -> str:
        return "waterbody" if self.is_waterbody else "basin"

    def _source(self, comp: str) -> str:
        """The chosen source of ``comp`` where the chosen unit's series has it; else (the moment between choosing
        a water body and its sources following) the one the switch gives: a basin's earlier choice, or the first
        of the water body's sources (its storage: ``levels``). Every view sees the same selection."""
        v = getattr(self, comp)
        opts = self._offered(comp)
        if v in opts:
            return v
        if self._kind == "basin":  # back from a water body: the basin's choice; from a merged source: the product
            backs = (self._basin_choice.get(comp), self._last_product.get(comp))
            for back in (backs[::-1] if is_merged(v) else backs):
                if back in opts:
                    return back
        return opts[0]

    # ----------------------------------------------------------------- merged sources (`balance.merge`)
    def _offered(self, comp: str) -> list[str]:
        """The sources the picker of ``comp`` offers: the unit's products, then the merged source where the chosen
        basin's can be built (a new list: a Selector may append to it)."""
        opts = list(self._sources_of[self._kind][comp])
        if self._kind == "basin" and self._merged()[0] is not None:
            opts.append(merged_name(comp))
        return opts

    def _merge_one(self, ds, basin: str) -> tuple:
        """(`merge_products` of ``basin`` in ``ds``, or None; why not: its one-line refusal), in the page's closure
        form (storage-change method, window matching) with `merge_method`; memoised."""
        form = (self.storage_change, self.matched)

        def run():
            try:  # the form a selection file's export builds the merge in (`balance.merge.merge_form`)
                return merge_products(ds, method=self.merge_method, basins=[basin], options=merge_form(*form)), ""
            except InputError as exc:
                return None, str(exc).removeprefix(f"basin {basin!r}: ")

        return self._cached(("merge", ds.attrs.get("unit", "whole"), basin, self.merge_method, form), run)

    def _merged(self) -> tuple:
        """(the chosen basin's series (that basin alone: a basin's balance does not depend on the others) with its
        merged sources, or None; why not)."""
        if self.is_waterbody:
            return None, "a water body has no merged sources"
        ds = self.unit_series()
        m, why = self._merge_one(ds, self.basin)
        if m is None:
            return None, why
        key = ("merged series", ds.attrs.get("unit", "whole"), self.basin, self.merge_method, m.attrs["closure_options"])
        one = [[str(b) for b in ds["basin"].values].index(self.basin)]
        return self._cached(key, lambda: with_merged(ds.isel(basin=one), m)), ""

    def _merged_everywhere(self):
        """The whole basins' series with the merged sources of every basin where they can be built (NaN elsewhere)."""
        import xarray as xr

        ds = self.series
        parts = [m for m, _ in (self._merge_one(ds, b) for b in self._basin_ids) if m is not None]
        if not parts:
            return ds
        opts = parts[0].attrs["closure_options"]
        return self._cached(("merged everywhere", self.merge_method, opts), lambda: with_merged(
            ds, xr.concat(parts, "basin", data_vars="all", coords="minimal", compat="override",
                          join="outer").reindex(basin=ds["basin"].values)))

    def _follow_merged(self, *events) -> None:
        """The pickers offer a merged source only where the chosen unit has one; a merged choice where there is
        none goes back to the product chosen before it."""
        if self._kind != self._shown_kind:  # `_switch_kind` sets the pickers
            return
        new = {}
        for comp in SOURCE_COMPONENTS:
            getattr(self.param, comp).objects = self._offered(comp)
            if getattr(self, comp) not in getattr(self.param, comp).objects:
                new[comp] = self._source(comp)
        if new:
            self.param.update(**new)

    def _merge_method_changed(self, *events) -> None:
        """Another merge variant: the merged entries' labels name it, and the pickers offer a merged source where
        that variant can be built (collocation may refuse where the filter does not)."""
        self.labels = {**self.labels, **{merged_name(c): merged_label(self.merge_method) for c in SOURCE_COMPONENTS}}
        self._follow_merged()

    def _remember_product(self, *events) -> None:
        for e in events:
            if self._kind == "basin" and not is_merged(e.new):
                self._last_product[e.name] = e.new

    def merged_note(self) -> str:
        """One line saying why the pickers offer no merged source for the chosen basin ("" where they do, and
        for a water body, whose sources are its own)."""
        if self.is_waterbody:
            return ""
        m, why = self._merged()
        return "" if m is not None else f"{merged_label(self.merge_method)} not offered for {self.basin}: {why}"

    def _computed_series(self):
        """The series the chosen unit's balance is computed on: the unit's, with its merged sources where they
        can be built."""
        m, _ = self._merged()
        return self.unit_series() if m is None else m

    def exchange(self):
        """A water body's residual as unmeasured exchange (`balance.waterbody.unmeasured_exchange`), or None."""
        if not self.is_waterbody:
            return None
        from ..balance.waterbody import unmeasured_exchange
        from ..series import SURFACE_AREA

        sel = self.selection()
        ds = self.waterbody_series

        def run():
            surf = ds[SURFACE_AREA].sel(basin=self.basin) if SURFACE_AREA in ds else None
            return unmeasured_exchange(self.result(), surface_area_km2=surf)

        return self._cached(("exchange", sel, self.min_valid), run)

    def levels(self):
        """Level (m) and volume (m3) of the chosen water body over time (`pipeline.waterbody_series`), or None."""
        lv = self.waterbody_levels
        if not self.is_waterbody or lv is None or self.basin not in set(map(str, lv["waterbody"].values)):
            return None
        return lv.sel(waterbody=self.basin)

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
        return Selection.from_options(self.basin, self.options(), **{c: self._source(c) for c in SOURCE_COMPONENTS})

    def _cached(self, key, fn):
        if key not in self._memo:
            if len(self._memo) > 512:
                self._memo.clear()
            self._memo[key] = fn()
        return self._memo[key]

    def result(self):
        """`SelectionResult` of the current selection, over the chosen balance unit."""
        sel = self.selection()
        ds = self._computed_series()
        unit = ds.attrs.get("unit", "whole")
        return self._cached(("result", unit, sel, self.min_valid, self.merge_method),
                            lambda: compute_selection(ds, sel, min_valid=self.min_valid))

    def _rank_for(self, basin: str) -> pd.DataFrame:
        opts = self.options()
        ds = self._computed_series() if basin == self.basin else self.series
        key = ("rank", ds.attrs.get("unit", "whole"), basin, opts, self.metric, self.merge_method)

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

    def basin_scores(self, metric: str | None = None) -> pd.Series:
        """Best score of `metric` (default: the ranking metric) per basin (for the map)."""
        opts = self.options()
        metric = self.metric if metric is None else metric
        key = ("scores", opts, metric)

        def run():
            try:
                return best_scores(self.series, opts, by=metric)
            except InputError:
                return pd.Series(np.nan, index=self.param.basin.objects)

        return self._cached(key, run)

    def estimate(self, term: str | None = None):
        """`balance.estimate.DifferenceEstimate` of ``term`` (default `estimate_term`) from the other terms of the
        current selection, over the chosen balance unit (with its merged sources); None for a water body (its
        residual is the unmeasured exchange, `exchange`) or where it cannot be estimated (`estimate_note` says
        why). The uncertainty is the summary's: stated, else collocation, else the product spread (labelled)."""
        return self._estimate(term)[0]

    def estimate_note(self, term: str | None = None) -> str:
        """Why there is no estimate of ``term`` for the current selection ("" where there is one)."""
        return self._estimate(term)[1]

    def _estimate(self, term: str | None) -> tuple:
        from ..balance.estimate import estimate_by_difference

        term = self.estimate_term if term is None else term
        if self.is_waterbody:
            return None, "a water body's residual is its unmeasured exchange: no estimate by difference"
        sel = self.selection()
        ds = self._computed_series()

        def run():
            try:
                return estimate_by_difference(ds, sel, term), ""
            except InputError as exc:
                return None, str(exc)

        return self._cached(("estimate", ds.attrs.get("unit", "whole"), sel, term, self.merge_method), run)

    def multi_basin(self) -> pd.DataFrame:
        """Long-term P - ET against Q of every basin (with a water body chosen: the basins' last sources)."""
        sel = self.selection()
        if self.is_waterbody:
            sel = sel.replace(**{c: self._basin_choice[c] for c in SOURCE_COMPONENTS})
        merged = any(is_merged(getattr(sel, c)) for c in SOURCE_COMPONENTS)
        return self._cached(("multi", sel.replace(basin=""), self.merge_method if merged else None),
                            lambda: long_term_all(self._merged_everywhere() if merged else self.series, sel))

    def select_best(self) -> None:
        """Set P, ET and TWSA to the first-ranked combination for the basin and period."""
        r = self.ranking()
        if len(r) and bool(r.iloc[0]["scored"]):
            self.param.update(P=r.iloc[0]["P"], ET=r.iloc[0]["ET"], TWSA=r.iloc[0]["TWSA"])

    def pick_basin_at(self, lon: float, lat: float) -> str | None:
        """The smallest basin or water body containing a point (so nested basins and lakes stay clickable)."""
        if self.basins is None and self.waterbodies is None:
            return None
        import shapely

        pt = shapely.Point(lon, lat)
        hits = [(row["area_km2"], bid) for gdf in (self.basins, self.waterbodies) if gdf is not None
                for bid, row in gdf.iterrows() if row.geometry.covers(pt)]
        if not hits:
            return None
        bid = str(min(hits)[1])
        if bid in self.param.basin.objects:
            self.basin = bid
        return bid

    def view_data(self) -> dict:
        """Everything the views draw, computed from `balance/` (used by tests and benchmarks)."""
        return {"result": self.result(), "ranking": self.ranking(), "scores": self.basin_scores(),
                "multi": self.multi_basin(), "exchange": self.exchange(), "levels": self.levels()}
