"""The physics-shaped candidates (log_linear, weibull_release, linear_select):
fits against scikit-learn's least squares, parameter recovery on the laws they
follow, and input selection per attribute."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression

from linkage.models.candidates import (LinearSelectRegressor, LogLinearRegressor, WeibullReleaseRegressor,
                                       input_subsets, log_eligible, tune)

INPUTS = ["ribbon_porosity", "granule_d50_um", "fines_pct", "compression_force_kn"]


def _lots(n=48, seed=0):
    """Correlated stage inputs, as in a campaign: d50 and fines follow porosity."""
    rng = np.random.default_rng(seed)
    por = rng.uniform(0.2, 0.45, n)
    d50 = 420 * np.exp(-4 * (por - 0.3)) + rng.normal(0, 10, n)
    fines = 20 + 60 * (por - 0.3) + rng.normal(0, 1.5, n)
    cf = rng.uniform(8, 20, n)
    return np.column_stack([por, d50, fines, cf]), rng


def test_input_subsets_are_every_non_empty_subset_smallest_first():
    """Σ_{k≥1} C(p, k) = 2^p − 1 subsets (binomial theorem), sizes ascending."""
    for p in range(1, 6):
        subsets = input_subsets(p)
        assert len(subsets) == 2**p - 1 == sum(math.comb(p, k) for k in range(1, p + 1))
        assert [len(s) for s in subsets] == sorted(len(s) for s in subsets)
    assert list(log_eligible(INPUTS)) == [False, True, False, True]  # sizes and forces, not fractions


def test_log_linear_equals_weighted_least_squares_of_scikit_learn():
    """Two steps: OLS of ln y, then weights ŷ² (delta method, g'(y) = 1/y);
    the reference is scikit-learn's LinearRegression with sample_weight."""
    X, rng = _lots()
    y = 8 * np.exp(-6 * X[:, 0]) * (X[:, 3] / 14) ** 0.8 * np.exp(rng.normal(0, 0.03, len(X)))
    est = LogLinearRegressor(features=[0, 3], log_mask=[False, False, False, True]).fit(X, y)
    Z = np.column_stack([X[:, 0], np.log(X[:, 3])])
    first = LinearRegression().fit(Z, np.log(y))
    ref = LinearRegression().fit(Z, np.log(y), sample_weight=np.exp(first.predict(Z)) ** 2)
    np.testing.assert_allclose(est.coef_[[0, 3]], ref.coef_, rtol=1e-7)
    assert est.coef_[1] == 0 and est.coef_[2] == 0
    np.testing.assert_allclose(est.predict(X), np.exp(ref.predict(Z)), rtol=1e-7)  # the 1e-10 ridge guard aside


def test_log_linear_recovers_ryshkewitch_duckworth_with_a_power_law_in_force():
    """Noise-free ln σ = ln σ0 − k ε + m ln F (Ryshkewitch 1953; Duckworth
    1953): the fit returns k and m exactly (parameter recovery)."""
    X, _ = _lots()
    y = 12.0 * np.exp(-8.0 * X[:, 0]) * X[:, 3] ** 0.6
    est = LogLinearRegressor(features=[0, 3], log_mask=[False, False, False, True]).fit(X, y)
    assert est.coef_[0] == pytest.approx(-8.0, rel=1e-6)
    assert est.coef_[3] == pytest.approx(0.6, rel=1e-6)
    assert np.all(est.predict(X * [1, 1, 1, 50]) > 0)  # positive far out too


def test_weibull_release_recovers_first_order_release_parameters():
    """First-order release at t = 30 min, Q = 100(1 − exp(−t/τ)) with
    ln τ = ln 11.8 − 4.5(ε − 0.3) + 0.4 ln(F/14) (Langenbucher 1972, β = 1):
    ln(−ln(1 − Q/100)) = ln t − ln τ, so the coefficients are +4.5 on ε and
    −0.4 on ln F (parameter recovery, noise-free)."""
    X, _ = _lots()
    tau = 11.8 * np.exp(-4.5 * (X[:, 0] - 0.3)) * (X[:, 3] / 14) ** 0.4
    y = 100 * -np.expm1(-30.0 / tau)
    est = WeibullReleaseRegressor(features=[0, 3], log_mask=[False, False, False, True]).fit(X, y)
    assert est.y_max_ == 100.0
    assert est.coef_[0] == pytest.approx(4.5, rel=1e-6)
    assert est.coef_[3] == pytest.approx(-0.4, rel=1e-6)
    far = est.predict(np.array([[0.9, 400, 20, 40], [0.0, 400, 20, 1]]))
    assert np.all((far > 0) & (far < 100))


def test_inner_cv_selects_the_input_that_acts():
    """Weight RSD exponential in fines only (the issue's example): among
    fines, porosity and d50, which move together, the one-SE inner CV keeps
    fines alone and gives the others no coefficient."""
    X, rng = _lots(60, seed=3)
    y = 1.33 * np.exp(0.052 * (X[:, 2] - 20)) + rng.normal(0, 0.05, len(X))
    groups = np.arange(len(y))
    tr = tune(LogLinearRegressor, X, y, groups, inputs=INPUTS, seed=0)
    assert tr.params["features"] == [2]
    est = LogLinearRegressor.build(tr.params, INPUTS, n=len(y)).fit(X, y)
    assert est.coef_[2] == pytest.approx(0.052, rel=0.15) and np.count_nonzero(est.coef_) == 1


@pytest.mark.parametrize("cls", [LogLinearRegressor, WeibullReleaseRegressor, LinearSelectRegressor])
def test_contributions_add_up_and_grid_matches_single_fits(cls):
    X, rng = _lots(seed=5)
    y = 60 + 60 * X[:, 0] + 0.3 * X[:, 3] + rng.normal(0, 1, len(X))
    grid = cls.grid(len(y), X.shape[1])
    (preds,) = cls.fit_predict_grid(grid, X, y, [X[:7]], inputs=INPUTS, monotone={}, seed=0)
    for g in (0, 5, len(grid) - 1):
        est = cls.build(grid[g], INPUTS, n=len(y)).fit(X, y)
        np.testing.assert_allclose(preds[g], est.predict(X[:7]), rtol=1e-10)
        phi, base = est.contributions(X[:7])
        np.testing.assert_allclose(phi.sum(axis=1) + base, est.predict(X[:7]), rtol=1e-10)


def test_not_applicable_reasons():
    X, _ = _lots()
    assert "ln y" in LogLinearRegressor.not_applicable(INPUTS, X, np.r_[0.0, np.ones(len(X) - 1)])
    assert "percentage" in WeibullReleaseRegressor.not_applicable(INPUTS, X, np.full(len(X), 180.0))
    assert WeibullReleaseRegressor.not_applicable(INPUTS, X, np.linspace(50, 99, len(X))) is None
