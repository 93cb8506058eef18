"""Unit harmonisation against pint and against facts of the trade."""

import re

import numpy as np
import pandas as pd
import pint
import pytest

from wbexplore.errors import UnitError
from wbexplore.units import (days_in_month, flow_m3s_to_mm_per_month, m3_to_mm, mm_per_month_to_flow_m3s, mm_to_m3,
                             parse_discharge_unit, parse_flux_unit, parse_level_unit, parse_storage_unit)

ureg = pint.UnitRegistry()


@pytest.mark.parametrize("text, pint_text", [("mm/day", "mm/day"), ("mm/h", "mm/hour"), ("m/s", "m/s"),
                                             ("mm d-1", "mm/day"), ("cm/day", "cm/day")])
def test_rates_match_pint(text, pint_text):
    # reference: pint's own conversion of the same rate to mm/day
    fu = parse_flux_unit(text)
    assert fu.kind == "rate"
    assert fu.factor == pytest.approx(ureg.Quantity(1, pint_text).to("mm/day").magnitude, rel=1e-12)


def test_mass_flux_is_depth_with_water_density():
    # 1 kg m-2 of liquid water = 1 mm (density 1000 kg m-3; common practice)
    fu = parse_flux_unit("kg m-2 s-1")
    assert fu.factor == pytest.approx(86400.0)
    assert parse_flux_unit("kg m-2").factor == pytest.approx(1.0)
    assert parse_storage_unit("kg m-2") == pytest.approx(1.0)
    assert parse_storage_unit("kg/m2") == pytest.approx(1.0)


def test_storage_lengths():
    # definition of the metric prefixes
    assert parse_storage_unit("cm") == 10.0
    assert parse_storage_unit("m") == 1000.0
    assert parse_storage_unit("mm") == 1.0


def test_per_month_means_calendar_month():
    # mm/month is a total per calendar month, never pint's mean month of 30.44 days
    fu = parse_flux_unit("mm/month")
    assert fu.kind == "per_month"
    months = pd.date_range("2001-01-01", periods=3, freq="MS")
    np.testing.assert_array_equal(fu.monthly_factor(months), [1.0, 1.0, 1.0])


def test_rate_to_monthly_total_uses_true_days():
    fu = parse_flux_unit("mm/day")
    months = pd.DatetimeIndex(["2000-02-01", "2001-02-01", "2001-01-01"])
    np.testing.assert_array_equal(fu.monthly_factor(months), [29, 28, 31])


def test_gregorian_february():
    # Gregorian rule: divisible by 4, except centuries not divisible by 400
    feb = pd.DatetimeIndex(["2000-02-01", "2004-02-01", "1900-02-01", "2100-02-01", "2023-02-01"])
    np.testing.assert_array_equal(days_in_month(feb), [29, 29, 28, 28, 28])


def test_one_mm_over_one_km2_is_1000_m3():
    # definition: 1e-3 m x 1e6 m2 = 1000 m3
    assert mm_to_m3(1.0, 1e6) == pytest.approx(1000.0)
    assert m3_to_mm(1000.0, 1e6) == pytest.approx(1.0)


def test_flow_to_depth_worked_example():
    # 1 m3/s for a 31-day month over 1000 km2: 86400*31/1e9 m = 2.6784 mm (arithmetic, common practice)
    jan = pd.DatetimeIndex(["2001-01-01"])
    assert flow_m3s_to_mm_per_month(1.0, jan, 1000e6)[0] == pytest.approx(2.6784, abs=1e-12)
    assert mm_per_month_to_flow_m3s(2.6784, jan, 1000e6)[0] == pytest.approx(1.0)


def test_discharge_units():
    assert parse_discharge_unit("m3/s").factor == 1.0
    assert parse_discharge_unit("l/s").factor == pytest.approx(ureg.Quantity(1, "l/s").to("m^3/s").magnitude)
    assert parse_discharge_unit("mm/month").kind == "depth"


@pytest.mark.parametrize("bad", ["degC", "K", "kg", "m^2", "W m-2"])
def test_wrong_dimension_for_flux_refused(bad):
    with pytest.raises(UnitError, match=r"source .rain_x.*" + re.escape(bad.split()[0])):
        parse_flux_unit(bad, source="rain_x")


@pytest.mark.parametrize("bad", ["mm/day", "kg m-2 s-1", "degC"])
def test_rate_for_twsa_refused(bad):
    with pytest.raises(UnitError, match="source 'tws'"):
        parse_storage_unit(bad, source="tws")


def test_unparseable_unit():
    with pytest.raises(UnitError, match="cannot parse"):
        parse_flux_unit("bananas per fortnight!", source="s")


# --- the table of common spellings (units._KNOWN) against pint ------------------------------------------
from wbexplore import units as _units  # noqa: E402

_PUBLIC = {"rate": parse_flux_unit, "per_month": parse_flux_unit, "depth": parse_storage_unit,
           "mass_depth": parse_storage_unit, "flow": parse_discharge_unit}


def _through_pint(monkeypatch, fn, text):
    with monkeypatch.context() as m:
        m.setattr(_units, "_KNOWN", {})  # every spelling through pint's registry, as before the table
        return fn(text)


@pytest.mark.parametrize("text", sorted(_units._KNOWN))
def test_every_table_spelling_equals_pints_conversion(text, monkeypatch):
    # reference: pint (its registry parses the spelling and converts it; the table must agree to 1e-12)
    kind, _ = _units._KNOWN[text]
    fn = _PUBLIC[kind]
    fast, slow = fn(text), _through_pint(monkeypatch, fn, text)
    if kind == "flow":
        assert (fast.kind, fast.flux) == (slow.kind, slow.flux)
        fast, slow = fast.factor, slow.factor
    elif fn is parse_flux_unit:
        assert fast.kind == slow.kind and fast.text == slow.text
        fast, slow = fast.factor, slow.factor
    assert fast == pytest.approx(slow, rel=1e-12)
    # and the same unit read as the other kinds it may stand for
    if kind in ("rate", "per_month", "depth", "mass_depth"):
        a, b = parse_discharge_unit(text), _through_pint(monkeypatch, parse_discharge_unit, text)
        assert (a.kind, a.flux.kind) == (b.kind, b.flux.kind)
        assert a.flux.factor == pytest.approx(b.flux.factor, rel=1e-12)
    if kind in ("depth", "mass_depth"):
        f = parse_flux_unit(text)
        assert f.kind == "amount" and f.factor == pytest.approx(_through_pint(monkeypatch, parse_flux_unit, text).factor,
                                                                 rel=1e-12)
    if kind == "depth":
        assert parse_level_unit(text) == pytest.approx(_through_pint(monkeypatch, parse_level_unit, text), rel=1e-12)


@pytest.mark.parametrize("text, pint_text, to", [("kg m-2 s-1", "mm/s", "mm/day"), ("m/s", "m/s", "mm/day"),
                                                 ("ML/day", "megaliter/day", "m^3/s"), ("l/s", "liter/s", "m^3/s"),
                                                 ("m3/day", "m^3/day", "m^3/s"), ("mm/h", "mm/hour", "mm/day")])
def test_table_factors_against_pint_directly(text, pint_text, to):
    # reference: pint's own conversion, written in pint's grammar (1 kg m-2 of water = 1 mm: common practice)
    fn = _PUBLIC[_units._KNOWN[text][0]]
    got = fn(text).factor
    assert got == pytest.approx(ureg.Quantity(1, pint_text).to(to).magnitude, rel=1e-12)


@pytest.mark.parametrize("text, fn", [("m3/s", parse_flux_unit), ("m3/s", parse_level_unit),
                                      ("m3/s", parse_storage_unit), ("mm/day", parse_storage_unit),
                                      ("kg m-2", parse_level_unit), ("mm/month", parse_level_unit)])
def test_table_spelling_of_the_wrong_kind_fails_as_through_pint(text, fn, monkeypatch):
    # a table spelling used where its kind does not fit falls through to pint: the same refusal as before
    with pytest.raises(UnitError) as fast:
        fn(text)
    with pytest.raises(UnitError) as slow:
        _through_pint(monkeypatch, fn, text)
    assert str(fast.value) == str(slow.value)


@pytest.mark.parametrize("table, fn, to", [("_KNOWN_AREA", "parse_area_unit", "m^2"),
                                           ("_KNOWN_VOLUME", "parse_volume_unit", "m^3")])
def test_area_and_volume_table_spellings_equal_pints_conversion(table, fn, to, monkeypatch):
    # reference: pint, through the registry (tables emptied) and directly in pint's grammar (1e-12 relative)
    parse = getattr(_units, fn)
    spellings = sorted(getattr(_units, table))
    assert spellings
    for text in spellings:
        fast = parse(text)
        with monkeypatch.context() as m:
            m.setattr(_units, table, {})
            slow = parse(text)
        assert fast == pytest.approx(slow, rel=1e-12), text
        assert fast == pytest.approx(ureg.Quantity(1, _units._normalise(text)).to(to).magnitude, rel=1e-12), text
    # anything else still goes through pint: its refusals unchanged
    with pytest.raises(UnitError, match="not an area"):
        _units.parse_area_unit("m3")
    with pytest.raises(UnitError, match="cubic megametres"):
        _units.parse_volume_unit("Mm3")
