"""The explorer page: controls that write to one `ClosureState`, views that read from it.

``explore(catalog_or_path)`` returns the app for a JupyterLab cell; ``serve(catalog)`` serves
the same app as a web page (panel serve). A catalog that fails validation shows its message
in the page instead of a traceback.

Served pages are open to anyone who reaches the port, and every text on them may come from a
file someone else wrote: names, ids, titles, labels and messages are escaped (`wbexplore.escape`),
paths are shown relative to the study folder, and exports go to one folder fixed when the server
starts, under generated file names: a visitor cannot choose where anything is written.
"""

from __future__ import annotations

import io
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from .. import plots
from ..names import METRIC_NAMES, OPTIONS, column_label, metric_label
from ..balance.combos import RANK_TABLE_COLUMNS, WATERBODY_TABLE_COLUMNS
from ..balance.terms import SOURCE_COMPONENTS
from ..errors import InputError
from ..escape import md_text, public_message, safe_filename, study_relative
from ..io.writers import CAUTION
from . import views
from .state import ClosureState

__all__ = ["Explorer", "explore", "serve", "load_state", "default_export_dir"]

_DEPS = views.DEPS  # what the ranking table follows


def load_state(catalog, *, cache_dir=None, progress: bool = False) -> ClosureState:
    """Open a catalog, extract (or reuse cached) series and build the shared state."""
    from ..io.catalog import open_catalog
    from ..pipeline import CoverageWarning, load_basins, load_incremental_basins, load_series

    if hasattr(catalog, "data_vars"):  # already a canonical Dataset
        return ClosureState(catalog)
    cat = open_catalog(catalog)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)  # shown per basin in the page instead
        ds = load_series(cat, cache_dir=cache_dir, progress=progress)
        inc = None
        if cat.basins.downstream_field and len(load_incremental_basins(cat)):  # nested basins: their units too
            inc = load_series(cat, cache_dir=cache_dir, progress=progress, incremental=True)
    return ClosureState(ds, basins=load_basins(cat), incremental_series=inc, catalog_path=str(cat.path),
                        title=str(cat.title or ""), **_waterbody_state(cat, cache_dir=cache_dir, progress=progress))


def _waterbody_state(cat, *, cache_dir=None, progress: bool = False) -> dict:
    """The water bodies' part of a `ClosureState` (series, levels and volumes, outlines); empty without any."""
    if cat.waterbodies is None:
        return {}
    from ..io.waterbodies import read_waterbody_outlines
    from ..pipeline import CoverageWarning, load_series, waterbody_series

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        wbs = load_series(cat, cache_dir=cache_dir, progress=progress, waterbodies=True)
    return {"waterbody_series": wbs, "waterbody_levels": waterbody_series(cat),
            "waterbodies": read_waterbody_outlines(cat.waterbodies)}


class Explorer:
    """Widgets and views around one `ClosureState`.

    `export_dir` is where the export and report buttons write (default ``exports/`` beside the
    catalog); the page cannot change it. `outlines`: the basins' `plots.Outlines` when the caller
    already has them (a served page computes them once for every session).
    """

    def __init__(self, state: ClosureState, *, export_dir: str | os.PathLike | None = None,
                 outlines: plots.Outlines | None = None, cell_means: dict | None = None):
        import panel as pn

        self.state = state
        self.cell_means = cell_means or {}  # basin -> product -> CellMeans (`pipeline.load_cell_means`)
        self._layout = None
        self.outlines = plots.basin_outlines(state.basins) if outlines is None else outlines
        s = state
        self.study_dir = Path(s.catalog_path).resolve().parent if s.catalog_path else None
        self.export_dir = default_export_dir(s.catalog_path, export_dir)
        self.wb_outlines = plots.basin_outlines(state.waterbodies) if state.waterbodies is not None else None
        self._basin_opts = self._choices("basin")  # basins, then water bodies
        self.controls = {name: self._control(name) for name in CONTROLS}
        c = self.controls
        self.w_basin, self.w_period, self.w_unit, self.w_estimate = (c[k] for k in ("basin", "period", "unit",
                                                                                      "estimate_term"))
        self.w_src = {comp: c[comp] for comp in SOURCE_COMPONENTS}
        self.w_method, self.w_matched, self.w_units, self.w_metric = (c[k] for k in ("storage_change", "matched",
                                                                                      "unit_system", "metric"))
        self.matched_help = pn.widgets.TooltipIcon(value=self._help("matched"), width=20)  # a checkbox shows no help
        self.w_search = pn.widgets.AutocompleteInput(name="Find basin", options=list(self._basin_opts),
                                                     case_sensitive=False, search_strategy="includes",
                                                     min_characters=1, placeholder="type an id or a name", width=260)
        self.w_best = pn.widgets.Button(name="Best combination", button_type="primary", width=260)
        self.w_unit.disabled = not s.has_incremental  # whole basin or its incremental unit: only where there is one
        self._wire()
        self.table = self._new_table(self._rank_view())
        self._table_box = pn.Column(self.table, sizing_mode="stretch_width")
        self.export_where = pn.pane.Markdown(f"Files go to *{md_text(self._shown(self.export_dir))}*",
                                             css_classes=["wbx-export-dir"], width=260)
        self.w_export = pn.widgets.Button(name="Export selection + CSV", button_type="success", width=260)
        self.w_export.on_click(self._on_export)
        self.w_report = pn.widgets.Button(name="Write HTML report", button_type="default", width=260)
        self.w_report.on_click(self._on_report)
        self.export_msg = pn.pane.Markdown("", css_classes=["wbx-export-msg"], width=260)
        self.w_download = pn.widgets.FileDownload(callback=self._csv_bytes, filename="series.csv",
                                                  label="Download series CSV", width=260, button_type="light")
        s.param.watch(self._refresh_table, list(_DEPS))
        s.param.watch(lambda *e: setattr(self.w_download, "filename", self._csv_name()), ["basin", *SOURCE_COMPONENTS])

    # ----------------------------------------------------------------- controls generated from the state's parameters
    def _choices(self, name: str) -> dict:
        """Display name -> value of every object of the state's parameter ``name`` (`wbexplore.names`; ids with the
        catalog's names or labels)."""
        s = self.state
        objects = s.param[name].objects
        if name == "basin":
            return {f"{b} - {n}": b for b, n in s.names().items()}
        if name in SOURCE_COMPONENTS:
            return {f"{s.labels.get(i, i)} [{i}]": i for i in objects}
        if name == "metric":
            return {metric_label(k): k for k in objects}
        if name == "estimate_term":
            from ..balance.estimate import formula

            return {formula(k): k for k in objects}
        return {OPTIONS[k].name: k for k in objects}

    def _help(self, name: str) -> str:
        """The help text of the state's parameter ``name``: each option's (`names.OPTIONS`), the chosen metric's, or
        the parameter's own ``doc``."""
        s = self.state
        if name == "metric":
            return METRIC_NAMES[s.metric].help
        if name in OPTIONS:
            return OPTIONS[name].help
        objects = getattr(s.param[name], "objects", None) or []
        if objects and all(k in OPTIONS for k in objects):
            return "; ".join(f"{OPTIONS[k].name}: {OPTIONS[k].help}" for k in objects)
        return s.param[name].doc or ""

    def _control(self, name: str):
        """The widget of the state's parameter ``name``, generated from it: the kind `CONTROLS` gives, the
        parameter's label as its name, its objects as options (`_choices`), its value, its help (`_help`) and a CSS
        class ``wbx-<name>``; linked both ways (the period as month numbers, written when a drag ends)."""
        import panel as pn

        s = self.state
        p = s.param[name]
        kind = CONTROLS[name]
        css = [f"wbx-{name.replace('_', '-')}"]
        if kind == "MonthRange":
            # the period in whole months: the slider counts months (year * 12 + month - 1), one step per arrow key
            from bokeh.models import CustomJSTickFormatter

            w = pn.widgets.IntRangeSlider(
                name=p.label, start=_month_number(s.months[0]), end=_month_number(s.months[-1]), step=1,
                value=tuple(_month_number(v) for v in s.period), width=260, css_classes=css,
                format=CustomJSTickFormatter(code="const y = Math.floor(tick / 12), m = tick - 12 * y + 1;"
                                                  " return y + '-' + (m < 10 ? '0' : '') + m;"))

            def to_state(e):
                lo, hi = sorted(e.new)
                s.period = (_month_text(lo), _month_text(hi))

            w.param.watch(to_state, "value_throttled")
            s.param.watch(lambda e: setattr(w, "value", tuple(_month_number(v) for v in e.new)), name)
            return w
        if kind == "Checkbox":
            w = pn.widgets.Checkbox(name=p.label, value=getattr(s, name), width=220, css_classes=css)
        else:
            w = getattr(pn.widgets, kind)(name=p.label, options=self._choices(name), value=getattr(s, name),
                                          width=260, css_classes=css, description=self._help(name) or None)
        w.param.watch(lambda e: setattr(s, name, e.new), "value")
        if name in SOURCE_COMPONENTS:  # the options follow the state's (merged sources, a water body's own)
            s.param.watch(lambda e: self._follow_source(w, name, e.new), name)
        elif name == "metric":  # the help names the chosen metric
            s.param.watch(lambda e: w.param.update(value=e.new, description=self._help(name)), name)
        else:
            s.param.watch(lambda e: setattr(w, "value", e.new), name)
        return w

    # ----------------------------------------------------------------- wiring widgets <-> state
    def _wire(self):
        """What the generated controls do not: finding a basin by name, the best-combination button, the pickers'
        options where the kind of unit or the merged sources change, the balance-unit switch's availability."""
        s = self.state

        def on_search(e):
            if e.new in self._basin_opts:
                s.basin = self._basin_opts[e.new]

        self.w_search.param.watch(on_search, "value")

        def on_kind(*e):  # a water body has its own sources (storage from levels): the pickers follow
            for comp, w in self.w_src.items():
                self._follow_source(w, comp, getattr(s, comp), refresh=True)

        # and merged sources come and go (another merge variant: their label too)
        s.param.watch(on_kind, ["basin", "unit", "storage_change", "matched", "merge_method"])
        self.w_best.on_click(lambda e: s.select_best())

        def on_unit(e):
            self.w_unit.disabled = not s.has_incremental
            self.w_unit.value = s.unit

        s.param.watch(on_unit, ["unit", "basin"])

    def _follow_source(self, w, comp: str, value, *, refresh: bool = False) -> None:
        """Source picker ``w`` shows the state's ``value`` of ``comp``; its options are the state's (refreshed
        first where they changed: a page's Select would otherwise reset a value it does not offer)."""
        s = self.state
        if refresh or value not in w.options.values():
            w.options = {f"{s.labels.get(i, i)} [{i}]": i for i in getattr(s.param, comp).objects}
        w.value = value

    def _rank_view(self) -> pd.DataFrame:
        r = self.state.ranking()
        wb = self.state.is_waterbody  # its storage is always the levels; no metric against a gauged outlet
        cols = list(WATERBODY_TABLE_COLUMNS if wb else RANK_TABLE_COLUMNS)
        first = 3 if wb else 4  # the first numeric column
        metric = self.state.metric
        if metric not in cols:
            cols.insert(first, metric)
        if not len(r):
            return pd.DataFrame(columns=cols)
        out = r[cols].copy()
        out["rank"] = [str(v) if sc else "not scored" for v, sc in zip(r["rank"], r["scored"])]
        for c in cols[first:]:
            if c != "n_valid":
                out[c] = out[c].astype(float).round(3)
        return out

    @staticmethod
    def _titles(view) -> dict:
        """Plain column headers with units (`wbexplore.names`); the source columns hold product ids."""
        return {c: ("Rank" if c == "rank" else column_label(c).rsplit(" (", 1)[0] if c in ("P", "ET", "TWSA")
                    else column_label(c)) for c in view.columns}

    @staticmethod
    def _tooltips(view) -> dict:
        return {c: METRIC_NAMES[c].help for c in view.columns if c in METRIC_NAMES}

    def _on_screen_rows(self, view=None) -> list[int]:
        """The row(s) of the ranking ``view`` (default the table's) with the combination on screen."""
        v = self.table.value if view is None else view
        on = np.ones(len(v), dtype=bool)
        for c in SOURCE_COMPONENTS:
            if c in v:  # a water body's ranking has no TWSA column
                on &= v[c].astype(str).to_numpy() == str(getattr(self.state, c))
        return np.flatnonzero(on).tolist()

    def _new_table(self, view):
        """The ranking table for ``view`` (a `_rank_view` frame), escaped, clickable, the combination on screen
        selected and shown bold on light orange (`_ON_SCREEN_CSS`).

        The mark is the table's row selection, not cell styles: a change of the styles makes Tabulator redraw the
        whole table, about 100 ms of the page's main thread per source change, where a selection change selects
        one row (chromium profile of four ET changes, panel 1.9.4)."""
        import panel as pn

        # "plaintext" escapes the cell value (ids come from the catalog): no cell renders HTML
        table = pn.widgets.Tabulator(view, disabled=True, show_index=False, height=330,
                                     sizing_mode="stretch_width", selectable=1, selection=self._on_screen_rows(view),
                                     formatters={c: {"type": "plaintext"} for c in view.columns},
                                     titles=self._titles(view), header_tooltips=self._tooltips(view),
                                     css_classes=["wbx-ranking"], stylesheets=[_ON_SCREEN_CSS])
        table.on_click(self._on_row)
        table.param.watch(self._keep_selection, "selection")
        return table

    def _mark_on_screen(self) -> None:
        rows = self._on_screen_rows()
        if list(self.table.selection) != rows:
            self.table.selection = rows

    def _keep_selection(self, event) -> None:
        """A click on the marked row unselects it in the page: the combination is still on screen, so mark it again."""
        self._mark_on_screen()

    def _refresh_table(self, *events):
        if any(e.name in ("basin", "unit", "period", "storage_change", "matched", "metric", "merge_method")
               for e in events):
            view = self._rank_view()
            if list(view.columns) != list(self.table.value.columns):
                # other columns (another "Rank by", basin <-> water body): a new table in the same place. Updating
                # the columns of the one on the page left the removed column's header standing in the browser in
                # 6 of 12 switches back to a shorter set (measured with headless chromium, panel 1.9.4).
                self.table = self._new_table(view)
                self._table_box.objects = [self.table]
                return
            self.table.param.update(value=view, titles=self._titles(view), header_tooltips=self._tooltips(view))
            self._mark_on_screen()
        elif any(e.name in SOURCE_COMPONENTS for e in events):
            self._mark_on_screen()  # the same rows, another one on screen

    def _on_row(self, event):
        row = self.table.value.iloc[event.row]
        self.state.param.update(**{c: row[c] for c in SOURCE_COMPONENTS if c in row})  # a water body: P and ET

    def _shown(self, path) -> str:
        """A path as a visitor may see it: relative to the study folder."""
        return study_relative(Path(path).resolve(), self.study_dir)

    def _csv_name(self):
        s = self.state
        return f"series_{safe_filename(s.basin, s.P, s.ET, s.TWSA)}.csv"

    def _csv_bytes(self):
        from ..selection import _series_frame

        f = _series_frame(self.state.result(), self.state.unit_system)
        f = f.rename(columns=lambda c: column_label(str(c), self.state.unit_system))  # plain names with units
        buf = io.StringIO()
        buf.write(f"# {CAUTION}\n")
        f.to_csv(buf, float_format="%.17g")
        return io.BytesIO(buf.getvalue().encode())

    def _write_to_folder(self, what: str, write) -> None:
        """Run ``write(state, folder)`` (returns the message) and show the outcome under the buttons."""
        s = self.state
        folder = self.export_dir
        try:
            if not s.catalog_path:
                raise InputError(f"{what} needs the explorer to be opened on a catalog file")
            folder.mkdir(parents=True, exist_ok=True)
            unit = ["incremental"] if s.unit_series() is not s.series else []
            written = write(s, folder, safe_filename(s.basin, *unit, s.P, s.ET, s.TWSA, s.start, s.end))
            self.export_msg.object = "Wrote " + " and ".join(f"*{md_text(self._shown(p))}*" for p in written)
        except (InputError, OSError) as exc:
            msg = public_message(exc, self.study_dir)
            self.export_msg.object = f"**{what.capitalize()} failed:** {md_text(msg)}"

    def _on_export(self, event):
        from ..selection import export_selection

        def write(s, folder, stem):
            out = export_selection(s.catalog_path, s.selection(), folder / f"selection_{stem}.yaml", overwrite=True,
                                   series=str(folder / f"selection_{stem}.csv"), unit_system=s.unit_system,
                                   ds=s.unit_series(), incremental=s.unit_series() is not s.series,
                                   merge_method=s.merge_method)
            return [out["selection"], out["series"]]

        self._write_to_folder("export", write)

    def _on_report(self, event):
        from ..report import write_report

        def write(s, folder, stem):
            out = write_report(s.catalog_path, s.unit_series(), s.selection(), folder / f"report_{stem}.html",
                               overwrite=True, by=s.metric, merge_method=s.merge_method)
            return [out]

        self._write_to_folder("the report", write)

    # ----------------------------------------------------------------- views
    def _view(self, cls):
        """The pane of view class ``cls`` (`views.PlotView`: its figure built once for this page; `views.TextView`)."""
        return cls(self).pane()

    def _disagreement(self):
        """Where the products of one component disagree in the basin: `plots.disagreement_map` of the cell means
        the extraction cached with the series, redrawn when the basin or the chooser's component changes."""
        import panel as pn

        from ..names import TERM_NAMES

        s = self.state
        chooser = pn.widgets.RadioButtonGroup(name="Map of", options={TERM_NAMES[c].name: c for c in SOURCE_COMPONENTS},
                                              value=SOURCE_COMPONENTS[0], css_classes=["wbx-disagree-component"])
        # each panel its own pane in a panel grid: the bokeh grid of the same figures, placed on this page, drew
        # every panel as an empty frame a few pixels wide (seen in headless chromium; alone on a page it drew well)
        pane = pn.GridBox(ncols=1, css_classes=["wbx-disagree"])

        def draw(*events):
            grid = plots.disagreement_map(self.cell_means.get(s.basin, {}), self.outlines, basin=s.basin,
                                          component=chooser.value, labels=dict(s.labels))
            children = getattr(grid, "children", None)
            if not children:  # a one-line message (no product of the component for this basin)
                pane.ncols, pane.objects = 1, [pn.pane.Bokeh(grid)]
                return
            for fig, _, _ in children:
                fig.toolbar_location = None  # the hover stays; one toolbar per panel would crowd the grid
            pane.ncols = 1 + max(c for _, _, c in children)
            pane.objects = [pn.pane.Bokeh(fig) for fig, _, _ in sorted(children, key=lambda t: (t[1], t[2]))]

        draw()
        s.param.watch(draw, "basin")
        chooser.param.watch(draw, "value")
        return chooser, pane

    def _disagreement_section(self):
        """The disagreement maps behind a button: drawn on the first click only (two panels per product kept the
        first page heavier by about a tenth and its notebook file over 2 MB)."""
        import panel as pn

        head = pn.pane.Markdown("### Where the products disagree in this basin (cell by cell, whole basin; "
                                "opacity: share of the cell inside the basin)")
        show = pn.widgets.Button(name="Show the maps of where the products disagree", button_type="default",
                                 width=360, css_classes=["wbx-disagree-show"])
        col = pn.Column(head, show, sizing_mode="stretch_width")

        def on_show(event):
            col.objects = [head, *self._disagreement()]

        show.on_click(on_show)
        return col

    def _estimate_section(self):
        """One term by difference from the others (`views.EstimateView`, `views.EstimateTextView`) and the chooser of
        the term (`ClosureState.estimate_term`); hidden for a water body (its residual is the unmeasured exchange)."""
        import panel as pn

        s = self.state
        col = pn.Column(pn.pane.Markdown("### One term by difference (long-term: over whole water years, storage left "
                                         "out)"), self.w_estimate,
                        self._view(views.EstimateView), self._view(views.EstimateTextView),
                        sizing_mode="stretch_width", css_classes=["wbx-estimate-section"])

        def show(*events):
            col.visible = not s.is_waterbody

        show()
        s.param.watch(show, "basin")
        return col

    def _waterbody_views(self, summary, warn, resid, scatter):
        """The water body's views (unmeasured exchange, level and volume) and which views show for which kind:
        a water body has no gauged outlet (no Q scatter) and its residual is the unmeasured exchange.

        The water body's two plots are built when a water body is first shown: on a page that opens on a basin
        they would be two of its eight figures, built, sent and laid out by the browser unseen."""
        import panel as pn

        s = self.state
        exchange, levels = (pn.Column(sizing_mode="stretch_width", margin=0) for _ in range(2))
        wb_summary, wb_warn = self._view(views.WaterbodySummaryView), self._view(views.WaterbodyWarningsView)
        self._wb_panes = (wb_summary, wb_warn)

        def show(*events):
            wb = s.is_waterbody
            if wb and not exchange.objects:
                exchange.objects = [self._view(views.ExchangeView)]
                levels.objects = [self._view(views.LevelsView)]
            for pane in (exchange, levels, *exchange.objects, *levels.objects, wb_summary, wb_warn):
                _set_visible(pane, wb)
            for pane in (resid, scatter, summary, warn):
                _set_visible(pane, not wb)

        show()
        s.param.watch(show, "basin")
        return exchange, levels

    def panel(self):
        """The page layout (a panel object; built once per explorer)."""
        if self._layout is None:
            self._layout = self._build_layout()
        return self._layout

    def _build_layout(self):
        import panel as pn

        s = self.state
        bars, resid, scatter = (self._view(v) for v in (views.BarsView, views.ResidualView, views.ScatterView))
        summary, warn = self._view(views.SummaryView), self._view(views.WarningsView)
        multi = self._view(views.MultiBasinView)
        exchange, levels = self._waterbody_views(summary, warn, resid, scatter)
        controls = pn.Column(
            pn.pane.Markdown("### Selection"), self.w_basin, self.w_search,
            pn.pane.Markdown("Balance unit (incremental: minus the upstream basins)"), self.w_unit, self.w_src["P"], self.w_src["ET"],
            self.w_src["TWSA"], self.w_period, pn.pane.Markdown("Storage change (TWSA differences)"), self.w_method,
            pn.Row(self.w_matched, self.matched_help), self.w_units, self.w_metric,
            self.w_best,
            pn.pane.Markdown("### Summary"), summary, warn, *self._wb_panes,
            pn.pane.Markdown("### Export"), self.export_where, self.w_export, self.w_report, self.export_msg, self.w_download,
            width=290)
        views_col = pn.Column(
            pn.Row(pn.Column(self._view(views.MapView), sizing_mode="stretch_width"), bars,
                   sizing_mode="stretch_width"),
            resid, exchange,
            pn.Row(scatter, levels, multi, sizing_mode="stretch_width"),
            self._estimate_section(),
            self._disagreement_section(),
            pn.pane.Markdown("### Every combination for this basin and period (click a row to select it)"),
            self._table_box,
            sizing_mode="stretch_width")
        title = f"\n**{md_text(s.title)}**\n" if s.title else ""
        header = pn.pane.Markdown(
            f"## wbexplore: water-balance closure\n{title}\n*{CAUTION}*", sizing_mode="stretch_width",
            css_classes=["wbx-header"])
        return pn.Column(header, pn.Row(controls, views_col, sizing_mode="stretch_width"),
                         sizing_mode="stretch_width")

    def __panel__(self):
        return self.panel()

    def _repr_mimebundle_(self, include=None, exclude=None):
        """A notebook cell shows the page (one layout per explorer, built on first display)."""
        return self.panel()._repr_mimebundle_(include, exclude)

    # ----------------------------------------------------------------- the notebook's handle on the page
    @property
    def selection(self):
        """The `Selection` on screen (basin, sources, period, storage-change method, window matching)."""
        return self.state.selection()

    @property
    def result(self) -> pd.DataFrame:
        """The current combination's balance terms, one row per month of the period (a copy).

        Columns as `compute_selection` gives them: every term, the residual, their sigmas and valid fractions,
        in mm per month (TWSA in mm) whatever the page's unit switch shows; ``valid`` marks the months scored.
        """
        return self.state.result().frame.copy()

    @property
    def ranking(self) -> pd.DataFrame:
        """Every combination for the basin and period on screen, best first by the page's "Rank by" (a copy)."""
        return self.state.ranking().copy()


# the page's controls: the widget kind of each state parameter shown (`Explorer._control` generates the widget from the
# parameter); a new parameter on the page is one line here and one in `Explorer._build_layout`. The units are a Select:
# four buttons do not fit the 260 px column ("hm3/month" was cut off)
CONTROLS = {"basin": "Select", "unit": "RadioButtonGroup", "P": "Select", "ET": "Select", "TWSA": "Select",
            "period": "MonthRange", "storage_change": "RadioButtonGroup", "matched": "Checkbox",
            "unit_system": "Select", "metric": "Select", "estimate_term": "RadioButtonGroup"}

# the selected row of the ranking is the combination on screen (`Explorer._new_table`)
_ON_SCREEN_CSS = (".tabulator-row.tabulator-selected, .tabulator-row.tabulator-selected:hover "
                  "{ background-color: #fde3c4 !important; } .tabulator-row.tabulator-selected .tabulator-cell "
                  "{ font-weight: bold; }")


def _set_visible(pane, on: bool) -> None:
    """Show or hide a pane, and the bokeh figure it shows with it: panel's Bokeh pane, set back to visible (its
    default), forgets the override and reads the figure's own ``visible``, which the pane had set to False when
    it was hidden, so a plot hidden once stayed hidden (tests/test_explorer_waterbody.py)."""
    fig = getattr(pane, "object", None)
    if fig is not None and not isinstance(fig, str) and hasattr(fig, "visible"):
        fig.visible = on
    pane.visible = on


def _month_number(month) -> int:
    """A month ('YYYY-MM' or a timestamp) as a count of months: year * 12 + month - 1 (the period slider's value)."""
    p = pd.Period(str(month)[:7], freq="M")
    return p.year * 12 + p.month - 1


def _month_text(number: int) -> str:
    y, m = divmod(int(number), 12)
    return f"{y:04d}-{m + 1:02d}"


def default_export_dir(catalog_path, export_dir=None) -> Path:
    """The one folder the page's export and report buttons write to (``exports/`` beside the catalog)."""
    if export_dir:
        return Path(export_dir).resolve()
    base = Path(catalog_path).resolve().parent if catalog_path else Path.cwd()
    return base / "exports"


def _error_page(message: str, study_dir=None):
    """The page shown instead of the explorer: the message with study-relative paths, as plain text."""
    import panel as pn

    text = md_text(public_message(message, study_dir))
    return pn.Column(pn.pane.Markdown("## wbexplore"),
                     pn.pane.Alert(f"**The catalog could not be opened.** {text}", alert_type="danger",
                                   css_classes=["wbx-error"]),
                     pn.pane.Markdown(f"*{CAUTION}*"))


def explore(catalog_or_path, *, cache_dir=None, export_dir=None):
    """The explorer for a JupyterLab cell: an `Explorer`, shown as the page when it ends a cell.

    A next cell reads what is on screen: ``app.selection`` (a `Selection`), ``app.result`` (the current
    combination's monthly terms, mm/month), ``app.ranking`` (every combination, best first). A catalog that
    cannot be opened gives the page with its message instead (a panel layout).

    Parameters
    ----------
    catalog_or_path : catalog path, `Catalog`, or canonical series (xarray.Dataset)

    Examples
    --------
    >>> app = explore("catalog.yaml")  # doctest: +SKIP
    >>> app.ranking.head(3)             # doctest: +SKIP
    """
    from . import notebook

    notebook.extension("tabulator")  # the page's code from the Jupyter server: no network, small notebook files
    try:
        state = load_state(catalog_or_path, cache_dir=cache_dir)
    except InputError as exc:
        return _error_page(str(exc), _study_dir(catalog_or_path))
    return Explorer(state, export_dir=export_dir, cell_means=_cell_means_of(catalog_or_path, cache_dir))


def _cell_means_of(catalog, cache_dir=None) -> dict:
    """The cell means the extraction cached with the series (`pipeline.load_cell_means`); none for series given
    as a Dataset."""
    if hasattr(catalog, "data_vars"):
        return {}
    from ..pipeline import CoverageWarning, load_cell_means

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        return load_cell_means(catalog, cache_dir=cache_dir)


def _study_dir(catalog) -> Path | None:
    path = getattr(catalog, "path", catalog)
    if isinstance(path, (str, os.PathLike)):
        return Path(path).resolve().parent
    return None


def serve(catalog, *, port: int = 5006, address: str = "127.0.0.1", show: bool = False, cache_dir=None,
          export_dir=None):
    """Serve the explorer as a web page (blocks).

    The series are extracted (or read from the cache) once, before the first page is requested,
    and shared by every session together with everything computed from them (rankings, basin
    scores, selections): a new session only builds its widgets. Exports and reports go to
    `export_dir` (default ``exports/`` beside the catalog), fixed here for every visitor.
    """
    import panel as pn

    pn.extension("tabulator")
    study = _study_dir(catalog)
    out_dir = default_export_dir(catalog if study else None, export_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError(f"serve: option '--export-dir': {out_dir} exists and is not a folder")
    try:
        base = load_state(catalog, cache_dir=cache_dir, progress=True)
        err = None
    except InputError as exc:
        base, err = None, str(exc)
    outlines = cells = None
    if base is not None:
        outlines = plots.basin_outlines(base.basins)
        cells = _cell_means_of(catalog, cache_dir)
        base.view_data()  # the first page's results, computed before anyone waits for them

    def page():
        if err:
            return _error_page(err, study)
        # each session has its own selection, but the series, the outlines and the memo of
        # computed results are the server's (read-only data, one thread serves all sessions)
        st = ClosureState(base.series, basins=base.basins, incremental_series=base.incremental_series,
                          waterbody_series=base.waterbody_series, waterbody_levels=base.waterbody_levels,
                          waterbodies=base.waterbodies,
                          catalog_path=base.catalog_path, title=base.title, memo=base._memo)
        return Explorer(st, export_dir=out_dir, outlines=outlines, cell_means=cells).panel()

    print(f"wbexplore explorer on http://{address}:{port}/  (Ctrl+C to stop); exports go to "
          f"{out_dir}", flush=True)
    pn.serve({"/": page}, port=port, address=address, show=show, title="wbexplore",
             websocket_origin=[f"{address}:{port}", f"localhost:{port}", f"127.0.0.1:{port}"])
