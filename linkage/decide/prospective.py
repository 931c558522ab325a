"""Promotion on prospective evidence: the champion and the challenger on the
lots that arrived after the champion was trained, paired lot by lot.

For each attribute and each new lot *i* with a measured value:

* the champion's error ``a_i`` is its fitted model's prediction (from the
  lot's measured stage inputs) minus what the lot measured; the champion never
  saw the lot;
* the challenger's error ``b_i`` is its **out-of-fold** prediction for the
  lot, from the fold model of its grouped cross-validation that left the lot
  out, minus what the lot measured.

The rule is a paired one-sided non-inferiority test on the squared-error
loss differential with margin ``m`` (the ``--tolerance``)::

    d_i = b_i² − (1 + m)²·a_i²
    H0: E[d] ≥ 0  (the challenger's RMSE is at least (1 + m) times the champion's)
    H1: E[d] < 0  (it is less: the challenger is not worse beyond the margin)

with the Diebold–Mariano statistic (Diebold & Mariano 1995, J. Business &
Economic Statistics 13:253–263) for one-step errors (no autocorrelation
lags) and its small-sample form (Harvey, Leybourne & Newbold 1997,
Int. J. Forecasting 13:281–291): ``t = mean(d) / (sd(d)/√n)`` against
Student's t with n − 1 degrees of freedom, which for one-step errors is the
one-sample t statistic of ``d``. The challenger passes the attribute when the
one-sided p-value is below ``alpha`` (5 %). The challenger is promoted only
when it passes every attribute the champion has (an intersection–union test,
level alpha without adjustment: Berger 1982, Technometrics 24:295–300, from
memory). A 30 % worse challenger is refused with probability at least
1 − alpha whatever the number of new lots; a better one needs lots to be
shown non-inferior (see :func:`power`).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["MIN_NEW_LOTS", "ALPHA", "TEST", "paired_noninferiority", "prospective_pairs", "power"]

#: fewest new lots with a measured value for an attribute to be judged (common practice, no source)
MIN_NEW_LOTS = 5

#: one-sided level of the non-inferiority test
ALPHA = 0.05

TEST = ("paired one-sided non-inferiority test on the new lots' squared errors: d = e_challenger² − "
        "(1 + margin)²·e_champion², H0 E[d] ≥ 0, promote the attribute when the one-sided p-value < {alpha:g}; "
        "Diebold–Mariano statistic for one-step errors with the small-sample correction of Harvey, Leybourne & "
        "Newbold 1997 (Student t, n − 1 df; Diebold & Mariano 1995, J. Bus. Econ. Stat. 13:253–263); the "
        "champion's errors from its fitted models, the challenger's from its grouped-CV folds that left each "
        "lot out; every attribute must pass (intersection–union test, Berger 1982)")


def paired_noninferiority(champion_errors, challenger_errors, *, margin: float, alpha: float = ALPHA) -> dict:
    """The test of the module docstring on paired errors (same lots, same order).

    Returns a dict: ``n``, ``champion_rmse``, ``challenger_rmse``,
    ``rmse_ratio`` (challenger / champion; None when the champion's RMSE is
    0), ``margin``, ``alpha``, ``mean_difference`` (mean of d), ``statistic``
    (t), ``df``, ``p_value`` (one-sided, P(T ≤ t)) and ``passed``.
    """
    from scipy import stats

    a = np.asarray(champion_errors, float)
    b = np.asarray(challenger_errors, float)
    if a.shape != b.shape or a.ndim != 1:
        raise ValueError("champion and challenger errors must be 1-D arrays of the same length (paired lots)")
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        raise ValueError("the paired errors must be finite")
    if not 0 <= margin < 1:
        raise ValueError(f"the margin must lie in [0, 1); got {margin}")
    n = a.size
    d = b**2 - (1 + margin) ** 2 * a**2
    r_a = math.sqrt(float(np.mean(a**2))) if n else None
    r_b = math.sqrt(float(np.mean(b**2))) if n else None
    out = {"n": int(n), "champion_rmse": r_a, "challenger_rmse": r_b,
           "rmse_ratio": (r_b / r_a) if n and r_a > 0 else None, "margin": float(margin), "alpha": float(alpha),
           "mean_difference": float(np.mean(d)) if n else None, "statistic": None, "df": max(n - 1, 0),
           "p_value": None, "passed": False}
    if n < 2:
        return out
    mean = float(np.mean(d))
    sd = float(np.std(d, ddof=1))
    if sd <= 1e-15 * max(1.0, abs(mean)):  # every difference the same: the sign decides
        out.update(statistic=-math.inf if mean < 0 else math.inf, p_value=0.0 if mean < 0 else 1.0)
    else:
        t = mean / (sd / math.sqrt(n))  # Harvey, Leybourne & Newbold 1997 with h = 1: the one-sample t
        out.update(statistic=t, p_value=float(stats.t.cdf(t, n - 1)))
    out["passed"] = bool(out["p_value"] < alpha)
    return out


def prospective_pairs(champion, challenger, table, attribute: str):
    """(lots, champion errors, challenger errors) on the lots the champion
    never saw that have a measured ``attribute``, the champion's prediction
    from their measured stage inputs and the challenger's out-of-fold
    prediction of its selected model."""
    old, new = champion.targets[attribute], challenger.targets[attribute]
    seen = set(champion.training["lots"])
    rows = table[~table["lot"].astype(str).isin(seen)].dropna(subset=[attribute, *old.inputs])
    oof = new.oof[new.selected]
    rows = rows[rows["lot"].astype(str).isin(set(oof.index))]
    if rows.empty:
        return [], np.empty(0), np.empty(0)
    lots = rows["lot"].astype(str).tolist()
    y = rows[attribute].to_numpy(float)
    a = np.asarray(old.predict(rows[old.inputs]), float) - y
    b = oof.loc[lots].to_numpy(float) - y
    return lots, a, b


def power(n: int, ratio: float, *, margin: float, alpha: float = ALPHA, shared: float = 0.5,
          trials: int = 2000, seed: int = 0) -> float:
    """Monte Carlo probability that the test promotes a challenger whose RMSE
    is ``ratio`` times the champion's, on ``n`` new lots, when errors are
    normal and a fraction ``shared`` of the champion's error variance is
    measurement noise common to both (seeded)."""
    rng = np.random.default_rng(seed)
    s2 = float(shared)
    if not 0 <= s2 <= min(1.0, ratio**2):
        raise ValueError("shared must lie in [0, min(1, ratio²)]")
    hits = 0
    for _ in range(trials):
        eps = rng.normal(0, math.sqrt(s2), n)
        a = eps + rng.normal(0, math.sqrt(1 - s2), n)
        b = eps + rng.normal(0, math.sqrt(ratio**2 - s2), n)
        hits += paired_noninferiority(a, b, margin=margin, alpha=alpha)["passed"]
    return hits / trials
