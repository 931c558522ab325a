"""Candidate models for one target, under one tuning and selection rule.

Eight candidates, from the simplest (see :data:`linkage.models.cv.SIMPLICITY_ORDER`):

``mean``
    The mean of the training lots: the floor every model must beat.
``rd_baseline``
    Ryshkewitch–Duckworth form y = y0·exp(−k·ribbon_porosity), fitted by
    non-linear least squares (:func:`linkage.physics.strength.fit_ryshkewitch_duckworth`,
    ``method="nls"``) with parameter standard errors. Only where
    ``ribbon_porosity`` is a stage input. For ribbon tensile strength it is the
    law itself; for tablet attributes it is the physical reference.
``log_linear``, ``weibull_release``, ``linear_select``
    Forms shaped by the physics, each attribute with its own inputs: g(y)
    linear in a subset of the stage inputs (dimensional ones optionally as
    ln x), the subset chosen by inner grouped CV. g = ln for
    Ryshkewitch–Duckworth strength and power laws, the complementary log-log
    of y/F∞ for Weibull / first-order release and the RRSB undersize (fines),
    the identity for least squares with input selection. See the classes.
``pls``
    Partial least squares on standardised inputs; the number of components
    is chosen by inner grouped CV; VIP scores are kept.
``quadratic_ridge``
    Ridge regression on the standardised inputs, their squares and pairwise
    products (for curved responses); the penalty is chosen by inner grouped CV.
``boosting``
    scikit-learn ``HistGradientBoostingRegressor`` with small-data settings
    (depth-2 trees, learning rate 0.2, at least a few lots per leaf, no early
    stopping) and optional monotonic constraints; the number of trees
    (5, 10 or 20) is chosen by inner grouped CV from staged predictions, so
    the grid costs one fit per inner fold.

Every estimator follows the scikit-learn contract (``fit`` returns self,
learned state ends in ``_``; input checked by scikit-learn's
``validate_data``, which records ``n_features_in_`` and, for a DataFrame,
``feature_names_in_`` and refuses another count or other names later;
``check_is_fitted`` before use; NaN and inf refused, naming the cells) and
adds ``contributions(X) -> (matrix, base_value)`` whose rows add up to
``prediction − base_value``. ``tests/models/test_estimator_checks.py`` runs
scikit-learn's estimator checks over every registered candidate.

Adding a candidate
------------------
A candidate is one class: a subclass of :class:`Candidate` (itself a
scikit-learn regressor) that is at once the estimator and the rules for
tuning it.

1. Set the class attributes ``name`` (the key in :data:`CANDIDATES`, in the
   training report and on the command line) and ``description`` (one line).
2. Give the estimator ``__init__`` (hyperparameters only, stored as given),
   ``_fit(X, y)`` (returns self; learned state ends in ``_``), ``_predict(X)``
   and ``_contributions(X) -> (matrix, base)``. The base class's ``fit``,
   ``predict`` and ``contributions`` check the input first and call these
   with a float array.
3. Override the class methods where the defaults do not fit:
   ``not_applicable(inputs, X, y)`` (default: refused when no input varies),
   ``grid(n, p)`` (default: one point, ``[{}]``; list the simplest first),
   ``build(params, inputs, *, n, monotone, seed)`` (default:
   ``cls(**params)``) and ``fit_predict_grid(...)`` (default: one fit per grid
   point; override when one fit gives every grid point, as the staged
   boosting predictions do). Set ``grid_rule = "one_se"`` to have :func:`tune`
   take the simplest grid point within one standard error of the lowest
   inner RMSE instead of the lowest (the input-selecting forms do).
4. ``lean_spec()``: the fitted model as plain numbers for
   :mod:`linkage.models.lean` (``{"kind": ..., ...}``, one of the kinds that
   module evaluates; a new kind needs its numpy arithmetic there, called by
   the estimator's ``_predict`` too, so the two cannot drift apart).
5. Decorate the class with :func:`register` and put its ``name`` at its place
   in :data:`linkage.models.cv.SIMPLICITY_ORDER` (simplest first; the
   one-standard-error rule prefers the earlier one). A test checks that the
   two agree.
6. ``tests/models/test_estimator_checks.py`` then runs scikit-learn's
   estimator checks on it. A check that cannot apply goes into that file's
   ``SKIPS`` by name, with the reason and the message it fails with.
"""

from __future__ import annotations

import inspect
import math
import warnings
import weakref
from abc import ABCMeta, abstractmethod
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_array, check_consistent_length, check_is_fitted, column_or_1d

from linkage.models.cv import inner_splits
from linkage.models.lean import (quad_features, quadratic_contributions, quadratic_predict, tree_shap,
                                 walk_trees)

__all__ = [
    "CandidateError",
    "Candidate",
    "register",
    "MeanRegressor",
    "RDRegressor",
    "JohansonRibbonRegressor",
    "PLSRegressor",
    "QuadraticRidge",
    "BoostingRegressor",
    "LogLinearRegressor",
    "WeibullReleaseRegressor",
    "LinearSelectRegressor",
    "fit_link_batch",
    "input_subsets",
    "log_eligible",
    "CandidateSpec",
    "CANDIDATES",
    "vip_from_weights",
    "pls_vip",
    "tree_predict",
    "tree_shap_values",
    "tune",
    "TuneResult",
]

POROSITY = "ribbon_porosity"


class CandidateError(ValueError):
    """A candidate cannot be fitted on these data (the message says why)."""


def _varying(X: np.ndarray) -> np.ndarray:
    X = np.asarray(X, dtype=float)
    if X.shape[0] < 2:
        return np.zeros(X.shape[1], dtype=bool)
    span = np.ptp(X, axis=0)
    return span > 1e-12 * np.maximum(1.0, np.max(np.abs(X), axis=0))


# ---------------------------------------------------------------------------
# input validation, the same at every scikit-learn version pyproject.toml allows
# ---------------------------------------------------------------------------
try:  # scikit-learn >= 1.6
    from sklearn.utils.validation import validate_data as _sklearn_validate_data
except ImportError:  # scikit-learn 1.5: the estimator's own method, same arguments
    def _sklearn_validate_data(estimator, X, *, reset, **check_params):
        return estimator._validate_data(X, reset=reset, **check_params)

#: check_array's switch for its own finiteness check: renamed in scikit-learn 1.6
_FINITE_ARG = ("ensure_all_finite" if "ensure_all_finite" in inspect.signature(check_array).parameters
               else "force_all_finite")


def validate_inputs(estimator, X, *, reset: bool) -> np.ndarray:
    """X as a 2-D float array, through scikit-learn's ``validate_data``:
    at fit (``reset=True``) it records ``n_features_in_`` and, for a
    DataFrame, ``feature_names_in_``; afterwards it refuses another count
    of inputs or other column names. Non-finite values are left to the
    caller, which names the cells (:meth:`Candidate._fit_input`).

    The arrays training and the chain pass (a non-empty 2-D float64 numpy
    array, to an estimator fitted without column names) take a short path
    that does what ``validate_data`` does with them (the array returned as
    is, ``n_features_in_`` set or compared, with scikit-learn's message)
    without its per-call cost (about 0.35 ms a predict and 0.8 ms a fit,
    measured 2026-12-04 with scikit-learn 1.9, several times the candidates'
    own arithmetic; thousands of calls in a training).
    ``tests/models/test_candidate_registry.py`` checks the two paths agree.
    """
    if (type(X) is np.ndarray and X.dtype == np.float64 and X.ndim == 2 and X.shape[0] > 0 and X.shape[1] > 0
            and not hasattr(estimator, "feature_names_in_")):
        if reset:
            estimator.n_features_in_ = X.shape[1]
        elif X.shape[1] != estimator.n_features_in_:
            raise ValueError(f"X has {X.shape[1]} features, but {type(estimator).__name__} is expecting "
                             f"{estimator.n_features_in_} features as input.")
        return X
    return _sklearn_validate_data(estimator, X, reset=reset, dtype=np.float64, **{_FINITE_ARG: False})


def _non_finite(X: np.ndarray, y: np.ndarray | None = None) -> str | None:
    """Where X (and y) hold NaN or inf, as "X row i, column j; y row k", or None."""
    bad_x = ~np.isfinite(X)
    bad_y = ~np.isfinite(y) if y is not None else np.zeros(0, dtype=bool)
    if not (bad_x.any() or bad_y.any()):
        return None
    where = [f"X row {i}, column {j}" for i, j in zip(*np.nonzero(bad_x))][:5]
    where += [f"y row {i}" for i in np.flatnonzero(bad_y)][:5]
    return "; ".join(where)


# ---------------------------------------------------------------------------
# the candidate base class and the registry
# ---------------------------------------------------------------------------
BOOSTING_STAGES = (5, 10, 20)
RIDGE_ALPHAS = (0.1, 1.0, 10.0, 100.0, 1000.0)
PLS_MAX_COMPONENTS = 4


def min_samples_leaf_for(n: int) -> int:
    """Lots per boosting leaf: n/8 between 2 and 10 (common practice, no source)."""
    return int(max(2, min(10, n // 8)))


#: name -> candidate class, in the order they are registered (see :func:`register`)
CANDIDATES: dict[str, type[Candidate]] = {}


def register(cls: type[Candidate]) -> type[Candidate]:
    """Class decorator: enter the candidate ``cls`` in :data:`CANDIDATES` under ``cls.name``."""
    if not cls.name:
        raise TypeError(f"{cls.__name__} sets no candidate name")
    if CANDIDATES.get(cls.name, cls) is not cls:
        raise TypeError(f"candidate name {cls.name!r} is taken by {CANDIDATES[cls.name].__name__}")
    CANDIDATES[cls.name] = cls
    return cls


class Candidate(RegressorMixin, BaseEstimator, metaclass=ABCMeta):
    """One candidate: a scikit-learn regressor that also says when it applies,
    what grid it is tuned over, how it is built and how its grid is fitted
    (class methods, so the class itself is the candidate's specification;
    see "Adding a candidate" in the module notes).

    ``fit``, ``predict`` and ``contributions`` check their input and call
    the subclass's ``_fit``, ``_predict`` and ``_contributions``.
    """

    #: key in :data:`CANDIDATES` and :data:`linkage.models.cv.SIMPLICITY_ORDER`
    name: ClassVar[str] = ""
    #: one line for the training report
    description: ClassVar[str] = ""
    #: how :func:`tune` picks the grid point: "min" (lowest inner RMSE) or
    #: "one_se" (the simplest within one standard error of it)
    grid_rule: ClassVar[str] = "min"

    # -- the estimator -----------------------------------------------------
    def fit(self, X, y):
        X, y = self._fit_input(X, y)
        return self._fit(X, y)

    def predict(self, X):
        return self._predict(self._input(X))

    def contributions(self, X):
        """(matrix rows × inputs, base value): rows add up to prediction − base."""
        return self._contributions(self._input(X))

    def _fit_input(self, X, y):
        """X (2-D) and y (1-D) as float arrays of one length; records
        ``n_features_in_`` (and ``feature_names_in_`` for a DataFrame);
        refuses NaN and inf, naming the cells."""
        who = type(self).__name__
        X = validate_inputs(self, X, reset=True)
        if not (type(y) is np.ndarray and y.dtype == np.float64 and y.shape == (X.shape[0],)):  # else as is
            y = np.asarray(column_or_1d(y, warn=True), dtype=np.float64)
            check_consistent_length(X, y)
        where = _non_finite(X, y)
        if where is not None:
            raise ValueError(f"{who}.fit: the data contain NaN or infinite values ({where}); the "
                             "candidates do not impute: leave out the lots missing a value, or fill them, "
                             "before fitting")
        return X, y

    def _input(self, X):
        """X checked against the fit: fitted, as many inputs (and the same
        column names, for a DataFrame), every value finite."""
        check_is_fitted(self)
        X = validate_inputs(self, X, reset=False)
        where = _non_finite(X)
        if where is not None:
            raise ValueError(f"{type(self).__name__}: the inputs contain NaN or infinite values ({where}); a "
                             "prediction needs every input")
        return X

    @abstractmethod
    def _fit(self, X: np.ndarray, y: np.ndarray):
        """Learn from checked inputs; return self."""

    @abstractmethod
    def _predict(self, X: np.ndarray) -> np.ndarray:
        """Predictions (rows,) for checked inputs."""

    def _contributions(self, X: np.ndarray):
        """(matrix rows × inputs, base value) for checked inputs; optional, like
        :meth:`lean_spec`, so a candidate without them says so."""
        raise TypeError(f"a {type(self).__name__} gives no per-input contributions")

    def lean_spec(self) -> dict:
        """The fitted model as plain numbers, ``{"kind": ..., ...}``, for
        :mod:`linkage.models.lean`."""
        raise TypeError(f"no lean form for a {type(self).__name__}")

    # -- the candidate -----------------------------------------------------
    @classmethod
    def not_applicable(cls, inputs: list[str], X: np.ndarray, y: np.ndarray) -> str | None:
        """Reason the candidate cannot be used on these data, or None."""
        if not _varying(X).any():
            return "no input varies over the training lots"
        return None

    @classmethod
    def grid(cls, n: int, p: int) -> list[dict]:
        """Hyperparameter grid, simplest first, for a tuning set of n lots and p inputs."""
        return [{}]

    @classmethod
    def build(cls, params: dict, inputs: list[str], *, n: int, monotone: dict[str, int] | None = None,
              seed: int = 0) -> Candidate:
        """An unfitted estimator at the grid point ``params`` for the stage
        ``inputs``, a training set of ``n`` lots, the stage's monotone
        constraints {input: ±1} and ``seed``."""
        return cls(**params)

    @classmethod
    def fit_predict_grid(cls, grid, Xtr, ytr, evals, *, inputs, monotone, seed):
        """Fit every grid point on (Xtr, ytr); predictions on each array of
        ``evals``: a list of arrays of shape (G, m_e)."""
        out = [np.empty((len(grid), len(Xe))) for Xe in evals]
        for g, params in enumerate(grid):
            est = cls.build(params, inputs, n=len(ytr), monotone=monotone, seed=seed).fit(Xtr, ytr)
            for e, Xe in enumerate(evals):
                if len(Xe):
                    out[e][g] = est.predict(Xe)
        return out


#: the former name of the candidate specification (now the class itself)
CandidateSpec = Candidate


# ---------------------------------------------------------------------------
# the candidates
# ---------------------------------------------------------------------------
@register
class MeanRegressor(Candidate):
    """Predicts the mean of the training lots."""

    name = "mean"
    description = "mean of the training lots (the floor)"

    @classmethod
    def not_applicable(cls, inputs, X, y):
        return None

    # scikit-learn's estimator checks ask a regressor for R² > 0.5 on their data unless it is tagged
    # poor_score; the mean is the floor by design (R² 0 on the training lots)
    def __sklearn_tags__(self):  # scikit-learn >= 1.6
        tags = super().__sklearn_tags__()
        tags.regressor_tags.poor_score = True
        return tags

    def _more_tags(self):  # scikit-learn 1.5
        return {"poor_score": True}

    def _fit(self, X, y):
        self.mean_ = float(np.mean(y))
        return self

    def _predict(self, X):
        return np.full(X.shape[0], self.mean_)

    def _contributions(self, X):
        return np.zeros(X.shape), self.mean_

    def lean_spec(self):
        return {"kind": "mean", "mean": float(self.mean_)}


@register
class RDRegressor(Candidate):
    """y = s0·exp(−k·ε) on the porosity column ``porosity_index`` of X."""

    name = "rd_baseline"
    description = "Ryshkewitch–Duckworth y0·exp(−k·ribbon_porosity), non-linear least squares"

    def __init__(self, porosity_index: int = 0):
        self.porosity_index = porosity_index

    @classmethod
    def not_applicable(cls, inputs, X, y):
        if POROSITY not in inputs:
            return "ribbon_porosity is not an input of this stage"
        eps = X[:, inputs.index(POROSITY)]
        if len(np.unique(eps)) < 3:
            return "the training lots have fewer than 3 distinct ribbon porosities; k cannot be estimated"
        if np.any((eps < 0) | (eps > 1)):
            return "ribbon_porosity lies outside 0–1"
        if np.any(y < 0):
            return "the target has negative values; y0·exp(−k·ε) cannot fit them"
        return None

    @classmethod
    def build(cls, params, inputs, *, n, monotone=None, seed=0):
        return cls(porosity_index=inputs.index(POROSITY))

    def _fit(self, X, y):
        from linkage.physics.strength import fit_ryshkewitch_duckworth

        eps = X[:, self.porosity_index]
        if eps.size < 3:
            raise CandidateError(f"Ryshkewitch–Duckworth fit needs at least 3 lots; got n_samples = {eps.size}")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # OptimizeWarning on the covariance of tiny fits
            try:
                fit = fit_ryshkewitch_duckworth(eps, y, method="nls")
            except (ValueError, RuntimeError) as exc:
                raise CandidateError(f"Ryshkewitch–Duckworth fit failed: {exc}") from None
        if not (np.isfinite(fit["s0"]) and np.isfinite(fit["k"])):
            raise CandidateError("Ryshkewitch–Duckworth fit did not converge to finite parameters")
        self.s0_, self.k_ = float(fit["s0"]), float(fit["k"])
        self.s0_se_ = float(fit["s0_se"]) if np.isfinite(fit["s0_se"]) else None
        self.k_se_ = float(fit["k_se"]) if np.isfinite(fit["k_se"]) else None
        self.base_ = float(np.mean(self._curve(eps)))
        return self

    def _curve(self, eps):
        return self.s0_ * np.exp(-self.k_ * np.asarray(eps, dtype=float))  # y = y0 exp(-k eps)

    def _predict(self, X):
        return self._curve(X[:, self.porosity_index])

    def _contributions(self, X):
        c = np.zeros(X.shape)
        c[:, self.porosity_index] = self._predict(X) - self.base_
        return c, self.base_

    def lean_spec(self):
        return {"kind": "rd", "porosity_index": int(self.porosity_index), "s0": float(self.s0_),
                "k": float(self.k_), "base": float(self.base_)}

    @property
    def params_(self) -> dict:
        return {"s0": self.s0_, "k": self.k_, "s0_se": self.s0_se_, "k_se": self.k_se_}


# the ribbon stage's physical baseline (Johanson's rolling theory) lives in its own module; imported here so that
# it registers after rd_baseline, in its place in the simplicity order
from linkage.models import physical as _physical  # noqa: E402,F401


# ---------------------------------------------------------------------------
# physics-shaped linear forms with inputs selected per attribute
# ---------------------------------------------------------------------------
#: name endings of dimensional inputs (sizes, forces, speeds, stresses) that the
#: link candidates may enter as logarithms (power laws); fractions and
#: percentages (porosity, fines) always enter linearly (exponential laws)
LOG_INPUT_SUFFIXES = ("_mm", "_um", "_kn", "_kn_per_cm", "_rpm", "_mpa", "_n")
#: most inputs for which every subset is tried; above it, subsets of at most
#: two inputs and all of them (common practice, no source)
SUBSET_ALL_UP_TO = 5
#: ridge added to the standardised normal equations (numerical guard only)
_LINK_RIDGE = 1e-10


def log_eligible(inputs: list[str]) -> np.ndarray:
    """Which inputs may enter as ln(x): dimensional quantities by name (:data:`LOG_INPUT_SUFFIXES`)."""
    return np.array([str(c).endswith(LOG_INPUT_SUFFIXES) for c in inputs], dtype=bool)


def input_subsets(p: int) -> list[tuple[int, ...]]:
    """Non-empty subsets of p inputs, smallest first (all of them up to
    :data:`SUBSET_ALL_UP_TO` inputs)."""
    from itertools import combinations

    sizes = range(1, p + 1) if p <= SUBSET_ALL_UP_TO else [1, 2, p]
    return [s for k in sizes for s in combinations(range(p), k)]


def fit_link_batch(Z: np.ndarray, y: np.ndarray, masks: np.ndarray, link: str, y_max: float):
    """Weighted least squares of g(y) on the columns of Z that each row of
    ``masks`` (G, p) selects, for all G subsets at once.

    Two steps: ordinary least squares on g(y), then again with the weights
    1/g'(ŷ)² at its fitted values (:func:`linkage.models.lean.link_weights`). Returns
    (z_mean (p,), coef (G, p), intercept (G,)) for
    g(ŷ) = intercept + (z − z_mean)·coef; columns outside a subset get 0.
    """
    from linkage.models.lean import link_inverse, link_transform, link_weights

    n, p = Z.shape
    G = masks.shape[0]
    z_mean = Z.mean(axis=0)
    sd = Z.std(axis=0)
    sd[~(sd > 1e-12 * np.maximum(1.0, np.abs(z_mean)))] = 1.0
    Zs = (Z - z_mean) / sd
    D = np.hstack([np.ones((n, 1)), Zs])  # (n, p + 1)
    keep = np.hstack([np.ones((G, 1), dtype=bool), masks])  # (G, p + 1)
    t = link_transform(link, y, y_max)
    eye = np.eye(p + 1)

    def solve(w):  # w (G, n)
        A = np.einsum("gn,ni,nj->gij", w, D, D)
        b = np.einsum("gn,ni,n->gi", w, D, t)
        off = ~keep
        A = np.where(keep[:, :, None] & keep[:, None, :], A, 0.0) + eye[None] * off[:, :, None]
        A = A + _LINK_RIDGE * eye[None] * np.maximum(np.einsum("gii->g", A), 1.0)[:, None, None]
        b = np.where(keep, b, 0.0)
        return np.linalg.solve(A, b[:, :, None])[:, :, 0]  # (G, p + 1)

    beta = solve(np.ones((G, n)))
    if link != "identity":
        y_fit = link_inverse(link, beta @ D.T, y_max)
        w = link_weights(link, y_fit, y_max)
        w = w / np.maximum(w.mean(axis=1, keepdims=True), np.finfo(float).tiny)
        if np.all(np.isfinite(w)):
            beta = solve(w)
    coef = beta[:, 1:] / sd
    return z_mean, coef, beta[:, 0]


class _LinkLinear(Candidate):
    """g(y) linear in a subset of the stage inputs, each entering as x or
    ln x; the subset and the choice of logarithms are tuned by inner grouped
    CV (the simplest grid point within one standard error of the lowest
    inner RMSE: fewest inputs, then the form's preferred entry of the
    dimensional inputs, :attr:`logs_first`). So each attribute of a stage
    uses the inputs that act on it. Subclasses fix the link g (see
    :mod:`linkage.models.lean`, ``link`` kind).

    x and ln x cost one coefficient each, so neither is simpler; the tie is
    broken by the physics of the form. Where g(y) is a log or a log-log
    (``log_linear``, ``weibull_release``) the linear predictor is the
    exponent of a physical law, and a dimensional quantity enters an
    exponent as a power law (ln x: a change of unit moves only the
    intercept; a linear term b·x would need a reference scale of x the data
    do not give). The two fit a noisy campaign about equally well (their
    inner RMSEs lie well within one SE of each other), yet b·x is a chord of
    b'·ln x and misplaces the level at the middle of the input's range: on
    the unit scenario of :mod:`linkage.synthetic` (release ∝ force^0.4 in
    the Weibull time scale) release at 14 kN came out 0.5 % high, which
    moved P(pass at S1) of USP <711> by 0.16. Least squares (identity
    link) keeps x first."""

    link: ClassVar[str] = "identity"
    grid_rule: ClassVar[str] = "one_se"
    #: grid order of the dimensional inputs: ln x before x (power laws) or x before ln x
    logs_first: ClassVar[bool] = False

    def __init__(self, features=None, log_mask=None):
        self.features = features
        self.log_mask = log_mask

    @classmethod
    def grid(cls, n, p):
        order = (True, False) if cls.logs_first else (False, True)
        return [{"features": list(s), "log_inputs": b} for s in input_subsets(p) for b in order]

    @classmethod
    def build(cls, params, inputs, *, n, monotone=None, seed=0):
        elig = log_eligible(inputs)
        mask = elig if params.get("log_inputs") else np.zeros(len(inputs), dtype=bool)
        return cls(features=list(params.get("features", range(len(inputs)))), log_mask=[bool(v) for v in mask])

    @classmethod
    def y_max_for(cls, y) -> float:
        return 1.0

    @classmethod
    def response(cls, y, y_max):
        """The training values as the link sees them (unchanged by default)."""
        return y

    @classmethod
    def _masks(cls, grid, p):
        masks = np.zeros((len(grid), p), dtype=bool)
        for g, params in enumerate(grid):
            masks[g, list(params["features"])] = True
        return masks

    @classmethod
    def fit_predict_grid(cls, grid, Xtr, ytr, evals, *, inputs, monotone, seed):
        """Every subset fitted at once (:func:`fit_link_batch`), for the
        linear and the logarithmic inputs."""
        from linkage.models.lean import link_predict

        p = Xtr.shape[1]
        out = [np.empty((len(grid), len(Xe))) for Xe in evals]
        y_max = cls.y_max_for(ytr)
        masks = cls._masks(grid, p)
        for use_log in (False, True):
            rows = np.array([bool(g.get("log_inputs")) == use_log for g in grid])
            if not rows.any():
                continue
            log_mask = cls._usable_logs(log_eligible(inputs) & use_log, Xtr)
            Z = cls._linked_inputs(Xtr, log_mask)
            z_mean, coef, icpt = fit_link_batch(Z, cls.response(ytr, y_max), masks[rows], cls.link, y_max)
            for e, Xe in enumerate(evals):
                if len(Xe):
                    for k, g in enumerate(np.flatnonzero(rows)):
                        out[e][g] = link_predict(Xe, cls.link, log_mask, z_mean, coef[k], icpt[k], y_max)
        return out

    @staticmethod
    def _usable_logs(mask, X) -> np.ndarray:
        """The log mask without inputs that are not positive on every training lot."""
        return np.asarray(mask, dtype=bool) & np.all(X > 0, axis=0)

    @staticmethod
    def _linked_inputs(X, log_mask):
        """The inputs on the link scale: log where ``log_mask`` says so (lean._link_inputs)."""
        from linkage.models.lean import _link_inputs

        return _link_inputs(X, log_mask)

    @classmethod
    def response_domain(cls, y) -> str | None:
        """Why the link cannot take these targets (None when it can)."""
        return None

    def _fit(self, X, y):
        why = type(self).response_domain(y)
        if why is not None:
            raise CandidateError(f"{type(self).__name__}: {why}")
        p = X.shape[1]
        features = list(range(p)) if self.features is None else [int(j) for j in self.features]
        if not features or min(features) < 0 or max(features) >= p:
            raise CandidateError(f"{type(self).__name__}: features {features} do not fit {p} inputs")
        mask = np.zeros(p, dtype=bool) if self.log_mask is None else np.asarray(self.log_mask, dtype=bool)
        if mask.size != p:
            raise CandidateError(f"{type(self).__name__}: log_mask has {mask.size} entries for {p} inputs")
        self.log_mask_ = self._usable_logs(mask, X)
        self.y_max_ = float(self.y_max_for(y))
        sel = np.zeros((1, p), dtype=bool)
        sel[0, features] = True
        Z = self._linked_inputs(X, self.log_mask_)
        self.z_mean_, coef, icpt = fit_link_batch(Z, self.response(y, self.y_max_), sel, self.link, self.y_max_)
        self.coef_, self.intercept_ = coef[0], float(icpt[0])
        self.used_ = sel[0]
        if not (np.all(np.isfinite(self.coef_)) and np.isfinite(self.intercept_)):
            raise CandidateError(f"{type(self).__name__}: the fit gave non-finite coefficients")
        return self

    def _predict(self, X):
        from linkage.models.lean import link_predict

        return link_predict(X, self.link, self.log_mask_, self.z_mean_, self.coef_, self.intercept_, self.y_max_)

    def _contributions(self, X):
        from linkage.models.lean import link_contributions

        return link_contributions(X, self.link, self.log_mask_, self.z_mean_, self.coef_, self.intercept_,
                                  self.y_max_)

    def leverage_basis(self, X, factor: float) -> dict:
        """C = (DᵀWD)⁻¹ of the training lots X for :func:`linkage.models.lean.link_leverage`:
        D = [1, hⱼ(xⱼ) − x_meanⱼ] over the inputs the model uses (those the
        inner selection kept), W = :func:`linkage.models.lean.link_weights` at
        the fitted values (the weights of the model's final weighted least
        squares, up to a constant that cancels in h). Returns
        ``{"columns", "cov", "factor"}``; a pseudo-inverse where D is
        rank-deficient."""
        from linkage.models.lean import link_weights

        check_is_fitted(self, "coef_")
        X = np.asarray(X, dtype=float)
        cols = np.flatnonzero(self.used_)
        Z = self._linked_inputs(X, self.log_mask_)
        D = np.hstack([np.ones((X.shape[0], 1)), (Z - self.z_mean_)[:, cols]])
        W = link_weights(self.link, self._predict(X), self.y_max_)
        return {"columns": cols.astype(np.int64), "cov": np.linalg.pinv(D.T @ (W[:, None] * D)),
                "factor": float(factor)}

    def lean_spec(self):
        return {"kind": "link", "link": self.link, "log_mask": np.asarray(self.log_mask_, dtype=bool),
                "x_mean": np.asarray(self.z_mean_, float), "coef": np.asarray(self.coef_, float),
                "intercept": float(self.intercept_), "y_max": float(self.y_max_)}


@register
class LogLinearRegressor(_LinkLinear):
    """ln y = a + Σ bⱼ·hⱼ(xⱼ) on the inputs selected for the attribute.

    The generalised Ryshkewitch–Duckworth form (Ryshkewitch 1953; Duckworth
    1953): ln σ = ln σ₀ − k·ε, here with further terms (compression force,
    granule size) where they act; with sizes in logarithms it is also the
    power law of the RRSB characteristic size in the mill screen (Rosin &
    Rammler 1933: ln d50 linear in ln x′) and of friability in strength.
    Predictions are positive by construction. Only for positive targets."""

    name = "log_linear"
    description = "ln y linear in inputs selected per attribute (Ryshkewitch–Duckworth, power laws)"
    link = "log"
    logs_first = True  # power laws in dimensional inputs (see _LinkLinear)

    @classmethod
    def response_domain(cls, y) -> str | None:
        return "the target has values at or below 0; ln y is undefined" if np.any(np.asarray(y) <= 0) else None

    @classmethod
    def not_applicable(cls, inputs, X, y):
        why = super().not_applicable(inputs, X, y)
        return why if why is not None else cls.response_domain(y)


#: highest value of a percentage target the release form accepts (dissolution
#: is bounded at 150 % of label claim by the template)
RELEASE_MAX_PCT = 150.0
#: the plateau F∞ of the release form: the whole label claim [%]
RELEASE_PLATEAU_PCT = 100.0
#: share of the plateau at which a lot at or above it enters the fit
RELEASE_TOP = 0.999


@register
class WeibullReleaseRegressor(_LinkLinear):
    """y = y_max·(1 − exp(−e^η)), η = a + Σ bⱼ·hⱼ(xⱼ): the Weibull release
    profile (Langenbucher 1972, J. Pharm. Pharmacol. 24:979) at the spec's
    time point, F = F∞(1 − exp(−(t/τ)^β)), with ln τ linear in the inputs
    (first-order release is β = 1), since then
    ln(−ln(1 − F/F∞)) = β ln t − β ln τ. The same form is the RRSB undersize
    (Rosin & Rammler 1933): fines = 100(1 − exp(−(x_c/x′)^n)). For
    percentages, with F∞ = 100 % (the label claim; a lot measured at or
    above it enters the fit at 99.9 %, see :meth:`response`). Predictions
    lie in (0, 100) by construction; a product whose release levels off
    elsewhere fits worse, and the one-SE selection then prefers another
    candidate."""

    name = "weibull_release"
    description = "Weibull / first-order release and RRSB undersize form, inputs selected per attribute"
    link = "cloglog"
    logs_first = True  # ln τ (or ln x′) a power law in force and size (see _LinkLinear)

    @classmethod
    def y_max_for(cls, y) -> float:
        return RELEASE_PLATEAU_PCT

    @classmethod
    def response(cls, y, y_max):
        """Lots measured at or above the plateau (release scatters past the
        label claim) enter the fit at :data:`RELEASE_TOP` of it, where the
        delta-method weights give them almost no say."""
        return np.minimum(y, RELEASE_TOP * y_max)

    @classmethod
    def response_domain(cls, y) -> str | None:
        y = np.asarray(y)
        if np.any(y <= 0) or np.any(y > RELEASE_MAX_PCT):
            return f"the target is not a percentage between 0 (excluded) and {RELEASE_MAX_PCT:g}"
        return None

    @classmethod
    def not_applicable(cls, inputs, X, y):
        why = super().not_applicable(inputs, X, y)
        return why if why is not None else cls.response_domain(y)


@register
class LinearSelectRegressor(_LinkLinear):
    """y = a + Σ bⱼ·hⱼ(xⱼ), ordinary least squares on the inputs selected
    for the attribute by inner grouped CV (best-subset selection, Hastie,
    Tibshirani & Friedman 2009, §3.3.1, with the one-standard-error rule of
    §7.10). Dimensional inputs may enter as logarithms (the solid fraction
    of a ribbon is linear in ln roll force, a logarithmic compressibility law)."""

    name = "linear_select"
    description = "least squares on inputs selected per attribute (x or ln x)"
    link = "identity"


def vip_from_weights(weights, ss) -> np.ndarray:
    """Cumulative VIP (Wold, Johansson & Cocchi 1993; Chong & Jun 2005):
    VIPⱼ = √(p · Σₐ SSₐ (wⱼₐ/‖wₐ‖)² / Σₐ SSₐ), with SSₐ the y-variance
    explained by component a. Σⱼ VIPⱼ² = p."""
    W = np.asarray(weights, dtype=float)
    ss = np.asarray(ss, dtype=float)
    if W.ndim != 2 or W.shape[1] != ss.size:
        raise ValueError("weights must be (p, A) and ss (A,)")
    norms = np.linalg.norm(W, axis=0)
    norms[norms == 0] = 1.0
    Wn = W / norms
    p = W.shape[0]
    total = ss.sum()
    if not total > 0:
        return np.zeros(p)
    return np.sqrt(p * (Wn**2 @ ss) / total)


def pls_vip(pls) -> np.ndarray:
    """VIP of a fitted scikit-learn ``PLSRegression`` with one target:
    SSₐ = qₐ²·tₐᵀtₐ from its y-loadings and x-scores."""
    T = pls.x_scores_
    q = np.asarray(pls.y_loadings_, dtype=float)[0]
    ss = q**2 * np.sum(T**2, axis=0)
    return vip_from_weights(pls.x_weights_, ss)


@register
class PLSRegressor(Candidate):
    """PLS1 on standardised inputs (scikit-learn ``PLSRegression``, scale=True).

    Inputs without variation over the training lots are left out of the fit
    (coefficient 0, VIP 0); with none left it predicts the training mean
    (documented fallback). ``n_components`` is capped at the number of
    varying inputs and n − 1.
    """

    name = "pls"
    description = "PLS on standardised inputs, components by inner grouped CV"

    def __init__(self, n_components: int = 1):
        self.n_components = n_components

    @classmethod
    def grid(cls, n, p):
        n_train = n - math.ceil(n / 5)
        top = max(1, min(p, PLS_MAX_COMPONENTS, n_train - 1))
        return [{"n_components": a} for a in range(1, top + 1)]

    @classmethod
    def fit_predict_grid(cls, grid, Xtr, ytr, evals, *, inputs, monotone, seed):
        """One fit with the most components; the smaller grid points from its
        first components (:meth:`predict_components`)."""
        out = [np.empty((len(grid), len(Xe))) for Xe in evals]
        top = max(g["n_components"] for g in grid)
        est = cls.build({"n_components": top}, inputs, n=len(ytr)).fit(Xtr, ytr)
        for g, params in enumerate(grid):
            for e, Xe in enumerate(evals):
                if len(Xe):
                    out[e][g] = est.predict_components(Xe, params["n_components"])
        return out

    def _fit(self, X, y):
        from sklearn.cross_decomposition import PLSRegression

        n, p = X.shape
        self.x_mean_ = X.mean(axis=0)
        self.intercept_ = float(y.mean())
        self.coef_ = np.zeros(p)
        self.vip_ = np.zeros(p)
        keep = _varying(X)
        self.used_ = keep
        a = int(min(self.n_components, keep.sum(), n - 1))
        self.n_components_ = max(a, 0)
        if a < 1 or not np.ptp(y) > 0:
            return self
        pls = PLSRegression(n_components=a, scale=True).fit(X[:, keep], y)
        # the scaling PLSRegression(scale=True) applies: SD with ddof = 1
        self.x_sd_ = X[:, keep].std(axis=0, ddof=1)
        self.y_sd_ = float(y.std(ddof=1))
        self.coef_[keep] = np.asarray(pls.coef_, dtype=float).reshape(-1)
        self.intercept_ = float(np.asarray(pls.intercept_).reshape(-1)[0])
        self.vip_ = np.zeros(p)
        v = pls_vip(pls)
        # with constant inputs left out, Σ VIP² over the used inputs is their count;
        # rescale to the formula with all p inputs (zero weight on the unused ones)
        self.vip_[keep] = v * math.sqrt(p / keep.sum())
        self.pls_ = pls
        return self

    def _predict(self, X):
        return (X - self.x_mean_) @ self.coef_ + self.intercept_

    def predict_components(self, X, n_components: int) -> np.ndarray:
        """Prediction with the first ``n_components`` components only.

        NIPALS components are sequential (the scores of the first a do not
        depend on later ones, and PᵀW is upper triangular), so the
        a-component model is T[:, :a]·q[:a] = Z·R[:, :a]·q[:a] with R the
        x-rotations of the larger fit; equal to refitting with a components.
        """
        X = self._input(X)
        a = min(int(n_components), self.n_components_)
        if a >= self.n_components_ or not hasattr(self, "pls_"):
            return self._predict(X)
        pls, keep = self.pls_, self.used_
        Xk = X[:, keep]
        x_sd = self.x_sd_
        z = (Xk - self.x_mean_[keep]) / x_sd
        beta = pls.x_rotations_[:, :a] @ pls.y_loadings_[0, :a]
        return z @ beta * self.y_sd_ + self.intercept_

    def _contributions(self, X):
        return (X - self.x_mean_) * self.coef_, self.intercept_

    def lean_spec(self):
        return {"kind": "linear", "x_mean": np.asarray(self.x_mean_, float), "coef": np.asarray(self.coef_, float),
                "intercept": float(self.intercept_)}


@register
class QuadraticRidge(Candidate):
    """Ridge regression on standardised inputs zᵢ, their squares zᵢ² and
    pairwise products zᵢzⱼ (intercept not penalised).

    ``contributions`` are exact interventional Shapley values with the inputs
    drawn independently from their training distributions: for
    f = b + Σβᵢzᵢ + Σβᵢᵢzᵢ² + Σβᵢⱼzᵢzⱼ, input i gets βᵢ(zᵢ − mᵢ) +
    βᵢᵢ(zᵢ² − sᵢ) + Σⱼ βᵢⱼ·½(zᵢ − mᵢ)(zⱼ + mⱼ), with mᵢ, sᵢ the training
    means of zᵢ and zᵢ². The base value is the model's expectation under that
    background, so the contributions add up to prediction − base exactly.
    """

    name = "quadratic_ridge"
    description = "ridge on standardised inputs, squares and pairwise products, penalty by inner grouped CV"

    def __init__(self, alpha: float = 1.0):
        self.alpha = alpha

    @classmethod
    def grid(cls, n, p):
        return [{"alpha": a} for a in reversed(RIDGE_ALPHAS)]  # most penalised (simplest) first

    def _fit(self, X, y):
        self.x_mean_ = X.mean(axis=0)
        sd = X.std(axis=0)
        self.x_scale_ = np.where(_varying(X), sd, 1.0)
        Z = (X - self.x_mean_) / self.x_scale_
        F = quad_features(Z)
        self.f_mean_ = F.mean(axis=0)
        Fc = F - self.f_mean_
        yc = y - y.mean()
        A = Fc.T @ Fc + float(self.alpha) * np.eye(F.shape[1])
        self.beta_ = np.linalg.solve(A, Fc.T @ yc)
        self.intercept_ = float(y.mean() - self.f_mean_ @ self.beta_)
        self.z_m1_ = Z.mean(axis=0)
        self.z_m2_ = (Z**2).mean(axis=0)
        return self

    def _predict(self, X):
        return quadratic_predict(X, self.x_mean_, self.x_scale_, self.beta_, self.intercept_)

    def _contributions(self, X):
        return quadratic_contributions(X, self.x_mean_, self.x_scale_, self.beta_, self.intercept_, self.z_m1_,
                                       self.z_m2_)

    def lean_spec(self):
        return {"kind": "quadratic", "x_mean": np.asarray(self.x_mean_, float),
                "x_scale": np.asarray(self.x_scale_, float), "beta": np.asarray(self.beta_, float),
                "intercept": float(self.intercept_), "z_m1": np.asarray(self.z_m1_, float),
                "z_m2": np.asarray(self.z_m2_, float)}


@register
class BoostingRegressor(Candidate):
    """scikit-learn ``HistGradientBoostingRegressor`` with small-data
    settings; ``contributions`` are path-dependent TreeSHAP values (Lundberg
    et al. 2020, Nat. Mach. Intell. 2:56-67), which add up to prediction −
    expected value: the values ``shap.TreeExplainer`` gives, computed here
    without importing shap (see :func:`tree_shap_values`)."""

    name = "boosting"
    description = "histogram gradient boosting, depth 2, learning rate 0.2, trees by inner grouped CV"

    def __init__(self, max_iter: int = 20, learning_rate: float = 0.2, max_depth: int = 2,
                 min_samples_leaf: int = 3, monotonic_cst=None, random_state: int = 0):
        self.max_iter = max_iter
        self.learning_rate = learning_rate
        self.max_depth = max_depth
        self.min_samples_leaf = min_samples_leaf
        self.monotonic_cst = monotonic_cst
        self.random_state = random_state

    @classmethod
    def grid(cls, n, p):
        return [{"max_iter": m} for m in BOOSTING_STAGES]

    @classmethod
    def build(cls, params, inputs, *, n, monotone=None, seed=0):
        cst = [int((monotone or {}).get(c, 0)) for c in inputs]
        return cls(min_samples_leaf=min_samples_leaf_for(n), monotonic_cst=cst if any(cst) else None,
                   random_state=seed, **params)

    @classmethod
    def fit_predict_grid(cls, grid, Xtr, ytr, evals, *, inputs, monotone, seed):
        """One fit with the most trees; the smaller grid points from its staged predictions."""
        top = max(g["max_iter"] for g in grid)
        est = cls.build({"max_iter": top}, inputs, n=len(ytr), monotone=monotone, seed=seed).fit(Xtr, ytr)
        want = [g["max_iter"] for g in grid]
        out = []
        for Xe in evals:
            if len(Xe) == 0:
                out.append(np.empty((len(grid), 0)))
                continue
            staged = [p for i, p in enumerate(est.staged_predict(Xe), start=1) if i in want]
            out.append(np.vstack(staged))
        return out

    def _model(self):
        from sklearn.ensemble import HistGradientBoostingRegressor

        return HistGradientBoostingRegressor(
            learning_rate=self.learning_rate, max_iter=self.max_iter, max_depth=self.max_depth,
            max_leaf_nodes=2 ** self.max_depth, min_samples_leaf=self.min_samples_leaf,
            l2_regularization=0.0, early_stopping=False,
            monotonic_cst=None if self.monotonic_cst is None else list(self.monotonic_cst),
            random_state=self.random_state,
        )

    def _fit(self, X, y):
        self.model_ = self._model().fit(X, y)
        self.n_iter_ = int(self.model_.n_iter_)  # trees built (scikit-learn's convention for max_iter)
        return self

    def _predict(self, X):
        fast = tree_predict(self.model_, X) if X.shape[0] <= TREE_PREDICT_ROWS else None
        return fast if fast is not None else self.model_.predict(X)

    def staged_predict(self, X):
        return self.model_.staged_predict(self._input(X))

    def _contributions(self, X):
        fast = tree_shap_values(self.model_, X)
        if fast is not None:
            return fast
        with warnings.catch_warnings():  # shap's own import-time deprecation notices
            warnings.simplefilter("ignore", PendingDeprecationWarning)
            warnings.simplefilter("ignore", DeprecationWarning)
            import shap  # heavy: only for inputs the direct computation does not cover

        explainer = shap.TreeExplainer(self.model_)
        values = np.asarray(explainer.shap_values(X), dtype=float).reshape(X.shape)
        base = float(np.asarray(explainer.expected_value, dtype=float).reshape(-1)[0])
        return values, base

    def lean_spec(self):
        trees = _trees(self.model_)
        if trees is None:
            import sklearn

            raise TypeError(f"the boosted trees of this model cannot be read into the lean form with scikit-learn "
                            f"{sklearn.__version__} (categorical splits, another loss, or a private tree layout "
                            "this version of linkage does not know); train without boosting "
                            "(--candidates) or with the scikit-learn version pyproject.toml names")
        out = {"kind": "trees", "baseline": float(trees.baseline), "depth": int(trees.depth)}
        for name in ("feature", "threshold", "left", "right", "value", "leaf", "leaf_value", "path_feature",
                     "path_threshold", "path_left", "path_fraction"):
            a = np.asarray(getattr(trees, name))
            out[name] = a.astype(np.int64) if a.dtype.kind in "iu" else a
        return out


#: fitted model -> its trees as arrays (see _trees); weak, so a model that is
#: dropped takes its entry with it
_TREES: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


@dataclass(frozen=True)
class _Trees:
    """The trees of a fitted ``HistGradientBoostingRegressor`` as padded arrays
    (trees × nodes), and every leaf's path (leaves × depth)."""

    baseline: float
    feature: np.ndarray
    threshold: np.ndarray
    left: np.ndarray
    right: np.ndarray
    value: np.ndarray
    leaf: np.ndarray
    depth: int
    leaf_value: np.ndarray  # (L,) value of each leaf, trees in order
    path_feature: np.ndarray  # (L, D) input split on at each step of the leaf's path; -1 pads
    path_threshold: np.ndarray  # (L, D)
    path_left: np.ndarray  # (L, D) bool: the path goes left there
    path_fraction: np.ndarray  # (L, D) count(child) / count(both children); 1 pads


def _trees(model) -> _Trees | None:
    """The arrays of :class:`_Trees` for ``model`` (cached), or None where a
    tree has categorical splits, an iteration holds more than one tree, or
    scikit-learn's private layout (``_predictors``, ``_baseline_prediction``,
    the node record fields) is not the one read here: then the callers use
    scikit-learn's own ``predict`` and shap's ``TreeExplainer``, and the lean
    export refuses with a clear message (:meth:`BoostingRegressor.lean_spec`)."""
    try:
        return _read_trees(model)
    except (AttributeError, KeyError, IndexError, ValueError, TypeError):
        return None  # a renamed or changed private attribute


def _read_trees(model) -> _Trees | None:
    try:
        key, trees = _TREES[model]
        if key is model._predictors:  # a refit makes a new list of trees
            return trees
    except KeyError:
        pass
    per_tree = []
    for predictors in model._predictors:
        if len(predictors) != 1:
            return None
        nodes = predictors[0].nodes
        names = nodes.dtype.names
        leaf = nodes["is_leaf"].astype(bool)
        if "is_categorical" in names and np.any(nodes["is_categorical"][~leaf]):
            return None
        threshold = nodes["num_threshold"] if "num_threshold" in names else nodes["threshold"]
        per_tree.append((nodes["feature_idx"].astype(np.intp), threshold.astype(float),
                         nodes["left"].astype(np.intp), nodes["right"].astype(np.intp),
                         nodes["value"].astype(float), leaf, nodes["count"].astype(float)))
    if not per_tree:
        return None
    size = max(len(t[0]) for t in per_tree)

    def pad(k, fill, dtype):
        out = np.full((len(per_tree), size), fill, dtype=dtype)
        for i, t in enumerate(per_tree):
            out[i, :len(t[k])] = t[k]
        return out

    leaf_value, paths = [], []
    for feature, threshold, left, right, value, leaf, count in per_tree:
        stack = [(0, ())]
        while stack:
            i, path = stack.pop()
            if leaf[i]:
                leaf_value.append(float(value[i]))
                paths.append(path)
                continue
            both = count[left[i]] + count[right[i]]
            stack.append((int(right[i]), path + ((int(feature[i]), float(threshold[i]), False,
                                                   count[right[i]] / both),)))
            stack.append((int(left[i]), path + ((int(feature[i]), float(threshold[i]), True,
                                                  count[left[i]] / both),)))
    depth = max(len(p) for p in paths)
    shape = (len(paths), depth)
    path_feature, path_threshold = np.full(shape, -1, dtype=np.intp), np.zeros(shape)
    path_left, path_fraction = np.ones(shape, dtype=bool), np.ones(shape)
    for k, path in enumerate(paths):
        for j, (f, t, go_left, q) in enumerate(path):
            path_feature[k, j], path_threshold[k, j], path_left[k, j], path_fraction[k, j] = f, t, go_left, q
    trees = _Trees(
        baseline=float(np.asarray(model._baseline_prediction, dtype=float).reshape(-1)[0]),
        feature=pad(0, 0, np.intp), threshold=pad(1, 0.0, float), left=pad(2, 0, np.intp), right=pad(3, 0, np.intp),
        value=pad(4, 0.0, float), leaf=pad(5, True, bool), depth=depth, leaf_value=np.asarray(leaf_value),
        path_feature=path_feature, path_threshold=path_threshold, path_left=path_left, path_fraction=path_fraction)
    _TREES[model] = (model._predictors, trees)
    return trees


def _applies(model, X: np.ndarray) -> bool:
    return (X.ndim == 2 and X.shape[1] == getattr(model, "n_features_in_", -1) and bool(np.all(np.isfinite(X)))
            and type(model).__name__ == "HistGradientBoostingRegressor"
            and getattr(model, "loss", None) == "squared_error")


#: up to this many rows BoostingRegressor.predict walks the trees itself
#: (tree_predict); above it scikit-learn's compiled predictor is faster
TREE_PREDICT_ROWS = 512


def tree_predict(model, X: np.ndarray):
    """The prediction of a fitted scikit-learn ``HistGradientBoostingRegressor``
    (squared error) at finite inputs, by walking its trees here with numpy;
    None where this does not apply (missing values, categorical splits,
    another loss), so that the caller uses ``model.predict``.

    The same arithmetic as scikit-learn's: the baseline plus each tree's
    leaf value, added tree by tree in order (so the same floats to the last
    bit), a row going left where ``x <= threshold``. A what-if predicts one
    row through a dozen such models, where scikit-learn's per-call set-up
    (input checks, a parallel region per tree) costs far more than the trees.
    """
    X = np.asarray(X, dtype=float)
    trees = _trees(model) if _applies(model, X) else None
    if trees is None:
        return None
    return walk_trees(trees, X)


#: largest 2^inputs × rows × leaves for which :func:`tree_shap_values` enumerates
#: coalitions; above it the shap package's polynomial algorithm is used
TREE_SHAP_BUDGET = 20_000_000


def tree_shap_values(model, X: np.ndarray):
    """Exact path-dependent TreeSHAP values of a fitted scikit-learn
    ``HistGradientBoostingRegressor`` and its expected value, or ``None``
    where this direct computation does not apply (missing or non-finite
    inputs, categorical splits, too many inputs × rows), so that the caller
    uses ``shap.TreeExplainer``.

    Definition (Lundberg, Erion & Lee 2018, arXiv:1802.03888, Algorithm 1;
    Lundberg et al. 2020, Nat. Mach. Intell. 2:56-67): the value of a
    coalition S of inputs is v(S) = E[f(x) | x_S], taken down each tree by
    following x at a split on an input in S and otherwise averaging the two
    children weighted by their training counts; so a leaf's weight is the
    product, along its path, of 1{x goes this way} (input in S) or
    count(child)/count(both children) (input not in S), and v(S) sums leaf
    value × weight over all leaves of all trees. An input's value is its
    Shapley value, φᵢ = Σ_{S ∌ i} |S|!(p−|S|−1)!/p! · (v(S ∪ {i}) − v(S)),
    here by enumerating all 2^p coalitions (p inputs; a stage has a handful).
    The expected value is v(∅) plus the baseline prediction. These are the
    numbers shap's TreeExplainer computes with its polynomial-time algorithm
    (a test compares them); doing it here keeps the several-second shap
    import off a what-if.
    """
    X = np.asarray(X, dtype=float)
    trees = _trees(model) if _applies(model, X) else None
    if trees is None:
        return None
    n, p = X.shape
    n_leaves = trees.leaf_value.size
    if (2 ** p) * n * n_leaves > TREE_SHAP_BUDGET:
        return None
    return tree_shap(trees, X)


@dataclass
class TuneResult:
    """Inner grouped CV of one candidate on one tuning set.

    ``params`` the chosen grid point; ``grid_rmse`` the inner RMSE of every
    grid point; ``inner_pred`` (n,) out-of-fold predictions of the tuning lots
    at the chosen point; ``inner_fold`` (n,) their inner fold; ``extra_pred``
    (F, m) the prediction of each inner-fold model at extra points (for
    nested CV+).
    """

    params: dict
    grid_rmse: list[float]
    inner_pred: np.ndarray
    inner_fold: np.ndarray
    extra_pred: np.ndarray


def tune(spec: type[Candidate], X: np.ndarray, y: np.ndarray, groups, X_extra: np.ndarray | None = None, *,
         inputs: list[str], monotone: dict[str, int] | None = None, seed: int = 0,
         splits: list | None = None) -> TuneResult:
    """Choose the candidate's hyperparameters by inner grouped CV (lowest
    inner RMSE; ties go to the simpler grid point, listed first; a candidate
    whose ``grid_rule`` is ``"one_se"`` takes the simplest grid point within
    one standard error of the lowest, as the outer selection does). ``splits``
    may pass the inner splits of ``groups`` already made."""
    if splits is None:
        splits = inner_splits(groups)
    grid = spec.grid(len(y), X.shape[1])
    G = len(grid)
    if X_extra is None:
        X_extra = np.empty((0, X.shape[1]))
    pred = np.empty((G, len(y)))
    fold = np.empty(len(y), dtype=int)
    extra = np.empty((G, len(splits), len(X_extra)))
    for f, (tr, te) in enumerate(splits):
        p_te, p_ex = spec.fit_predict_grid(grid, X[tr], y[tr], [X[te], X_extra],
                                           inputs=inputs, monotone=monotone, seed=seed)
        pred[:, te] = p_te
        extra[:, f, :] = p_ex
        fold[te] = f
    if not np.all(np.isfinite(pred)):
        raise CandidateError("inner cross-validation gave non-finite predictions")
    sq = (pred - y[None, :]) ** 2
    rmse = np.sqrt(np.mean(sq, axis=1))
    best = int(np.argmin(rmse))
    if getattr(spec, "grid_rule", "min") == "one_se" and len(y) > 1 and rmse[best] > 0:
        # the first (simplest) grid point within one standard error of the lowest inner RMSE
        # (delta-method SE as in linkage.models.cv.metrics)
        se = float(np.std(sq[best], ddof=1)) / math.sqrt(len(y)) / (2.0 * rmse[best])
        best = int(np.flatnonzero(rmse <= rmse[best] + se + 1e-12 * rmse[best])[0])
    return TuneResult(params=dict(grid[best]), grid_rmse=[float(v) for v in rmse],
                      inner_pred=pred[best].copy(), inner_fold=fold, extra_pred=extra[best].copy())
