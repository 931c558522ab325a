"""PLS candidate against an independent NIPALS PLS1 written here, and VIP
against the hand values of references.md §8 (Wold, Johansson & Cocchi 1993;
Chong & Jun 2005, Chemometr. Intell. Lab. Syst. 78:103-112)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.cross_decomposition import PLSRegression

from linkage.models.candidates import PLSRegressor, pls_vip, vip_from_weights

# references.md §8, NIPALS PLS1 check (COMPUTED there from the stated algorithm)
X8 = np.array([[1, 2, 0], [2, 1, 1], [3, 4, 1], [4, 3, 0], [5, 6, 1], [6, 5, 0]], dtype=float)
Y8 = np.array([1, 2, 3.5, 3.9, 5.2, 6.1])


def nipals_pls1(X, y, n_components):
    """Textbook NIPALS PLS1 on centred data (Wold, Sjöström & Eriksson 2001,
    Chemometr. Intell. Lab. Syst. 58:109-130, the PLS1 case): w = Xᵀy/‖Xᵀy‖,
    t = Xw, p = Xᵀt/tᵀt, q = yᵀt/tᵀt, deflate X and y. Returns W, P, q, T and
    the regression vector B = W (PᵀW)⁻¹ q on the centred scale."""
    X = X - X.mean(axis=0)
    y = y - y.mean()
    W, P, T, Q = [], [], [], []
    for _ in range(n_components):
        w = X.T @ y
        w = w / np.linalg.norm(w)
        t = X @ w
        tt = t @ t
        p = X.T @ t / tt
        q = y @ t / tt
        X = X - np.outer(t, p)
        y = y - q * t
        W.append(w), P.append(p), T.append(t), Q.append(q)
    W, P, T, Q = np.array(W).T, np.array(P).T, np.array(T).T, np.array(Q)
    B = W @ np.linalg.solve(P.T @ W, Q)
    return W, P, Q, T, B


def test_test_nipals_reproduces_the_reference_values():
    """The test's own NIPALS gives references.md §8's w₁, q, SS and VIP."""
    W, P, q, T, _ = nipals_pls1(X8, Y8, 2)
    assert W[:, 0] == pytest.approx([0.754270, 0.656534, -0.006374], abs=1e-6)
    assert q == pytest.approx([0.738608, 0.475330], abs=1e-6)
    ss = q**2 * np.sum(T**2, axis=0)
    assert ss == pytest.approx([17.381428, 0.702214], abs=1e-5)
    assert vip_from_weights(W, ss) == pytest.approx([1.300151, 1.144063, 0.026953], abs=1e-6)


def test_vip_hand_check_and_sum_of_squares():
    """references.md §8: W = [[.8, 0], [.6, .6], [0, .8]], SS = [3, 1] ->
    VIP = [1.2, 1.039230, 0.692820]; Σ VIP² = p."""
    vip = vip_from_weights([[0.8, 0.0], [0.6, 0.6], [0.0, 0.8]], [3.0, 1.0])
    assert vip == pytest.approx([1.2, 1.039230, 0.692820], abs=1e-6)
    assert np.sum(vip**2) == pytest.approx(3.0, abs=1e-12)


def test_vip_of_a_scikit_learn_fit_matches_the_reference():
    """pls_vip on scikit-learn's PLSRegression (centred, unscaled, as in §8)."""
    pls = PLSRegression(n_components=2, scale=False).fit(X8, Y8)
    assert pls_vip(pls) == pytest.approx([1.300151, 1.144063, 0.026953], abs=1e-6)


@pytest.mark.parametrize("n_components", [1, 2, 3])
def test_pls_candidate_equals_independent_nipals_on_standardised_inputs(n_components):
    rng = np.random.default_rng(11)
    X = rng.normal(size=(25, 4)) * [1, 10, 0.1, 3] + [5, 100, 0.3, 20]
    X[:, 3] += 0.8 * X[:, 1]
    y = X @ [0.5, 0.02, 8.0, -0.1] + rng.normal(0, 0.3, 25)
    model = PLSRegressor(n_components=n_components).fit(X, y)

    mean, sd = X.mean(axis=0), X.std(axis=0, ddof=1)  # "standardised": SD with ddof = 1
    W, P, q, T, B = nipals_pls1((X - mean) / sd, y, n_components)
    expected = ((X - mean) / sd) @ B + y.mean()
    assert model.predict(X) == pytest.approx(expected, rel=1e-9, abs=1e-9)
    assert model.coef_ == pytest.approx(B / sd, rel=1e-8)
    ss = q**2 * np.sum(T**2, axis=0)
    assert model.vip_ == pytest.approx(vip_from_weights(W, ss), rel=1e-8)
    assert np.sum(model.vip_**2) == pytest.approx(4.0, rel=1e-12)  # Σ VIP² = p


def test_constant_input_gets_zero_vip_and_the_sum_stays_p():
    rng = np.random.default_rng(2)
    X = rng.normal(size=(20, 3))
    X[:, 1] = 7.0
    y = X[:, 0] - X[:, 2] + rng.normal(0, 0.1, 20)
    model = PLSRegressor(n_components=2).fit(X, y)
    assert model.vip_[1] == 0.0 and model.coef_[1] == 0.0
    assert np.sum(model.vip_**2) == pytest.approx(3.0, rel=1e-12)


def test_fewer_components_from_one_fit_equal_a_refit():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(30, 4))
    y = X @ [1, 2, 0, -1] + rng.normal(size=30)
    big = PLSRegressor(n_components=4).fit(X, y)
    for a in (1, 2, 3):
        assert big.predict_components(X, a) == pytest.approx(PLSRegressor(a).fit(X, y).predict(X), abs=1e-10)


def test_contributions_add_up_exactly():
    rng = np.random.default_rng(9)
    X = rng.normal(size=(15, 3))
    y = X @ [1.0, -2.0, 0.5] + 4
    model = PLSRegressor(n_components=2).fit(X, y)
    c, base = model.contributions(X[:4])
    assert base == pytest.approx(y.mean(), rel=1e-12)
    assert c.sum(axis=1) + base == pytest.approx(model.predict(X[:4]), abs=1e-12)
