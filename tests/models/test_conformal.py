"""Conformal rank rules against references.md §9, and coverage by simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest

from linkage.models.conformal import (
    cv_plus_interval,
    cv_plus_slack,
    jackknife_plus_interval,
    lower_rank,
    split_conformal_quantile,
    upper_rank,
)


@pytest.mark.parametrize("n, alpha, k", [(19, 0.1, 18), (9, 0.1, 9), (8, 0.1, 9), (99, 0.05, 95), (20, 0.1, 19)])
def test_upper_rank_matches_reference(n, alpha, k):
    """k = ⌈(1 − α)(n + 1)⌉ (Lei et al. 2018; references.md §9 check values)."""
    assert upper_rank(n, alpha) == k


def test_split_conformal_quantile_reference_and_infinite_case():
    """references.md §9: these 19 residuals at α = 0.1 give q̂ = 1.05 (18th
    smallest); with n = 8 the rank 9 > n gives an unbounded interval."""
    r = [0.2, 0.5, 0.1, 0.9, 0.4, 0.3, 0.7, 0.6, 0.8, 1.2, 0.25, 0.35, 0.45, 0.55, 0.65, 0.75, 0.85, 0.95, 1.05]
    assert split_conformal_quantile(r, 0.1) == pytest.approx(1.05)
    assert split_conformal_quantile(r[:8], 0.1) == math.inf


def test_jackknife_plus_reference_interval():
    """references.md §9 (Barber et al. 2021 rank rule): lower index 2, upper
    index 8, interval [9.30, 10.50]."""
    mu = [10.1, 9.8, 10.3, 10.0, 9.9, 10.2, 10.05, 9.95, 10.15]
    r = [0.3, 0.5, 0.2, 0.4, 0.6, 0.1, 0.35, 0.45, 0.25]
    assert lower_rank(9, 0.2) == 2 and upper_rank(9, 0.2) == 8
    assert jackknife_plus_interval(mu, r, 0.2) == pytest.approx((9.30, 10.50))


def test_cv_plus_with_one_lot_per_fold_is_jackknife_plus():
    mu = np.array([10.1, 9.8, 10.3, 10.0, 9.9, 10.2, 10.05, 9.95, 10.15])
    r = np.array([0.3, 0.5, 0.2, 0.4, 0.6, 0.1, 0.35, 0.45, 0.25])
    low, high = cv_plus_interval(mu[:, None], np.arange(9), r, 0.2)
    assert (low[0], high[0]) == pytest.approx((9.30, 10.50))
    low, high = cv_plus_interval(mu[:8, None], np.arange(8), r[:8], 0.1)
    assert low[0] == -math.inf and high[0] == math.inf  # too few lots for 90 %


@pytest.mark.parametrize("n, k, slack", [(100, 10, 0.081818), (50, 5, 0.145455)])
def test_cv_plus_slack(n, k, slack):
    """references.md §9 check values of the CV+ coverage slack."""
    assert cv_plus_slack(n, k) == pytest.approx(slack, abs=1e-6)


def test_split_conformal_coverage_by_simulation():
    """Marginal coverage of split conformal lies in [1 − α, 1 − α + 1/(n+1)]
    (Lei et al. 2018, Theorem 2.2); checked over 4000 simulated calibration
    sets of n = 19 with a fixed (wrong) model."""
    rng = np.random.default_rng(0)
    n, alpha, reps = 19, 0.1, 4000
    y_cal = rng.standard_t(4, size=(reps, n))
    y_new = rng.standard_t(4, size=reps)
    q = np.array([split_conformal_quantile(y - 0.3, alpha) for y in y_cal])  # model predicts 0.3
    covered = np.abs(y_new - 0.3) <= q
    se = math.sqrt(0.9 * 0.1 / reps)
    assert 1 - alpha - 3 * se <= covered.mean() <= 1 - alpha + 1 / (n + 1) + 3 * se


def test_cv_plus_coverage_with_a_refitted_model():
    """CV+ with a least-squares line refitted in 5 folds: coverage of 90 %
    intervals on fresh points is within a few points of nominal (and above
    the 1 − 2α − slack guarantee of Barber et al. 2021)."""
    rng = np.random.default_rng(1)
    covered = []
    for _ in range(300):
        x = rng.uniform(0, 1, 40)
        y = 2 + 3 * x + rng.normal(0, 1, 40)
        fold = np.arange(40) % 5
        coefs, res = [], np.empty(40)
        for f in range(5):
            tr = fold != f
            c = np.polyfit(x[tr], y[tr], 1)
            coefs.append(c)
            res[~tr] = y[~tr] - np.polyval(c, x[~tr])
        x_new = rng.uniform(0, 1, 20)
        y_new = 2 + 3 * x_new + rng.normal(0, 1, 20)
        preds = np.vstack([np.polyval(c, x_new) for c in coefs])
        low, high = cv_plus_interval(preds, fold, res, 0.1)
        covered.append((low <= y_new) & (y_new <= high))
    rate = np.mean(covered)
    assert 0.87 <= rate <= 0.94
    assert rate >= 1 - 2 * 0.1 - cv_plus_slack(40, 5)
