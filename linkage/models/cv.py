"""Grouped cross-validation by lot, the error metrics, and the one-standard-error
selection rule.

Every split here is made over *lots*, never over rows: a lot's replicates (if a
table ever carries several rows per lot) always fall on the same side of a
split. The outer loop is leave-one-lot-out for small data sets and a seeded
grouped k-fold above that; the inner loop (hyperparameters) is a grouped k-fold
inside each outer training set.
"""

from __future__ import annotations

import math

import numpy as np

from linkage.exceptions import InsufficientDataError

__all__ = [
    "SIMPLICITY_ORDER",
    "INNER_SPLITS",
    "outer_splits",
    "fold_assignment",
    "inner_splits",
    "metrics",
    "select_candidate",
    "SELECTION_RULE",
]

#: Candidates from the simplest to the most flexible; the one-SE rule prefers
#: the earliest candidate within one standard error of the best.
SIMPLICITY_ORDER: tuple[str, ...] = ("mean", "rd_baseline", "johanson_baseline", "log_linear", "weibull_release",
                                     "linear_select", "pls", "quadratic_ridge", "boosting")

#: Number of inner grouped folds (fewer when the training set has fewer lots).
INNER_SPLITS = 5

SELECTION_RULE = (
    "lowest outer cross-validated RMSE; the simplest candidate (order: {order}) whose RMSE is "
    "within one standard error of the lowest is preferred (one-standard-error rule: Breiman, "
    "Friedman, Olshen & Stone 1984, Classification and Regression Trees, §3.4.3; Hastie, "
    "Tibshirani & Friedman 2009, The Elements of Statistical Learning, §7.10). The standard "
    "error of the RMSE is the delta-method value from the per-lot squared errors: "
    "sd(e²)/(2·RMSE·√n)."
)


def _as_lots(lots) -> np.ndarray:
    lots = np.asarray([str(v) for v in lots], dtype=object)
    return lots


def fold_assignment(lots, seed: int, max_loo: int = 30, n_splits: int = 10) -> tuple[dict[str, int], str]:
    """Seeded fold of every lot for the outer loop, and the scheme's name.

    Leave-one-lot-out when there are at most ``max_loo`` distinct lots, a
    grouped ``n_splits``-fold otherwise. The lots are sorted, permuted with
    ``numpy.random.default_rng(seed)`` and dealt round-robin into folds, so the
    same lots and seed always give the same folds whatever the row order.

    Raises
    ------
    InsufficientDataError
        With fewer than two distinct lots (nothing to hold out).
    """
    unique = sorted(set(_as_lots(lots)))
    n = len(unique)
    if n < 2:
        raise InsufficientDataError(
            f"cross-validation grouped by lot (or by the --group-by column) needs at least 2 distinct groups; "
            f"got {n}"
        )
    if n_splits < 2:
        raise ValueError(f"n_splits must be at least 2; got {n_splits}")
    rng = np.random.default_rng(seed)
    order = rng.permutation(n)
    if n <= max_loo:
        k = n
        scheme = "leave-one-lot-out"
    else:
        k = min(n_splits, n)
        scheme = f"grouped {k}-fold"
    fold = np.empty(n, dtype=int)
    fold[order] = np.arange(n) % k
    return {lot: int(f) for lot, f in zip(unique, fold)}, scheme


def outer_splits(lots, seed: int, max_loo: int = 30, n_splits: int = 10):
    """Outer cross-validation splits grouped by lot.

    Parameters
    ----------
    lots : sequence of lot identifiers, one per row (repeats allowed; rows of
        the same lot always stay together).
    seed : int
        Seed of the fold permutation.
    max_loo : int
        Largest number of distinct lots for leave-one-lot-out.
    n_splits : int
        Number of grouped folds above ``max_loo`` lots.

    Returns
    -------
    (splits, scheme)
        ``splits`` is a list of ``(train_idx, test_idx)`` integer arrays into
        ``lots``, one per fold in fold order; ``scheme`` names the scheme
        ("leave-one-lot-out" or "grouped 10-fold").
    """
    row_lots = _as_lots(lots)
    folds, scheme = fold_assignment(row_lots, seed, max_loo=max_loo, n_splits=n_splits)
    fold_of_row = np.array([folds[v] for v in row_lots], dtype=int)
    k = max(folds.values()) + 1
    splits = [(np.flatnonzero(fold_of_row != f), np.flatnonzero(fold_of_row == f)) for f in range(k)]
    return splits, scheme


def inner_splits(groups, n_splits: int = INNER_SPLITS):
    """Grouped inner folds (scikit-learn ``GroupKFold``, no shuffling, so
    deterministic) with ``min(n_splits, distinct groups)`` folds.

    Raises
    ------
    InsufficientDataError
        With fewer than two distinct groups.
    """
    from sklearn.model_selection import GroupKFold

    groups = _as_lots(groups)
    n_groups = len(set(groups))
    if n_groups < 2:
        raise InsufficientDataError(f"an inner cross-validation needs at least 2 distinct groups (lots, or the "
                                    f"--group-by column's values) among the lots of an outer fold; got {n_groups}")
    cv = GroupKFold(n_splits=min(n_splits, n_groups))
    dummy = np.zeros((len(groups), 1))
    return [(np.asarray(tr), np.asarray(te)) for tr, te in cv.split(dummy, groups=groups)]


def metrics(observed, predicted) -> dict[str, float | None]:
    """Cross-validated error metrics of out-of-fold predictions.

    Returns
    -------
    dict
        ``rmse`` root mean squared error; ``mae`` mean absolute error;
        ``q2`` = 1 − PRESS / Σ(y − ȳ)², with ȳ the mean of all observed lots
        (cross-validated R², Wold 1978; ``None`` when the observed values have
        no variance, where it is undefined); ``bias`` = mean(predicted −
        observed), positive when the model over-predicts; ``rmse_se`` the
        delta-method standard error of the RMSE, sd(e²) / (2·RMSE·√n)
        (``0.0`` when the RMSE is 0).
    """
    y = np.asarray(observed, dtype=float)
    p = np.asarray(predicted, dtype=float)
    if y.shape != p.shape or y.ndim != 1 or y.size == 0:
        raise ValueError("observed and predicted must be 1-D arrays of the same, non-zero length")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(p))):
        raise ValueError("metrics need finite observed and predicted values")
    e = p - y
    n = y.size
    mse = float(np.mean(e**2))
    rmse = math.sqrt(mse)
    ss = float(np.sum((y - y.mean()) ** 2))
    q2 = None if ss <= 1e-12 * max(1.0, float(np.sum(y**2))) else 1.0 - float(np.sum(e**2)) / ss
    if rmse > 0 and n > 1:
        se_mse = float(np.std(e**2, ddof=1)) / math.sqrt(n)
        rmse_se = se_mse / (2.0 * rmse)  # delta method: d sqrt(m)/dm = 1/(2 sqrt(m))
    else:
        rmse_se = 0.0
    return {
        "rmse": rmse,
        "mae": float(np.mean(np.abs(e))),
        "q2": q2,
        "bias": float(np.mean(e)),
        "rmse_se": rmse_se,
    }


def select_candidate(results: dict[str, dict], order: tuple[str, ...] = SIMPLICITY_ORDER):
    """The one-standard-error rule.

    Parameters
    ----------
    results : candidate name -> dict with at least ``rmse`` and ``rmse_se``.
    order : simplicity order, simplest first; names not in it rank last in
        the order given.

    Returns
    -------
    (selected, details)
        ``details`` holds ``best`` (lowest RMSE), ``best_rmse``,
        ``threshold`` (best RMSE + its SE), ``order`` and ``rule`` (text).
    """
    if not results:
        raise InsufficientDataError("no candidate could be evaluated")
    rank = {name: i for i, name in enumerate(order)}
    names = sorted(results, key=lambda n: (rank.get(n, len(order)), n))
    best = min(names, key=lambda n: (results[n]["rmse"], rank.get(n, len(order))))
    threshold = results[best]["rmse"] + results[best]["rmse_se"]
    selected = next(n for n in names if results[n]["rmse"] <= threshold + 1e-12 * max(1.0, threshold))
    details = {
        "best": best,
        "best_rmse": results[best]["rmse"],
        "threshold": threshold,
        "order": names,
        "rule": SELECTION_RULE.format(order=" < ".join(names)),
    }
    return selected, details
