"""Candidate estimators: parameter recovery, agreement with reference
libraries, contributions that add up."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import Ridge
from sklearn.preprocessing import PolynomialFeatures

from linkage.models.candidates import (
    CANDIDATES,
    BoostingRegressor,
    MeanRegressor,
    QuadraticRidge,
    RDRegressor,
    tune,
)


def test_rd_recovers_known_parameters_noise_free():
    """references.md §2: ε = [0.15 … 0.35] with σ₀ = 10, k = 8 gives
    σ = [3.011942, 2.018965, 1.353353, 0.907180, 0.608101]; the fit returns
    σ₀ = 10, k = 8."""
    eps = np.array([0.15, 0.20, 0.25, 0.30, 0.35])
    sigma = np.array([3.011942, 2.018965, 1.353353, 0.907180, 0.608101])
    model = RDRegressor(porosity_index=0).fit(eps[:, None], sigma)
    assert model.s0_ == pytest.approx(10.0, rel=1e-5)
    assert model.k_ == pytest.approx(8.0, rel=1e-5)
    assert model.predict(np.array([[0.25]]))[0] == pytest.approx(1.353353, rel=1e-6)  # 10·e⁻²


def test_rd_recovers_parameters_from_noisy_lots_within_their_standard_errors():
    """Simulated from σ₀ = 12, k = 7 with N(0, 0.05) noise: the NLS estimates
    lie within 3 standard errors of the truth (parameter recovery, as in
    lifelines' estimation tests)."""
    rng = np.random.default_rng(4)
    eps = rng.uniform(0.15, 0.40, 80)
    y = 12 * np.exp(-7 * eps) + rng.normal(0, 0.05, 80)
    X = np.column_stack([rng.normal(size=80), eps])  # porosity is the second input
    model = RDRegressor(porosity_index=1).fit(X, y)
    p = model.params_
    assert abs(p["s0"] - 12) < 3 * p["s0_se"] and abs(p["k"] - 7) < 3 * p["k_se"]
    c, base = model.contributions(X[:5])
    assert np.all(c[:, 0] == 0)
    assert c.sum(axis=1) + base == pytest.approx(model.predict(X[:5]), abs=1e-12)


def test_quadratic_ridge_matches_scikit_learn_ridge_on_the_same_features():
    """Same features (standardised inputs, squares, pairwise products) and
    penalty in scikit-learn's Ridge (intercept unpenalised)."""
    rng = np.random.default_rng(3)
    X = rng.normal(size=(40, 3)) * [2, 0.5, 10] + [5, 1, 50]
    y = X[:, 0] ** 2 - 3 * X[:, 1] * X[:, 2] / 10 + rng.normal(size=40)
    ours = QuadraticRidge(alpha=2.5).fit(X, y)
    Z = (X - X.mean(axis=0)) / X.std(axis=0)
    poly = PolynomialFeatures(degree=2, include_bias=False)
    F = poly.fit_transform(Z)
    ref = Ridge(alpha=2.5).fit(F, y)
    assert ours.predict(X) == pytest.approx(ref.predict(F), rel=1e-9, abs=1e-9)


def test_quadratic_ridge_contributions_add_up_exactly():
    rng = np.random.default_rng(8)
    X = rng.normal(size=(30, 4))
    y = X[:, 0] * X[:, 1] + X[:, 2] ** 2 - X[:, 3] + rng.normal(0, 0.1, 30)
    model = QuadraticRidge(alpha=0.5).fit(X, y)
    c, base = model.contributions(X)
    assert c.sum(axis=1) + base == pytest.approx(model.predict(X), abs=1e-10)
    # the base is the model's expectation with inputs drawn independently
    # from their training values (interventional Shapley, checked by brute force)
    grid = np.stack(np.meshgrid(*[X[:, j] for j in range(4)], indexing="ij"), -1).reshape(-1, 4)
    assert base == pytest.approx(model.predict(grid).mean(), rel=1e-9)


def test_boosting_shap_contributions_add_up_and_monotone_constraint_holds():
    rng = np.random.default_rng(0)
    X = rng.uniform(0, 1, size=(60, 3))
    y = np.sin(4 * X[:, 0]) + X[:, 1] + rng.normal(0, 0.1, 60)
    model = BoostingRegressor(max_iter=20, monotonic_cst=[0, 1, 0], min_samples_leaf=3).fit(X, y)
    c, base = model.contributions(X[:10])
    assert c.sum(axis=1) + base == pytest.approx(model.predict(X[:10]), abs=1e-6)
    line = np.column_stack([np.full(50, 0.5), np.linspace(0, 1, 50), np.full(50, 0.5)])
    assert np.all(np.diff(model.predict(line)) >= -1e-12)  # non-decreasing in the constrained input


def test_mean_contributions_are_zero():
    X = np.arange(12.0).reshape(6, 2)
    model = MeanRegressor().fit(X, np.arange(6.0))
    c, base = model.contributions(X)
    assert np.all(c == 0) and base == 2.5


def test_boosting_staged_grid_equals_separate_fits():
    """The staged-prediction grid gives what a separate fit with that many trees gives."""
    rng = np.random.default_rng(2)
    X = rng.normal(size=(30, 2))
    y = X[:, 0] - X[:, 1] ** 2 + rng.normal(0, 0.2, 30)
    spec = CANDIDATES["boosting"]
    grid = spec.grid(30, 2)
    (staged,) = spec.fit_predict_grid(grid, X, y, [X[:5]], inputs=["a", "b"], monotone=None, seed=0)
    for g, params in enumerate(grid):
        alone = spec.build(params, ["a", "b"], n=30, seed=0).fit(X, y).predict(X[:5])
        assert staged[g] == pytest.approx(alone, abs=1e-12)


def test_tune_picks_the_grid_point_with_lowest_inner_rmse():
    rng = np.random.default_rng(6)
    X = rng.normal(size=(30, 3))
    y = X @ [1.0, 0.5, 0.0] + rng.normal(0, 0.1, 30)
    lots = np.array([f"L{i}" for i in range(30)], dtype=object)
    res = tune(CANDIDATES["pls"], X, y, lots, X[:2], inputs=["a", "b", "c"])
    assert res.params["n_components"] == 1 + int(np.argmin(res.grid_rmse))
    assert res.extra_pred.shape == (5, 2) and res.inner_pred.shape == (30,)
    assert not set(lots[res.inner_fold == 0]) & set(lots[res.inner_fold != 0])
