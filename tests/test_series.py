"""The canonical series schema (wbexplore.series): names, validation, and the `.wbx` accessor that only
delegates (reference: the plain functions it names; xarray's accessor pattern)."""

from __future__ import annotations

import numpy as np
import pytest

from utils import canonical_series as synthetic_series
from wbexplore.errors import InputError
from wbexplore.series import flow_name, flow_variables, source_ids, valid_fraction_name, validate_series


def test_names():
    assert valid_fraction_name("rain_a") == "valid_fraction_rain_a"
    assert flow_name("up") == "flow_up"


def test_accessor_delegates():
    from wbexplore.balance import closure_terms, rank
    from wbexplore.balance.terms import balance_terms

    ds, _ = synthetic_series()
    assert ds.wbx.validate() is ds
    assert ds.wbx.sources("ET") == source_ids(ds, "ET") == ["ET0", "ET1"]
    assert ds.wbx.flows() == flow_variables(ds) == ["flow_up", "flow_irr"]
    assert ds.wbx.terms() == balance_terms(ds)
    assert ds.wbx.rank("B1", min_valid=12).equals(rank(ds, "B1", min_valid=12))
    a, b = ds.wbx.closure_terms(storage_change="forward"), closure_terms(ds, storage_change="forward")
    assert np.array_equal(a["residual"].values, b["residual"].values, equal_nan=True)


@pytest.mark.parametrize("change, match", [
    (lambda ds: ds["flow_up"].attrs.update(direction="both"), "flow_up.*direction.*'both'"),
    (lambda ds: ds["flow_up"].attrs.update(units="m3/s"), "flow_up.*units.*m3/s"),
    (lambda ds: ds["flow_up"].attrs.update(flow_id="down"), "flow_up.*flow_id.*'down'"),
    (lambda ds: ds["P0"].attrs.update(component="Q"), "P0.*component.*'Q'"),
    (lambda ds: ds["valid_fraction_P0"].values.__setitem__((0, 0), 1.5), "valid_fraction_P0.*1.5"),
])
def test_validate_refuses_naming_variable_field_value(change, match):
    ds, _ = synthetic_series()
    change(ds)
    with pytest.raises(InputError, match=match):
        validate_series(ds)
