"""Conformal rank rules against references.md §9, and coverage by simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

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


# ---------------------------------------------------------------------------
# CV+ without the (n × m) matrix (issue 8): the fold-by-fold selection must
# return the very float the direct selection returns
# ---------------------------------------------------------------------------
def _direct_plus_bounds(centres, residuals, alpha):
    """The CV+ / jackknife+ ends by their definition (Barber et al. 2021, rank
    rule): the ⌊α(n + 1)⌋-th smallest of centres − |R| and the
    ⌈(1 − α)(n + 1)⌉-th smallest of centres + |R| over the n rows of the
    (n, m) matrix, read off a full sort (±inf where a rank falls outside 1..n).
    Independent of conformal.py's selection by np.partition."""
    n = residuals.size
    r = np.abs(residuals)[:, None]
    lo_k, hi_k = lower_rank(n, alpha), upper_rank(n, alpha)
    low = np.sort(centres - r, axis=0)[lo_k - 1] if lo_k >= 1 else np.full(centres.shape[1], -np.inf)
    high = np.sort(centres + r, axis=0)[hi_k - 1] if hi_k <= n else np.full(centres.shape[1], np.inf)
    return low, high


def _same_floats(a, b):
    """Bit for bit (so +0.0 and −0.0 differ, and so would two NaNs)."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return a.shape == b.shape and np.array_equal(a.view(np.int64), b.view(np.int64))


_ALPHAS = st.sampled_from([0.01, 0.05, 0.1, 0.2, 0.25, 1 / 3, 0.5, 0.9]) | st.floats(0.001, 0.999)
# values from a few-element set (ties within and across folds, exact zeros, μ̂ = R) or general floats;
# predictions never −0.0 (see _grouped_plus_bounds: there the sign of a zero end is the direct
# selection's own arbitrary choice among tied zeros)
_TIED = st.sampled_from([0.0, 0.5, 1.0, -1.0, 2.0, 0.1, 0.3])
_WIDE = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)


@st.composite
def _cv_plus_inputs(draw):
    k = draw(st.integers(1, 6))
    n = draw(st.integers(1, 60))
    m = draw(st.integers(1, 5))
    values = draw(st.sampled_from([_TIED, _WIDE, _TIED | _WIDE]))
    rows = np.array(draw(st.lists(values, min_size=k * m, max_size=k * m)), dtype=float).reshape(k, m) + 0.0
    residuals = np.array(draw(st.lists(values, min_size=n, max_size=n)), dtype=float)
    index = np.array(draw(st.lists(st.integers(0, k - 1), min_size=n, max_size=n)), dtype=int)
    # the search's settings: as shipped, or tight (first guess of ±0-1 ranks, windows narrowed to 0-2
    # distinct residuals, at most 4 taken), so that small n also runs the narrowing and the fallback
    tuning = draw(st.sampled_from([(8, 24, 96), (1, 2, 4), (0, 0, 4), (1, 1, 1)]))
    return rows, index, residuals, draw(_ALPHAS), tuning


@settings(max_examples=200, deadline=None, derandomize=True)
@given(_cv_plus_inputs())
def test_fold_by_fold_cv_plus_selects_the_same_float_as_the_direct_selection(inputs):
    """The k-th smallest of the union of K shifted sorted groups equals the
    k-th smallest of the (n × m) matrix, bit for bit, including ties, exact
    zeros, and small n where a rank runs out (±inf)."""
    from linkage.models import conformal

    rows, index, residuals, alpha, tuning = inputs
    shipped = conformal._FIRST_RANKS, conformal._WINDOW_GOAL, conformal._WINDOW_MAX
    conformal._FIRST_RANKS, conformal._WINDOW_GOAL, conformal._WINDOW_MAX = tuning
    try:
        got = conformal._grouped_plus_bounds(rows, index, residuals, alpha)
    finally:
        conformal._FIRST_RANKS, conformal._WINDOW_GOAL, conformal._WINDOW_MAX = shipped
    want = _direct_plus_bounds(rows[index], residuals, alpha)
    assert _same_floats(got[0], want[0]) and _same_floats(got[1], want[1])


def test_fold_by_fold_cv_plus_with_too_few_lots_is_unbounded():
    """n = 5 at 90 %: ⌈0.9·6⌉ = 6 > 5 and ⌊0.1·6⌋ = 0 (Barber et al. 2021
    rank rule; references.md §9): both ends infinite; at 50 % both finite."""
    from linkage.models.conformal import _grouped_plus_bounds

    rows = np.array([[1.0, 2.0], [1.5, 2.5]])
    index, r = np.array([0, 1, 0, 1, 1]), np.array([0.3, -0.2, 0.2, 0.3, 0.1])
    low, high = _grouped_plus_bounds(rows, index, r, 0.1)
    assert np.all(low == -np.inf) and np.all(high == np.inf)
    got, want = _grouped_plus_bounds(rows, index, r, 0.5), _direct_plus_bounds(rows[index], r, 0.5)
    assert np.all(np.isfinite(got[0])) and _same_floats(got[0], want[0]) and _same_floats(got[1], want[1])


def test_fold_by_fold_cv_plus_falls_back_where_rounding_merges_values():
    """Fold predictions near 1e16 swallow residuals of 0.001..0.4 (one unit
    in the last place of 1e16 is 2, so μ̂ ± R rounds to μ̂): the windows cannot
    be narrowed to a few distinct residuals, those points go to the direct
    selection (some of them: a window may also end inside a block of equal
    floats, which the check allows), and the result is still the direct
    selection's; the points near 10 are all settled fold by fold."""
    from linkage.models.conformal import _Groups, _grouped_plus_bounds

    rng = np.random.default_rng(3)
    n, m = 400, 40
    residuals = rng.permutation(np.arange(1, n + 1) * 1e-3)
    index = np.arange(n) % 5
    rows = np.where(np.arange(m) % 2 == 0, 1e16, 10.0)[None, :] + rng.normal(0, 1, (5, m))
    k = np.full(m, upper_rank(n, 0.1))
    settled = ~np.isnan(_Groups(index, np.abs(residuals), 5).kth(rows, k))
    assert not settled[0::2].all() and settled[1::2].all()
    got, want = _grouped_plus_bounds(rows, index, residuals, 0.1), _direct_plus_bounds(rows[index], residuals, 0.1)
    assert _same_floats(got[0], want[0]) and _same_floats(got[1], want[1])


@pytest.mark.parametrize("tie_step", [0.0, 0.05])
def test_cv_plus_interval_at_training_size_equals_the_direct_selection(tie_step, monkeypatch):
    """cv_plus_interval at a size that takes the fold-by-fold path (2,000
    calibration lots in 5 folds, 300 points; residuals rounded to 0.05 for
    many ties, or not) gives the direct selection's floats at α = 0.1 and
    0.05."""
    from linkage.models import conformal

    calls = []
    grouped = conformal._grouped_plus_bounds
    monkeypatch.setattr(conformal, "_grouped_plus_bounds", lambda *a: calls.append(1) or grouped(*a))
    rng = np.random.default_rng(11)
    n, m = 2000, 300
    x = rng.uniform(0, 1, m)
    preds = np.vstack([2 + 3 * x + rng.normal(0, 0.05, m) for _ in range(5)])
    fold = rng.permutation(np.arange(n) % 5)
    residuals = rng.standard_t(5, n)
    if tie_step:
        residuals = np.round(residuals / tie_step) * tie_step
    for alpha in (0.1, 0.05):
        got = cv_plus_interval(preds, fold, residuals, alpha)
        want = _direct_plus_bounds(preds[fold], residuals, alpha)
        assert _same_floats(got[0], want[0]) and _same_floats(got[1], want[1])
    assert len(calls) == 2


def test_fold_by_fold_cv_plus_leaves_non_finite_input_to_the_direct_selection():
    """A NaN prediction or an infinite residual: the same result as the direct
    selection (np.partition sorts NaN last), not a silently different one."""
    from linkage.models.conformal import _grouped_plus_bounds

    rows = np.array([[1.0, np.nan, 3.0], [1.5, 2.5, 3.5]])
    index, r = np.array([0, 1, 0, 1, 0, 1, 1, 0, 1, 0]), np.linspace(-1, 1, 10)
    for resid in (r, np.where(np.arange(10) == 3, np.inf, r)):
        got, want = _grouped_plus_bounds(rows, index, resid, 0.2), _direct_plus_bounds(rows[index], resid, 0.2)
        np.testing.assert_array_equal(got[0], want[0])
        np.testing.assert_array_equal(got[1], want[1])
