"""Files of an estimate by difference (`wbexplore.balance.estimate.DifferenceEstimate`): CSV and netCDF.

Both go through `io.writers.atomic_path` (nothing is left behind on failure), the netCDF file through the one
CF-1.8 writer `io.writers.write_netcdf` (with the basin's position), and carry the formula, the uncertainty source
of every term, the note on what the standard errors leave out, and the caution text (global attributes).
"""

from __future__ import annotations

import datetime as _dt
import json
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..errors import InputError
from .writers import CAUTION, atomic_path, write_netcdf

__all__ = ["FORMATS", "estimate_table", "estimate_dataset", "write_estimate", "uncertainty_line", "water_years_text"]

FORMATS = (".csv", ".nc")
_LONG_NAMES = {"ET": "evapotranspiration", "Q": "outlet discharge as depth over the basin",
               "dS": "storage change"}


def check_format(path) -> str:
    """The output's suffix if it is one of `FORMATS`, else `InputError` naming the file."""
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        raise InputError(f"{path}: --out must end in .csv or .nc (got {suffix or 'no suffix'!r})")
    return suffix


def uncertainty_line(est) -> str:
    """Where each term's uncertainty comes from, one line."""
    from ..balance.uncertainty import uncertainty_text

    return uncertainty_text(est.uncertainty, q_relative_error=None if est.term == "Q" else est.q_relative_error)


def water_years_text(years) -> str:
    """The water years used, runs of consecutive years joined: "WY2001..WY2002, WY2004" ("" for none)."""
    runs = []
    for y in sorted(int(v) for v in years):
        if runs and y == runs[-1][1] + 1:
            runs[-1][1] = y
        else:
            runs.append([y, y])
    return ", ".join(f"WY{a}" if a == b else f"WY{a}..WY{b}" for a, b in runs)


def estimate_table(est) -> pd.DataFrame:
    """One table: rows of every month, every whole water year and the long-term mean (column ``scale``),
    values in mm over the row's span; column names carry the unit."""
    t = est.term
    m = est.monthly
    rows = pd.DataFrame({"scale": "month", "period": [f"{x:%Y-%m}" for x in m.index], "months": 1,
                         f"{t}_mm": m["estimate"].to_numpy(), f"{t}_standard_error_mm": m["standard_error"].to_numpy(),
                         f"{t}_product_mm": m["product"].to_numpy()})
    a = est.annual
    yr = pd.DataFrame({"scale": "water_year", "period": [f"WY{y}" for y in a.index], "months": a["months"].to_numpy(),
                       f"{t}_mm": a["estimate"].to_numpy(), f"{t}_standard_error_mm": a["standard_error"].to_numpy()})
    if "storage_change" in a:
        yr["storage_change_mm"] = a["storage_change"].to_numpy()
        yr["storage_change_standard_error_mm"] = a["storage_change_standard_error"].to_numpy()
    lt = est.long_term
    span = water_years_text(lt["years"])
    last = {"scale": "long_term", "period": span, "months": 12 * lt["water_years"], f"{t}_mm": lt["estimate"],
            f"{t}_standard_error_mm": lt["standard_error"]}
    if t != "dS":
        last["storage_change_mm"] = np.nan if lt["storage_change"] is None else lt["storage_change"]
    return pd.concat([rows, yr, pd.DataFrame([last])], ignore_index=True)


def _head(est) -> list[str]:
    sel = est.selection
    srcs = " ".join(f"{c}={getattr(sel, c)}" for c in ("P", "ET", "TWSA") if getattr(sel, c))
    return [
        f"wbexplore estimate by difference: {est.formula}; basin {sel.basin} ({est.basin_name}); {srcs}; "
        f"storage change {sel.storage_change}{' (window-matched)' if sel.matched else ''}; water year starts in "
        f"month {sel.water_year_start}",
        f"uncertainty_source: {uncertainty_line(est)}",
        "units: mm over the row's span: scale=month mm per month; scale=water_year mm per water year "
        "(named by the year it ends); scale=long_term mm per year, mean over whole water years with the "
        "storage term left out (storage_change_mm: what was left out, from the TWSA product)",
        f"note: {est.formula.split(' = ')[0]}_product_mm is the term as the chosen product or gauge has it. "
        "Monthly values are window-matched where the storage change is. " + _note(),
        f"caution: {CAUTION}",
    ]


def _note() -> str:
    from ..balance.estimate import NOTE

    return NOTE


def estimate_dataset(est):
    """The estimate as a CF-minded `xarray.Dataset`: monthly, per water year and long-term variables, each
    with its standard error as an ancillary variable (``<name>_standard_error``)."""
    import xarray as xr

    t = est.term
    m = est.monthly
    months = pd.DatetimeIndex(m.index)
    ends = months + pd.offsets.MonthBegin(1)
    ds = xr.Dataset(coords={"time": ("time", months.values),
                            "water_year": ("water_year", est.annual.index.to_numpy(dtype=np.int32))})
    ds["time"].attrs = {"standard_name": "time", "long_name": "month (start)", "bounds": "time_bnds", "axis": "T"}
    ds["time_bnds"] = (("time", "nv"), np.stack([months.values, ends.values], axis=1))
    ds["water_year"].attrs = {"long_name": f"water year (named by the calendar year it ends; starts in month "
                                           f"{est.selection.water_year_start})", "units": "1"}
    what = f"{_LONG_NAMES[t]} by difference ({est.formula})"

    def put(name, dims, values, long_name, units, err=None, cell_methods=None):
        ds[name] = (dims, np.asarray(values, dtype=np.float64))
        ds[name].attrs = {"long_name": long_name, "units": units}
        if cell_methods:
            ds[name].attrs["cell_methods"] = cell_methods
        if err is not None:
            ds[f"{name}_standard_error"] = (dims, np.asarray(err, dtype=np.float64))
            ds[f"{name}_standard_error"].attrs = {"long_name": f"standard error of {name} (random errors only)",
                                                  "units": units}
            ds[name].attrs["ancillary_variables"] = f"{name}_standard_error"

    put(t, ("time",), m["estimate"], f"{what}, monthly", "mm", m["standard_error"], "time: sum area: mean")
    put(f"{t}_product", ("time",), m["product"], f"{t} as the chosen product or gauge has it", "mm",
        cell_methods="time: sum area: mean")
    a = est.annual
    put(f"{t}_water_year", ("water_year",), a["estimate"], f"{what}, water-year total", "mm", a["standard_error"])
    if "storage_change" in a:
        put("storage_change_water_year", ("water_year",), a["storage_change"],
            "storage change in the water year (included in the estimate)", "mm", a["storage_change_standard_error"])
    lt = est.long_term
    put(f"{t}_long_term", (), lt["estimate"], f"{what.split(' (')[0]}, mean per water year over "
        f"{lt['water_years']} whole water years ({water_years_text(lt['years'])}), storage term left out", "mm year-1",
        lt["standard_error"])
    if t != "dS":
        put("storage_change_long_term", (), np.nan if lt["storage_change"] is None else lt["storage_change"],
            f"mean storage change per water year left out of {t}_long_term ({lt['storage_change_years']} years)",
            "mm year-1")
    sel = est.selection
    ds.attrs = {
        "Conventions": "CF-1.8",
        "title": f"wbexplore estimate by difference: {est.formula}, basin {sel.basin} ({est.basin_name})",
        "source": "; ".join(f"{c}={getattr(sel, c)}" for c in ("P", "ET", "TWSA") if getattr(sel, c))
                  + f"; storage change {sel.storage_change}{' (window-matched)' if sel.matched else ''}",
        "history": f"{_dt.datetime.now(_dt.timezone.utc):%Y-%m-%dT%H:%M:%SZ} wbexplore {__version__}",
        "basin_id": str(sel.basin), "basin_area_km2": float(est.area_km2),
        "uncertainty_source": json.dumps(est.uncertainty_source, sort_keys=True),
        "uncertainty_notes": uncertainty_line(est),
        "comment": f"{_note()} {CAUTION}",
    }
    ds = ds.assign_coords(basin=((), str(sel.basin), {"long_name": "basin identifier"}))
    for v in ds.variables:
        ds[v].encoding = {}
    return ds


def write_estimate(est, path, *, overwrite: bool = False, protect=None, positions=None) -> Path:
    """Write ``est`` as CSV (header lines start with '#') or CF-1.8 netCDF-4 (`wbexplore.io.writers.write_netcdf`,
    ``positions`` as for `wbexplore.io.writers.cf_ready`: a point inside the basin), by the suffix of ``path``."""
    suffix = check_format(path)
    if suffix == ".csv":
        table = estimate_table(est)
        with atomic_path(path, overwrite=overwrite, protect=protect) as tmp:
            with open(tmp, "w") as fh:
                fh.write("".join(f"# {line}\n" for line in _head(est)))
                table.to_csv(fh, index=False, float_format="%.10g")
        return Path(path)
    return write_netcdf(estimate_dataset(est), path, overwrite=overwrite, protect=protect, positions=positions)
