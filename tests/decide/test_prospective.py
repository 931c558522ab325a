"""Promotion on prospective evidence (issue 19 item 1): the paired
non-inferiority test on the lots the champion never saw, its statistic
checked against scipy, and the acceptance trials (a 30 %
worse challenger refused, a 30 % better one promoted, in at least 9 of 10
seeded trials each)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from linkage.decide.prospective import MIN_NEW_LOTS, paired_noninferiority, power
from linkage.decide.retrain import Comparison, decide

MARGIN = 0.10
N_NEW = 60  # new lots per trial; the power at this size is stated in README (Retrain: the promotion test)


def _errors(seed, ratio, n=N_NEW, shared=0.25):
    """Champion errors with RMSE 1 and challenger errors with RMSE ``ratio`` on the same n new lots; a
    variance ``shared`` of each is the lot's measurement noise, common to both (the same measured value)."""
    rng = np.random.default_rng(seed)
    eps = rng.normal(0, np.sqrt(shared), n)
    a = eps + rng.normal(0, np.sqrt(1 - shared), n)
    b = eps + rng.normal(0, np.sqrt(ratio**2 - shared), n)
    return a, b


def _comparison(test, name="dissolution_pct"):
    return Comparison(name, "pls", "pls", 2.0, 2.0, 0.1, 2.0, test["champion_rmse"], 0.0, test["n"], True, True,
                      test)


def test_statistic_is_the_one_sample_t_of_the_loss_differential_scipy_and_statsmodels():
    """Diebold & Mariano 1995 with the Harvey, Leybourne & Newbold 1997 small-sample correction, for one-step
    errors, is the one-sample t statistic of d = b² − (1+m)²a² against t(n−1): checked against
    scipy.stats.ttest_1samp on the same numbers (statsmodels is not a dependency)."""
    a, b = _errors(3, 1.1, n=25)
    got = paired_noninferiority(a, b, margin=MARGIN)
    d = b**2 - (1 + MARGIN) ** 2 * a**2
    ref = stats.ttest_1samp(d, 0.0, alternative="less")
    assert got["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    assert got["p_value"] == pytest.approx(ref.pvalue, rel=1e-10)
    assert got["df"] == 24
    # the Diebold-Mariano form itself: mean(d)/sqrt(gamma0/n) with gamma0 the (1/n) variance, times the HLN factor
    # sqrt((n + 1 - 2h + h(h-1)/n)/n) at h = 1 (Harvey, Leybourne & Newbold 1997, from memory)
    n = d.size
    dm = d.mean() / np.sqrt(np.var(d) / n)
    assert got["statistic"] == pytest.approx(dm * np.sqrt((n + 1 - 2) / n), rel=1e-12)
    assert got["rmse_ratio"] == pytest.approx(np.sqrt(np.mean(b**2) / np.mean(a**2)))


@pytest.mark.parametrize("ratio, promoted_at_least, refused_at_least", [(1.3, 0, 9), (0.7, 9, 0)])
def test_acceptance_worse_refused_better_promoted_in_9_of_10_seeded_trials(ratio, promoted_at_least,
                                                                           refused_at_least):
    """Issue 19 acceptance: a challenger whose RMSE on the new lots is 30 % higher is refused, one 30 % lower
    promoted, each in at least 9 of 10 seeded trials, through the decision rule."""
    promoted = 0
    for seed in range(10):
        a, b = _errors(seed, ratio)
        ok, reasons = decide([_comparison(paired_noninferiority(a, b, margin=MARGIN))])
        promoted += ok
        assert reasons[0] == ("the challenger meets the promotion rule" if ok else
                              "the challenger does not meet the promotion rule; the champion stays")
    assert promoted >= promoted_at_least and 10 - promoted >= refused_at_least


def test_a_worse_challenger_is_refused_at_the_test_level_whatever_the_number_of_lots():
    """At the margin's edge (ratio exactly 1 + margin) the promotion rate is the test's level alpha = 0.05
    (Monte Carlo, 4000 trials: 3 binomial SE = 0.010); far below it for a 30 % worse challenger."""
    at_edge = power(20, 1 + MARGIN, margin=MARGIN, trials=4000, seed=1)
    assert abs(at_edge - 0.05) < 3 * np.sqrt(0.05 * 0.95 / 4000) + 0.01  # + 0.01: t on non-normal d
    assert power(10, 1.3, margin=MARGIN, trials=2000, seed=2) < 0.05


def test_too_few_new_lots_cannot_pass():
    a, b = _errors(0, 0.5, n=MIN_NEW_LOTS - 1)
    ok, reasons = decide([_comparison(paired_noninferiority(a, b, margin=MARGIN))])
    assert not ok and "are needed to judge the challenger" in reasons[1]


def test_every_attribute_must_pass():
    good = paired_noninferiority(*_errors(0, 0.7), margin=MARGIN)
    bad = paired_noninferiority(*_errors(0, 1.3), margin=MARGIN)
    assert good["passed"] and not bad["passed"]
    ok, reasons = decide([_comparison(good), _comparison(bad, "weight_rsd_pct")])
    assert not ok and "passes" in reasons[1] and "NOT SHOWN" in reasons[2]
