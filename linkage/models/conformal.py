"""Conformal prediction intervals with lots as the exchangeable unit.

Rank rules (Lei, G'Sell, Rinaldo, Tibshirani & Wasserman 2018, JASA 113:1094;
Barber, Candès, Ramdas & Tibshirani 2021, "Predictive inference with the
jackknife+", Ann. Statist. 49(1):486-507, doi:10.1214/20-AOS1965):

* split conformal: with calibration residuals R_1..R_n, q̂ is the k-th
  smallest R with k = ⌈(1 − α)(n + 1)⌉; q̂ = ∞ when k > n.
* jackknife+ / CV+: the lower end is the ⌊α(n + 1)⌋-th smallest of
  μ̂₋ᵢ(x) − Rᵢ (−∞ when that rank is below 1), the upper end the
  ⌈(1 − α)(n + 1)⌉-th smallest of μ̂₋ᵢ(x) + Rᵢ (+∞ when that rank exceeds n).
  For CV+, μ̂₋ᵢ is the model fitted without the fold that holds lot i and Rᵢ
  its out-of-fold residual.

An unbounded end is returned as ±inf on purpose: with too few lots for the
level asked, no finite interval carries the guarantee.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "upper_rank",
    "lower_rank",
    "split_conformal_quantile",
    "jackknife_plus_interval",
    "cv_plus_interval",
    "cv_plus_slack",
]

_EPS = 1e-9  # guards ⌈·⌉ and ⌊·⌋ against binary round-off, e.g. 0.9 * 20


def _check_alpha(alpha: float) -> float:
    alpha = float(alpha)
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must lie strictly between 0 and 1; got {alpha}")
    return alpha


def upper_rank(n: int, alpha: float) -> int:
    """k = ⌈(1 − α)(n + 1)⌉ (may exceed n: the interval is then unbounded)."""
    alpha = _check_alpha(alpha)
    return int(math.ceil((1 - alpha) * (n + 1) - _EPS))


def lower_rank(n: int, alpha: float) -> int:
    """⌊α(n + 1)⌋ (may be 0: the lower end is then −∞)."""
    alpha = _check_alpha(alpha)
    return int(math.floor(alpha * (n + 1) + _EPS))


def split_conformal_quantile(residuals, alpha: float) -> float:
    """q̂ of split conformal: the ⌈(1 − α)(n + 1)⌉-th smallest absolute
    residual, ``inf`` when that rank exceeds n."""
    r = np.sort(np.abs(np.asarray(residuals, dtype=float)))
    k = upper_rank(r.size, alpha)
    return float("inf") if k > r.size else float(r[k - 1])


def _plus_bounds(centres: np.ndarray, residuals: np.ndarray, alpha: float):
    """centres: (n, m) leave-out predictions for m new points; residuals (n,)."""
    n = residuals.size
    lo_k, hi_k = lower_rank(n, alpha), upper_rank(n, alpha)
    r = np.abs(residuals)[:, None]
    if lo_k < 1:
        low = np.full(centres.shape[1], -np.inf)
    else:
        low = np.partition(centres - r, lo_k - 1, axis=0)[lo_k - 1]
    if hi_k > n:
        high = np.full(centres.shape[1], np.inf)
    else:
        high = np.partition(centres + r, hi_k - 1, axis=0)[hi_k - 1]
    return low, high


def jackknife_plus_interval(loo_predictions, loo_residuals, alpha: float) -> tuple[float, float]:
    """Jackknife+ interval for one new point.

    Parameters
    ----------
    loo_predictions : (n,) μ̂₋ᵢ(x), the prediction at x of the model fitted
        without lot i.
    loo_residuals : (n,) leave-one-out residuals Rᵢ = |yᵢ − μ̂₋ᵢ(xᵢ)|.
    alpha : miscoverage level.
    """
    c = np.asarray(loo_predictions, dtype=float).reshape(-1, 1)
    r = np.asarray(loo_residuals, dtype=float).ravel()
    if c.shape[0] != r.size:
        raise ValueError("loo_predictions and loo_residuals must have the same length")
    low, high = _plus_bounds(c, r, _check_alpha(alpha))
    return float(low[0]), float(high[0])


def cv_plus_interval(fold_predictions, fold_of, residuals, alpha: float):
    """CV+ intervals for m new points.

    Parameters
    ----------
    fold_predictions : (K, m) predictions of the K fold models (each fitted
        without its fold) at the new points.
    fold_of : (n,) fold index of each calibration lot.
    residuals : (n,) out-of-fold residuals of the calibration lots.
    alpha : miscoverage level.

    Returns
    -------
    (low, high) arrays of shape (m,); ±inf where the rank rule runs out.
    """
    preds = np.atleast_2d(np.asarray(fold_predictions, dtype=float))
    fold_of = np.asarray(fold_of, dtype=int)
    r = np.asarray(residuals, dtype=float).ravel()
    if fold_of.size != r.size:
        raise ValueError("fold_of and residuals must have the same length")
    centres = preds[fold_of]  # (n, m): μ̂ without lot i's fold, at each new point
    return _plus_bounds(centres, r, _check_alpha(alpha))


def cv_plus_slack(n: int, n_folds: int) -> float:
    """Extra miscoverage allowed for K-fold CV+ beyond 2α:
    min{2(1 − 1/K)/(n/K + 1), (1 − K/n)/(K + 1)} (Barber et al. 2021,
    Theorem 4; recalled from memory, see references.md §9). The guarantee is
    coverage ≥ 1 − 2α − slack; leave-one-out (K = n) has slack 0."""
    k = float(n_folds)
    return float(min(2 * (1 - 1 / k) / (n / k + 1), (1 - k / n) / (k + 1)))
