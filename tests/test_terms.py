"""The term table, the closure pipeline (closure_terms / closure_metrics), ClosureOptions and flows.

Outside references: the general water balance of hydrology textbooks (inputs - outputs = change in
storage) with the storage identity of DESIGN.md (monthly means of a piecewise-linear store:
(M[i+1] - M[i-1]) / 2 = (F[i-1] + 2 F[i] + F[i+1]) / 4), evaluated here with plain numpy on a synthetic
truth; hydroeval for the efficiencies where named.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from wbexplore.balance import ClosureOptions, Selection, best_selection, closure_metrics, closure_terms, rank
from wbexplore.balance import compute_selection
from wbexplore.errors import InputError

from utils import canonical_series as synthetic_series


def test_best_selection_keeps_every_option():
    """Regression (issue 14): best_selection dropped water_year_start and min_valid_fraction, so the selection
    it returned scored differently from the row it was chosen from."""
    ds, _ = synthetic_series()
    ds["valid_fraction_P1"][:, ::7] = 0.6  # below 0.9: masked under the stricter option only
    opts = {"water_year_start": 10, "min_valid_fraction": 0.9, "start": "2002-01", "storage_change": "backward"}
    sel = best_selection(ds, "B0", **opts)
    assert sel.water_year_start == 10 and sel.min_valid_fraction == 0.9
    r = rank(ds, "B0", **opts)
    res = compute_selection(ds, sel)
    for k in ("rmse", "annual_bias", "annual_rmse", "n_valid"):
        assert res.metrics[k] == r.iloc[0][k], k


# ----------------------------------------------------------------------------------------- the term table
def test_term_table_signs_and_kinds():
    """Textbook balance: what enters is +, what leaves or is stored is - (P in; ET, Q out; dS stored)."""
    from wbexplore.balance.terms import BASE_TERMS, KINDS, SOURCE_COMPONENTS, flow_terms, term_signs

    assert [(t.name, t.sign, t.kind) for t in BASE_TERMS] == [
        ("P", 1.0, "gridded flux"), ("ET", -1.0, "gridded flux"), ("Q", -1.0, "station flux"),
        ("dS", -1.0, "gridded storage")]
    assert SOURCE_COMPONENTS == ("P", "ET", "TWSA")
    assert list(term_signs()) == [1.0, -1.0, -1.0, -1.0]
    assert set(KINDS) == {"gridded flux", "gridded storage", "station flux", "station storage"}
    ds, _ = synthetic_series()
    fl = flow_terms(ds)
    assert [(t.name, t.sign, t.kind, t.label) for t in fl] == [
        ("flow_up", 1.0, "station flux", "flow up"), ("flow_irr", -1.0, "station flux", "flow irr")]
    ds["flow_irr"].attrs["direction"] = "sideways"
    with pytest.raises(InputError, match="flow_irr.*direction.*sideways"):
        flow_terms(ds)


def _kernel(F, method):
    """The flux window of DESIGN.md written out (an independent implementation of storage.KERNELS)."""
    prev = np.concatenate([np.full(F.shape[:-1] + (1,), np.nan), F[..., :-1]], axis=-1)
    nxt = np.concatenate([F[..., 1:], np.full(F.shape[:-1] + (1,), np.nan)], axis=-1)
    return {"central": (prev + 2 * F + nxt) / 4, "backward": (prev + F) / 2, "forward": (F + nxt) / 2}[method]


@pytest.mark.parametrize("method", ["central", "backward", "forward"])
def test_truth_closes_with_flows(method):
    """Window-matched closure of a truth built with flows is exact (DESIGN.md storage identity)."""
    ds, _ = synthetic_series()
    t = closure_terms(ds, ClosureOptions(storage_change=method), sources={"P": ["P0"], "ET": ["ET0"],
                                                                         "TWSA": ["TWSA0"]})
    r = t["residual"].values
    assert t["residual"].dims == ("basin", "P_source", "ET_source", "TWSA_source", "time")
    assert np.isfinite(r).sum() >= r.size - 2 * 3
    assert np.nanmax(np.abs(r)) < 1e-9
    # Qhat is the discharge the other terms predict: residual + Q
    assert np.allclose(t["Qhat"].values, r + t["Q"].values[:, None, None, None], rtol=0, atol=1e-9, equal_nan=True)


def test_leaving_flows_out_shifts_mean_residual_by_their_net_mean():
    """Sign test (issue 14): without the flows the mean residual moves by minus the mean of inflows -
    outflows over the compared months, window-matched (the kernel written out here)."""
    ds, truth = synthetic_series()
    opts = ClosureOptions(min_valid=12)
    with_f = closure_metrics(closure_terms(ds, opts))
    without = closure_metrics(closure_terms(ds.drop_vars(["flow_up", "flow_irr"]), opts))
    net_w = _kernel(truth["net"], "central")
    ok = np.isfinite(net_w) & np.isfinite(_kernel(truth["M"], "central"))  # interior months
    expected = -np.array([net_w[b][ok[b]].mean() for b in range(3)])
    shift = (without["bias"] - with_f["bias"]).values  # (basin, P, ET, TWSA)
    assert np.allclose(shift, expected[:, None, None, None], rtol=0, atol=1e-9)
    assert expected[0] != 0 and expected[-1] == 0  # the last basin has no flow: no shift
    # and the truth combination closes only with the flows
    assert abs(float(with_f["bias"].sel(basin="B0", P_source="P0", ET_source="ET0", TWSA_source="TWSA0"))) < 1e-9


def test_a_second_transfer_needs_no_code_change():
    """A made-up further term (a second transfer, out) only needs its series variable (the reader's
    part): the engine, the ranking and the selection frame take it from the term table."""
    ds, truth = synthetic_series()
    rng = np.random.default_rng(5)
    extra = np.abs(rng.normal(3, 1, truth["P"].shape))
    # rebuild the truth's storage with the extra outflow
    F = truth["P"] - truth["ET"] - truth["Q"] + truth["net"] - extra
    S = np.cumsum(F, axis=1)
    M = 0.5 * (np.concatenate([np.zeros((3, 1)), S[:, :-1]], axis=1) + S)
    ds["TWSA0"] = ds["TWSA0"].copy(data=M)
    before = closure_terms(ds, sources={"P": ["P0"], "ET": ["ET0"], "TWSA": ["TWSA0"]})
    assert np.nanmax(np.abs(before["residual"].values)) > 1  # not closed without the new term
    ds["flow_transfer2"] = (("basin", "time"), extra, {"role": "flow", "flow_id": "transfer2", "direction": "out",
                                                       "label": "second transfer", "units": "mm/month",
                                                       "component": "flow"})
    ds.wbx.validate()
    t = closure_terms(ds, sources={"P": ["P0"], "ET": ["ET0"], "TWSA": ["TWSA0"]})
    assert np.nanmax(np.abs(t["residual"].values)) < 1e-9
    assert t["flow_transfer2"].attrs["sign"] == -1.0
    r = rank(ds, "B0", min_valid=12)
    assert (r.iloc[0]["P"], r.iloc[0]["ET"], r.iloc[0]["TWSA"]) == ("P0", "ET0", "TWSA0")
    res = compute_selection(ds, Selection("B0", "P0", "ET0", "TWSA0"), min_valid=12)
    assert {"flow_transfer2", "flow_transfer2_raw", "sigma_flow_transfer2", "net_flow"} <= set(res.frame)
    assert abs(res.metrics["bias"]) < 1e-9


def test_views_equal_the_pipeline_and_hydroeval():
    """rank rows are closure_metrics values (bitwise); NSE and KGE of Qhat against Q with flows agree
    with hydroeval (Nash-Sutcliffe 1970, Gupta et al. 2009)."""
    import hydroeval
    ds, _ = synthetic_series(close=False)
    opts = ClosureOptions(storage_change="backward", min_valid=12)
    t = closure_terms(ds, opts)
    m = closure_metrics(t, explain=True)
    r = rank(ds, "B1", opts)
    for _, row in r.iterrows():
        cell = m.sel(basin="B1", P_source=row["P"], ET_source=row["ET"], TWSA_source=row["TWSA"])
        for k in ("rmse", "bias", "nse", "kge", "annual_rmse"):
            assert np.array_equal(cell[k].values, row[k], equal_nan=True), k
    sel = Selection("B1", "P1", "ET0", "TWSA1", storage_change="backward")
    res = compute_selection(ds, sel, min_valid=12)
    f = res.frame[res.frame["valid"]]
    assert np.isclose(res.metrics["nse"], hydroeval.evaluator(hydroeval.nse, f["Qhat"].values, f["Q"].values)[0],
                      rtol=0, atol=1e-12)
    assert np.isclose(res.metrics["kge"],
                      hydroeval.evaluator(hydroeval.kge, f["Qhat"].values, f["Q"].values)[0][0], rtol=0, atol=1e-12)
    cell = m.sel(basin="B1", P_source="P1", ET_source="ET0", TWSA_source="TWSA1")
    assert res.metrics["rmse"] == float(cell["rmse"])


@pytest.mark.parametrize("kw, match", [
    ({"storage_change": "sideways"}, "storage-change method 'sideways'"),
    ({"lag": 13}, "lag 13"),
    ({"min_valid_fraction": 1.5}, "min_valid_fraction 1.5"),
    ({"water_year_start": 0}, "water_year_start 0"),
    ({"min_valid": -1}, "min_valid -1"),
    ({"start": "2005-13"}, "start '2005-13'"),
    ({"start": "2006-01", "end": "2005-01"}, "ends before it starts"),
    ({"matched": "yes"}, "matched"),
])
def test_closure_options_refuse_bad_values(kw, match):
    with pytest.raises(InputError, match=match):
        ClosureOptions(**kw)


def test_old_keywords_and_options_object_agree():
    ds, _ = synthetic_series(close=False)
    a = rank(ds, "B0", start="2002-03", lag=1, water_year_start=4, min_valid=12)
    b = rank(ds, "B0", ClosureOptions(start="2002-03", lag=1, water_year_start=4, min_valid=12))
    assert a.equals(b)
    with pytest.raises(TypeError, match="wobble"):
        rank(ds, "B0", wobble=1)


def test_flows_in_series_exports_and_by_difference(tmp_path):
    """Flows reach the CSV and CF exports, and the unknown term by difference balances with them
    (ET = P - Q - dS + inflows - outflows: the textbook balance solved for ET)."""
    from wbexplore.balance import by_difference
    from wbexplore.selection import series_dataset, write_series_csv

    ds, truth = synthetic_series()
    res = compute_selection(ds, Selection("B0", "P0", "ET0", "TWSA0"), min_valid=12)
    out = write_series_csv(res, tmp_path / "s.csv")
    f = pd.read_csv(out, comment="#", index_col="month")
    assert {"flow_up", "flow_irr", "sigma_flow_up", "net_flow"} <= set(f.columns)
    assert np.allclose(f["net_flow"], f["flow_up"] - f["flow_irr"], equal_nan=True)
    cf = series_dataset(res)
    assert cf["flow_irr"].attrs["units"] == "mm" and "outflow" in cf["flow_irr"].attrs["long_name"]
    est = by_difference(ds, Selection("B0", "P0", "ET0", "TWSA0"), "ET", min_valid=12)["monthly"]
    ok = est["estimate"].notna()
    assert np.allclose(est["estimate"][ok], est["reference"][ok], rtol=0, atol=1e-9)


def test_closure_terms_write_to_netcdf_and_keep_their_options(tmp_path):
    """The labelled result is a plain Dataset: it goes to netCDF and back with its options (xarray's own
    round trip), and closure_metrics of the read-back terms equals that of the original."""
    ds, _ = synthetic_series(close=False)
    opts = ClosureOptions(storage_change="forward", water_year_start=10, min_valid=12, lag=1)
    t = closure_terms(ds, opts)
    t.to_netcdf(tmp_path / "t.nc")
    back = xr.open_dataset(tmp_path / "t.nc").load()
    assert ClosureOptions.from_json(back.attrs["closure_options"]) == opts
    a, b = closure_metrics(t), closure_metrics(back)
    for k in ("rmse", "annual_bias", "kge"):
        assert np.array_equal(a[k].values, b[k].values, equal_nan=True), k


def test_selection_file_records_flows_and_refuses_a_bad_one(tmp_path):
    """Each flow of the balance is recorded with its direction and the SHA-256 of its station table
    (hashlib as the outside reference); a selection file with a bad flow entry is refused naming the field."""
    import hashlib
    from types import SimpleNamespace

    from wbexplore.errors import SelectionError
    from wbexplore.selection import _flow_entries, _validate, files_digest

    ds, _ = synthetic_series()
    res = compute_selection(ds, Selection("B0", "P0", "ET0", "TWSA0"), min_valid=12)
    table = tmp_path / "gauges.csv"
    table.write_text("date,q\n2001-01-01,1.0\n")
    cat = SimpleNamespace(path=tmp_path / "catalog.yaml", flows=[SimpleNamespace(id="up", path=table)])
    entries = _flow_entries(cat, res)
    assert [(e["id"], e["direction"]) for e in entries] == [("up", "in"), ("irr", "out")]
    # the station table's digest lives in the file's provenance block (one entry per flow, `files_digest`):
    # sha256sum's line for the file, hashed again (hashlib as the outside reference)
    assert all("file" not in e for e in entries)
    line = f"{hashlib.sha256(table.read_bytes()).hexdigest()}  gauges.csv\n"
    assert files_digest([table], tmp_path) == {"files": 1, "sha256": hashlib.sha256(line.encode()).hexdigest()}
    doc = {"wbexplore_selection": 1, "catalog": {"path": "catalog.yaml", "sha256": "0" * 64}, "basin": {"id": "B0"},
           "period": {"start": "2001-01", "end": "2008-12"},
           "sources": {c: {"id": f"{c}0", "files": []} for c in ("P", "ET", "TWSA")},
           "storage_change": {"method": "central"}, "metrics": {"rmse": 1.0}, "flows": entries}
    assert _validate(doc, tmp_path / "s.yaml").basin == "B0"
    doc["flows"] = [{"id": "up", "direction": "across"}]
    with pytest.raises(SelectionError, match=r"s.yaml: field 'flows.0.direction': 'across'"):
        _validate(doc, tmp_path / "s.yaml")


def test_old_combination_arrays_refuse_a_series_with_flows():
    """`combination_terms` (old arrays without a place for flows) refuses rather than leave them out."""
    from wbexplore.balance.combos import combination_terms

    ds, _ = synthetic_series(nb=2, nt=36)
    with pytest.raises(InputError, match="flow_up"):
        combination_terms(ds, "B0")
    ids, P, ET, dS, Q = combination_terms(ds[[v for v in ds.data_vars if not v.startswith("flow_")]], "B0")
    assert P.shape[0] == len(ids["P"]) and Q.shape == (36,)


def test_selection_mirrors_the_closure_options():
    """`Selection` carries the option fields of `ClosureOptions` (besides basin and sources) with the same
    defaults: one drifting from the other would score a selection differently from its ranking row."""
    from dataclasses import MISSING, fields

    opts = {f.name: f.default for f in fields(ClosureOptions)}
    mirrored = {f.name: f.default for f in fields(Selection) if f.name in opts}
    assert mirrored and all(mirrored[k] == opts[k] for k in mirrored), (mirrored, opts)
    assert all(f.default is not MISSING for f in fields(Selection) if f.name in opts)
    sel = Selection("B0", "P0", "ET0", "TWSA0")
    assert sel.options() == ClosureOptions()
