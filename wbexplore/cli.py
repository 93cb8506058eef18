"""Command line: ``wbexplore demo | check | extract | rank | export | replay | report | estimate | merge | serve``.

Exit status 0 on success, 2 on bad input (one line naming the file, field or value),
1 when ``replay`` finds different numbers. No partial output file is left behind.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import warnings
from contextlib import contextmanager
from pathlib import Path

from . import __version__
from .errors import InputError, ReplayMismatch

__all__ = ["main"]


def _count(text: str) -> int:
    """A whole number of months, 0 or more (argparse type)."""
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if n < 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be 0 or more")
    return n


def _port(text: str) -> int:
    """A TCP port number, 1..65535 (argparse type)."""
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number") from None
    if not 1 <= n <= 65535:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number (1 to 65535)")
    return n


def _check_listen(address: str, port: int) -> None:
    """Refuse an address the server could not listen on (unknown host, port in use) before any work."""
    import socket

    try:
        infos = socket.getaddrinfo(address, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except (OSError, UnicodeError) as exc:
        raise InputError(f"--address {address!r}: not an address of this machine ({exc.__class__.__name__})") from None
    family, kind, proto, _, sockaddr = infos[0]
    with socket.socket(family, kind, proto) as sock:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            sock.bind(sockaddr)
        except OSError as exc:
            raise InputError(f"--address {address!r} --port {port}: cannot listen there ({exc.strerror})") from None


def _fraction(text: str) -> float:
    """A share between 0 and 1 (argparse type)."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text!r} must be between 0 and 1")
    return v


def _month_number(text: str) -> int:
    """A calendar month number, 1..12 (argparse type)."""
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a month number") from None
    if not 1 <= n <= 12:
        raise argparse.ArgumentTypeError(f"{text!r} must be between 1 and 12")
    return n


def _add_merge_method(p):
    p.add_argument("--merge-method", default=MERGE_DEFAULT, choices=list(MERGE_METHOD_NAMES), metavar="VARIANT",
                   help="variant of a merged source given as --P merged_P, --ET merged_ET or --TWSA merged_TWSA: "
                        "pr, ckf or collocation (default ckf, as in the explorer); built in the selection's "
                        "storage-change method and window matching")


def _add_selection_args(p, *, sources: bool, every_basin: bool = False):
    p.add_argument("catalog", help="catalog YAML file")
    if every_basin:
        g = p.add_mutually_exclusive_group(required=True)
        g.add_argument("--basin", help="basin or water-body id")
        g.add_argument("--all", action="store_true", help="every basin: one table, sorted by basin then rank")
    else:
        p.add_argument("--basin", required=True, help="basin or water-body id")
    p.add_argument("--incremental", action="store_true",
                   help="the basin's incremental unit (its area minus its upstream basins; needs basins: downstream_field)")
    if sources:
        p.add_argument("--P", required=True, metavar="SRC", help="precipitation source id")
        p.add_argument("--ET", required=True, metavar="SRC", help="evapotranspiration source id")
        p.add_argument("--TWSA", metavar="SRC", help="storage-anomaly source id (a basin; a water body's storage "
                                                    "comes from its levels)")
    p.add_argument("--start", metavar="YYYY-MM", help="first month of the period")
    p.add_argument("--end", metavar="YYYY-MM", help="last month of the period")
    p.add_argument("--storage-change", default="central", choices=["central", "backward", "forward"],
                   help="difference of TWSA monthly means (default central)")
    p.add_argument("--unmatched", action="store_true",
                   help="compare the storage difference with raw monthly fluxes (default: window-matched)")
    p.add_argument("--lag", type=int, default=0, metavar="K", help="compare gauged Q K months later (default 0)")
    p.add_argument("--min-valid-fraction", type=_fraction, default=0.5, metavar="F",
                   help="months where a product covers less of the basin are missing (default 0.5)")
    p.add_argument("--water-year-start", type=_month_number, default=1, metavar="M",
                   help="first month of the water year, for annual metrics (default 1)")
    p.add_argument("--area", default="outline", choices=["outline", "surface"],
                   help="water bodies: P and E over the outline (default) or over the surface at the month's level")
    p.add_argument("--cache-dir", metavar="DIR", help="weights and series cache (default ~/.cache/wbexplore)")


class _Parser(argparse.ArgumentParser):
    """argparse with the project's error form: one line naming the option and value, exit status 2
    (argparse's own form prints the whole usage block first)."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


# the techniques of `wbexplore.balance.merge.MERGE_METHODS` (spelled here so that --help imports no numpy)
MERGE_METHOD_NAMES = ("pr", "ckf", "collocation")
MERGE_DEFAULT = "ckf"  # `wbexplore.balance.merge.DEFAULT_METHOD`, spelled here for the same reason


def _caution() -> str:
    from .io.writers import CAUTION

    return CAUTION


def _parser() -> argparse.ArgumentParser:
    ap = _Parser(
        prog="wbexplore",
        description="Basin water-balance closure explorer: which P, ET and TWSA products close "
                    "P - ET - Q - dS against gauged discharge. Screening-level analysis.")
    ap.add_argument("--version", action="version", version=f"wbexplore {__version__}")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("demo", help="write the invented demo study and open the explorer notebook")
    p.add_argument("--out", default="wbexplore-demo", metavar="DIR", help="study folder (default ./wbexplore-demo)")
    p.add_argument("--no-launch", action="store_true", help="do not start JupyterLab")
    p.add_argument("--force", action="store_true",
                   help="replace a demo study written before (only if nothing in it was added or changed)")

    p = sub.add_parser("check", help="validate a catalog and summarise its sources")
    p.add_argument("catalog")

    p = sub.add_parser("extract", help="basin means of every source into one netCDF file")
    p.add_argument("catalog")
    p.add_argument("--out", required=True, metavar="FILE.nc")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--scheduler", metavar="ADDRESS", help="a running dask.distributed scheduler")
    g.add_argument("--workers", type=int, metavar="N", help="start a local cluster of N worker processes")
    p.add_argument("--cache-dir", metavar="DIR")
    p.add_argument("--force", action="store_true", help="overwrite FILE")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = sub.add_parser("rank", help="rank every P x ET x TWSA combination for a basin (or every basin)")
    _add_selection_args(p, sources=False, every_basin=True)
    p.add_argument("--by", default="rmse", metavar="METRIC", help="ranking metric (default rmse)")
    p.add_argument("--format", default="table", choices=["table", "csv", "json"])
    p.add_argument("--ensemble", action="store_true", help="add the per-component ensemble mean as a source")
    p.add_argument("--min-valid", type=_count, default=24, metavar="N", help="months needed to score (default 24)")

    p = sub.add_parser("export", help="write the selection file of one combination")
    _add_selection_args(p, sources=True)
    p.add_argument("--out", required=True, metavar="FILE.yaml")
    p.add_argument("--series", metavar="FILE", help="also write the series (.csv or .nc)")
    p.add_argument("--units", default="mm", choices=["mm", "m3", "m3/s"], help="unit system of a CSV series")
    _add_merge_method(p)
    p.add_argument("--force", action="store_true")

    p = sub.add_parser("replay", help="recompute a selection file and compare every metric")
    p.add_argument("selection", metavar="FILE.yaml")
    p.add_argument("--incremental", action="store_true", help="the selection's basin as its incremental unit")
    p.add_argument("--cache-dir", metavar="DIR")

    p = sub.add_parser("report", help="self-contained HTML report of one combination")
    _add_selection_args(p, sources=False)
    p.add_argument("--P", metavar="SRC")
    p.add_argument("--ET", metavar="SRC")
    p.add_argument("--TWSA", metavar="SRC")
    p.add_argument("--by", default="rmse", metavar="METRIC")
    _add_merge_method(p)
    p.add_argument("--out", required=True, metavar="FILE.html")
    p.add_argument("--force", action="store_true")

    p = sub.add_parser("merge", help="merged best estimates of P, ET and TWSA, budget forced to close (CF netCDF)")
    p.add_argument("catalog", help="catalog YAML file")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--basin", help="basin id")
    g.add_argument("--all", action="store_true", help="every basin")
    p.add_argument("--method", required=True, choices=list(MERGE_METHOD_NAMES),
                   help="closure technique: pr (proportional redistribution), ckf (constrained Kalman filter), "
                        "collocation (multiple collocation, then the filter)")
    p.add_argument("--out", required=True, metavar="FILE.nc")
    p.add_argument("--storage-change", default="central", choices=["central", "backward", "forward"],
                   help="difference of TWSA monthly means the budget closes against (default central)")
    p.add_argument("--unmatched", action="store_true",
                   help="close against raw monthly fluxes (default: window-matched, as rank does)")
    p.add_argument("--min-valid-fraction", type=_fraction, default=0.5, metavar="F",
                   help="months where a product covers less of the basin are missing (default 0.5)")
    p.add_argument("--cache-dir", metavar="DIR")
    p.add_argument("--force", action="store_true", help="overwrite FILE")

    p = sub.add_parser("estimate", help="one balance term by difference (ET, Q or dS) with its standard error")
    _add_selection_args(p, sources=False)
    p.add_argument("--term", required=True, metavar="ET|Q|dS", help="the term to estimate from the others")
    p.add_argument("--P", metavar="SRC", help="precipitation source id")
    p.add_argument("--ET", metavar="SRC", help="evapotranspiration source id (not needed for --term ET)")
    p.add_argument("--TWSA", metavar="SRC", help="storage-anomaly source id (not needed for --term dS)")
    p.add_argument("--uncertainty", default="auto", metavar="auto|stated|collocation|spread",
                   help="error of each product: auto (default: stated, else collocation with three products "
                        "or more, else their spread), or one of them explicitly")
    p.add_argument("--by", default="rmse", metavar="METRIC",
                   help="without sources: the best-ranked combination by this metric")
    p.add_argument("--out", required=True, metavar="FILE.csv|FILE.nc")
    p.add_argument("--force", action="store_true")

    p = sub.add_parser("serve", help="the explorer as a web page")
    p.add_argument("catalog")
    p.add_argument("--port", type=_port, default=5006, help="TCP port (default 5006)")
    p.add_argument("--address", default="127.0.0.1")
    p.add_argument("--show", action="store_true", help="open a browser")
    p.add_argument("--cache-dir", metavar="DIR")
    p.add_argument("--export-dir", metavar="DIR",
                   help="the one folder the page's export and report buttons write to (default: exports/ beside "
                        "the catalog); visitors cannot change it")
    return ap


def _cmd_check(args) -> int:
    from .io.catalog import open_catalog
    from .io.grids import open_source
    from .cache import load_basins

    cat = open_catalog(args.catalog)
    basins = load_basins(cat)
    waterbodies = None
    if cat.waterbodies is not None:  # read (and refused) before anything is printed
        from .io.waterbodies import read_waterbodies

        waterbodies = read_waterbodies(cat, basin_ids=basins.index)
    print(f"{cat.title}\n{cat.path}")
    print(f"basins: {len(basins)} in {cat.basins.path.name} "
          f"({basins['area_km2'].min():,.0f} to {basins['area_km2'].max():,.0f} km2)")
    if cat.discharge:
        from .io.stations import read_discharge_series

        qds, table = read_discharge_series(cat.discharge, basins["area_km2"])
        q = qds["discharge"]
        print(f"discharge: {cat.discharge.path.name}, {int(q.notnull().sum())} basin-months, "
              f"{q.time.values[0].astype('datetime64[M]')}..{q.time.values[-1].astype('datetime64[M]')}, "
              f"units {cat.discharge.units}")
        _print_station_table(cat.discharge, table)
    else:
        print("discharge: none (closure metrics need it)")
    _print_flows(cat, basins)
    _print_nesting(cat, basins)
    if waterbodies is not None:
        print(f"water bodies: {len(waterbodies.outlines)} in {cat.waterbodies.path.name}")
        for line in waterbodies.summary():
            print(f"  {line}")
    rows = [open_source(s).summary() for s in cat.sources]
    cols = ["id", "component", "units", "step", "grid", "period", "crs", "incomplete", "label"]
    width = {c: max(len(c), *(len(str(r[c])) for r in rows)) for c in cols}
    print("  ".join(c.ljust(width[c]) for c in cols))
    for r in rows:
        print("  ".join(str(r[c]).ljust(width[c]) for c in cols))
    print(f"ok: {len(rows)} sources validate")
    return 0


def _print_flows(cat, basins) -> None:
    """One line per flow: id, the basin it enters, direction, station, months with data and period."""
    if not cat.flows:
        return
    from .io.stations import read_flow_series
    from .pipeline import split_flows

    to_basins, to_waterbodies = split_flows(cat)
    fds = read_flow_series(to_basins, basins["area_km2"], catalog=cat.path) if to_basins else None
    wds = None
    if to_waterbodies:  # a flow into a lake or reservoir: a depth over its outline
        from .io.waterbodies import read_waterbody_outlines

        wds = read_flow_series(to_waterbodies, read_waterbody_outlines(cat.waterbodies)["area_km2"],
                               catalog=cat.path)
    print(f"flows: {len(cat.flows)}")
    rows = []
    for f in cat.flows:
        src = wds if f in to_waterbodies else fds
        v = src[f.var].sel(basin=f.basin)
        has = v.notnull().values
        t = v["time"].values.astype("datetime64[M]")
        rows.append({"id": f.id, "basin": f.basin, "direction": f.direction, "station": f.station,
                     "months": f"{int(has.sum())} of {has.size}", "period": f"{t[0]}..{t[-1]}",
                     "file": f.table.path.name, "label": f.display})
    _print_rows(rows, indent="  ")


def _print_nesting(cat, basins) -> None:
    """Each basin that drains into another, and each incremental unit with its area."""
    if not cat.basins.downstream_field:
        return
    from .cache import load_incremental_basins

    print(f"nesting ({cat.basins.downstream_field}):")
    for b, d in basins["drains_to"].items():
        if d is not None:
            out = float(basins.loc[b, "outside_km2"])
            print(f"  {b} -> drains to {d}" + (f" ({out:,.1f} km2 outside it, clipped)" if out > 0 else ""))
    units = load_incremental_basins(cat)
    rows = [{"incremental unit": b, "area km2": f"{units.loc[b, 'area_km2']:,.1f}",
             "whole km2": f"{units.loc[b, 'whole_area_km2']:,.1f}", "minus": units.loc[b, "upstream"]}
            for b in units.index]
    if rows:
        _print_rows(rows, indent="  ")
    else:
        print("  no basin has upstream basins")


def _print_rows(rows: list[dict], *, indent: str = "") -> None:
    cols = list(rows[0])
    width = {c: max(len(c), *(len(str(r[c])) for r in rows)) for c in cols}
    print(indent + "  ".join(c.ljust(width[c]) for c in cols).rstrip())
    for r in rows:
        print(indent + "  ".join(str(r[c]).ljust(width[c]) for c in cols).rstrip())


def _print_station_table(spec, table) -> None:
    """One line per station: the basin it feeds, its step, period, share of months with data, gaps."""
    mapping = spec.station_map
    print(f"  layout {table.layout}, {len(table.stations)} station(s)"
          + (f", min_coverage {spec.min_coverage:g}" if table.daily else ""))
    for note in table.notes:
        print(f"  {note}")
    for st in table.stations:
        m = table.monthly.loc[st]
        has = m["value"].notna()
        gaps = int((has & (m["coverage"] < 1)).sum())
        first, last = m.index[0], m.index[-1]
        basin = mapping[st] if mapping is not None else st
        print(f"  station {st!r} -> basin {basin!r}: {'daily' if st in table.daily else 'monthly'}, "
              f"{first:%Y-%m}..{last:%Y-%m}, months with data {has.mean():.0%}"
              + (f", {gaps} month(s) accepted with gaps (coverage_{st})" if gaps else ""))


@contextmanager
def _no_distributed_probe():
    """xarray's netCDF writer and dask ask ``distributed`` whether a client is running, importing it
    (about 0.6 s of start-up). A process that never imported it runs no client: while the block runs,
    importing it fails with ImportError, which both probes take as "no distributed client"."""
    if "distributed" in sys.modules:
        yield
        return
    names = ("distributed", "dask.distributed")
    for n in names:
        sys.modules[n] = None  # an import of a name mapped to None raises ImportError
    try:
        yield
    finally:
        for n in names:
            if sys.modules.get(n, 0) is None:
                del sys.modules[n]


def _cmd_extract(args) -> int:
    from .io.catalog import open_catalog
    from .io.writers import check_output, write_netcdf
    from .pipeline import extract

    # refused before the (long) extraction: an existing file without --force, and always an input of the catalog
    cat = open_catalog(args.catalog)
    check_output(args.out, overwrite=args.force, protect=cat)
    ds = extract(args.catalog, scheduler=args.scheduler, workers=args.workers, progress=not args.quiet,
                 cache_dir=args.cache_dir)
    from .cache import load_basins
    from .io.basins import representative_points

    with _no_distributed_probe():
        write_netcdf(ds, args.out, overwrite=args.force, protect=cat, time_step="month",
                     positions=representative_points(load_basins(cat)))
    print(f"wrote {args.out}: {ds.sizes['basin']} basins x {ds.sizes['time']} months, "
          f"{len([v for v in ds.data_vars if ds[v].attrs.get('role') == 'source'])} sources")
    return 0


def _options(args):
    """The one `ClosureOptions` of a rank / export / report command line (validated once, before any work)."""
    from .balance import ClosureOptions

    kw = {}
    if hasattr(args, "min_valid"):
        kw["min_valid"] = args.min_valid
    if hasattr(args, "ensemble"):
        kw["ensemble"] = args.ensemble
    return ClosureOptions(start=args.start, end=args.end, storage_change=args.storage_change,
                          matched=not args.unmatched, lag=args.lag, min_valid_fraction=args.min_valid_fraction,
                          water_year_start=args.water_year_start, area=getattr(args, "area", "outline"), **kw)


def _unit_kind(args) -> str:
    """What ``--basin`` names: "basin" or "waterbody" (a lake or reservoir of the catalog's ``waterbodies``).

    An id that is neither, in a catalog with water bodies, is refused listing both kinds; ``--incremental``,
    ``--area surface`` and ``--TWSA`` are checked against the kind. Without water bodies every id is a basin's
    (an unknown one is refused where the series are read, as before).
    """
    from .io.catalog import open_catalog

    cat = open_catalog(args.catalog)
    basin = args.basin
    kind = "basin"
    if cat.waterbodies is not None:
        from .cache import load_basins
        from .io.waterbodies import check_distinct_ids, read_waterbody_outlines

        wbs = [str(w) for w in read_waterbody_outlines(cat.waterbodies).index]
        basins = [str(b) for b in load_basins(cat).index]
        check_distinct_ids(wbs, basins, path=cat.waterbodies.path)  # an id naming both would be ambiguous
        if basin is None:
            pass
        elif basin in wbs:
            kind = "waterbody"
        elif basin not in basins:
            raise InputError(f"{cat.path}: --basin {basin!r} is neither a basin (basins: {', '.join(basins)}) nor a "
                             f"water body (water bodies: {', '.join(wbs)})")
    if kind == "waterbody":
        if getattr(args, "incremental", False):
            raise InputError(f"{cat.path}: --incremental: {basin!r} is a water body, which has no incremental unit")
        twsa = getattr(args, "TWSA", None)
        if twsa is not None and twsa != "levels":
            raise InputError(f"{cat.path}: --TWSA {twsa!r}: water body {basin!r} takes its storage from its levels "
                             "(leave --TWSA out, or give 'levels')")
    elif getattr(args, "area", "outline") != "outline":
        raise InputError(f"--area {args.area}: {basin!r} is a basin; only a water body's P and E can fall on "
                         "another area than its outline")
    return kind


def _check_incremental(catalog, basin) -> None:
    """Refuse ``--incremental`` for a basin without an upstream basin (one line, exit 2), before any work."""
    from .cache import load_basins, load_incremental_basins
    from .io.catalog import open_catalog

    cat = catalog if hasattr(catalog, "basins") else open_catalog(catalog)
    if not getattr(cat.basins, "downstream_field", None):
        raise InputError(f"{cat.path}: --incremental: basin {basin!r} has no upstream basin "
                         "(the catalog has no basins: downstream_field)")
    if basin in load_incremental_basins(cat).index:
        return
    if basin in load_basins(cat).index:
        raise InputError(f"{cat.basins.path}: --incremental: basin {basin!r} has no upstream basin "
                         f"(field {cat.basins.downstream_field!r}), so it has no incremental unit")
    raise InputError(f"{cat.basins.path}: --incremental: basin {basin!r} not found")


def _series(args, *, incremental=None, waterbodies=False):
    from .pipeline import load_series

    kw = {}
    if waterbodies:
        kw["waterbodies"] = True
    elif getattr(args, "incremental", False) if incremental is None else incremental:
        kw["incremental"] = True
    return load_series(args.catalog, cache_dir=getattr(args, "cache_dir", None), progress=sys.stderr.isatty(), **kw)


def _print_rank_table(df, by: str, *, head: str) -> None:
    from .balance.combos import EXCHANGE_COLUMNS, RANK_TABLE_COLUMNS

    cols = [c for c in ("basin", "unit") if c in df] + list(RANK_TABLE_COLUMNS)
    waterbody = EXCHANGE_COLUMNS[0] in df
    if waterbody:  # a water body: the residual as unmeasured exchange in volume units too
        cols += list(EXCHANGE_COLUMNS)
    show = df[cols].copy()
    show["rank"] = [str(r) if s else "-" for r, s in zip(df["rank"], df["scored"])]
    print(head)
    print(show.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    print("rmse, bias in mm/month; rel_imbalance in %; '-' = too few valid months to score")
    if waterbody:
        print("mm/month over the outline; exchange = residual, the net unmeasured outflow (positive = loss: "
              "seepage, leakage, abstraction; negative = ungauged gain), mean per month in hm3, m3/s and mm over the surface, _se its standard error "
              "(lag-1 autocorrelation inflated)")
    for why in dict.fromkeys(w for w in df["undefined"] if w):
        print(f"NaN: {why}")


def _rank_every_unit(args, ds, opts):
    """``rank --all``: every basin's rows (``unit`` whole), then, where the catalog nests basins, every
    incremental unit's rows (``unit`` incremental); sorted by basin, whole before incremental, then rank."""
    import numpy as np
    import pandas as pd

    from .balance import rank_all
    from .cache import load_incremental_basins
    from .io.catalog import open_catalog

    df = rank_all(ds, opts, by=args.by)
    attrs = df.attrs
    df.insert(1, "unit", "whole")
    cat = open_catalog(args.catalog)
    if cat.basins.downstream_field and len(load_incremental_basins(cat)):
        inc = rank_all(_series(args, incremental=True), opts, by=args.by)
        inc.insert(1, "unit", "incremental")
        df = pd.concat([df, inc], ignore_index=True)
    key = np.char.add(df["basin"].to_numpy(dtype=str), np.where(df["unit"] == "whole", "\x00", "\x01"))
    df = df.iloc[np.argsort(key, kind="stable")].reset_index(drop=True)  # by basin, unit, then rank (kept)
    df.attrs = attrs
    return df


def _note_waterbodies_left_out(catalog) -> None:
    """``rank --all`` ranks basins: say in one line (stderr, not an error) which water bodies it leaves out."""
    from .io.catalog import open_catalog

    cat = open_catalog(catalog)
    if cat.waterbodies is None:
        return
    from .io.waterbodies import read_waterbody_outlines

    wbs = [str(w) for w in read_waterbody_outlines(cat.waterbodies).index]
    if wbs:
        print(f"note: --all ranks basins only; water bodies left out: {', '.join(wbs)} (rank each with --basin ID)",
              file=sys.stderr)


def _cmd_rank(args) -> int:
    from .balance import rank
    from .balance.metrics import check_metric

    check_metric(args.by)
    opts = _options(args)  # before the series are loaded: a bad option fails fast
    if args.incremental and args.all:
        raise InputError("--incremental goes with --basin ID (--all already lists every incremental unit)")
    kind = _unit_kind(args)  # --all: basins only (water-body ids are checked against them)
    if args.all and args.area != "outline":
        raise InputError("--area goes with --basin RES_ID (a water body)")
    if kind == "waterbody":
        from .balance.metrics import check_waterbody_metric

        check_waterbody_metric(args.by, args.basin)
    if args.incremental:
        _check_incremental(args.catalog, args.basin)
    ds = _series(args, waterbodies=kind == "waterbody")
    if args.all:
        df = _rank_every_unit(args, ds, opts)
        _note_waterbodies_left_out(args.catalog)
    else:
        df = rank(ds, args.basin, opts, by=args.by)
    what = ({"basins": sorted(set(df["basin"]))} if args.all
            else {"basin": args.basin, "unit": "waterbody" if kind == "waterbody"
                  else "incremental" if args.incremental else "whole"})
    note = None
    if kind == "waterbody":  # end-of-month storage: the storage-change options change nothing, never claim them
        from .balance.storage import storage_note
        from .series import STORAGE_STATE

        note = storage_note(str(ds[STORAGE_STATE].sel(basin=args.basin).item()))
    if args.format == "csv":
        df.to_csv(sys.stdout, index=False, float_format="%.6g")
    elif args.format == "json":
        json.dump({**what, "by": args.by, "period": [df.attrs["start"], df.attrs["end"]],
                   "storage_change": None if note else args.storage_change,
                   "matched": None if note else not args.unmatched, **({"storage": note} if note else {}),
                   "options": json.loads(opts.to_json()), "caution": _caution(),
                   "rows": json.loads(df.to_json(orient="records"))}, sys.stdout, indent=1)
        print()
    else:
        who = (f"{len(what['basins'])} basins" if args.all else f"water body {args.basin}" if kind == "waterbody"
               else f"basin {args.basin}" + (" (incremental unit)" if args.incremental else ""))
        _print_rank_table(df, args.by, head=(
            f"{who}, {df.attrs['start']}..{df.attrs['end']}, "
            + (note if note else f"storage change {args.storage_change}"
               f"{' (unmatched)' if args.unmatched else ' (window-matched)'}") + f", ranked by {args.by}"))
    return 0


def _selection_from_args(args, P=None, ET=None, TWSA=None, *, kind="basin"):
    from .balance import Selection

    twsa = TWSA or args.TWSA or ("levels" if kind == "waterbody" else None)
    if twsa is None:
        raise InputError(f"--TWSA is needed for basin {args.basin!r} (only a water body's storage comes from levels)")
    return Selection.from_options(args.basin, _options(args), P=P or args.P, ET=ET or args.ET, TWSA=twsa)


def _cmd_export(args) -> int:
    from .selection import export_selection

    _options(args)  # a bad option fails before the catalog is read
    kind = _unit_kind(args)
    sel = _selection_from_args(args, kind=kind)
    if args.incremental:
        _check_incremental(args.catalog, args.basin)
    out = export_selection(args.catalog, sel, args.out, overwrite=args.force, series=args.series,
                           unit_system=args.units, cache_dir=args.cache_dir, incremental=args.incremental,
                           waterbody=kind == "waterbody", merge_method=args.merge_method)
    print(f"wrote {out['selection']}" + (f" and {out['series']}" if out.get("series") else ""))
    return 0


def _cmd_replay(args) -> int:
    from .selection import load_selection, replay

    if args.incremental:  # the file says which unit it was computed over; the option only confirms it
        doc, sel, cat_path = load_selection(args.selection)
        _check_incremental(cat_path, sel.basin)
        if doc.get("unit", "whole") != "incremental":
            raise InputError(f"{args.selection}: field 'unit': {doc.get('unit', 'whole')!r} (a whole basin's "
                             "selection): --incremental replays only a selection exported with --incremental")
    try:
        res = replay(args.selection, cache_dir=args.cache_dir)
    except ReplayMismatch as exc:
        args.status = 1  # kept if the table cannot be written (`replay FILE | head -1`)
        print(f"wbexplore replay: {exc}", file=sys.stderr)
        if exc.table:
            print(exc.table)
        return 1
    print(f"replay ok: {res['n_metrics']} metrics reproduced to 1e-9 ({args.selection})")
    return 0


def _cmd_report(args) -> int:
    from .balance import best_selection
    from .io.catalog import open_catalog
    from .io.writers import check_output
    from .report import write_report

    opts = _options(args)  # before the series are loaded
    # refused before the series are loaded (write_report checks again just before writing)
    cat = open_catalog(args.catalog)
    check_output(args.out, overwrite=args.force, protect=cat)
    kind = _unit_kind(args)
    if kind == "waterbody" and not (args.P or args.ET or args.TWSA):  # the best combination by --by
        from .balance.metrics import check_waterbody_metric

        check_waterbody_metric(args.by, args.basin)
    if args.incremental:
        _check_incremental(cat, args.basin)
    ds = _series(args, waterbodies=kind == "waterbody")
    if args.P and args.ET and (args.TWSA or kind == "waterbody"):
        sel = _selection_from_args(args, kind=kind)
    elif args.P or args.ET or args.TWSA:
        raise InputError("give all of --P, --ET and --TWSA (a water body: --P and --ET), or none (then the "
                         "best-ranked combination is used)")
    else:
        sel = best_selection(ds, args.basin, opts, by=args.by)
    out = write_report(args.catalog, ds, sel, args.out, overwrite=args.force, by=args.by,
                       merge_method=args.merge_method)
    print(f"wrote {out}")
    return 0


def _cmd_merge(args) -> int:
    from .balance import ClosureOptions
    from .balance.merge import merge_products
    from .cache import load_basins
    from .io.basins import representative_points
    from .io.catalog import open_catalog
    from .io.writers import check_output, write_netcdf

    opts = ClosureOptions(storage_change=args.storage_change, matched=not args.unmatched,
                          min_valid_fraction=args.min_valid_fraction)
    cat = open_catalog(args.catalog)
    if Path(args.out).suffix.lower() != ".nc":
        raise InputError(f"--out {args.out}: a merge is written as netCDF; name the file *.nc")
    if args.basin is not None and _unit_kind(args) == "waterbody":
        raise InputError(f"{cat.path}: --basin {args.basin!r} is a water body: merging combines the P, ET and TWSA "
                         "products of a basin; for a water body use rank or export")
    check_output(args.out, overwrite=args.force, protect=cat)  # before the series are loaded
    ds = _series(args)
    merged = merge_products(ds, method=args.method, basins=None if args.all else [args.basin], options=opts)
    merged.attrs.update({"title": f"{cat.title}: merged best estimates ({args.method})",
                         "source": f"wbexplore {__version__} merge of catalog {Path(args.catalog).name}",
                         "wbexplore_version": __version__, "caution": _caution()})
    with _no_distributed_probe():
        write_netcdf(merged, args.out, overwrite=args.force, protect=cat, time_step="month",
                     positions=representative_points(load_basins(cat)))
    worst = float(abs(merged["residual_after"]).max(skipna=True)) if merged["residual_after"].notnull().any() \
        else float("nan")
    print(f"wrote {args.out}: {merged.sizes['basin']} basin(s) x {merged.sizes['time']} months, method "
          f"{args.method}; largest residual after closure {worst:.1e} mm/month")
    if merged.attrs.get("negative_flux_months"):
        print(f"note: {merged.attrs['negative_flux_months']} basin-months with a negative adjusted flux")
    return 0


def _cmd_estimate(args) -> int:
    from .balance import Selection, best_selection
    from .balance.estimate import OWN_COMPONENT, TERMS, estimate_by_difference
    from .balance.uncertainty import check_method
    from .io.catalog import open_catalog
    from .io.estimates import check_format, write_estimate
    from .io.writers import check_output

    # every refusal that needs no series comes before they are loaded
    if args.term not in TERMS:
        raise InputError(f"--term {args.term!r} is not one of {', '.join(TERMS)}")
    check_method(args.uncertainty)
    check_format(args.out)
    opts = _options(args)
    cat = open_catalog(args.catalog)
    if _unit_kind(args) == "waterbody":
        raise InputError(f"{cat.path}: --basin {args.basin!r} is a water body: its residual is the unmeasured exchange "
                         f"(wbexplore rank {args.catalog} --basin {args.basin}); estimate takes a basin")
    check_output(args.out, overwrite=args.force, protect=cat)
    if args.incremental:
        _check_incremental(cat, args.basin)
    own = OWN_COMPONENT[args.term]
    needed = [c for c in ("P", "ET", "TWSA") if c != own]
    given = {c: getattr(args, c) for c in ("P", "ET", "TWSA")}
    ds = _series(args)
    if all(given[c] for c in needed):
        sel = Selection.from_options(args.basin, opts, **given)
    elif any(given[c] for c in needed):
        raise InputError(f"--term {args.term}: give all of {', '.join('--' + c for c in needed)}, or none "
                         "(then the best-ranked combination is used)")
    else:
        from .balance.metrics import check_metric

        check_metric(args.by)
        best = best_selection(ds, args.basin, opts, by=args.by)
        sel = best.replace(**{own: given[own]}) if own else best
    est = estimate_by_difference(ds, sel, args.term, uncertainty=args.uncertainty, strict=True)
    positions = None
    if args.out.lower().endswith(".nc"):
        from .selection import series_positions

        positions = series_positions(cat, sel.basin, incremental=args.incremental)
    with _no_distributed_probe():
        write_estimate(est, args.out, overwrite=args.force, protect=cat, positions=positions)
    from .io.estimates import water_years_text

    lt = est.long_term
    print(f"wrote {args.out}: {est.formula}, basin {sel.basin}, {len(est.monthly)} months, "
          f"{lt['water_years']} whole water years ({water_years_text(lt['years']) or 'none'}); "
          f"long-term {args.term} {lt['estimate']:.1f} +- "
          f"{lt['standard_error']:.1f} mm/year (random errors only)")
    return 0


def _cmd_serve(args) -> int:
    from .explorer.app import serve

    _check_listen(args.address, args.port)
    serve(args.catalog, port=args.port, address=args.address, show=args.show, cache_dir=args.cache_dir,
          export_dir=args.export_dir)
    return 0


def _cmd_demo(args) -> int:
    from .demo import write_demo

    out = Path(args.out)
    info = write_demo(out, overwrite=args.force, progress=sys.stderr.isatty(), templates=True)
    nb = out / "explore_basin.ipynb" if (out / "explore_basin.ipynb").exists() else out
    print(f"wrote the demo study to {out} ({info.n_bytes / 1e6:.0f} MB, invented data)")
    _cmd_check(argparse.Namespace(catalog=str(info.catalog)))
    print("\nnext:")
    print(f"  wbexplore rank {info.catalog} --basin VEL")
    print(f"  wbexplore serve {info.catalog}")
    if args.no_launch:
        print(f"  jupyter lab {nb}")
        return 0
    import subprocess

    return subprocess.call([sys.executable, "-m", "jupyterlab", str(nb)])


def _copy_templates(out: Path) -> Path:
    from .demo import copy_templates

    return copy_templates(out)


_COMMANDS = {"demo": _cmd_demo, "check": _cmd_check, "extract": _cmd_extract, "rank": _cmd_rank,
             "export": _cmd_export, "replay": _cmd_replay, "report": _cmd_report, "estimate": _cmd_estimate,
             "merge": _cmd_merge,
             "serve": _cmd_serve}


def main(argv=None) -> int:
    ap = _parser()
    args = ap.parse_args(argv)
    if not args.command:
        ap.print_help()
        return 2
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            # library deprecation notices (e.g. rioxarray's use of affine) are not the user's business
            warnings.filterwarnings("ignore", category=PendingDeprecationWarning)
            warnings.filterwarnings("ignore", category=DeprecationWarning)
            warnings.filterwarnings("ignore", category=FutureWarning)
            warnings.formatwarning = lambda m, c, *a, **k: f"wbexplore: warning: {m}\n"
            if hasattr(args, "cache_dir"):  # an unusable cache folder is bad input, found before any work
                from .cache import cache_root, check_root_for

                if getattr(args, "catalog", None) and args.cache_dir:  # never inside the study's inputs
                    from .io.catalog import open_catalog

                    try:
                        cat = open_catalog(args.catalog)
                    except InputError:
                        cat = None  # the command reports it its own way (serve: on the page)
                    if cat is not None:
                        check_root_for(cat, Path(args.cache_dir))
                cache_root(args.cache_dir)
            return _COMMANDS[args.command](args)
    except InputError as exc:
        print(f"wbexplore: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("wbexplore: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        # The reader has gone; the command's own status stands (a replay that found differences stays 1;
        # only a command that had nothing else to report ends 0). Later writes (the final flush at exit)
        # go to the null device instead of raising again.
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            os.close(devnull)
        except (OSError, ValueError, AttributeError):
            pass
        return getattr(args, "status", 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
