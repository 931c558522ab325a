"""Training the chain: the known-truth acceptance, the fitted objects, the
same-seed reproducibility and the degenerate cases."""

from __future__ import annotations

import json

import numpy as np
import pytest

from linkage.exceptions import InputError, InsufficientDataError, UsageError
from linkage.models.chain import ChainSpec, StageSpec
from linkage.models.train import train_chain
from linkage.schema import TABLES

from .conftest import DISSOLUTION_SD, assembled_table, one_stage


# ---------------------------------------------------------------------------
# acceptance with a known truth
# ---------------------------------------------------------------------------
def test_known_truth_dissolution_rmse_and_coverage():
    """Issue acceptance: on lots with known truth and noise, the selected
    dissolution model's CV RMSE is within 1.5× the true noise SD and the
    empirical (nested outer-CV) coverage of 90 % intervals lies in 85-95 %.
    The deployed CV+ intervals are also checked on 2000 fresh lots from the
    same truth: coverage within a few points of nominal."""
    table = assembled_table(150, seed=1)
    fit = train_chain(table, one_stage(), seed=0, nominal_coverage=0.9)
    t = fit.targets["dissolution_pct"]
    assert t.candidates[t.selected]["rmse"] <= 1.5 * DISSOLUTION_SD
    assert 0.85 <= t.coverage <= 0.95
    assert t.cv["scheme"] == "grouped 10-fold"
    # the replicate-based floor recovers the true SD of the lot mean (6 vessels)
    assert t.noise_floor == pytest.approx(DISSOLUTION_SD, rel=0.15)
    fresh = assembled_table(2000, seed=99)
    low, high = t.interval(fresh[t.inputs])
    y = fresh["dissolution_pct"].to_numpy()
    assert 0.86 <= np.mean((low <= y) & (y <= high)) <= 0.95


def test_known_truth_from_linkage_synthetic():
    """The same acceptance on lots from linkage.synthetic (its own truth and
    noise model, assembled by linkage.assemble)."""
    synthetic = pytest.importorskip("linkage.synthetic")
    from linkage.assemble import assemble

    lots = synthetic.make_lots(150, seed=0, with_vessels=True)
    table = assemble(lots.tables)
    fit = train_chain(table, one_stage(), seed=0)
    t = fit.targets["dissolution_pct"]
    true_sd = lots.truth.noise_sd["dissolution_pct"]
    assert t.candidates[t.selected]["rmse"] <= 1.5 * true_sd
    assert 0.85 <= t.coverage <= 0.95


# ---------------------------------------------------------------------------
# the fitted objects
# ---------------------------------------------------------------------------
def test_fitted_target_attributes(small_fit):
    table, fit = small_fit
    t = fit.targets["dissolution_pct"]
    assert t.n_lots == 24 and t.lots == sorted(table["lot"])
    assert t.cv["scheme"] == "leave-one-lot-out" and t.cv["n_splits"] == 24 and t.cv["seed"] == 0
    assert sorted(t.cv["folds"].values()) == list(range(24))
    assert set(t.candidates) == {"mean", "rd_baseline", "pls", "quadratic_ridge"}
    for m in t.candidates.values():
        assert {"rmse", "mae", "q2", "bias", "rmse_se", "rmse_over_noise", "coverage"} <= set(m)
    assert list(t.oof.columns) == ["observed", "mean", "rd_baseline", "pls", "quadratic_ridge"]
    assert (t.residuals == t.oof["observed"] - t.oof[t.selected]).all()
    assert t.noise_floor is not None and "pooled within-lot SD" in t.noise_floor_method
    assert sum(v**2 for v in t.vip.values()) == pytest.approx(4.0)
    assert t.rd_params is not None and {"s0", "k", "s0_se", "k_se"} <= set(t.rd_params)
    ts = fit.targets["tensile_strength_mpa"]
    assert ts.noise_floor is None and ts.noise_floor_method.startswith("none estimated")
    # the mean candidate's out-of-fold prediction is the mean of the other lots
    obs = t.oof["observed"]
    assert t.oof["mean"].to_numpy() == pytest.approx(((obs.sum() - obs) / 23).to_numpy())


def test_contributions_add_up_for_the_selected_model(small_fit):
    table, fit = small_fit
    for t in fit.targets.values():
        X = table[t.inputs].iloc[:5]
        c = t.contributions(X)
        assert list(c.columns) == t.inputs
        assert c.sum(axis=1).to_numpy() + c.attrs["base_value"] == pytest.approx(t.predict(X), abs=1e-9)
        assert c.base_value == c.attrs["base_value"]


def test_interval_and_domain_and_residual_table(small_fit):
    table, fit = small_fit
    t = fit.targets["dissolution_pct"]
    X = table[t.inputs].iloc[:3]
    low, high = t.interval(X)
    pred = t.predict(X)
    assert np.all(low < pred) and np.all(pred < high)
    low50, high50 = t.interval(X, level=0.5)
    assert np.all(high50 - low50 < high - low)
    stage = fit.stages[0]
    verdicts = stage.domain.check(table[stage.inputs].iloc[:3])
    assert len(verdicts) == 3 and all(v.t2_limit > 0 for v in verdicts)
    res = stage.residual_table()
    assert list(res.columns) == ["dissolution_pct", "tensile_strength_mpa"] and len(res) == 24
    with pytest.raises(InputError, match="no finite value"):
        t.predict(X.assign(fines_pct=[1.0, np.nan, 2.0]))
    with pytest.raises(InputError, match="column missing"):
        t.predict(X.drop(columns="fines_pct"))


def test_metadata_is_json_safe_and_records_training(small_fit):
    table, fit = small_fit
    meta = fit.metadata()
    text = json.dumps(meta, allow_nan=False)
    assert "dissolution_pct" in text
    tr = meta["training"]
    assert tr["n_lots"] == 24 and len(tr["table_sha256"]) == 64
    assert tr["medians"]["compression_force_kn"] == pytest.approx(table["compression_force_kn"].median())
    assert tr["ranges"]["ribbon_porosity"] == pytest.approx(
        [table["ribbon_porosity"].min(), table["ribbon_porosity"].max()])
    assert meta["targets"]["dissolution_pct"]["selection_rule"].startswith("lowest outer cross-validated RMSE")
    assert set(meta["library_versions"]) >= {"numpy", "scikit-learn", "python"}


def test_a_lot_missing_one_target_still_counts_for_the_others():
    table = assembled_table(20, seed=5)
    table.loc[:4, "dissolution_pct"] = np.nan
    chain = ChainSpec([StageSpec("tablets", ["ribbon_porosity", "compression_force_kn"],
                                 ["dissolution_pct", "friability_pct"])])
    fit = train_chain(table, chain, candidates=["mean", "pls"])
    assert fit.targets["dissolution_pct"].n_lots == 15
    assert fit.targets["friability_pct"].n_lots == 20
    res = fit.stages[0].residual_table()
    assert res["dissolution_pct"].isna().sum() == 5 and res["friability_pct"].notna().all()


def test_same_seed_gives_byte_identical_results_and_progress_is_reported():
    table = assembled_table(36, seed=2)
    calls = []
    a = train_chain(table, one_stage(), seed=4, progress=lambda *args: calls.append(args))
    b = train_chain(table.sample(frac=1.0, random_state=1), one_stage(), seed=4)  # row order does not matter
    ja = json.dumps(a.metadata()["targets"], sort_keys=True)
    jb = json.dumps(b.metadata()["targets"], sort_keys=True)
    assert ja == jb
    X = table[a.targets["dissolution_pct"].inputs]
    ta, tb = a.targets["dissolution_pct"], b.targets["dissolution_pct"]
    assert ta.predict(X).tobytes() == tb.predict(X).tobytes()
    assert np.array_equal(np.vstack(ta.interval(X)), np.vstack(tb.interval(X)))
    assert calls[0] == ("cross-validating", 0, 11) and calls[-1] == ("cross-validating", 11, 11)
    c = train_chain(table, one_stage(), seed=5, candidates=["mean"])
    assert c.targets["dissolution_pct"].cv["folds"] != ta.cv["folds"]


# ---------------------------------------------------------------------------
# degenerate data: a clear error or a documented fallback
# ---------------------------------------------------------------------------
def test_one_lot_and_too_few_lots_are_refused():
    with pytest.raises(InsufficientDataError, match="the table has 1 lot$"):
        train_chain(assembled_table(1))
    with pytest.raises(InsufficientDataError, match="the table has 4 lots"):
        train_chain(assembled_table(4))


def test_too_few_lots_for_one_target_skips_it_with_the_reason():
    table = assembled_table(12, seed=3)
    table.loc[3:, "friability_pct"] = np.nan
    chain = ChainSpec([StageSpec("tablets", ["ribbon_porosity", "compression_force_kn"],
                                 ["dissolution_pct", "friability_pct"])])
    fit = train_chain(table, chain, candidates=["mean", "pls"])
    assert "friability_pct" not in fit.targets
    assert "needs at least 5 lots" in fit.skipped["friability_pct"]
    assert "friability_pct missing on 9 of 12 lots" in fit.skipped["friability_pct"]
    assert fit.stages[0].skipped == {"friability_pct": fit.skipped["friability_pct"]}


def test_constant_target_falls_back_to_the_mean():
    table = assembled_table(10, seed=3)
    table["friability_pct"] = 0.4
    fit = train_chain(table, one_stage("friability_pct"))
    t = fit.targets["friability_pct"]
    assert t.selected == "mean" and list(t.candidates) == ["mean"]
    assert t.candidates["mean"]["q2"] is None and t.candidates["mean"]["rmse"] == pytest.approx(0, abs=1e-12)
    assert any("constant target" in n for n in t.notes)
    assert t.unavailable["pls"] == "constant target"
    json.dumps(fit.metadata(), allow_nan=False)


def test_all_lots_at_one_porosity():
    table = assembled_table(12, seed=3)
    table["ribbon_porosity"] = 0.3
    fit = train_chain(table, one_stage(), candidates=["mean", "rd_baseline", "pls"])
    t = fit.targets["dissolution_pct"]
    assert "fewer than 3 distinct ribbon porosities" in t.unavailable["rd_baseline"]
    assert t.vip["ribbon_porosity"] == 0.0 and t.rd_params is None
    assert fit.stages[0].domain.constant_inputs_ == ["ribbon_porosity"]


def test_column_entirely_missing():
    table = assembled_table(12, seed=3).drop(columns=["granule_d50_um"])
    fit = train_chain(table, candidates=["mean", "pls"])
    assert "granule_d50_um" in fit.skipped and "granule_d50_um missing on 12 of 12 lots" in fit.skipped["granule_d50_um"]
    # the tablet stage needs granule_d50_um as an input: skipped with the reason
    assert "dissolution_pct" in fit.skipped
    assert set(fit.targets) == {"ribbon_porosity", "fines_pct"}
    assert "column granule_d50_um is absent from the assembled table" in fit.training["notes"]
    with pytest.raises(InsufficientDataError, match="no attribute can be trained"):
        train_chain(assembled_table(12).drop(columns=["ribbon_porosity"]), candidates=["mean"])


def test_few_lots_give_unbounded_intervals_not_nan():
    fit = train_chain(assembled_table(6, seed=2), one_stage(), candidates=["mean", "pls"])
    t = fit.targets["dissolution_pct"]
    X = assembled_table(3, seed=9)[t.inputs]
    low, high = t.interval(X, raw=True)
    assert np.all(low == -np.inf) and np.all(high == np.inf)  # ⌈0.9·7⌉ = 7 > 6 lots
    # projected onto the physical range, the unbounded ends are dissolution's bounds: 0 and the template's 150 %
    low, high = t.interval(X)
    assert np.all(low == 0.0) and np.all(high == TABLES["tablets"].column("dissolution_pct").high)
    assert t.infinite_intervals == 6 and t.coverage == 1.0
    assert any("unbounded" in n for n in t.notes)


def test_bad_tables_are_refused_with_every_problem():
    table = assembled_table(8)
    table.loc[2, "lot"] = table.loc[1, "lot"]
    table["fines_pct"] = table["fines_pct"].astype(object)
    table.loc[5, "fines_pct"] = "n.d."
    with pytest.raises(InputError) as exc:
        train_chain(table)
    text = str(exc.value)
    assert "lot appears on rows [3, 4]" in text
    assert "row 7, column 'fines_pct', value 'n.d.': not a number" in text


def test_bad_arguments():
    table = assembled_table(8)
    with pytest.raises(UsageError, match="unknown candidate"):
        train_chain(table, candidates=["forest"])
    with pytest.raises(UsageError, match="nominal coverage"):
        train_chain(table, nominal_coverage=90)
