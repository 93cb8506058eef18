"""The one table of what readers see: plain names, units and one-line help for metrics, terms and options.

Every control, table header, tooltip, CSV header and report line that names a metric, a balance term or a
method option takes its words from here (`metric_label`, `column_label`, `OPTIONS`); the internal keys
(``rel_imbalance``, ``kge_prime``, ``central``) stay the keys of files, the command line and `balance/`.
Units are not repeated here: a metric's units are those of `balance.metrics.METRICS`, a term's those of
the unit system it is shown in (`balance.closure.to_unit_system`).

Signs, once for every text: the residual is P - ET - Q - dS (positive: the products leave more water
than the gauge carries away); PBIAS is 100 (sum Q - sum Qhat) / sum Q with Qhat = P - ET - dS, so a
positive mean residual goes with a *negative* PBIAS (Moriasi et al. 2007 define PBIAS that way).

Pure data (no panel, no bokeh): `wbexplore.report` and the explorer both read it.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["COMPARABLE_METRICS", "EFFICIENCY_METRICS", "MAP_METRIC", "METRIC_NAMES", "OPTIONS", "REPORT_NAMES",
           "SIGNED_METRICS", "TERM_NAMES", "Name", "column_label", "map_metric", "map_note", "metric_label",
           "metric_name", "metric_scale", "option_label", "term_units"]


@dataclass(frozen=True)
class Name:
    """What a reader sees for one key: a plain name, its units ("" for none) and a one-line help."""

    key: str
    name: str
    units: str
    help: str

    @property
    def label(self) -> str:
        """``name (units)``, or the name alone for a number without units."""
        return f"{self.name} ({self.units})" if self.units else self.name


_SIGN = "positive when P - ET - Q - dS > 0 (the products give more water than the gauge carries away)"

# metric key -> plain name and help (units from balance.metrics.METRICS)
_METRICS = (
    ("rmse", "Residual RMSE", "root-mean-square of the monthly residual P - ET - Q - dS; 0 is exact closure"),
    ("mae", "Mean absolute residual", "mean of |P - ET - Q - dS| over the valid months; 0 is exact closure"),
    ("bias", "Mean residual", f"mean of P - ET - Q - dS over the valid months; {_SIGN}"),
    ("rel_imbalance", "Relative imbalance",
     "mean residual as a share of mean P, same sign as the mean residual; comparable between wet and dry basins"),
    ("nse", "Nash-Sutcliffe efficiency",
     "of P - ET - dS against gauged Q: 1 is perfect, 0 no better than the mean of Q, below 0 worse"),
    ("nse_cyclo", "Nash-Sutcliffe beyond the seasons",
     "NSE about the monthly climatology of Q: the seasonal cycle earns no credit (Lehmann et al. 2022)"),
    ("kge", "Kling-Gupta efficiency",
     "of P - ET - dS against gauged Q: correlation, spread and mean ratio in one number; 1 is perfect (Gupta et al. 2009)"),
    ("kge_prime", "Kling-Gupta efficiency (CV ratio)",
     "KGE with the ratio of coefficients of variation in place of the spread ratio (Kling et al. 2012)"),
    ("r", "Correlation with gauged Q", "Pearson correlation of P - ET - dS with gauged Q; 1 is perfect"),
    ("pbias", "Percent bias",
     ("100 x (sum Q - sum (P - ET - dS)) / sum Q: positive when the balance gives less water than the gauge, "
      "so its sign is opposite to the mean residual's (Moriasi et al. 2007)")),
    ("annual_bias", "Mean annual residual", f"mean residual of complete years; {_SIGN}"),
    ("annual_rmse", "Annual residual RMSE", "root-mean-square of the residual totals of complete years"),
    ("n_valid", "Valid months", "months where P, ET, storage change and Q are all present"),
)


def _metric_names() -> dict:
    from .balance.metrics import METRICS

    rows = {k: Name(k, name, "" if METRICS[k][1] == "-" else METRICS[k][1], text) for k, name, text in _METRICS}
    if set(rows) != set(METRICS):  # pragma: no cover - guarded by tests/test_names.py
        raise RuntimeError(f"names.py and balance.metrics.METRICS disagree: {sorted(set(rows) ^ set(METRICS))}")
    return rows


METRIC_NAMES: dict[str, Name] = _metric_names()

# How a metric's values read on a colour scale (the map), the one place that says it:
# signed metrics: 0 is exact closure and the sign is a direction (a diverging scale centred on zero). The value is
# the sign of the water the products leave over: +1 where a positive value means the balance gives *more* water than
# the gauge carries away (the residual's sign), -1 for PBIAS (Moriasi et al. 2007: positive = the balance gives less).
SIGNED_METRICS: dict[str, int] = {"bias": 1, "rel_imbalance": 1, "annual_bias": 1, "pbias": -1}
# efficiencies: 1 is perfect, no lower bound (r: -1); 0 is "no better than the mean of Q" for NSE
EFFICIENCY_METRICS: tuple[str, ...] = ("nse", "nse_cyclo", "kge", "kge_prime", "r")
# the rest (rmse, mae, annual_rmse, n_valid) are magnitudes: >= 0, sequential scale from 0

# metrics without a depth unit, whose values mean the same in a wet and in a dry basin
COMPARABLE_METRICS: tuple[str, ...] = ("rel_imbalance", "pbias", *EFFICIENCY_METRICS)

#: What the basin map shows when "Rank by" is a depth (RMSE, mean residual, in mm): the Kling-Gupta efficiency.
#: Why KGE and not the relative imbalance: each basin shows its *best* combination, and the relative imbalance is
#: signed, so among the 75 combinations of the demo one nearly always crosses zero (best |value| 0.08 to 0.51 % in
#: every basin: all basins would look closed); KGE compares P - ET - dS with gauged Q relative to Q's own mean and
#: spread, so wet and dry basins share one scale (demo: 0.90 to 0.98 in the three wettest, -1.7 to -5.6 in the four
#: with small flows, which RMSE in mm/month ranks among the best because their flows are small).
MAP_METRIC = "kge"


def metric_scale(key: str) -> str:
    """How `key` reads on a colour scale: ``"signed"``, ``"efficiency"`` or ``"magnitude"`` (see `SIGNED_METRICS`)."""
    if key in SIGNED_METRICS:
        return "signed"
    return "efficiency" if key in EFFICIENCY_METRICS else "magnitude"


def map_metric(rank_by: str) -> str:
    """The metric the basin map colours by for "Rank by" `rank_by`: itself where it compares across basins
    (`COMPARABLE_METRICS`), else `MAP_METRIC`."""
    return rank_by if rank_by in COMPARABLE_METRICS else MAP_METRIC


def map_note(rank_by: str) -> str:
    """The map's explanation when it colours by another metric than "Rank by" ("" when it does not); three short lines
    (a narrow map cuts a long line)."""
    shown = map_metric(rank_by)
    if shown == rank_by:
        return ""
    n = METRIC_NAMES.get(rank_by)
    units = n.units if n else ""
    return (f"Colours: {metric_name(shown)}, not Rank by:\n{metric_name(rank_by)} in {units or 'its units'} "
            "does not compare\nbetween wet and dry basins")

# balance terms and other series columns: plain name and help; units come from the unit system shown
TERM_NAMES: dict[str, Name] = {n.key: n for n in (
    Name("P", "Precipitation (P)", "", "basin-mean precipitation of the chosen product"),
    Name("ET", "Evapotranspiration (ET)", "", "basin-mean evapotranspiration of the chosen product"),
    Name("Q", "Gauged discharge (Q)", "", "outlet discharge spread over the basin area"),
    Name("dS", "Storage change (dS)", "", "change of the storage anomaly, by the chosen difference"),
    Name("TWSA", "Storage anomaly (TWSA)", "", "basin-mean storage anomaly (a state, not a flux)"),
    Name("residual", "Residual (P - ET - Q - dS)", "", _SIGN),
    Name("Qhat", "Discharge from the balance (P - ET - dS)", "", "what the balance says the gauge should carry"),
)}

# option keys -> plain names and help (the explorer's controls, the report's method notes)
OPTIONS: dict[str, Name] = {n.key: n for n in (
    Name("central", "Central", "",
         "dS = (M[i+1] - M[i-1]) / 2 of monthly-mean storage M: from mid-month i-1 to mid-month i+1, halved"),
    Name("backward", "Backward", "", "dS = M[i] - M[i-1]: from mid-month i-1 to mid-month i"),
    Name("forward", "Forward", "", "dS = M[i+1] - M[i]: from mid-month i to mid-month i+1"),
    Name("matched", "Window-matched fluxes", "",
         "P, ET and Q filtered with the window the storage difference spans (half of each end month), so that "
         "a consistent balance closes exactly; off: each month's own totals, off by a seasonal smoothing error"),
    Name("whole", "Whole basin", "", "the basin up to its outlet gauge"),
    Name("incremental", "Incremental unit", "",
         "the basin minus its upstream basins; their gauged outflow enters as inflow"),
    Name("mm", "mm/month", "", "depth over the basin per month (TWSA in mm)"),
    Name("m3", "m3/month", "", "volume per month (TWSA in m3)"),
    Name("m3/s", "m3/s", "", "mean flow over the month (TWSA in m3)"),
    Name("hm3", "hm3/month", "", "cubic hectometres (10^6 m3) per month; a water body's default (storage in hm3)"),
)}

# the report's tables: their column headings (units given where the column has them)
REPORT_NAMES: dict[str, Name] = {n.key: n for n in (
    Name("product", "Product", "", "display name of the catalog entry, its id in brackets"),
    Name("component", "Term", "", "the balance term the product gives: P, ET or TWSA"),
    Name("grid", "Grid spacing", "", "cell size of the product's grid: degrees (geographic) or km (projected)"),
    Name("step", "Time step", "", "the product's own time step, before summing to calendar months"),
    Name("water_year", "Water year", "", "twelve months from the water-year start, named by the year it ends"),
    Name("annual_n_valid", "Valid months", "", "months of the water year with every term present (0..12)"),
    Name("exchange_hm3", "Unmeasured exchange", "hm3/month",
         "mean residual as a volume: the net unmeasured outflow, positive = unmeasured loss"),
    Name("exchange_hm3_se", "Exchange standard error", "hm3/month", "1 standard error, lag-1 inflated"),
    Name("exchange_m3s", "Unmeasured exchange", "m3/s", "mean residual as a mean flow; positive = unmeasured loss"),
    Name("exchange_m3s_se", "Exchange standard error", "m3/s", "1 standard error, lag-1 inflated"),
)}

_SYSTEM_UNITS = {"mm": ("mm/month", "mm"), "m3": ("m3/month", "m3"), "m3/s": ("m3/s", "m3"), "hm3": ("hm3/month", "hm3")}


def metric_name(key: str) -> str:
    """Plain name of a metric key (the key itself for an unknown one, so nothing is ever hidden)."""
    n = METRIC_NAMES.get(key)
    return n.name if n else key


def metric_label(key: str) -> str:
    """Plain name of a metric with its units, e.g. ``Residual RMSE (mm/month)``."""
    n = METRIC_NAMES.get(key)
    return n.label if n else key


def option_label(key: str) -> str:
    n = OPTIONS.get(key)
    return n.name if n else key


def term_units(key: str, unit_system: str = "mm") -> str:
    """Units of a series column shown in `unit_system` (TWSA is a storage: mm or m3)."""
    flux, storage = _SYSTEM_UNITS[unit_system]
    if key.startswith("valid_fraction") or key == "beyond_2sigma":
        return ""
    return storage if key == "TWSA" or key == "sigma_TWSA" else flux


def column_label(key: str, unit_system: str = "mm") -> str:
    """Header of a series or table column: plain name with units (``Precipitation (P) (mm/month)``).

    Metric keys get their metric label; ``sigma_<term>`` the term's one-sigma uncertainty; ``valid_fraction_<c>``
    the share of the basin the product covers (0..1); flows (``flow_<id>``) keep their id; the source columns of
    a ranking (``P``, ``ET``, ``TWSA``) are product ids, not values: use ``units=False`` there.
    """
    if key in METRIC_NAMES:
        return metric_label(key)
    if key in REPORT_NAMES:
        return REPORT_NAMES[key].label
    if key.startswith("valid_fraction_"):
        return f"{key.removeprefix('valid_fraction_')} valid share of basin (0..1)"
    if key == "beyond_2sigma":
        return "Residual beyond 2 sigma (true/false)"
    base, prefix = (key[6:], "1-sigma of ") if key.startswith("sigma_") else (key, "")
    name = TERM_NAMES[base].name if base in TERM_NAMES else base
    return f"{prefix}{name} ({term_units(base, unit_system)})"
