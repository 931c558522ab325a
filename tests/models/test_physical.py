"""The ribbon stage's physical baseline (linkage.models.physical.JohansonRibbonRegressor).

References: the physics (linkage.physics.rolling, Johanson 1965) is checked in tests/physics/test_rolling.py;
here the estimator against it, its lean form against the estimator (bit for bit), its contributions against a
brute-force Shapley value (average over all orders of adding the inputs, Shapley 1953, from memory, computed with
itertools.permutations), and its place in the grouped CV on a synthetic campaign generated from the theory with
a known truth (linkage.synthetic_rolling), where it should win.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from linkage.models.chain import ChainSpec, StageSpec
from linkage.models.lean import Model
from linkage.models.physical import PHYSICAL_INPUTS, JohansonRibbonRegressor
from linkage.physics.rolling import johanson_ribbon_porosity
from linkage.synthetic_rolling import TransferTruth, make_transfer_lots

from .conftest import assert_estimator_contract

COLUMNS = [*PHYSICAL_INPUTS, "roll_speed_rpm"]


def _data(seed=0):
    lots = make_transfer_lots(seed=seed)
    lots["roll_speed_rpm"] = np.random.default_rng(seed).uniform(3, 8, len(lots))
    return lots[COLUMNS].to_numpy(), lots["ribbon_porosity"].to_numpy(), lots


def test_fit_recovers_the_truth_and_predicts_by_the_physics():
    X, y, _ = _data()
    est = JohansonRibbonRegressor().fit(X, y)
    truth = TransferTruth()
    assert est.compressibility_ == pytest.approx(truth.compressibility, rel=0.1)
    ref = johanson_ribbon_porosity(X[:, 0], X[:, 1], X[:, 2], est.compressibility_, est.pressure_constant_mpa_)
    np.testing.assert_allclose(est.predict(X), ref, rtol=1e-12)


def test_contract_on_data_inside_the_domain():
    # what the skipped scikit-learn checks ask (tests/models/test_estimator_checks.py), on valid data
    X, y, _ = _data(1)
    assert_estimator_contract(JohansonRibbonRegressor, X, y, COLUMNS)


def test_lean_form_gives_the_same_floats():
    X, y, _ = _data(2)
    est = JohansonRibbonRegressor().fit(X, y)
    lean = Model(est.lean_spec())
    assert np.array_equal(lean.predict(X), est.predict(X))
    c1, b1 = lean.contributions(X)
    c2, b2 = est.contributions(X)
    assert np.array_equal(c1, c2) and b1 == b2


def test_contributions_are_shapley_values():
    X, y, _ = _data(3)
    est = JohansonRibbonRegressor().fit(X, y)
    contrib, base = est.contributions(X[:4])
    np.testing.assert_allclose(contrib.sum(axis=1) + base, est.predict(X[:4]), atol=1e-12)
    assert np.all(contrib[:, 3] == 0)  # roll speed: not in the theory
    ref = np.asarray(est.reference_)

    def f(row, subset):
        z = np.append(ref, 0.0)
        z[list(subset)] = row[list(subset)]
        return est.predict(z[None, :])[0]

    for row, got in zip(X[:4], contrib):  # brute force: average marginal change over the 3! orders
        phi = np.zeros(3)
        for order in itertools.permutations(range(3)):
            for k, j in enumerate(order):
                phi[j] += f(row, order[:k + 1]) - f(row, order[:k])
        np.testing.assert_allclose(got[:3], phi / math.factorial(3), atol=1e-12)


def test_not_applicable_without_the_roll_diameter():
    X, y, _ = _data()
    why = JohansonRibbonRegressor.not_applicable(["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm"],
                                                 X[:, [0, 1, 3]], y)
    assert "roll_diameter_mm is not an input of this stage" in why
    assert JohansonRibbonRegressor.not_applicable(COLUMNS, X, y * 100) == \
        "the target is not a porosity fraction between 0 and 1"
    assert JohansonRibbonRegressor.not_applicable(COLUMNS, X, y) is None


def test_joins_the_grouped_cv_and_wins_on_data_from_the_theory():
    # the same grouped CV and one-SE selection as every candidate (linkage.models.train.train_chain)
    from linkage.models.train import train_chain

    _, _, lots = _data(4)
    chain = ChainSpec([StageSpec("ribbon", COLUMNS, ["ribbon_porosity"], {})], source="test chain")
    fitted = train_chain(lots, chain, seed=0, candidates=["mean", "johanson_baseline", "pls"], n_bootstrap=0)
    target = fitted.stages[0].targets["ribbon_porosity"]
    assert set(target.candidates) >= {"mean", "johanson_baseline", "pls"}
    assert target.candidates["johanson_baseline"]["rmse"] < target.candidates["pls"]["rmse"]
    assert target.selected == "johanson_baseline"
    # its CV error is near the campaign's lot-to-lot noise (SD 0.008), as a correct model's should be
    assert target.candidates["johanson_baseline"]["rmse"] < 1.5 * TransferTruth().porosity_sd
