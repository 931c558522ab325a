"""Studentized CV+ of the whole procedure (issue 12, coverage by region at
30 lots): the delta-method leverage of the link-linear candidates, checked
against scikit-learn's least squares through the leave-one-out identity, and
the procedure's fold models and residuals against a direct refit."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import LinearRegression

from linkage.models.candidates import LinearSelectRegressor, LogLinearRegressor, WeibullReleaseRegressor
from linkage.models.conformal import cv_plus_interval, lw_cv_plus_interval
from linkage.models.lean import link_leverage, link_transform, link_weights, leverage_scale
from tests.models.test_link_candidates import INPUTS, _lots  # correlated stage inputs, as in a campaign

def _h(model, X, X_new, factor=1.0):
    basis = model.leverage_basis(X, factor)
    p = model.lean_spec()
    return link_leverage(X_new, p["link"], p["log_mask"], p["x_mean"], p["coef"], p["intercept"], p["y_max"],
                         basis["columns"], basis["cov"]), basis


@pytest.mark.parametrize("cls, make_y", [
    (LinearSelectRegressor, lambda X, rng: 2.0 + 3.0 * X[:, 0] + 0.01 * X[:, 1] + rng.normal(0, 0.2, len(X))),
    (LogLinearRegressor, lambda X, rng: np.exp(0.5 - 2.0 * X[:, 0] + 0.3 * np.log(X[:, 3]) + rng.normal(0, 0.05, len(X)))),
    (WeibullReleaseRegressor, lambda X, rng: 100 * (1 - np.exp(-np.exp(1.0 - 3.0 * X[:, 0]
                                                                         + rng.normal(0, 0.05, len(X)))))),
])
def test_leverage_at_the_training_lots_is_the_weighted_hat_diagonal_of_scikit_learn(cls, make_y):
    """At a training lot, h = Wᵢ·dᵢᵀ(DᵀWD)⁻¹dᵢ is the diagonal of the hat
    matrix of weighted least squares on g(y) with weights W. Reference:
    scikit-learn's LinearRegression with those sample weights, refitted
    without each lot in turn, and the leave-one-out identity
    eᵢ₍₋ᵢ₎ = eᵢ/(1 − hᵢᵢ) (Cook & Weisberg 1982, Residuals and Influence in
    Regression, §2.2, eq. 2.2.21; from memory) — the prediction-error
    variance σ²(1 + h) of the classical interval rests on the same hᵢᵢ."""
    X, rng = _lots()
    y = make_y(X, rng)
    params = {"features": [0, 3] if cls is not LinearSelectRegressor else [0, 1], "log_inputs": True}
    m = cls.build(params, INPUTS, n=len(y)).fit(X, y)
    h, basis = _h(m, X, X)
    cols = basis["columns"]
    Z = np.where(m.log_mask_, np.log(X), X)[:, cols]
    W = link_weights(m.link, m.predict(X), m.y_max_)
    t = link_transform(m.link, m.response(y, m.y_max_), m.y_max_)
    full = LinearRegression().fit(Z, t, sample_weight=W)
    e = t - full.predict(Z)
    loo = np.empty_like(e)
    for i in range(len(y)):
        keep = np.arange(len(y)) != i
        fit = LinearRegression().fit(Z[keep], t[keep], sample_weight=W[keep])
        loo[i] = t[i] - fit.predict(Z[i:i + 1])[0]
    np.testing.assert_allclose(h, 1 - e / loo, rtol=1e-6, atol=1e-9)
    assert h.sum() == pytest.approx(len(cols) + 1, rel=1e-6)  # trace of a hat matrix = its rank (Weisberg 2005 §9.1)


def test_leverage_of_the_identity_link_is_the_ols_prediction_variance_factor():
    """For least squares (identity link, weights 1) the variance of the
    fitted mean at a new x₀ is σ²·x₀ᵀ(XᵀX)⁻¹x₀ (Weisberg 2005, Applied
    Linear Regression, 3rd ed., §3.6): computed here from the design matrix
    with numpy's own inverse, at points outside the training lots."""
    X, rng = _lots(seed=1)
    y = 1.0 + 4.0 * X[:, 0] + rng.normal(0, 0.1, len(X))
    m = LinearSelectRegressor.build({"features": [0, 2], "log_inputs": False}, INPUTS, n=len(y)).fit(X, y)
    X_new, _ = _lots(n=7, seed=2)
    h, _ = _h(m, X, X_new)
    A = np.column_stack([np.ones(len(X)), X[:, [0, 2]]])
    A0 = np.column_stack([np.ones(len(X_new)), X_new[:, [0, 2]]])
    ref = np.einsum("ij,jk,ik->i", A0, np.linalg.inv(A.T @ A), A0)
    np.testing.assert_allclose(h, ref, rtol=1e-8)


def test_the_scale_is_sqrt_one_plus_c_h_and_is_larger_at_the_edge_of_the_lots():
    """ρ(x) = √(1 + c·h(x)); h grows with the distance from the centre of
    the lots (Weisberg 2005 §3.6: the prediction interval widens away from x̄)."""
    X, rng = _lots(seed=3)
    y = 1.0 + 4.0 * X[:, 0] + rng.normal(0, 0.1, len(X))
    m = LinearSelectRegressor.build({"features": [0], "log_inputs": False}, INPUTS, n=len(y)).fit(X, y)
    centre = X.mean(axis=0, keepdims=True)
    edge = centre.copy()
    edge[0, 0] = X[:, 0].max()
    h, basis = _h(m, X, np.vstack([centre, edge]), factor=1.5)
    s = leverage_scale(np.vstack([centre, edge]), m.lean_spec(), basis)
    np.testing.assert_allclose(s, np.sqrt(1 + 1.5 * h), rtol=1e-12)
    assert h[0] == pytest.approx(1 / len(X), rel=1e-6)  # at x̄ the leverage is 1/n
    assert s[1] > s[0]


def test_with_a_constant_scale_the_studentized_interval_is_cv_plus():
    """A positive constant normaliser leaves the CV+ order statistics in
    place (Barber et al. 2021 §3 ranks; Lei et al. 2018 §5.2 scaling)."""
    rng = np.random.default_rng(4)
    preds = rng.normal(size=(5, 6))
    fold_of = np.repeat(np.arange(5), 4)
    res = rng.normal(size=20)
    a = cv_plus_interval(preds, fold_of, res, 0.1)
    b = lw_cv_plus_interval(preds, fold_of, res, np.full(20, 2.0), np.full(6, 2.0), 0.1)
    np.testing.assert_allclose(a, b, rtol=1e-12)


def test_the_procedure_basis_refits_the_candidate_chosen_inside_each_fold():
    """The studentized basis's fold model k is the one-SE choice on fold k's
    inner CV, refitted on fold k's training lots, and its residuals are the
    held-out errors of those models: checked by refitting each chosen
    candidate at its tuned parameters (the estimator API of scikit-learn)."""
    from linkage.assemble import assemble
    from linkage.models.chain import ChainSpec, StageSpec
    from linkage.models.train import train_chain
    from linkage.synthetic import make_lots

    table = assemble(make_lots(24, seed=5).tables)
    chain = ChainSpec([StageSpec("tablet", ["ribbon_porosity", "compression_force_kn"], ["tensile_strength_mpa"])])
    fitted = train_chain(table, chain, seed=0, n_bootstrap=0,
                         candidates=["mean", "linear_select", "log_linear", "pls"])
    t = fitted.targets["tensile_strength_mpa"]
    b = t.interval_basis
    assert b is not None and len(b["fold_models"]) == len(t.fold_models_)
    data = table.set_index("lot").loc[t.lots]
    X = data[t.inputs].to_numpy(float)
    y = data["tensile_strength_mpa"].to_numpy(float)
    for k, (model, name) in enumerate(zip(b["fold_models"], b["fold_candidates"])):
        tr, te = t.fold_of_ != k, t.fold_of_ == k
        assert name in t.candidates
        ref = type(model)(**model.get_params()).fit(X[tr], y[tr])  # scikit-learn's clone: same parameters, refit
        np.testing.assert_allclose(b["residuals"][te], y[te] - ref.predict(X[te]), rtol=1e-9, atol=1e-12)
    low, high = t.interval(pd.DataFrame(X[:3], columns=t.inputs))
    assert np.all(low < high)
