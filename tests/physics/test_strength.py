"""Tests of linkage.physics.strength against /work/shared/references.md §2 and scipy.

Status labels as in the reference sheet: VERIFIED, COMPUTED, FROM MEMORY.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from linkage.physics.strength import (
    fit_ryshkewitch_duckworth,
    porosity_for_strength,
    ryshkewitch_duckworth,
)

FAST = settings(max_examples=40, deadline=None, derandomize=True)

# references.md §2, COMPUTED: noise-free data with s0 = 10 MPa, k = 8
EPS = np.array([0.15, 0.20, 0.25, 0.30, 0.35])
SIGMA = np.array([3.011942, 2.018965, 1.353353, 0.907180, 0.608101])


def test_model_sheet_values():
    # references.md §2, COMPUTED: s0 10, k 8, eps 0.25 -> 10 e^-2 = 1.353353 MPa (Ryshkewitch 1953, form standard)
    assert ryshkewitch_duckworth(0.25, 10, 8) == pytest.approx(1.353353, abs=1e-6)
    assert ryshkewitch_duckworth(0.25, 10, 8) == pytest.approx(10 * math.exp(-2))  # by hand
    np.testing.assert_allclose(ryshkewitch_duckworth(EPS, 10, 8), SIGMA, atol=1e-6)


@pytest.mark.parametrize("method", ["nls", "loglinear"])
def test_fit_noise_free_sheet(method):
    # references.md §2, COMPUTED: linear fit of ln sigma on eps returns slope -8 and s0 = 10 (both methods here)
    fit = fit_ryshkewitch_duckworth(EPS, ryshkewitch_duckworth(EPS, 10, 8), method=method)
    assert fit["k"] == pytest.approx(8.0, abs=1e-6)
    assert fit["s0"] == pytest.approx(10.0, abs=1e-6)
    assert fit["method"] == method
    assert fit["n"] == 5
    assert fit["rmse"] < 1e-9
    # the sheet's rounded table values refit to the same parameters within rounding
    fit6 = fit_ryshkewitch_duckworth(EPS, SIGMA, method=method)
    assert fit6["k"] == pytest.approx(8.0, abs=1e-4) and fit6["s0"] == pytest.approx(10.0, abs=1e-4)


def _noisy(seed=11):
    rng = np.random.default_rng(seed)
    eps = np.linspace(0.12, 0.40, 14)
    sigma = ryshkewitch_duckworth(eps, 12.0, 7.0) + rng.normal(0, 0.08, eps.size)
    return eps, sigma


def test_nls_matches_scipy_least_squares():
    # cross-check: NLS estimates against scipy.optimize.least_squares (a different solver, TRF) on seeded noisy
    # data; SEs against the Gauss-Newton covariance s^2 (J^T J)^-1 built from least_squares' Jacobian
    eps, sigma = _noisy()
    fit = fit_ryshkewitch_duckworth(eps, sigma, method="nls")
    res = optimize.least_squares(lambda p: p[0] * np.exp(-p[1] * eps) - sigma, x0=[5.0, 3.0], method="trf",
                                 xtol=1e-14, ftol=1e-14, gtol=1e-14)
    assert fit["s0"] == pytest.approx(res.x[0], rel=1e-6)
    assert fit["k"] == pytest.approx(res.x[1], rel=1e-6)
    dof = eps.size - 2
    s2 = 2 * res.cost / dof
    cov = s2 * np.linalg.inv(res.jac.T @ res.jac)
    assert fit["s0_se"] == pytest.approx(math.sqrt(cov[0, 0]), rel=1e-4)
    assert fit["k_se"] == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-4)
    assert fit["rmse"] == pytest.approx(math.sqrt(2 * res.cost / eps.size), rel=1e-6)


def test_loglinear_matches_scipy_linregress():
    # cross-check: OLS of ln sigma on eps against scipy.stats.linregress; s0 SE by the delta method
    eps, sigma = _noisy()
    fit = fit_ryshkewitch_duckworth(eps, sigma, method="loglinear")
    lr = stats.linregress(eps, np.log(sigma))
    assert fit["k"] == pytest.approx(-lr.slope, rel=1e-10)
    assert fit["k_se"] == pytest.approx(lr.stderr, rel=1e-8)
    assert fit["s0"] == pytest.approx(math.exp(lr.intercept), rel=1e-10)
    assert fit["s0_se"] == pytest.approx(math.exp(lr.intercept) * lr.intercept_stderr, rel=1e-8)


def test_methods_differ_on_noisy_data():
    # references.md §2 test note: the two fits give different estimates on noisy data
    eps, sigma = _noisy()
    a = fit_ryshkewitch_duckworth(eps, sigma, method="nls")
    b = fit_ryshkewitch_duckworth(eps, sigma, method="loglinear")
    assert a["k"] != pytest.approx(b["k"], rel=1e-6)
    assert a["rmse"] <= b["rmse"]  # NLS minimises the original-scale residuals


def test_nan_pairs_are_left_out():
    eps = np.append(EPS, [np.nan, 0.3])
    sigma = np.append(ryshkewitch_duckworth(EPS, 10, 8), [1.0, np.nan])
    fit = fit_ryshkewitch_duckworth(eps, sigma)
    assert fit["n"] == 5
    assert fit["k"] == pytest.approx(8.0, abs=1e-6)


def test_nls_accepts_a_zero_strength():
    eps = np.append(EPS, 0.9)
    sigma = np.append(ryshkewitch_duckworth(EPS, 10, 8), 0.0)
    fit = fit_ryshkewitch_duckworth(eps, sigma, method="nls")
    assert fit["k"] == pytest.approx(8.0, rel=0.05)


@FAST
@given(s0=st.floats(1.0, 60.0), k=st.floats(2.0, 15.0), method=st.sampled_from(["nls", "loglinear"]))
def test_property_fit_recovers_noise_free_parameters(s0, k, method):
    # property: simulate from known parameters (porosity 0.05-0.45), fit, recover them
    eps = np.linspace(0.05, 0.45, 7)
    fit = fit_ryshkewitch_duckworth(eps, ryshkewitch_duckworth(eps, s0, k), method=method)
    assert fit["s0"] == pytest.approx(s0, rel=1e-6)
    assert fit["k"] == pytest.approx(k, rel=1e-6)


def test_porosity_for_strength_sheet_values():
    # references.md §2, COMPUTED: s0 10, k 8: target 1.0 -> 0.287823; 1.7 -> 0.221495; 2.0 -> 0.201180
    np.testing.assert_allclose(porosity_for_strength([1.0, 1.7, 2.0], 10, 8), [0.287823, 0.221495, 0.201180],
                               atol=1e-6)
    assert porosity_for_strength(1.7, 10, 8) == pytest.approx(math.log(10 / 1.7) / 8)  # by hand
    # inverse of the model
    assert ryshkewitch_duckworth(porosity_for_strength(1.7, 10, 8), 10, 8) == pytest.approx(1.7)
    assert porosity_for_strength(20, 10, 8) < 0  # target above s0: unreachable


def test_model_errors():
    with pytest.raises(ValueError, match="porosity must lie between 0 and 1"):
        ryshkewitch_duckworth(25, 10, 8)
    with pytest.raises(ValueError, match="porosity must lie between 0 and 1"):
        ryshkewitch_duckworth(-0.1, 10, 8)
    with pytest.raises(ValueError, match="s0 must be positive"):
        ryshkewitch_duckworth(0.2, 0, 8)


@pytest.mark.parametrize(
    "eps, sigma, method, match",
    [
        ([0.1, 0.2], [2.0, 1.0], "nls", "need at least 3"),
        ([0.1, 0.2, np.nan], [2.0, 1.0, 0.5], "loglinear", "need at least 3"),
        ([0.1, 0.2, 0.3], [2.0, 0.0, 0.5], "loglinear", "strength must be positive for the loglinear fit"),
        ([0.1, 0.2, 0.3], [2.0, -1.0, 0.5], "nls", "strength cannot be negative"),
        ([0.2, 0.2, 0.2], [2.0, 1.0, 0.5], "nls", "porosity values are all equal"),
        ([10, 20, 30], [2.0, 1.0, 0.5], "nls", "porosity must lie between 0 and 1"),
        ([0.1, 0.2, 0.3], [2.0, 1.0], "nls", "must have the same length"),
        ([0.1, 0.2, 0.3], [2.0, 1.0, 0.5], "ols", "method must be one of"),
    ],
)
def test_fit_errors(eps, sigma, method, match):
    with pytest.raises(ValueError, match=match):
        fit_ryshkewitch_duckworth(eps, sigma, method=method)


def test_porosity_for_strength_errors():
    with pytest.raises(ValueError, match="target_strength must be positive"):
        porosity_for_strength(0, 10, 8)
    with pytest.raises(ValueError, match="s0 must be positive"):
        porosity_for_strength(1, -10, 8)
    with pytest.raises(ValueError, match="k cannot be zero"):
        porosity_for_strength(1, 10, 0)
