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
    "SPREAD_TEST_LEVEL",
    "spread_trend_test",
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

    Notes
    -----
    The ends are the order statistics of Barber et al. (2021), §3 (CV+):
    the ⌊α(n + 1)⌋-th smallest of μ̂₋ₖ₍ᵢ₎(x) − Rᵢ and the ⌈(1 − α)(n + 1)⌉-th
    smallest of μ̂₋ₖ₍ᵢ₎(x) + Rᵢ. With many lots and points they are found by
    :func:`_grouped_plus_bounds`, which uses that μ̂₋ₖ₍ᵢ₎(x) takes only K
    values per point; the selected element is the same float as the direct
    (n × m) selection gives.
    """
    preds = np.atleast_2d(np.asarray(fold_predictions, dtype=float))
    fold_of = np.asarray(fold_of, dtype=int)
    r = np.asarray(residuals, dtype=float).ravel()
    if fold_of.size != r.size:
        raise ValueError("fold_of and residuals must have the same length")
    alpha = _check_alpha(alpha)
    m = preds.shape[-1]
    if fold_of.ndim == 1 and preds.ndim == 2 and m >= _GROUPED_MIN_POINTS and r.size * m >= _GROUPED_MIN_CELLS:
        folds, index = np.unique(fold_of, return_inverse=True)
        if folds.size <= _GROUPED_MAX_FOLDS:
            rows = preds[folds]  # (K, m); an index out of range raises as preds[fold_of] would
            return _grouped_plus_bounds(rows, index.ravel(), r, alpha)
    centres = preds[fold_of]  # (n, m): μ̂ without lot i's fold, at each new point
    return _plus_bounds(centres, r, alpha)


# ---------------------------------------------------------------------------
# CV+ without the (n × m) matrix
# ---------------------------------------------------------------------------
#: n·m and m from which cv_plus_interval selects fold by fold (below them the
#: direct selection is as fast; both give the same floats)
_GROUPED_MIN_CELLS = 50_000
_GROUPED_MIN_POINTS = 32
#: most folds for the fold-by-fold selection (leave-one-out goes direct)
_GROUPED_MAX_FOLDS = 64
#: ranks either side of k in the first window; narrowing steps at most; the
#: distinct residuals (all folds) a window is narrowed to, and the most it may
#: hold when the element is taken from it (a point beyond is selected directly)
_FIRST_RANKS = 8
_NARROW_STEPS = 60
_WINDOW_GOAL = 24
_WINDOW_MAX = 96


def _grouped_plus_bounds(rows: np.ndarray, index: np.ndarray, residuals: np.ndarray, alpha: float):
    """The CV+ ends of :func:`_plus_bounds` for ``centres = rows[index]``.

    rows : (K, m) predictions of the K fold models at the m new points;
    index : (n,) fold (row of ``rows``) of each calibration lot, 0..K-1;
    residuals : (n,) out-of-fold residuals.

    At a new point x the n values μ̂₋ₖ₍ᵢ₎(x) + Rᵢ fall into K groups, each
    one fold model's prediction shifted by that fold's residuals, and a
    group sorted by |R| is sorted by value, since rounded floating-point
    addition is monotone. The k-th smallest of the union of K sorted groups
    is found for every point at once with ``np.searchsorted`` counts per
    fold (a first guess from the pooled residuals, then interpolation and
    bisection on the value), O(K log n) per point and step instead of O(n); equal
    residuals within a fold count as one value with its multiplicity. The
    lower end is the same search on −μ̂: the ⌊α(n + 1)⌋-th smallest of
    μ̂ − R is minus the (n + 1 − ⌊α(n + 1)⌋)-th smallest of −μ̂ + R (rounding
    to nearest is symmetric), with an exact zero given the sign μ̂ − R has.

    Exactness: the search only proposes, per point and fold, a window of
    residuals. The element is taken from the windows only after a check on
    the actual floats that every element left of the windows is ≤ every
    element right of their left edges, every element up to their right
    edges ≤ every element right of them, and that rank k falls inside
    them. Then the k-th smallest of all n is the matching element of the
    windows: the same float the direct selection returns (a zero may differ
    in sign only if a fold prediction is exactly −0.0, where the direct
    selection's own choice among tied zeros decides). A point whose check
    fails, or whose window stays wide, is selected directly as in
    :func:`_plus_bounds`.
    """
    n = residuals.size
    m = rows.shape[1]
    lo_k, hi_k = lower_rank(n, alpha), upper_rank(n, alpha)
    low = np.full(m, -np.inf)
    high = np.full(m, np.inf)
    if n == 0 or m == 0 or (lo_k < 1 and hi_k > n):
        return low, high
    r = np.abs(residuals)
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(rows))):
        return _plus_bounds(rows[index], residuals, alpha)
    parts, ks = [], []
    if lo_k >= 1:
        parts.append(-rows)
        ks.append(np.full(m, n + 1 - lo_k))
    if hi_k <= n:
        parts.append(rows)
        ks.append(np.full(m, hi_k))
    found = _Groups(index, r, rows.shape[0]).kth(np.hstack(parts), np.concatenate(ks))
    if lo_k >= 1:
        low = -found[:m]
        low[low == 0] = 0.0  # μ̂ − R = 0 exactly is +0 (μ̂ = −0 aside)
    if hi_k <= n:
        high = found[-m:]
    bad = np.flatnonzero(np.isnan(low) | np.isnan(high))  # points the windows did not settle
    if bad.size:
        low[bad], high[bad] = _plus_bounds(rows[:, bad][index], residuals, alpha)
    return low, high


class _Groups:
    """The calibration lots' |R| fold by fold: each fold's distinct values in
    ascending order with their multiplicities, and all n pooled."""

    def __init__(self, index: np.ndarray, r: np.ndarray, n_folds: int):
        by_value = np.argsort(r)
        small = index.astype(np.int16)  # n_folds ≤ _GROUPED_MAX_FOLDS: a radix sort
        order = by_value[np.argsort(small[by_value], kind="stable")]  # by fold, then by value
        g, v = index[order], r[order]
        first = np.ones(v.size, dtype=bool)
        first[1:] = (g[1:] != g[:-1]) | (v[1:] != v[:-1])
        starts = np.flatnonzero(first)
        ug, uv = g[starts], v[starts]
        counts = np.diff(np.append(starts, v.size))
        self.size = np.bincount(ug, minlength=n_folds)  # distinct values per fold
        self.weight = np.bincount(index, minlength=n_folds) / r.size  # share of the lots per fold
        width = int(self.size.max())
        t = np.arange(ug.size) - (np.cumsum(self.size) - self.size)[ug]
        self.value = np.zeros((n_folds, width + 2))  # column t + 1 holds value t; the ends are padding
        self.value[ug, t + 1] = uv
        self.count = np.zeros((n_folds, width), dtype=np.int64)
        self.count[ug, t] = counts
        self.cum = np.zeros((n_folds, width + 1), dtype=np.int64)  # lots before position t
        np.cumsum(self.count, axis=1, out=self.cum[:, 1:])
        self.ties = bool(counts.max() > 1)
        self.key = [self.value[f, 1:self.size[f] + 1] for f in range(n_folds)]
        self.pooled = r[by_value]

    def kth(self, rows: np.ndarray, k: np.ndarray) -> np.ndarray:
        """k[j]-th smallest (1-based, 1 ≤ k ≤ n) over the lots i of
        rows[fold(i), j] + |Rᵢ|, for each column j of rows; NaN for a column
        not settled here."""
        vl, vh, a, b = self._first_windows(rows, k)
        self._narrow(rows, k, vl, vh, a, b)
        return self._select(rows, k, a, np.maximum(a, b))

    def _edges(self, rows: np.ndarray, v: np.ndarray, side: str, cols=slice(None)) -> np.ndarray:
        """(K, len(v)) positions of v − rows[g, cols] in each fold g's distinct values."""
        return np.stack([np.searchsorted(self.key[g], v - rows[g, cols], side) for g in range(rows.shape[0])])

    def _lots_before(self, pos: np.ndarray) -> np.ndarray:
        """Lots left of the positions ``pos`` (K × points), summed over the folds."""
        return self.cum[np.arange(pos.shape[0])[:, None], pos].sum(axis=0)

    def _first_windows(self, rows: np.ndarray, k: np.ndarray):
        """Value windows (vl, vh) and their positions (a, b) in each fold that hold the k-th smallest."""
        pooled = self.pooled
        n = pooled.size
        # Element i lies within min_g..max_g of rows plus its own |Rᵢ|, so the k-th smallest lies within
        # the same shifts of the k-th smallest |R| (the safe ends, widened for round-off). First guess:
        # the fold models' mean weighted by their lots, shifted by the pooled |R| a few ranks either
        # side of k (right to first order in the spread of the fold models).
        tol = 8 * np.finfo(float).eps * (np.abs(rows).max(axis=0) + pooled[-1])
        safe_lo = rows.min(axis=0) + pooled[k - 1] - tol
        safe_hi = rows.max(axis=0) + pooled[k - 1] + tol
        centre = self.weight @ rows
        vl = np.clip(centre + pooled[np.maximum(k - 1 - _FIRST_RANKS, 0)] - tol, safe_lo, safe_hi)
        vh = np.clip(centre + pooled[np.minimum(k - 1 + _FIRST_RANKS, n - 1)] + tol, safe_lo, safe_hi)
        a, b = self._edges(rows, vl, "left"), self._edges(rows, vh, "right")
        # where the guess missed rank k, one of its ends still bounds the k-th smallest
        over = np.flatnonzero(self._lots_before(a) >= k)  # about k elements below vl already
        if over.size:
            vh[over], b[:, over] = vl[over], a[:, over]
            vl[over], a[:, over] = safe_lo[over], self._edges(rows, safe_lo[over], "left", over)
        under = np.flatnonzero(self._lots_before(b) < k)  # fewer than k elements up to vh
        if under.size:
            vl[under], a[:, under] = vh[under], b[:, under]
            vh[under], b[:, under] = safe_hi[under], self._edges(rows, safe_hi[under], "right", under)
        return vl, vh, a, b

    def _narrow(self, rows: np.ndarray, k: np.ndarray, vl, vh, a, b) -> None:
        """Narrow (in place) the windows still holding many distinct values: probes placed by linear
        interpolation of the count between the ends, and every third step the midpoint (bisection, so that
        every window shrinks whatever the data)."""
        for step in range(_NARROW_STEPS):
            wide = np.flatnonzero((b - a).sum(axis=0) > _WINDOW_GOAL)
            if wide.size == 0:
                break
            lo, hi, kw = vl[wide], vh[wide], k[wide]
            if step % 3 == 2:
                probes = [lo + 0.5 * (hi - lo)]
            else:
                n_lo, n_hi = self._lots_before(a[:, wide]), self._lots_before(b[:, wide])
                spread = np.maximum(n_hi - n_lo, 1)
                d = np.maximum(0.25 * _WINDOW_GOAL, spread / 8)
                probes = [lo + np.clip((kw - n_lo + s) / spread, 0.0, 1.0) * (hi - lo) for s in (-d, d)]
            moved = False
            for vm in probes:
                inside = (vm > vl[wide]) & (vm < vh[wide])  # strictly between the current ends
                pts, vm = wide[inside], vm[inside]
                if pts.size == 0:
                    continue
                moved = True
                at = self._edges(rows, vm, "right", pts)  # about the elements ≤ vm
                upper = self._lots_before(at) >= k[pts]  # then the k-th smallest is ≤ vm
                vh[pts[upper]], b[:, pts[upper]] = vm[upper], at[:, upper]
                vl[pts[~upper]], a[:, pts[~upper]] = vm[~upper], at[:, ~upper]
            if not moved and step % 3 == 2:  # not even the midpoint lies strictly between the ends
                break

    def _select(self, rows: np.ndarray, k: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """The k-th smallest of each column whose window (positions a to b per fold) is narrow enough and
        passes the check; NaN for the others."""
        K, m = rows.shape
        size, value, count = self.size, self.value, self.count
        folds = np.arange(K)[:, None]
        out = np.full(m, np.nan)
        per_point = (b - a).sum(axis=0)
        cols = np.flatnonzero(per_point <= _WINDOW_MAX)
        if cols.size == 0:
            return out
        a, b, c, k, per_point = a[:, cols], b[:, cols], rows[:, cols], k[cols], per_point[cols]

        def element(t):  # the float of element t (−1 ≤ t ≤ size) of each fold, as the direct selection has it
            return c + value[folds, t + 1]

        # the check (see the docstring of _grouped_plus_bounds)
        below_max = np.where(a > 0, element(a - 1), -np.inf).max(axis=0)
        rest_min = np.where(a < size[:, None], element(a), np.inf).min(axis=0)
        upto_max = np.where(b > 0, element(b - 1), -np.inf).max(axis=0)
        above_min = np.where(b < size[:, None], element(b), np.inf).min(axis=0)
        n_below = self._lots_before(a)
        ok = (below_max <= rest_min) & (upto_max <= above_min) & (n_below < k) & (k <= self._lots_before(b))

        # the windows' elements, one row per point, sorted; the first whose running count of lots
        # reaches k − (lots below the windows) is the k-th smallest
        p = cols.size
        span = (b - a).T.ravel()  # point-major, then fold
        seg = np.repeat(np.arange(p * K), span)
        j, g = np.divmod(seg, K)
        t = a[g, j] + (np.arange(seg.size) - np.repeat(np.cumsum(span) - span, span))
        column = np.arange(seg.size) - np.repeat(np.cumsum(per_point) - per_point, per_point)
        vals = np.full((p, max(int(per_point.max()), 1)), np.inf)
        vals[j, column] = c[g, j] + value[g, t + 1]
        need = k - n_below
        if self.ties:
            lots = np.zeros(vals.shape, dtype=np.int64)
            lots[j, column] = count[g, t]
            order = np.argsort(vals, axis=1)
            vals = np.take_along_axis(vals, order, axis=1)
            reach = np.cumsum(np.take_along_axis(lots, order, axis=1), axis=1)
            at = np.argmax(reach >= need[:, None], axis=1)
        else:  # one lot per value: the need-th of the sorted window
            vals.sort(axis=1)
            at = np.clip(need - 1, 0, vals.shape[1] - 1)
        out[cols[ok]] = vals[ok, at[ok]]
        return out


def cv_plus_slack(n: int, n_folds: int) -> float:
    """Extra miscoverage allowed for K-fold CV+ beyond 2α:
    min{2(1 − 1/K)/(n/K + 1), (1 − K/n)/(K + 1)} (Barber et al. 2021,
    Theorem 4; recalled from memory, see references.md §9). The guarantee is
    coverage ≥ 1 − 2α − slack; leave-one-out (K = n) has slack 0."""
    k = float(n_folds)
    return float(min(2 * (1 - 1 / k) / (n / k + 1), (1 - k / n) / (k + 1)))


# ---------------------------------------------------------------------------
# coverage by region, and intervals that adapt to the level
# ---------------------------------------------------------------------------
#: confidence level of the binomial interval shown beside an empirical coverage
COVERAGE_CI_LEVEL = 0.95


def clopper_pearson(k: int, n: int, level: float = COVERAGE_CI_LEVEL) -> tuple[float, float]:
    """Exact (Clopper & Pearson 1934, Biometrika 26:404-413) two-sided
    binomial interval for k successes in n trials: the α/2 quantile of
    Beta(k, n − k + 1) and the 1 − α/2 quantile of Beta(k + 1, n − k), with
    0 and 1 at k = 0 and k = n; computed by ``scipy.stats.binomtest(k,
    n).proportion_ci(method="exact")``. (0, 1) when n = 0."""
    from scipy.stats import binomtest

    k, n = int(k), int(n)
    if n < 0 or not 0 <= k <= max(n, 0):
        raise ValueError(f"need 0 <= k <= n; got k={k}, n={n}")
    if n == 0:
        return 0.0, 1.0
    ci = binomtest(k, n).proportion_ci(confidence_level=float(level), method="exact")
    return float(ci.low), float(ci.high)


def region_edges(values, n_regions: int = 3) -> np.ndarray:
    """Edges of ``n_regions`` equal parts of the range of ``values``
    (thirds by default): min, ..., max."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        raise ValueError("no finite value to make regions of")
    return np.linspace(float(v.min()), float(v.max()), int(n_regions) + 1)


def coverage_by_region(covered, values, edges, level: float = COVERAGE_CI_LEVEL) -> list[dict]:
    """Empirical coverage in each region [edgesⱼ, edgesⱼ₊₁) of ``values``
    (the last region closed), with its Clopper–Pearson interval
    (:func:`clopper_pearson`). Each region is a dict ``range`` [low, high],
    ``n`` lots, ``coverage`` (None where n = 0), ``ci_low``, ``ci_high``."""
    covered = np.asarray(covered, dtype=bool)
    v = np.asarray(values, dtype=float)
    edges = np.asarray(edges, dtype=float)
    out = []
    for j in range(edges.size - 1):
        last = j == edges.size - 2
        inside = (v >= edges[j]) & ((v <= edges[j + 1]) if last else (v < edges[j + 1]))
        n, k = int(inside.sum()), int(covered[inside].sum())
        lo, hi = clopper_pearson(k, n, level)
        out.append({"range": [float(edges[j]), float(edges[j + 1])], "n": n,
                    "coverage": (k / n) if n else None, "ci_low": lo, "ci_high": hi})
    return out


def worst_region_gap(regions: list[dict], nominal: float) -> float:
    """Largest |coverage − nominal| over the regions that hold lots."""
    gaps = [abs(r["coverage"] - nominal) for r in regions if r["n"]]
    return max(gaps) if gaps else 0.0


def cv_plus_guarantee(n: int, n_folds: int, nominal: float) -> dict:
    """What CV+ promises at ``nominal`` coverage with n lots in K folds:
    at least 1 − 2α − slack (Barber, Candès, Ramdas & Tibshirani 2021,
    Ann. Statist. 49:486-507, Theorems 1 and 4; slack 0 for leave-one-out),
    about 1 − α in practice."""
    alpha = 1.0 - float(nominal)
    slack = 0.0 if n_folds >= n else cv_plus_slack(n, n_folds)
    floor = max(0.0, 1.0 - 2.0 * alpha - slack)
    return {"nominal": float(nominal), "guaranteed": floor, "slack": slack,
            "text": (f"CV+ guarantees at least 1 − 2α{' − slack' if slack else ''} = {floor:.1%} coverage at "
                     f"a nominal {nominal:.0%} (Barber et al. 2021, Ann. Statist. 49:486), about {nominal:.0%} in "
                     "practice")}


#: largest ratio of the highest to the lowest fitted spread over the levels it was fitted on
SPREAD_MAX_RATIO = 10.0

#: significance level at which a trend of the absolute residuals with the level is taken as real
#: (common practice, no source)
SPREAD_TEST_LEVEL = 0.05


def spread_trend_test(level, abs_residuals) -> dict:
    """Glejser's test of heteroscedasticity (Glejser 1969, "A new test for
    heteroskedasticity", JASA 64:316-323): least squares of the absolute
    residuals |rᵢ| on the level zᵢ, and the two-sided t-test of its slope
    (``scipy.stats.linregress``; n − 2 degrees of freedom). A small p-value
    says the spread changes with the level; a large one that a spread model
    fitted to these residuals would follow noise (with 30 lots a fitted
    log-slope of ±0.2 per SD of the level is common under a constant
    spread). Returns ``slope`` (per unit of the level) and ``p_value`` (1.0
    when the level or the residuals do not vary)."""
    from scipy.stats import linregress

    z = np.asarray(level, dtype=float).ravel()
    r = np.abs(np.asarray(abs_residuals, dtype=float).ravel())
    if z.size != r.size or z.size < 3:
        raise ValueError("spread_trend_test needs at least 3 levels and as many residuals")
    if not (np.ptp(z) > 0 and np.ptp(r) > 0):
        return {"slope": 0.0, "p_value": 1.0}
    fit = linregress(z, r)
    return {"slope": float(fit.slope), "p_value": float(fit.pvalue)}


def fit_spread(level, abs_residuals) -> dict:
    """The spread model of locally weighted conformal intervals (Lei, G'Sell,
    Rinaldo, Tibshirani & Wasserman 2018, JASA 113:1094-1111, §5.2: scores
    |y − μ̂(x)| / ρ̂(x) with ρ̂ a fitted model of the mean absolute residual).

    ρ̂(z) = exp(a + b·(z − z̄)/s_z) of the level z (the model's prediction),
    fitted to the out-of-fold absolute residuals by a gamma GLM with log link
    (maximum likelihood by iteratively reweighted least squares, McCullagh &
    Nelder 1989, §2.5 and §8: with log link and variance ∝ μ² the working
    weights are 1 and the working response η + (|r| − μ)/μ; a test compares
    it with scikit-learn's ``GammaRegressor``). Its score equation
    Σ (|r| − ρ̂)/ρ̂ · x = 0 holds for any spread proportional to the mean
    absolute residual, and ρ̂ > 0 everywhere. The slope is capped so that
    ρ̂ changes at most :data:`SPREAD_MAX_RATIO`-fold over the fitted levels
    (a guard against a few near-zero residuals). z is clipped to the range it
    was fitted on, so the spread stays bounded outside it. Returns the
    numbers :func:`linkage.models.lean.spread_scale` evaluates.
    """
    z = np.asarray(level, dtype=float).ravel()
    r = np.abs(np.asarray(abs_residuals, dtype=float).ravel())
    if z.size != r.size or z.size < 3:
        raise ValueError("fit_spread needs at least 3 levels and as many residuals")
    mean_r = float(np.mean(r))
    if not mean_r > 0:
        raise ValueError("every residual is zero: there is no spread to model")
    z_mean, z_scale = float(np.mean(z)), float(np.std(z))
    if not z_scale > 1e-12 * max(1.0, abs(z_mean)):
        return {"kind": "loglinear", "a": math.log(mean_r), "b": 0.0, "z_mean": z_mean, "z_scale": 1.0,
                "z_low": z_mean, "z_high": z_mean}
    u = (z - z_mean) / z_scale
    D = np.column_stack([np.ones_like(u), u])
    y = np.maximum(r, 1e-6 * mean_r)  # a gamma response must be positive; an exact zero residual is rare

    def deviance(b):  # gamma deviance / 2 (McCullagh & Nelder 1989, §8.3)
        eta = D @ b
        return float(np.sum(y * np.exp(-eta) + eta))

    beta = np.array([math.log(mean_r), 0.0])
    dev = deviance(beta)
    for _ in range(100):
        eta = D @ beta
        work = eta + (y - np.exp(eta)) / np.exp(eta)  # working response; working weights are 1
        new, *_ = np.linalg.lstsq(D, work, rcond=None)
        for _ in range(30):  # step halving keeps every step downhill
            new_dev = deviance(new)
            if np.isfinite(new_dev) and new_dev <= dev + 1e-12 * abs(dev):
                break
            new = (new + beta) / 2
        else:
            break
        done = np.max(np.abs(new - beta)) < 1e-10 * max(1.0, float(np.max(np.abs(new))))
        beta, dev = new, new_dev
        if done:
            break
    # the spread may change at most SPREAD_MAX_RATIO-fold over the fitted range (common practice, no source)
    u_span = float(u.max() - u.min())
    b_max = math.log(SPREAD_MAX_RATIO) / u_span
    if abs(beta[1]) > b_max:
        b = math.copysign(b_max, beta[1])
        beta = np.array([math.log(float(np.mean(y * np.exp(-b * u)))), b])  # the MLE of a at that b
    return {"kind": "loglinear", "a": float(beta[0]), "b": float(beta[1]), "z_mean": z_mean,
            "z_scale": z_scale, "z_low": float(z.min()), "z_high": float(z.max())}


def lw_cv_plus_interval(fold_predictions, fold_of, residuals, lot_scale, x_scale, alpha: float):
    """Locally weighted CV+ for m new points: CV+ (:func:`cv_plus_interval`)
    on normalised scores Rᵢ/ρ̂ᵢ, with ρ̂ᵢ the spread at lot i's out-of-fold
    level (``lot_scale``) and ρ̂(x) the spread at each new point
    (``x_scale``, (m,)): the ends are ρ̂(x) times the CV+ ends of μ̂₋ₖ₍ᵢ₎(x)/ρ̂(x)
    and Rᵢ/ρ̂ᵢ (a positive factor keeps the order statistics in place).
    Lei et al. (2018) §5.2 for split conformal; here with the CV+ ranks of
    Barber et al. (2021)."""
    preds = np.atleast_2d(np.asarray(fold_predictions, dtype=float))
    s = np.asarray(x_scale, dtype=float).ravel()
    lot_scale = np.asarray(lot_scale, dtype=float).ravel()
    if np.any(~(s > 0)) or np.any(~(lot_scale > 0)):
        raise ValueError("spreads must be positive")
    low, high = cv_plus_interval(preds / s[None, :], fold_of, np.asarray(residuals, float) / lot_scale, alpha)
    return low * s, high * s
