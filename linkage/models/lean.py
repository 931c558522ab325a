"""A fitted chain as plain numbers: what a what-if needs, evaluated with
numpy alone.

A what-if is asked while the operator waits at the press. Loading the fitted
chain as trained (a joblib pickle of scikit-learn and pandas objects) costs
the import of both libraries, seconds on a small machine, for arithmetic
that is a few matrix products. So the registry also saves each model in this
form (``whatif.npz``: arrays, and a JSON header, read with
``allow_pickle=False``, so loading it runs no code), and the what-if, the
window and the curves run on it in process too: one implementation of the
prediction arithmetic, used by the estimators themselves
(:mod:`linkage.models.candidates` calls the functions below).

What is kept, per attribute: the selected model and its cross-validation
fold models (for the CV+ interval), the out-of-fold residuals by lot (for
the Monte Carlo through the chain), the fold of each lot; per stage: the
applicability-domain model. Model kinds:

``mean``       the training mean
``rd``         Ryshkewitch–Duckworth y0·exp(−k·ε) on the porosity column
``linear``     PLS as coefficients on the centred inputs
``quadratic``  ridge on standardised inputs, squares and pairwise products
``trees``      gradient-boosted trees as node arrays and leaf paths
``johanson``   Johanson's rolling theory on the roll force, gap and roll
               diameter columns (:func:`johanson_predict`)
``link``       a generalised linear form g(y) = a + Σ bⱼ·hⱼ(xⱼ) (identity, log
               or complementary log-log g; hⱼ the identity or ln), see
               :func:`link_predict`

A target may also carry a ``spread`` model (:func:`spread_scale`): then its
intervals are locally weighted CV+ and the Monte Carlo rescales each lot's
residual to the level of the draw. Files written before these existed load
unchanged (no spread: pooled residuals, plain CV+).
"""

from __future__ import annotations

import io
import json
import math
from types import SimpleNamespace

import numpy as np

from linkage.exceptions import InputError, Problem, UsageError

__all__ = ["LeanChain", "from_fitted", "as_lean", "to_npz_bytes", "from_npz_bytes", "FORMAT",
           "quad_features", "quadratic_predict", "quadratic_contributions", "walk_trees", "tree_shap",
           "domain_verdicts", "given_inputs_verdict", "physical_range", "project", "link_transform", "link_inverse",
           "link_predict", "link_contributions", "spread_scale", "LINKS", "link_weights", "link_leverage",
           "leverage_scale"]

FORMAT = 1


# ---------------------------------------------------------------------------
# the arithmetic (the estimators in candidates.py call these too)
# ---------------------------------------------------------------------------
def quad_features(Z: np.ndarray) -> np.ndarray:
    """[z, z², zᵢzⱼ (i < j)] for each row of the standardised inputs Z."""
    n, p = Z.shape
    cols = [Z, Z**2]
    pairs = [Z[:, i] * Z[:, j] for i in range(p) for j in range(i + 1, p)]
    if pairs:
        cols.append(np.column_stack(pairs))
    return np.hstack(cols)


def quadratic_predict(X, x_mean, x_scale, beta, intercept) -> np.ndarray:
    Z = (np.asarray(X, dtype=float) - x_mean) / x_scale
    return quad_features(Z) @ beta + intercept


def quadratic_contributions(X, x_mean, x_scale, beta, intercept, z_m1, z_m2):
    """Exact interventional Shapley values of the quadratic ridge (see
    :class:`linkage.models.candidates.QuadraticRidge`) and the base value."""
    Z = (np.asarray(X, dtype=float) - x_mean) / x_scale
    n, p = Z.shape
    b = beta
    lin, sq = b[:p], b[p:2 * p]
    m1, m2 = z_m1, z_m2
    phi = lin * (Z - m1) + sq * (Z**2 - m2)
    base = intercept + lin @ m1 + sq @ m2
    k = 2 * p
    for i in range(p):
        for j in range(i + 1, p):
            bij = b[k]
            k += 1
            phi[:, i] += 0.5 * bij * (Z[:, i] - m1[i]) * (Z[:, j] + m1[j])
            phi[:, j] += 0.5 * bij * (Z[:, j] - m1[j]) * (Z[:, i] + m1[i])
            base += bij * m1[i] * m1[j]
    return phi, float(base)


def walk_trees(trees, X: np.ndarray) -> np.ndarray:
    """Prediction of boosted trees held as padded node arrays (trees × nodes:
    ``feature``, ``threshold``, ``left``, ``right``, ``value``, ``leaf``,
    ``depth``, ``baseline``) at finite inputs: the baseline plus each tree's
    leaf value, added tree by tree in order, a row going left where
    ``x <= threshold``; the arithmetic of scikit-learn's
    ``HistGradientBoostingRegressor.predict`` (a test compares them bit for bit)."""
    X = np.asarray(X, dtype=float)
    n, n_trees = X.shape[0], trees.feature.shape[0]
    node = np.zeros((n, n_trees), dtype=np.intp)
    t = np.arange(n_trees)[None, :]
    rows = np.arange(n)[:, None]
    for _ in range(int(trees.depth)):  # every leaf is at most `depth` splits down
        go_left = X[rows, trees.feature[t, node]] <= trees.threshold[t, node]
        step = np.where(go_left, trees.left[t, node], trees.right[t, node])
        node = np.where(trees.leaf[t, node], node, step)
    raw = np.zeros(n)
    raw += float(trees.baseline)
    for k in range(n_trees):  # tree by tree, as scikit-learn adds them
        raw += trees.value[k, node[:, k]]
    return raw


def tree_shap(trees, X: np.ndarray):
    """Exact path-dependent TreeSHAP values and the expected value, from the
    leaf paths of the trees (``leaf_value``, ``path_feature``,
    ``path_threshold``, ``path_left``, ``path_fraction``); see
    :func:`linkage.models.candidates.tree_shap_values` for the definition
    (Lundberg, Erion & Lee 2018, arXiv:1802.03888, Algorithm 1), enumerating
    the 2^p coalitions of the p inputs."""
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    feat = trees.path_feature
    used = feat >= 0
    # does row r follow leaf k's path at step j: (n, leaves, depth); padding steps count as followed
    x_at = X[:, np.maximum(feat, 0)]
    follow = np.where(trees.path_left[None], x_at <= trees.path_threshold[None], ~(x_at <= trees.path_threshold[None]))
    follow = (follow | ~used[None]).astype(float)
    masks = np.arange(2 ** p)
    v = np.empty((2 ** p, n))
    bits = used[None] & ((masks[:, None, None] >> np.maximum(feat, 0)[None]) & 1).astype(bool)
    for m in masks:
        w = np.where(bits[m][None], follow, trees.path_fraction[None]).prod(axis=2)  # (n, leaves)
        v[m] = w @ trees.leaf_value
    size = np.array([bin(m).count("1") for m in masks])
    weight = np.array([math.factorial(s) * math.factorial(p - s - 1) / math.factorial(p) if s < p else 0.0
                       for s in size])
    phi = np.zeros((n, p))
    for i in range(p):
        without = masks[(masks >> i & 1) == 0]
        phi[:, i] = weight[without] @ (v[without | (1 << i)] - v[without])
    return phi, float(trees.baseline) + float(v[0, 0])


#: link functions of the ``link`` kind: g(y) and its inverse
LINKS = ("identity", "log", "cloglog")
#: |η| beyond which the inverse link is taken at the bound (exp(700) is finite in float64)
_ETA_MAX = 700.0


def link_transform(link: str, y, y_max: float = 1.0) -> np.ndarray:
    """g(y): ``identity`` y; ``log`` ln y (y > 0); ``cloglog``
    ln(−ln(1 − y/y_max)) for 0 < y < y_max (the first-order / Weibull
    release and RRSB undersize forms, 1 − exp(−e^η), linear in η)."""
    y = np.asarray(y, dtype=float)
    if link == "identity":
        return y
    if link == "log":
        return np.log(y)
    if link == "cloglog":
        return np.log(-np.log1p(-y / y_max))
    raise ValueError(f"unknown link {link!r}; known: {', '.join(LINKS)}")


def link_inverse(link: str, eta, y_max: float = 1.0) -> np.ndarray:
    """g⁻¹(η), the inverse of :func:`link_transform`."""
    eta = np.asarray(eta, dtype=float)
    if link == "identity":
        return eta
    eta = np.clip(eta, -_ETA_MAX, _ETA_MAX)  # far outside the data: large but finite, never inf
    if link == "log":
        return np.exp(eta)
    if link == "cloglog":
        return -y_max * np.expm1(-np.exp(eta))  # y_max (1 − exp(−e^η))
    raise ValueError(f"unknown link {link!r}; known: {', '.join(LINKS)}")


def _link_inputs(X, log_mask) -> np.ndarray:
    """hⱼ(xⱼ): ln x where ``log_mask``, else x; the mask broadcasts against X
    from the right (one mask for a matrix, or one per replicate, B × 1 × p,
    for a stack of matrices)."""
    X = np.asarray(X, dtype=float)
    mask = np.asarray(log_mask, dtype=bool)
    if not mask.any():
        return X
    if mask.ndim == 0 or mask.ndim > X.ndim or mask.shape[-1] != X.shape[-1]:  # broadcast otherwise: as it is
        return _logs_where(X, mask)
    logged = mask.reshape(-1, mask.shape[-1]).any(axis=0)  # the inputs some replicate takes the log of
    if logged.all():
        return _logs_where(X, mask)
    # the others as they are: the log is taken of the logged inputs' columns only (the same values); in X's own
    # memory order, as np.where keeps it, so that a product with Z sums in the same order (a review: a C copy of
    # a DataFrame's Fortran-ordered array changed the last digit of retrain's figures)
    Z = X.copy(order="K")
    Z[..., logged] = _logs_where(X[..., logged], mask[..., logged])
    return Z


def _logs_where(X: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """ln x where ``mask`` (broadcast against X from the right), else x; a value at or below 0 is taken at the
    smallest positive float (a size or force at or below 0 is outside any law)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        logs = np.log(np.maximum(X, np.finfo(float).tiny))
    return np.where(mask, logs, X)


def link_predict(X, link, log_mask, x_mean, coef, intercept, y_max=1.0) -> np.ndarray:
    """y = g⁻¹(intercept + Σⱼ coefⱼ·(hⱼ(xⱼ) − x_meanⱼ)), hⱼ = ln where
    ``log_mask``, else the identity."""
    Z = _link_inputs(X, log_mask)
    return link_inverse(link, (Z - x_mean) @ coef + intercept, y_max)


def link_contributions(X, link, log_mask, x_mean, coef, intercept, y_max=1.0):
    """Per-input contributions of :func:`link_predict` and the base value
    g⁻¹(intercept) (the prediction at the mean transformed inputs). With the
    identity link they are exact, coefⱼ·(hⱼ(xⱼ) − x_meanⱼ); otherwise the
    difference prediction − base is split in proportion to those link-scale
    terms (it is a monotone function of their sum), so rows add up to
    prediction − base and each input keeps the sign of its effect."""
    Z = _link_inputs(X, log_mask)
    terms = (Z - x_mean) * coef
    base = float(link_inverse(link, np.asarray(intercept, float), y_max))
    if link == "identity":
        return terms, base
    total = terms.sum(axis=1)
    pred = link_inverse(link, total + intercept, y_max)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(np.abs(total)[:, None] > 0, terms / total[:, None], 0.0)
    return share * (pred - base)[:, None], base


def link_weights(link: str, y_fit, y_max: float = 1.0) -> np.ndarray:
    """Delta-method weights 1/g'(ŷ)² so that least squares on g(y) weighs
    each lot as least squares on y would (Carroll & Ruppert 1988,
    Transformation and Weighting in Regression, ch. 2; from memory)."""
    y_fit = np.asarray(y_fit, dtype=float)
    if link == "identity":
        return np.ones_like(y_fit)
    if link == "log":
        return y_fit**2  # g'(y) = 1/y
    q = np.clip(y_fit / y_max, 1e-9, 1 - 1e-9)
    return (y_max * (1 - q) * -np.log1p(-q)) ** 2  # g'(y) = 1/((y_max − y)·(−ln(1 − y/y_max)))


def link_leverage(X, link, log_mask, x_mean, coef, intercept, y_max, columns, cov) -> np.ndarray:
    """h(x) = W(ŷ(x))·dᵀ C d: the variance of the fitted link-linear mean
    ŷ(x) over the noise variance on the y scale (delta method), with
    d = [1, hⱼ(xⱼ) − x_meanⱼ for j in ``columns``], C = (DᵀWD)⁻¹ of the
    training lots (see :func:`linkage.models.conformal.leverage_basis`) and
    W = :func:`link_weights` at ŷ(x). For the identity link it is the
    classical leverage x₀ᵀ(XᵀX)⁻¹x₀ of the prediction variance
    σ²(1 + h) (Weisberg 2005, Applied Linear Regression, 3rd ed., §3.6)."""
    Z = _link_inputs(X, log_mask)
    cols = np.asarray(columns, dtype=int)
    D = np.hstack([np.ones((Z.shape[0], 1)), (Z - np.asarray(x_mean, float))[:, cols]])
    y = link_predict(X, link, log_mask, x_mean, coef, intercept, y_max)
    return link_weights(link, y, y_max) * np.einsum("ij,jk,ik->i", D, np.asarray(cov, float), D)


def leverage_scale(X, model, leverage) -> np.ndarray:
    """ρ(x) = √(1 + c·h(x)) (:func:`link_leverage` of the link model
    ``model``, its parameters as a dict or namespace; c = ``leverage["factor"]``):
    the normaliser of studentized CV+ (see
    :data:`linkage.models.fitted.STUDENTIZED_INTERVAL_METHOD`)."""
    p = model if isinstance(model, dict) else vars(model)
    lev = leverage if isinstance(leverage, dict) else vars(leverage)
    h = link_leverage(np.atleast_2d(np.asarray(X, float)), p["link"], p["log_mask"], p["x_mean"], p["coef"],
                      p["intercept"], p["y_max"], lev["columns"], lev["cov"])
    return np.sqrt(1.0 + float(lev["factor"]) * np.maximum(h, 0.0))


def spread_scale(spread, level) -> np.ndarray:
    """ρ̂(z) = exp(a + b·(clip(z) − z_mean)/z_scale): the residual spread at
    the level z (see :func:`linkage.models.conformal.fit_spread`); z is
    clipped to the levels it was fitted on."""
    p = spread if isinstance(spread, dict) else vars(spread)
    z = np.clip(np.asarray(level, dtype=float), p["z_low"], p["z_high"])
    return np.exp(p["a"] + p["b"] * (z - p["z_mean"]) / p["z_scale"])


# ---------------------------------------------------------------------------
# physical bounds (FittedTarget, Target and the Monte Carlo call this)
# ---------------------------------------------------------------------------
def physical_range(name: str) -> tuple[float, float]:
    """The closed interval a value of ``name`` is projected onto: its
    physical bounds (:data:`linkage.schema.PHYSICAL_BOUNDS`), an open end
    moved inside by ``OPEN_MARGIN`` of the range; (−inf, inf) for a quantity
    without bounds."""
    from linkage.schema import OPEN_MARGIN, PHYSICAL_BOUNDS

    if name not in PHYSICAL_BOUNDS:
        return (-math.inf, math.inf)
    low, high, low_open, high_open = PHYSICAL_BOUNDS[name]
    step = OPEN_MARGIN * (high - low) if math.isfinite(high - low) else 0.0
    return (low + step if low_open else low, high - step if high_open else high)


def project(name: str, values) -> tuple[np.ndarray, np.ndarray]:
    """``values`` of ``name`` projected onto :func:`physical_range` (the
    nearest physically possible value: a clip, ±inf included), and a boolean
    array saying which were moved. The projection is monotone, so an interval
    projected end by end still holds every value it held that is physically
    possible: its coverage of real lots is unchanged."""
    v = np.asarray(values, dtype=float)
    low, high = physical_range(name)
    out = np.clip(v, low, high)
    return out, (out != v) & ~np.isnan(v)


# ---------------------------------------------------------------------------
# applicability domain (DomainModel.check calls this too)
# ---------------------------------------------------------------------------
_NOT_UNITS = {"-", "ISO 8601", "sieve | laser", "bool", "count"}


def _fmt(v: float, digits: int = 4) -> str:
    return f"{v:.{digits}g}"


def _fmt_beyond(value: float, limit: float) -> tuple[str, str]:
    """``value`` and the ``limit`` it exceeds, each to 4 significant digits, or to as many more
    (up to 12) as it takes for the two texts to differ: "0.4505 above its limit 0.4505" tells
    the reader nothing."""
    digits = 4
    while _fmt(value, digits) == _fmt(limit, digits) and digits < 12:
        digits += 1
    return _fmt(value, digits), _fmt(limit, digits)


def _with_unit(name: str, value: float) -> str:
    from linkage.schema import ASSEMBLED

    unit = ASSEMBLED.get(name, "-")
    return _fmt(value) if unit in _NOT_UNITS else f"{_fmt(value)} {unit}"


def domain_verdicts(d, values: np.ndarray) -> list[dict]:
    """Applicability-domain verdict of each row of ``values`` (columns in the
    order of ``d.inputs``), as dicts with the fields of
    :class:`linkage.models.domain.DomainVerdict`. ``d`` holds the fitted
    domain model: ``inputs``, ``ranges`` {input: (low, high)}, ``mean``,
    ``scale``, ``rotations``, ``loadings``, ``score_var``, ``n_components``,
    ``t2_limit`` and ``q_limit`` (None where not applicable), ``alpha``."""
    level = f"{100 * (1 - d.alpha):g}%"
    names = list(d.inputs)
    out = []
    for row in np.asarray(values, dtype=float):
        reasons = []
        for j, c in enumerate(names):
            v = row[j]
            if not np.isfinite(v):
                reasons.append(f"{c} is missing")
                continue
            reasons += _range_reason(d, c, v)
        if not np.all(np.isfinite(row)):
            out.append({"in_domain": False, "t2": float("nan"), "t2_limit": d.t2_limit, "q": float("nan"),
                        "q_limit": d.q_limit, "reasons": reasons, "contributions": {}, "t2_contributions": {},
                        "q_contributions": {}})
            continue
        z = (row - d.mean) / d.scale
        t = z @ d.rotations
        if d.n_components:
            t2c = z * (d.rotations @ (t / d.score_var))  # Σ_j z_j Σ_a r_ja t_a / s_a² = T²
        else:
            t2c = np.zeros_like(z)
        e = z - d.loadings @ t
        qc = e**2
        t2, q = float(t2c.sum()), float(qc.sum())
        share = np.zeros_like(z)
        if d.t2_limit:
            share = share + t2c / d.t2_limit
        if d.q_limit:
            share = share + qc / d.q_limit
        if d.t2_limit is not None and t2 > d.t2_limit:
            shown, limit = _fmt_beyond(t2, d.t2_limit)
            reasons.append(f"Hotelling T² {shown} above its {level} limit {limit} "
                           f"(driven by {names[int(np.argmax(t2c))]})")
        if d.q_limit is not None and q > d.q_limit:
            shown, limit = _fmt_beyond(q, d.q_limit)
            reasons.append(f"Q residual (squared prediction error) {shown} above its {level} limit "
                           f"{limit} (driven by {names[int(np.argmax(qc))]})")
        out.append({"in_domain": not reasons, "t2": t2, "t2_limit": d.t2_limit, "q": q, "q_limit": d.q_limit,
                    "reasons": reasons,
                    "contributions": {c: float(v) for c, v in zip(names, share)},
                    "t2_contributions": {c: float(v) for c, v in zip(names, t2c)},
                    "q_contributions": {c: float(v) for c, v in zip(names, qc)}})
    return out


def _range_reason(d, c: str, v: float) -> list[str]:
    """``[reason]`` when input ``c`` = ``v`` lies outside its training range in domain ``d``, else ``[]``."""
    lo, hi = d.ranges.get(c, (np.nan, np.nan))
    tol = 1e-9 * max(1.0, abs(hi - lo), abs(hi), abs(lo))
    if v < lo - tol:
        return [f"{c} = {_with_unit(c, v)} is below the training range {_fmt(lo)}–{_fmt(hi)}"]
    if v > hi + tol:
        return [f"{c} = {_with_unit(c, v)} is above the training range {_fmt(lo)}–{_fmt(hi)}"]
    return []


def given_inputs_verdict(d, values: dict) -> dict:
    """The verdict of a stage that is not run because every one of its
    targets was given (a what-if given ``ribbon_porosity``): those of its
    inputs found in ``values`` (given or held; one number each) against
    their training ranges. T² and Q need every input of the stage, so they
    are not computed (None). A setting given outside the training range of
    the only stage that takes it is flagged as it is when the stage runs.
    The page mirrors this (``givenInputsVerdict`` in ``whatif_page.js``)."""
    reasons: list[str] = []
    for c in d.inputs:
        if c in values:
            v = float(np.asarray(values[c], dtype=float).reshape(-1)[0])
            reasons += [f"{c} is missing"] if not np.isfinite(v) else _range_reason(d, c, v)
    return {"in_domain": not reasons, "t2": None, "t2_limit": d.t2_limit, "q": None, "q_limit": d.q_limit,
            "reasons": reasons}


def johanson_predict(X, *, force_index, gap_index, diameter_index, compressibility, pressure_constant_mpa,
                     internal_friction_deg, wall_friction_deg, reference=None):
    """Ribbon porosity by Johanson's rolling theory on three columns of X
    (:func:`linkage.physics.rolling.johanson_ribbon_porosity`; numpy only).
    Zero or negative forces, gaps and diameters are taken as 1e-9 (a
    Monte Carlo draw may reach them; the theory is not defined there)."""
    from linkage.physics.rolling import johanson_ribbon_porosity

    X = np.asarray(X, dtype=float)
    cols = [np.maximum(X[:, int(i)], 1e-9) for i in (force_index, gap_index, diameter_index)]
    return np.asarray(johanson_ribbon_porosity(*cols, compressibility, pressure_constant_mpa, internal_friction_deg,
                                               wall_friction_deg), dtype=float).reshape(X.shape[0])


def johanson_contributions(X, *, reference, **numbers):
    """Exact Shapley values of the three physical inputs of :func:`johanson_predict`
    against the reference point (training means): the average over the
    orders of adding the inputs of each one's change of the prediction
    (Shapley 1953, from memory); other inputs get 0. Rows add up to
    prediction − f(reference)."""
    from itertools import combinations

    X = np.asarray(X, dtype=float)
    idx = [int(numbers[k]) for k in ("force_index", "gap_index", "diameter_index")]
    ref_row = np.zeros(X.shape[1])
    ref_row[idx] = np.asarray(reference, dtype=float)
    base = float(johanson_predict(ref_row[None, :], reference=reference, **numbers)[0])

    def value(subset):  # f with the inputs in ``subset`` at the row's values, the others at the reference
        Z = np.tile(ref_row, (X.shape[0], 1))
        for j in subset:
            Z[:, idx[j]] = X[:, idx[j]]
        return johanson_predict(Z, reference=reference, **numbers)

    n = len(idx)
    values = {s: value(s) for r in range(n + 1) for s in combinations(range(n), r)}
    out = np.zeros(X.shape)
    for j in range(n):
        for s, v in values.items():
            if j in s:
                continue
            with_j = tuple(sorted((*s, j)))
            weight = math.factorial(len(s)) * math.factorial(n - len(s) - 1) / math.factorial(n)
            out[:, idx[j]] += weight * (values[with_j] - v)
    return out, base


# ---------------------------------------------------------------------------
# the lean objects
# ---------------------------------------------------------------------------
class Model:
    """One fitted estimator as numbers: ``predict(X)`` and
    ``contributions(X) -> (matrix, base)`` on a float matrix."""

    def __init__(self, spec: dict):
        self.kind = spec["kind"]
        self.p = SimpleNamespace(**{k: v for k, v in spec.items() if k != "kind"})

    def predict(self, X: np.ndarray) -> np.ndarray:
        p, X = self.p, np.asarray(X, dtype=float)
        if self.kind == "mean":
            return np.full(X.shape[0], p.mean)
        if self.kind == "rd":
            return p.s0 * np.exp(-p.k * X[:, p.porosity_index])  # y = y0 exp(-k eps)
        if self.kind == "linear":
            return (X - p.x_mean) @ p.coef + p.intercept
        if self.kind == "quadratic":
            return quadratic_predict(X, p.x_mean, p.x_scale, p.beta, p.intercept)
        if self.kind == "trees":
            return walk_trees(p, X)
        if self.kind == "link":
            return link_predict(X, p.link, p.log_mask, p.x_mean, p.coef, p.intercept, p.y_max)
        if self.kind == "johanson":
            return johanson_predict(X, **vars(p))
        raise ValueError(f"unknown model kind {self.kind!r}")

    def contributions(self, X: np.ndarray):
        p, X = self.p, np.asarray(X, dtype=float)
        if self.kind == "mean":
            return np.zeros(X.shape), p.mean
        if self.kind == "rd":
            c = np.zeros(X.shape)
            c[:, p.porosity_index] = self.predict(X) - p.base
            return c, p.base
        if self.kind == "linear":
            return (X - p.x_mean) * p.coef, p.intercept
        if self.kind == "quadratic":
            return quadratic_contributions(X, p.x_mean, p.x_scale, p.beta, p.intercept, p.z_m1, p.z_m2)
        if self.kind == "trees":
            return tree_shap(p, X)
        if self.kind == "link":
            return link_contributions(X, p.link, p.log_mask, p.x_mean, p.coef, p.intercept, p.y_max)
        if self.kind == "johanson":
            return johanson_contributions(X, **vars(p))
        raise ValueError(f"unknown model kind {self.kind!r}")


class Target:
    """One attribute: the selected model, its CV fold models and residuals."""

    def __init__(self, spec: dict):
        self.target = spec["target"]
        self.inputs = list(spec["inputs"])
        self.selected = spec["selected"]
        self.nominal_coverage = float(spec["nominal_coverage"])
        self.model_ = Model(spec["model"])
        self.fold_models_ = [Model(m) for m in spec["fold_models"]]
        self.fold_of_ = np.asarray(spec["fold_of"], dtype=int)
        self.residuals_ = np.asarray(spec["residuals"], dtype=float)
        #: spread model of locally weighted CV+ and ρ̂ at each lot's out-of-fold level (absent in older files)
        self.spread = spec.get("spread")
        self.lot_scale_ = (np.asarray(spec["lot_scale"], dtype=float) if spec.get("lot_scale") is not None
                           else np.ones(self.residuals_.size))
        #: studentized CV+ of the whole procedure (linkage.models.train._procedure_basis): its fold models,
        #: residuals, ρ at each lot and leverage (absent in older files and where a spread model is deployed)
        b = spec.get("interval")
        self.interval_ = None if b is None else {
            "fold_models": [Model(m) for m in b["fold_models"]],
            "residuals": np.asarray(b["residuals"], dtype=float),
            "lot_scale": np.asarray(b["lot_scale"], dtype=float),
            "leverage": None if b.get("leverage") is None else {
                "columns": np.asarray(b["leverage"]["columns"], dtype=int),
                "cov": np.asarray(b["leverage"]["cov"], dtype=float),
                "factor": float(b["leverage"]["factor"])}}

    def matrix(self, columns, what: str = "prediction") -> np.ndarray:
        """The inputs as a float matrix (one column per input, in order); a
        missing or non-finite input is refused with its column."""
        missing = [c for c in self.inputs if c not in columns]
        if missing:
            raise InputError([Problem(file=f"{self.target} {what}", column=c,
                                      rule="column missing; the model needs every input") for c in missing])
        # column-major, as DataFrame.to_numpy gives it to the fitted chain's own predict: the same floats
        X = np.vstack([np.asarray(columns[c], dtype=float).reshape(-1) for c in self.inputs]).T
        bad = ~np.isfinite(X)
        if bad.any():
            rows, cols = np.nonzero(bad)
            raise InputError([Problem(file=f"{self.target} {what}", column=self.inputs[j],
                                      value=None if np.isnan(X[i, j]) else float(X[i, j]),
                                      rule=f"row {i}: no finite value; a prediction needs every input")
                              for i, j in list(zip(rows, cols))[:50]])
        return X

    def predict(self, columns, *, raw: bool = False) -> np.ndarray:
        """The selected model's prediction, projected onto the attribute's
        physical range (:func:`project`) unless ``raw``."""
        out = np.asarray(self.model_.predict(self.matrix(columns)), float)
        return out if raw else project(self.target, out)[0]

    def scale(self, level) -> np.ndarray:
        """ρ̂ at the given levels (ones without a spread model)."""
        level = np.asarray(level, dtype=float)
        return np.ones(level.shape) if self.spread is None else spread_scale(self.spread, level)

    def interval(self, columns, level: float | None = None, *, raw: bool = False):
        """CV+ interval (see :data:`linkage.models.fitted.INTERVAL_METHOD`), or
        locally weighted CV+ where the target has a spread model, each end
        projected onto the physical range (:func:`project`) unless ``raw``."""
        from linkage.models.conformal import cv_plus_interval, lw_cv_plus_interval

        level = self.nominal_coverage if level is None else float(level)
        if not 0 < level < 1:
            raise ValueError(f"level must lie strictly between 0 and 1; got {level}")
        X = self.matrix(columns, "interval")
        b = None if self.spread is not None else self.interval_
        # the fold models and residuals of the interval given: the procedure's (studentized CV+) or the
        # selected candidate's (CV+, locally weighted CV+); each fold model predicts once
        models, residuals = ((b["fold_models"], b["residuals"]) if b is not None
                             else (self.fold_models_, self.residuals_))
        preds = np.vstack([np.asarray(m.predict(X), float) for m in models])
        if self.spread is not None:
            x_scale = self.scale(self.model_.predict(X))
            low, high = lw_cv_plus_interval(preds, self.fold_of_, residuals, self.lot_scale_, x_scale, 1 - level)
        elif b is not None and b["leverage"] is not None:
            x_scale = leverage_scale(X, self.model_.p, b["leverage"])
            low, high = lw_cv_plus_interval(preds, self.fold_of_, residuals, b["lot_scale"], x_scale, 1 - level)
        else:
            low, high = cv_plus_interval(preds, self.fold_of_, residuals, 1 - level)
        return (low, high) if raw else (project(self.target, low)[0], project(self.target, high)[0])

    def contributions(self, columns):
        """(matrix rows × inputs, base value): rows add up to prediction − base."""
        return self.model_.contributions(self.matrix(columns, "contributions"))


class Domain(SimpleNamespace):
    def check(self, columns) -> list[dict]:
        missing = [c for c in self.inputs if c not in columns]
        if missing:
            raise InputError([Problem(file="domain check", column=c,
                                      rule="column missing; the applicability domain needs every stage input")
                              for c in missing])
        X = np.column_stack([np.asarray(columns[c], dtype=float).reshape(-1) for c in self.inputs])
        return domain_verdicts(self, X)


class Stage:
    def __init__(self, spec: dict):
        self.name = spec["name"]
        self.inputs = list(spec["inputs"])
        self.targets = {t["target"]: Target(t) for t in spec["targets"]}
        d = spec["domain"]
        self.domain = None if d is None else Domain(**{**d, "ranges": {k: tuple(v) for k, v in d["ranges"].items()}})
        self.residual_lots = list(spec["residual_lots"])
        #: lots × targets (in the order of ``targets``) of out-of-fold residuals; NaN where a lot lacks one
        self.residual_matrix = np.asarray(spec["residual_matrix"], dtype=float).reshape(
            len(self.residual_lots), len(self.targets))
        #: the same lots × targets of ρ̂ at each lot's out-of-fold level (ones where a target has no spread
        #: model, and in files written before it existed)
        scale = spec.get("residual_scale")
        self.residual_scale = (np.ones(self.residual_matrix.shape) if scale is None
                               else np.asarray(scale, dtype=float).reshape(self.residual_matrix.shape))

    def residual_column(self, name: str) -> np.ndarray:
        return self.residual_matrix[:, list(self.targets).index(name)]

    def scaled_residual_column(self, name: str) -> np.ndarray:
        """The lots' residuals divided by ρ̂ at their out-of-fold level (the
        residuals themselves where the target has no spread model)."""
        j = list(self.targets).index(name)
        return self.residual_matrix[:, j] / self.residual_scale[:, j]


class LeanChain:
    """A fitted chain as numbers (see the module notes). ``stages`` in order,
    ``targets`` by name, ``medians`` of the training settings."""

    def __init__(self, spec: dict):
        if spec.get("format") != FORMAT:
            raise ValueError(f"lean chain format {spec.get('format')!r}; this version reads {FORMAT}")
        self.spec = spec
        self.model_id = spec["model_id"]
        self.created_at = spec["created_at"]
        self.nominal_coverage = float(spec["nominal_coverage"])
        self.medians = dict(spec["medians"])
        #: time point [min] of the model's dissolution_pct; None in a file written before it was recorded
        #: (read as the default, see :mod:`linkage.timepoint`)
        t = spec.get("dissolution_time_min")
        self.dissolution_time_min = None if t is None else float(t)
        #: products of the training lots (empty when unknown or in a file written before they were kept)
        self.products = list(spec.get("products") or [])
        #: lots per product and lots without a product name (None, 0 in a file written before they were kept)
        self.product_lots = spec.get("product_lots")
        self.lots_without_product = int(spec.get("lots_without_product") or 0)
        self.chain_targets = list(spec["chain_targets"])
        self.chain_root_inputs = list(spec["chain_root_inputs"])
        self.stages = [Stage(s) for s in spec["stages"]]
        self.within_lot = dict(spec.get("within_lot") or {})  # absent in models saved before it was kept
        self.targets = {name: t for st in self.stages for name, t in st.targets.items()}
        #: lot-level bootstrap replicates (:mod:`linkage.models.bootstrap`), or None for a model saved
        #: before they existed; :mod:`linkage.decide.bound` evaluates them
        self.bootstrap = spec.get("bootstrap")
        #: mean, covariance and range of the training lots' settings (:mod:`linkage.decide.held`); absent
        #: (empty names) in a model saved before coherent held settings
        self.settings_names = list(spec.get("settings_names") or [])
        #: the model's training lots, from its metadata (set by :func:`linkage.models.registry.load_whatif` and
        #: :func:`from_fitted`; not in the what-if file, so not on the what-if page); None when not known
        self.training_lots: list[str] | None = None

    def root_inputs(self) -> list[str]:
        return list(self.chain_root_inputs)

    def all_targets(self) -> list[str]:
        return list(self.chain_targets)


# ---------------------------------------------------------------------------
# from a fitted chain
# ---------------------------------------------------------------------------
def _model_spec(est) -> dict:
    """The lean form of one fitted estimator: each candidate gives its own
    (``lean_spec``, see :class:`linkage.models.candidates.Candidate`)."""
    spec = getattr(est, "lean_spec", None)
    if spec is None:
        raise TypeError(f"no lean form for a {type(est).__name__}")
    return spec()


def _num(v):
    return None if v is None else float(v)


def _domain_spec(dm) -> dict | None:
    if dm is None:
        return None
    return {"inputs": list(dm.inputs_), "ranges": {c: [float(lo), float(hi)] for c, (lo, hi) in dm.ranges_.items()},
            "mean": np.asarray(dm.mean_, float), "scale": np.asarray(dm.scale_, float),
            "rotations": np.asarray(dm.rotations_, float), "loadings": np.asarray(dm.loadings_, float),
            "score_var": np.asarray(dm.score_var_, float), "n_components": int(dm.n_components_),
            "t2_limit": _num(dm.t2_limit_), "q_limit": _num(dm.q_limit_), "alpha": float(dm.alpha_)}


def _residual_scale(stage, table) -> dict:
    """{"residual_scale": lots × targets of ρ̂ at each lot's out-of-fold level}
    where a target of the stage has a spread model; {} otherwise (the file
    then reads as before)."""
    targets = list(stage.targets.values())
    if not any(getattr(t, "spread", None) is not None for t in targets):
        return {}
    out = np.ones((len(table.index), len(targets)))
    for j, t in enumerate(targets):
        if getattr(t, "spread", None) is None:
            continue
        by_lot = dict(zip(t.residuals.index.astype(str), t.lot_scale()))
        out[:, j] = [by_lot.get(str(lot), 1.0) for lot in table.index]
    return {"residual_scale": out}


def _interval_spec(t) -> dict:
    """{"interval": the studentized CV+ basis} where the target has one; {} otherwise."""
    b = getattr(t, "interval_basis", None)
    if b is None:
        return {}
    lev = b["leverage"]
    return {"interval": {
        "fold_models": [_model_spec(m) for m in b["fold_models"]],
        "residuals": np.asarray(b["residuals"], float), "lot_scale": np.asarray(b["lot_scale"], float),
        "leverage": None if lev is None else {"columns": np.asarray(lev["columns"], dtype=np.int64),
                                              "cov": np.asarray(lev["cov"], float), "factor": float(lev["factor"])}}}


def from_fitted(chain) -> LeanChain:
    """The lean form of a :class:`linkage.models.fitted.FittedChain`, with its training lots."""
    lean = LeanChain(export(chain))
    lean.training_lots = chain.training_lots
    return lean


def export(chain) -> dict:
    """The nested dict of numbers and arrays that :class:`LeanChain` is built from."""
    stages = []
    for st in chain.stages:
        table = st.residual_table()
        stages.append({
            "name": st.name, "inputs": list(st.inputs),
            "targets": [{
                "target": t.target, "inputs": list(t.inputs), "selected": t.selected,
                "nominal_coverage": float(t.nominal_coverage),
                "model": _model_spec(t.model_), "fold_models": [_model_spec(m) for m in t.fold_models_],
                "fold_of": np.asarray(t.fold_of_, dtype=np.int64),
                "residuals": t.residuals.to_numpy(float),
                **({} if getattr(t, "spread", None) is None else
                   {"spread": dict(t.spread), "lot_scale": np.asarray(t.lot_scale(), float)}),
                **_interval_spec(t),
            } for t in st.targets.values()],
            "domain": _domain_spec(st.domain),
            "residual_lots": [str(v) for v in table.index],
            "residual_matrix": table.to_numpy(float).reshape(len(table.index), len(st.targets)),
            **_residual_scale(st, table),
        })
    medians = chain.training.get("medians", {})
    return {
        "format": FORMAT, "model_id": chain.model_id, "created_at": chain.created_at,
        "nominal_coverage": float(chain.nominal_coverage),
        "medians": {k: _num(v) for k, v in medians.items()},
        "dissolution_time_min": _num(chain.training.get("dissolution_time_min")),
        "products": [str(p) for p in chain.training.get("products", [])],
        **({"product_lots": {str(p): int(n) for p, n in chain.training["product_lots"].items()},
            "lots_without_product": int(chain.training.get("lots_without_product") or 0)}
           if chain.training.get("product_lots") is not None else {}),
        "chain_targets": list(chain.chain.targets()), "chain_root_inputs": list(chain.chain.root_inputs()),
        "stages": stages,
        # within-lot spread for unit-level compendial judgement (linkage.decide.compendial)
        "within_lot": chain.training.get("within_lot") or {},
        # settings model for coherent held settings (linkage.decide.held); absent in a model trained before it
        **{k: (list(v) if k == "settings_names" else
               [[float(x) for x in lv] for lv in v] if k == "settings_levels" else np.asarray(v, float))
           for k, v in (chain.training.get("settings") or {}).items()},
        # lot-level bootstrap replicates (linkage.models.bootstrap); absent in a model trained before them
        **({"bootstrap": _bootstrap_spec(chain.bootstrap)} if getattr(chain, "bootstrap", None) else {}),
    }


def _bootstrap_spec(bs: dict) -> dict:
    """The bootstrap record with its arrays as numpy arrays (for the .npz)."""
    out = {k: v for k, v in bs.items() if k not in ("counts", "targets")}
    out["counts"] = np.asarray(bs["counts"], dtype=np.int64)
    out["targets"] = {name: {"n": int(p["n"]), "same": dict(p["same"]),
                             "stacked": {k: np.asarray(v) for k, v in p["stacked"].items()},
                             "ragged": {k: {"flat": np.asarray(r["flat"]), "shapes": np.asarray(r["shapes"])}
                                        for k, r in p["ragged"].items()}}
                      for name, p in bs["targets"].items()}
    return out


def as_lean(chain) -> LeanChain:
    """``chain`` itself when lean, else its lean form."""
    return chain if isinstance(chain, LeanChain) else from_fitted(chain)


# ---------------------------------------------------------------------------
# the file: arrays in an .npz, the rest as JSON inside it; no pickles
# ---------------------------------------------------------------------------
_HEADER = "__lean__"


def to_npz_bytes(spec: dict) -> bytes:
    """``spec`` (from :func:`export`) as the bytes of an ``.npz`` file."""
    arrays: dict[str, np.ndarray] = {}

    def strip(obj):
        if isinstance(obj, np.ndarray):
            key = f"a{len(arrays)}"
            arrays[key] = obj
            return {"__array__": key}
        if isinstance(obj, dict):
            return {str(k): strip(v) for k, v in obj.items()}
        if isinstance(obj, (list, tuple)):
            return [strip(v) for v in obj]
        if isinstance(obj, float) and not math.isfinite(obj):
            return {"__float__": repr(obj)}
        return obj

    header = json.dumps(strip(spec), allow_nan=False, sort_keys=True)
    buf = io.BytesIO()
    np.savez(buf, **{_HEADER: np.array(header)}, **arrays)
    return buf.getvalue()


def from_npz_bytes(data: bytes) -> LeanChain:
    """The :class:`LeanChain` in ``.npz`` bytes written by :func:`to_npz_bytes`."""
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (ValueError, OSError, EOFError) as exc:
        raise UsageError(f"the what-if file is not a lean chain ({exc})") from None
    if _HEADER not in arrays:
        raise UsageError("the what-if file is not a lean chain (no header)")

    def restore(obj):
        if isinstance(obj, dict):
            if set(obj) == {"__array__"}:
                return arrays[obj["__array__"]]
            if set(obj) == {"__float__"}:
                return float(obj["__float__"])
            return {k: restore(v) for k, v in obj.items()}
        if isinstance(obj, list):
            return [restore(v) for v in obj]
        return obj

    return LeanChain(restore(json.loads(str(arrays[_HEADER]))))
