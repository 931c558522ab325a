"""Grouped cross-validation: no lot on both sides of any split; metrics; the one-SE rule."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import mean_absolute_error, mean_squared_error, r2_score

from linkage.exceptions import InsufficientDataError
from linkage.models.cv import fold_assignment, inner_splits, metrics, outer_splits, select_candidate

lot_lists = st.lists(st.integers(min_value=0, max_value=60).map(lambda i: f"LOT-{i:02d}"), min_size=2,
                     max_size=120).filter(lambda v: len(set(v)) >= 2)


@settings(max_examples=60, deadline=None)
@given(lots=lot_lists, seed=st.integers(0, 2**31 - 1))
def test_no_split_shares_a_lot(lots, seed):
    """Outer and inner splits never put one lot (replicate rows included) on both sides."""
    lots = np.array(lots, dtype=object)
    splits, scheme = outer_splits(lots, seed)
    seen = np.zeros(len(lots), dtype=int)
    for train, test in splits:
        assert not set(lots[train]) & set(lots[test])
        assert len(test) > 0
        seen[test] += 1
        if len(set(lots[train])) >= 2:
            for itr, ite in inner_splits(lots[train]):
                assert not set(lots[train][itr]) & set(lots[train][ite])
    assert np.all(seen == 1)  # every row is held out exactly once
    n = len(set(lots))
    if n <= 30:
        assert scheme == "leave-one-lot-out" and len(splits) == n
    else:
        assert scheme == "grouped 10-fold" and len(splits) == 10


@settings(max_examples=30, deadline=None)
@given(lots=lot_lists, seed=st.integers(0, 1000), perm_seed=st.integers(0, 1000))
def test_folds_are_seeded_and_independent_of_row_order(lots, seed, perm_seed):
    a, scheme_a = fold_assignment(lots, seed)
    shuffled = list(np.random.default_rng(perm_seed).permutation(np.array(lots, dtype=object)))
    b, scheme_b = fold_assignment(shuffled, seed)
    assert a == b and scheme_a == scheme_b


def test_grouped_kfold_above_the_loo_limit_balances_folds():
    lots = [f"L{i}" for i in range(48)]
    folds, scheme = fold_assignment(lots, seed=7)
    assert scheme == "grouped 10-fold"
    sizes = np.bincount(list(folds.values()))
    assert sizes.min() >= 4 and sizes.max() <= 5
    assert fold_assignment(lots, seed=8)[0] != folds  # the seed matters


def test_one_lot_is_refused():
    with pytest.raises(InsufficientDataError, match="at least 2 distinct groups"):
        outer_splits(["A", "A", "A"], seed=0)
    with pytest.raises(InsufficientDataError):
        inner_splits(["A", "A"])


def test_metrics_match_scikit_learn():
    """RMSE, MAE and Q² against scikit-learn's metrics (Q² = 1 − PRESS/SS is r2_score
    of the out-of-fold predictions)."""
    rng = np.random.default_rng(0)
    y = rng.normal(10, 2, 40)
    p = y + rng.normal(0.3, 1.0, 40)
    m = metrics(y, p)
    assert m["rmse"] == pytest.approx(np.sqrt(mean_squared_error(y, p)), rel=1e-12)
    assert m["mae"] == pytest.approx(mean_absolute_error(y, p), rel=1e-12)
    assert m["q2"] == pytest.approx(r2_score(y, p), rel=1e-12)
    assert m["bias"] == pytest.approx(np.mean(p - y), rel=1e-12)
    # delta method: se(RMSE) = sd(e²)/(2·RMSE·√n)
    e2 = (p - y) ** 2
    assert m["rmse_se"] == pytest.approx(np.std(e2, ddof=1) / np.sqrt(40) / (2 * m["rmse"]), rel=1e-12)


def test_q2_undefined_for_constant_observations():
    m = metrics([5.0, 5.0, 5.0], [5.0, 5.1, 4.9])
    assert m["q2"] is None and m["rmse"] > 0


def test_one_se_rule_prefers_the_simpler_candidate():
    results = {
        "mean": {"rmse": 3.0, "rmse_se": 0.3},
        "pls": {"rmse": 1.05, "rmse_se": 0.1},
        "boosting": {"rmse": 1.00, "rmse_se": 0.1},
    }
    selected, details = select_candidate(results)
    assert details["best"] == "boosting"
    assert selected == "pls"  # 1.05 <= 1.00 + 0.10
    results["pls"]["rmse"] = 1.2
    assert select_candidate(results)[0] == "boosting"
    assert "one-standard-error" in details["rule"]
