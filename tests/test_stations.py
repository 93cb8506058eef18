"""Station tables as gauging agencies export them (long, wide, separators, decimal commas, missing-value
codes, day-first dates, Excel, gauge ids with leading zeros, sub-daily records, incomplete months).

Outside references: pint for l/s, m3/day and ML/day (1 ML/day = 1e6 L / 86400 s = 11.574 l/s, arithmetic
from the SI definitions of the litre and the day); pandas writes the CSV variants and openpyxl the .xlsx
(the reader must give back what they wrote); `calendar.monthrange` for the days of each month.
"""

from __future__ import annotations

import calendar
import math

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

from wbexplore.cli import main

from utils import box_basins, lonlat_grid, one_line_error, run_cli, write_catalog, write_nc

# three basins; "0123" and "123" are different gauges and different basins
IDS = ["0123", "123", "VEL"]
DAYS = pd.date_range("2005-01-01", "2005-04-30", freq="D")


def _daily() -> pd.DataFrame:
    """Daily mean flows (m3/s) per station; NaN = a gap (3 days in February, none elsewhere)."""
    rng = np.random.default_rng(13)
    out = pd.DataFrame({"0123": 10 + rng.random(DAYS.size), "123": 500 + 50 * rng.random(DAYS.size),
                        "G-9": 3 + rng.random(DAYS.size)}, index=DAYS)
    out.loc["2005-02-10":"2005-02-12", "0123"] = np.nan
    return out.round(3)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    d = tmp_path_factory.mktemp("stations")
    lon, lat = lonlat_grid(0, 6, 0, 2, 1.0)
    t = pd.date_range("2005-01-01", periods=4, freq="MS")
    rng = np.random.default_rng(1)
    write_nc(d / "p.nc", 3 + rng.random((4, lat.size, lon.size)), lon, lat, t, var="pr", units="mm/day")
    write_nc(d / "et.nc", 1 + rng.random((4, lat.size, lon.size)), lon, lat, t, var="et", units="mm/day")
    write_nc(d / "tws.nc", rng.standard_normal((4, lat.size, lon.size)), lon, lat, t, var="lwe", units="mm")
    box_basins(d / "basins.geojson", [(0, 0, 2, 2), (2, 0, 4, 2), (4, 0, 6, 2)], ids=IDS)
    return d


def _catalog(study, folder, table: dict, *, version=2, name="catalog.yaml"):
    folder.mkdir(parents=True, exist_ok=True)
    sources = [{"id": "p1", "component": "P", "path": str(study / "p.nc"), "variable": "pr"},
               {"id": "e1", "component": "ET", "path": str(study / "et.nc"), "variable": "et"},
               {"id": "t1", "component": "TWSA", "path": str(study / "tws.nc"), "variable": "lwe"}]
    cat = write_catalog(folder, sources, basins=str(study / "basins.geojson"), discharge=table, name=name)
    doc = yaml.safe_load(cat.read_text())
    doc["catalog_version"] = version
    cat.write_text(yaml.safe_dump(doc, sort_keys=False))
    return cat


def _read(cat):
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.stations import read_discharge_series
    from wbexplore.pipeline import load_basins

    c = open_catalog(cat)
    return read_discharge_series(c.discharge, load_basins(c)["area_km2"])[0]


def _long(daily: pd.DataFrame, stations=("0123", "123")) -> pd.DataFrame:
    rows = daily[list(stations)].stack(future_stack=True).rename("q").reset_index()
    rows.columns = ["date", "gauge", "q"]
    return rows


_run = run_cli
_one_line_error = one_line_error


# --------------------------------------------------------------------------- units (pint, SI arithmetic)
def test_flow_units_through_pint():
    from wbexplore.units import parse_discharge_unit, parse_level_unit

    # SI: 1 L = 1e-3 m3, 1 day = 86400 s, 1 ML = 1e6 L
    assert parse_discharge_unit("l/s").factor == pytest.approx(1e-3)
    assert parse_discharge_unit("m3/day").factor == pytest.approx(1 / 86400)
    assert parse_discharge_unit("ML/day").factor == pytest.approx(1e6 * 1e-3 / 86400)
    assert parse_discharge_unit("ML/day").factor / parse_discharge_unit("l/s").factor == pytest.approx(11.574, abs=5e-4)
    assert parse_discharge_unit("mm/day").kind == "depth"
    assert parse_level_unit("cm") == pytest.approx(0.01)


# --------------------------------------------------------------------------- round trip over formats
def _variants(study, tmp_path):
    daily = _daily()
    out = {}
    # 1. tidy long CSV, ISO dates, empty cells for gaps
    d = tmp_path / "long"
    d.mkdir()
    _long(daily).to_csv(d / "q.csv", index=False)
    out["long"] = _catalog(study, d, {"path": "q.csv", "time_field": "date", "station_field": "gauge",
                                      "value_field": "q", "units": "m3/s", "min_coverage": 0.9})
    # 2. wide, semicolons, decimal commas, -999 for gaps, day-first dates; an extra unmapped column
    d = tmp_path / "wide"
    d.mkdir()
    w = daily.fillna(-999)
    w.index = w.index.strftime("%d/%m/%Y")
    w.rename_axis("Datum").to_csv(d / "q.csv", sep=";", decimal=",")
    out["wide"] = _catalog(study, d, {"path": "q.csv", "layout": "wide", "time_field": "Datum",
                                      "separator": ";", "decimal": ",", "missing_values": [-999],
                                      "date_format": "%d/%m/%Y", "units": "m3/s", "min_coverage": 0.9,
                                      "stations": {"0123": "0123", "123": "123"}})
    # 3. the same, separator detected, missing values written with a decimal ("-999,0")
    d = tmp_path / "wide_detected"
    d.mkdir()
    w = daily[["0123", "123"]].copy()
    w.index = w.index.strftime("%d/%m/%Y")
    text = w.rename_axis("Datum").to_csv(sep=";", decimal=",", na_rep="-999,0")
    # and a separator at the end of every line, as some exports write
    (d / "q.txt").write_text("".join(ln + ";\n" for ln in text.splitlines()))
    out["wide detected"] = _catalog(study, d, {"path": "q.txt", "layout": "wide", "time_field": "Datum",
                                               "decimal": ",", "missing_values": [-999],
                                               "date_format": "%d/%m/%Y", "units": "m3/s", "min_coverage": 0.9})
    # 4. Excel workbook written by openpyxl: dates as date cells, gaps as empty cells, ids as text
    import openpyxl

    d = tmp_path / "excel"
    d.mkdir()
    wb = openpyxl.Workbook()
    wb.active.title = "Notes"
    ws = wb.create_sheet("Daily")
    ws.append(["date", "0123", "123"])
    for day, row in daily.iterrows():
        ws.append([day.to_pydatetime()] + [None if math.isnan(v) else float(v) for v in row[["0123", "123"]]])
    wb.save(d / "q.xlsx")
    out["excel"] = _catalog(study, d, {"path": "q.xlsx", "layout": "wide", "time_field": "date", "sheet": "Daily",
                                       "units": "m3/s", "min_coverage": 0.9})
    return daily, out


def test_same_series_in_every_format_gives_identical_monthly_discharge(study, tmp_path):
    daily, cats = _variants(study, tmp_path)
    got = {k: _read(c) for k, c in cats.items()}
    ref = got["long"]
    for k, ds in got.items():
        xr.testing.assert_identical(ds["discharge"], ref["discharge"])
        assert sorted(ds.data_vars) == ["coverage_0123", "coverage_123", "discharge"], k
    # mean flow of the present days (m3/s) x seconds of the month (calendar) / area -> mm (arithmetic)
    from wbexplore.io.catalog import open_catalog
    from wbexplore.pipeline import load_basins

    area = load_basins(open_catalog(cats["long"]))["area_km2"]
    for st in ("0123", "123"):
        for m in (1, 2, 3, 4):
            if (st, m) == ("0123", 2):
                continue  # below min_coverage: checked below
            days = calendar.monthrange(2005, m)[1]
            mean = daily.loc[f"2005-{m:02d}", st].mean()  # pandas skips the gaps
            want = mean * 86400 * days / (area[st] * 1e6) * 1000
            assert float(ref["discharge"].sel(basin=st, time=f"2005-{m:02d}-01")) == pytest.approx(want, rel=1e-12)
    # February: 25 of 28 days at "0123" (0.89 < 0.9) is empty; "123" is complete
    assert math.isnan(float(ref["discharge"].sel(basin="0123", time="2005-02-01")))
    assert float(ref["coverage_0123"].sel(time="2005-02-01")) == pytest.approx(25 / 28)
    assert float(ref["coverage_123"].sel(time="2005-02-01")) == 1.0


def test_ids_with_leading_zero_stay_distinct(study, tmp_path, capsys):
    daily, cats = _variants(study, tmp_path)
    ds = _read(cats["long"])
    assert list(ds["discharge"].basin.values) == IDS
    q = ds["discharge"].sel(time="2005-01-01")
    assert float(q.sel(basin="0123")) != float(q.sel(basin="123"))
    assert ds["coverage_0123"].attrs["station"] == "0123" and ds["coverage_123"].attrs["basin"] == "123"
    # the whole extraction (netCDF output) keeps both, as text
    out = tmp_path / "x.nc"
    rc, _, err = _run(["extract", cats["long"], "--out", out, "--quiet", "--cache-dir", tmp_path / "cache"], capsys)
    assert rc == 0, err
    with xr.open_dataset(out) as x:  # as any netCDF reader sees it: the ids as text in the CF instance variable
        assert [str(b) for b in x["basin_id"].values] == IDS and x["basin_id"].attrs["cf_role"] == "timeseries_id"
    from wbexplore.io.writers import read_netcdf

    x = read_netcdf(out)  # the ids back as the basin index
    assert [str(b) for b in x["basin"].values] == IDS
    assert "coverage_0123" in x and "coverage_123" in x
    np.testing.assert_allclose(x["discharge"].sel(basin="0123").values, ds["discharge"].sel(basin="0123").values)
    rc, text, err = _run(["check", cats["long"]], capsys)
    assert rc == 0, err
    assert "station '0123' -> basin '0123'" in text and "station '123' -> basin '123'" in text


def test_units_of_the_table_are_converted(study, tmp_path):
    daily = _daily()
    base = tmp_path / "m3s"
    base.mkdir()
    _long(daily).to_csv(base / "q.csv", index=False)
    ref = _read(_catalog(study, base, {"path": "q.csv", "time_field": "date", "station_field": "gauge",
                                       "value_field": "q", "units": "m3/s"}))
    for units, scale in (("l/s", 1000.0), ("ML/day", 86400 / 1000.0), ("m3/day", 86400.0)):
        d = tmp_path / units.replace("/", "_")
        d.mkdir()
        t = _long(daily)
        t["q"] = t["q"] * scale
        t.to_csv(d / "q.csv", index=False)
        got = _read(_catalog(study, d, {"path": "q.csv", "time_field": "date", "station_field": "gauge",
                                        "value_field": "q", "units": units}))
        np.testing.assert_allclose(got["discharge"].values, ref["discharge"].values, rtol=1e-12)


def test_depth_per_day_is_summed_over_the_month(study, tmp_path):
    d = tmp_path / "depth"
    d.mkdir()
    rows = pd.DataFrame({"date": DAYS.strftime("%Y-%m-%d"), "gauge": "VEL", "q": 0.5})
    rows.to_csv(d / "q.csv", index=False)
    ds = _read(_catalog(study, d, {"path": "q.csv", "time_field": "date", "station_field": "gauge",
                                   "value_field": "q", "units": "mm/day"}))
    for m in (1, 2, 3, 4):
        assert float(ds["discharge"].sel(basin="VEL", time=f"2005-{m:02d}-01")) == pytest.approx(
            0.5 * calendar.monthrange(2005, m)[1])


def test_sub_daily_records_are_averaged_to_days_then_months(study, tmp_path):
    d = tmp_path / "hourly"
    d.mkdir()
    stamps = pd.date_range("2005-01-01", "2005-02-28 18:00", freq="6h")
    # day d: 1, 2, 3, 6 at 00, 06, 12, 18 h -> a daily mean of 3; January's second half doubled
    v = np.tile([1.0, 2.0, 3.0, 6.0], stamps.size // 4) * np.where(stamps >= "2005-01-17", 2.0, 1.0)
    pd.DataFrame({"date": stamps.strftime("%Y-%m-%dT%H:%M"), "gauge": "VEL", "q": v}).to_csv(d / "q.csv", index=False)
    from wbexplore.io.catalog import open_catalog
    from wbexplore.io.stations import read_station_table

    table = read_station_table(open_catalog(_catalog(study, d, {
        "path": "q.csv", "time_field": "date", "station_field": "gauge", "value_field": "q", "units": "m3/s"})).discharge)
    jan = table.monthly.loc[("VEL", pd.Timestamp("2005-01-01")), "value"]
    assert jan == pytest.approx((16 * 3.0 + 15 * 6.0) / 31)  # mean of the days, not of the records
    assert table.monthly.loc[("VEL", pd.Timestamp("2005-02-01")), "value"] == pytest.approx(6.0)
    assert "VEL" in table.daily and any("sub-daily" in n for n in table.notes)


def test_min_coverage_and_the_check_listing(study, tmp_path, capsys):
    daily = _daily()
    d = tmp_path / "cov"
    d.mkdir()
    t = _long(daily)
    t.to_csv(d / "q.csv", index=False)
    spec = {"path": "q.csv", "time_field": "date", "station_field": "gauge", "value_field": "q", "units": "m3/s"}
    full = _read(_catalog(study, d, spec))  # default 1.0: every day
    assert math.isnan(float(full["discharge"].sel(basin="0123", time="2005-02-01")))
    lax = _read(_catalog(study, d, dict(spec, min_coverage=0.85), name="lax.yaml"))
    assert float(lax["discharge"].sel(basin="0123", time="2005-02-01")) > 0  # 25/28 = 0.893 >= 0.85
    rc, text, err = _run(["check", d / "lax.yaml"], capsys)
    assert rc == 0, err
    line = next(ln for ln in text.splitlines() if "station '0123'" in ln)
    assert "daily" in line and "2005-01..2005-04" in line and "1 month(s) accepted with gaps" in line
    assert "months with data 100%" in line
    assert "layout long, 2 station(s)" in text


# --------------------------------------------------------------------------- duplicates (wide layout too)
def test_duplicates_in_a_wide_table(study, tmp_path, capsys):
    from wbexplore.io.stations import DuplicateRowsWarning

    daily = _daily()[["0123", "123"]]
    d = tmp_path / "dup"
    d.mkdir()
    w = daily.rename_axis("date")
    pd.concat([w, w.iloc[[5]]]).to_csv(d / "q.csv")
    cat = _catalog(study, d, {"path": "q.csv", "layout": "wide", "time_field": "date", "units": "m3/s"})
    with pytest.warns(DuplicateRowsWarning, match="2 duplicated rows collapsed"):
        _read(cat)
    with pytest.warns(DuplicateRowsWarning, match="2 duplicated rows collapsed"):  # `check` passes it on
        rc = main(["check", str(cat)])
    assert rc == 0 and "layout wide, 2 station(s)" in capsys.readouterr().out
    bad = w.iloc[[5]].copy()
    old = bad.iloc[0]["123"]
    bad["123"] = 1.5
    pd.concat([w, bad]).to_csv(d / "q.csv")
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert "station '123'" in line and "2005-01-06" in line and str(old) in line and "1.5" in line


def test_version_1_spelling_still_reads(study, tmp_path):
    d = tmp_path / "v1"
    d.mkdir()
    _long(_daily()).to_csv(d / "q.csv", index=False)
    v1 = _read(_catalog(study, d, {"path": "q.csv", "time_field": "date", "basin_field": "gauge",
                                   "value_field": "q", "units": "m3/s"}, version=1))
    v2 = _read(_catalog(study, d, {"path": "q.csv", "time_field": "date", "station_field": "gauge",
                                   "value_field": "q", "units": "m3/s"}, name="v2.yaml"))
    xr.testing.assert_identical(v1, v2)


# --------------------------------------------------------------------------- bad input: exit 2, one line
def _bad_cases(study, tmp_path):
    daily = _daily()
    iso = {"path": "q.csv", "time_field": "date", "station_field": "gauge", "value_field": "q", "units": "m3/s"}
    cases = {}

    def case(name, spec, text=None, frame=None, excel=False):
        d = tmp_path / name.replace(" ", "_")
        d.mkdir()
        if text is not None:
            (d / spec["path"]).write_text(text)
        elif frame is not None:
            frame.to_csv(d / spec["path"], index=False)
        if excel:
            import openpyxl

            wb = openpyxl.Workbook()
            wb.active.title = "Daily"
            wb.active.append(["date", "0123"])
            wb.active.append(["2005-01-01", 1.0])
            wb.save(d / spec["path"])
        cases[name] = (_catalog(study, d, spec), spec)

    day_first = _long(daily)
    day_first["date"] = pd.to_datetime(day_first["date"]).dt.strftime("%d/%m/%Y")
    case("day first without date_format", iso, frame=day_first)
    case("date not matching date_format", dict(iso, date_format="%d/%m/%Y"), frame=_long(daily))
    case("station without basin", iso, frame=_long(daily, ("0123", "G-9")))
    case("mapping to unknown basin", dict(iso, stations={"0123": "NOPE"}), frame=_long(daily))
    case("sheet missing", {"path": "q.xlsx", "layout": "wide", "time_field": "date", "units": "m3/s",
                           "sheet": "Hourly"}, excel=True)
    t = _long(daily)
    t["q"] = t["q"].astype(object)
    t.loc[40, "q"] = "12..5"
    case("value not a number", iso, frame=t)
    case("header only", iso, text="date,gauge,q\n")
    case("min_coverage above 1", dict(iso, min_coverage=1.5), frame=_long(daily))
    case("per-month unit on daily records", dict(iso, units="mm/month"), frame=_long(daily))
    return cases


_EXPECT = {
    "day first without date_format": ["line 2", "'01/01/2005'", "ISO 8601"],
    "date not matching date_format": ["line 2", "'2005-01-01'", "'%d/%m/%Y'"],
    "station without basin": ["'G-9'", "not in the basin file"],
    "mapping to unknown basin": ["'0123'", "'NOPE'", "not in the basin file"],
    "sheet missing": ["'Hourly'", "does not exist"],
    "value not a number": ["line 42", "column 'q'", "'12..5'"],
    "header only": ["no rows"],
    "min_coverage above 1": ["min_coverage", "1.5"],
    "per-month unit on daily records": ["'units'", "'mm/month'", "daily values (stations 0123, 123)"],
}


def test_bad_station_tables_exit_2_one_line_nothing_written(study, tmp_path, capsys):
    cases = _bad_cases(study, tmp_path)
    assert set(cases) == set(_EXPECT)
    for name, (cat, spec) in cases.items():
        line = _one_line_error(*_run(["check", cat], capsys)[::2])
        for part in _EXPECT[name]:
            assert part in line, (name, line)
        if name != "min_coverage above 1":  # a catalog error names the catalog; a table error the table
            assert str(cat.parent / spec["path"]) in line, (name, line)
        out = cat.parent / "x.nc"
        line2 = _one_line_error(*_run(["extract", cat, "--out", out, "--quiet", "--cache-dir",
                                       cat.parent / "cache"], capsys)[::2])
        assert line2 == line, name
        assert not out.exists() and not any(p.name.startswith("x.nc") for p in cat.parent.iterdir()), name


# --------------------------------------------------------------------------- the failures reported (version 1 catalogs)
def test_day_first_dates_are_refused_not_misread(study, tmp_path, capsys):
    # before: `check` exited 0 with the dates read month-first (or not at all)
    d = tmp_path / "dayfirst"
    d.mkdir()
    t = _long(_daily())
    t["date"] = pd.to_datetime(t["date"]).dt.strftime("%d/%m/%Y")
    t.to_csv(d / "q.csv", index=False)
    cat = _catalog(study, d, {"path": "q.csv", "time_field": "date", "basin_field": "gauge", "value_field": "q",
                              "units": "m3/s"}, version=1)
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert "'01/01/2005'" in line and "line 2" in line and str(d / "q.csv") in line


def test_gauge_code_with_leading_zero_is_its_own_basin(study, tmp_path, capsys):
    # a guard, not a reproduction: the long CSV reader already kept ids as text; now checked end to end
    d = tmp_path / "zeros"
    d.mkdir()
    _long(_daily()).to_csv(d / "q.csv", index=False)
    cat = _catalog(study, d, {"path": "q.csv", "time_field": "date", "basin_field": "gauge", "value_field": "q",
                              "units": "m3/s"}, version=1)
    rc, text, err = _run(["check", cat], capsys)
    assert rc == 0, err
    assert "station '0123' -> basin '0123'" in text and "station '123' -> basin '123'" in text


def test_unquoted_gauge_code_in_the_mapping_is_named_as_written(study, tmp_path, capsys):
    # YAML 1.1 reads 0123 as the octal number 83: the refusal named "key 83", which the user never wrote
    d = tmp_path / "octal"
    d.mkdir()
    _long(_daily()).to_csv(d / "q.csv", index=False)
    cat = _catalog(study, d, {"path": "q.csv", "time_field": "date", "station_field": "gauge", "value_field": "q",
                              "units": "m3/s"})
    cat.write_text(cat.read_text() + "  stations: {0123: VEL}\n")
    assert yaml.safe_load(cat.read_text())["discharge"]["stations"] == {83: "VEL"}  # PyYAML: octal
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert "key 0123 is not text" in line and "83" not in line.split(str(cat))[1]


_CATALOG_REFUSALS = [
    ("unknown layout", {"layout": "tall"}, ["'layout'", "'tall'"]),
    ("sheet for a CSV", {"sheet": "Daily"}, ["'sheet'", "'Daily'", "not an Excel workbook"]),
    ("long without station_field", {"station_field": None}, ["'station_field'", "layout long"]),
    ("two stations, one basin", {"stations": {"0123": "VEL", "123": "VEL"}}, ["'0123'", "'123'", "'VEL'"]),
    ("basin id read as a number", {"stations": {"G-9": 83}}, ["'G-9'", "put the id in quotes"]),
    ("min_coverage not a number", {"min_coverage": "most"}, ["'min_coverage'", "'most'"]),
    ("min_coverage below 0", {"min_coverage": -0.1}, ["'min_coverage'", "-0.1"]),
    ("decimal equals separator", {"separator": ";", "decimal": ";"}, ["'decimal'"]),
    ("not a flow or a depth", {"units": "degC"}, ["'units'", "'degC'"]),
]


@pytest.mark.parametrize("name,change,parts", _CATALOG_REFUSALS, ids=[c[0] for c in _CATALOG_REFUSALS])
def test_station_fields_validated_with_the_catalog(study, tmp_path, capsys, name, change, parts):
    _long(_daily()).to_csv(tmp_path / "q.csv", index=False)
    spec = {"path": "q.csv", "time_field": "date", "station_field": "gauge", "value_field": "q", "units": "m3/s"}
    spec.update(change)
    cat = _catalog(study, tmp_path / "c", {k: v for k, v in spec.items() if v is not None} | {"path": str(tmp_path / "q.csv")})
    line = _one_line_error(*_run(["check", cat], capsys)[::2])
    assert str(cat) in line and "discharge" in line
    for part in parts:
        assert part in line, (name, line)
