"""Unit harmonisation against pint and against facts of the trade."""

import re

import numpy as np
import pandas as pd
import pint
import pytest

from wbexplore.errors import UnitError
from wbexplore.units import (days_in_month, flow_m3s_to_mm_per_month, m3_to_mm, mm_per_month_to_flow_m3s, mm_to_m3,
                             parse_discharge_unit, parse_flux_unit, parse_storage_unit)

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
