"""Applicability domain of a stage: Hotelling T² and Q residual of a latent
variable model of the stage inputs, plus a per-input training-range check.

A prediction is in the domain when every input lies inside its training
range, the new point's Hotelling T² is at or below its limit and its Q
residual (squared prediction error, the part of the point the latent model
does not describe) is at or below its limit. Every breach is reported with its
reason; nothing is hidden.

Limits
------
* T² for new observations (phase II):
  A(n² − 1) / (n(n − A)) · F₁₋α(A, n − A)
  (NIST/SEMATECH e-Handbook of Statistical Methods, §6.5.4.3).
* T² for the calibration observations themselves (phase I):
  (n − 1)²/n · Beta₁₋α(A/2, (n − A − 1)/2)
  (Tracy, Young & Mason 1992, J. Quality Technology 24:88-95).
* Q: Jackson & Mudholkar (1979), Technometrics 21:341-349, from the
  eigenvalues of the residual covariance; Box (1954), Ann. Math. Stat.
  25:290-302, scaled χ² g·χ²₁₋α(h) with g = θ₂/θ₁, h = θ₁²/θ₂, as the
  alternative (and the fallback when the Jackson-Mudholkar h₀ is not positive).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import SimpleNamespace

import numpy as np
import pandas as pd

from linkage.exceptions import InputError, InsufficientDataError, Problem
from linkage.models.lean import domain_verdicts

__all__ = [
    "t2_limit_phase1",
    "t2_limit_phase2",
    "q_limit_jackson_mudholkar",
    "q_limit_box",
    "DomainVerdict",
    "DomainModel",
]

#: share of the standardised input variance the latent model must describe
#: when the number of components is not given (common practice, no source)
EXPLAINED_VARIANCE = 0.90


def t2_limit_phase2(n: int, n_components: int, alpha: float = 0.05) -> float:
    """Upper control limit of Hotelling T² for a new observation:
    A(n² − 1)/(n(n − A)) · F₁₋α(A, n − A) (NIST/SEMATECH e-Handbook §6.5.4.3)."""
    from scipy import stats

    n, a = int(n), int(n_components)
    if a < 1 or n <= a:
        raise ValueError(f"need 1 <= n_components < n; got n={n}, n_components={a}")
    return float(a * (n**2 - 1) / (n * (n - a)) * stats.f.ppf(1 - alpha, a, n - a))


def t2_limit_phase1(n: int, n_components: int, alpha: float = 0.05) -> float:
    """Upper limit of Hotelling T² for the calibration observations:
    (n − 1)²/n · Beta₁₋α(A/2, (n − A − 1)/2) (Tracy, Young & Mason 1992)."""
    from scipy import stats

    n, a = int(n), int(n_components)
    if a < 1 or n <= a + 1:
        raise ValueError(f"need 1 <= n_components < n - 1; got n={n}, n_components={a}")
    return float((n - 1) ** 2 / n * stats.beta.ppf(1 - alpha, a / 2, (n - a - 1) / 2))


def _thetas(eigenvalues) -> tuple[float, float, float]:
    lam = np.asarray(eigenvalues, dtype=float)
    lam = lam[lam > 0]
    if lam.size == 0:
        raise ValueError("no positive residual eigenvalue: the Q residual has no variation to set a limit from")
    return float(lam.sum()), float((lam**2).sum()), float((lam**3).sum())


def q_limit_jackson_mudholkar(eigenvalues, alpha: float = 0.05) -> float:
    """Q (squared prediction error) limit of Jackson & Mudholkar (1979).

    θᵢ = Σ_{j>A} λⱼⁱ, h₀ = 1 − 2θ₁θ₃/(3θ₂²),
    Q_α = θ₁·[c_α·√(2θ₂h₀²)/θ₁ + 1 + θ₂h₀(h₀ − 1)/θ₁²]^(1/h₀),
    with c_α the upper α quantile of the standard normal.

    Raises
    ------
    ValueError
        If h₀ is not positive (then use :func:`q_limit_box`).
    """
    from scipy import stats

    t1, t2, t3 = _thetas(eigenvalues)
    h0 = 1 - 2 * t1 * t3 / (3 * t2**2)
    if not h0 > 0:
        raise ValueError(f"Jackson-Mudholkar h0 = {h0:.4g} is not positive")
    c = stats.norm.ppf(1 - alpha)
    base = c * np.sqrt(2 * t2 * h0**2) / t1 + 1 + t2 * h0 * (h0 - 1) / t1**2
    if not base > 0:
        raise ValueError("Jackson-Mudholkar bracket is not positive")
    return float(t1 * base ** (1 / h0))


def q_limit_box(eigenvalues, alpha: float = 0.05) -> float:
    """Q limit by Box's (1954) scaled χ²: g·χ²₁₋α(h), g = θ₂/θ₁, h = θ₁²/θ₂."""
    from scipy import stats

    t1, t2, _ = _thetas(eigenvalues)
    g, h = t2 / t1, t1**2 / t2
    return float(g * stats.chi2.ppf(1 - alpha, h))


@dataclass
class DomainVerdict:
    """The applicability-domain verdict for one row.

    ``t2``/``q`` are NaN only for a row with a missing input (the reason says
    so). ``t2_limit`` is ``None`` when the model has no component (every
    training input constant); ``q_limit`` is ``None`` when the model leaves no
    residual space (as many components as inputs). ``t2_contributions`` and
    ``q_contributions`` add up to T² and Q; ``contributions`` is each input's
    share of T²/T²-limit + Q/Q-limit (what drives the point out).
    """

    in_domain: bool
    t2: float
    t2_limit: float | None
    q: float
    q_limit: float | None
    reasons: list[str] = field(default_factory=list)
    contributions: dict[str, float] = field(default_factory=dict)
    t2_contributions: dict[str, float] = field(default_factory=dict)
    q_contributions: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict:
        def num(v):
            return None if v is None or not np.isfinite(v) else float(v)

        return {
            "in_domain": bool(self.in_domain),
            "t2": num(self.t2),
            "t2_limit": num(self.t2_limit),
            "q": num(self.q),
            "q_limit": num(self.q_limit),
            "reasons": list(self.reasons),
            "contributions": {k: num(v) for k, v in self.contributions.items()},
        }


def _pls_targets(y, complete: np.ndarray, n_rows: int, cap: int):
    """The stage targets ``y`` on the complete rows, the rows where every target is known and their SDs,
    when they can steer a PLS latent model (at least 5 such rows, a target that varies, a component to
    spare); else None."""
    if y is None:
        return None
    Y = np.asarray(y, dtype=float)
    if Y.ndim == 1:
        Y = Y[:, None]
    if Y.shape[0] != n_rows:
        return None
    Y = Y[complete]
    keep = np.all(np.isfinite(Y), axis=1)
    ysd = Y[keep].std(axis=0, ddof=1) if keep.sum() > 1 else np.zeros(Y.shape[1])
    if keep.sum() >= 5 and np.any(ysd > 0) and cap >= 1:
        return Y, keep, ysd
    return None


class DomainModel:
    """Latent-variable model of a stage's inputs for the applicability domain.

    Use :meth:`fit`; then :meth:`check`. Inputs are standardised with the
    training mean and SD (ddof = 1; a constant input keeps SD 1 and is
    checked by its range). With targets given (``y``), the latent model is a
    PLS of the standardised inputs on the standardised targets (the issue's
    "PLS model of the stage inputs"), fitted on the lots that have every
    input and every target; without targets, or with fewer than 5 such lots
    or no target variation, it is a PCA of the inputs (documented fallback).
    The number of components, unless given, is the smallest that describes
    90 % of the standardised input variance (common practice, no source),
    capped at p − 1 (to leave a residual space for Q) and n − 2.
    """

    def __init__(self):
        self.inputs_: list[str] = []

    # -- fitting ---------------------------------------------------------
    @classmethod
    def fit(cls, X: pd.DataFrame, n_components: int | None = None, alpha: float = 0.05, *, y=None) -> "DomainModel":
        """Fit on the training inputs ``X`` (one column per input; rows with a
        missing input are left out of the latent model but count for the
        ranges); ``y`` the stage targets (rows aligned with X; NaN allowed)."""
        if not isinstance(X, pd.DataFrame):
            raise TypeError("X must be a pandas DataFrame with one column per input")
        if not 0 < alpha < 1:
            raise ValueError(f"alpha must lie between 0 and 1; got {alpha}")
        self = cls()
        self.inputs_ = [str(c) for c in X.columns]
        self.alpha_ = float(alpha)
        values = X.to_numpy(dtype=float)
        complete = np.all(np.isfinite(values), axis=1)
        Xc = values[complete]
        n, p = Xc.shape
        if n < 3 or p < 1:
            raise InsufficientDataError(
                f"the applicability domain needs at least 3 lots with every input ({', '.join(self.inputs_)}); "
                f"got {n}"
            )
        self.n_ = n
        self.ranges_ = {c: (float(np.nanmin(values[:, j])), float(np.nanmax(values[:, j])))
                        for j, c in enumerate(self.inputs_) if np.isfinite(values[:, j]).any()}
        self.mean_ = Xc.mean(axis=0)
        sd = Xc.std(axis=0, ddof=1)
        varies = sd > 1e-12 * np.maximum(1.0, np.abs(self.mean_))
        self.constant_inputs_ = [c for c, ok in zip(self.inputs_, varies) if not ok]
        self.scale_ = np.where(varies, sd, 1.0)
        Z = (Xc - self.mean_) / self.scale_

        eig = np.sort(np.clip(np.linalg.eigvalsh(Z.T @ Z / (n - 1)), 0, None))[::-1]
        rank = int(np.sum(eig > 1e-10 * max(1.0, eig[0] if eig.size else 0.0)))
        cap = max(0, min(rank, p - 1 if p > 1 else 1, n - 2))

        targets = _pls_targets(y, complete, values.shape[0], cap)
        use_pls = targets is not None

        if n_components is not None:
            a = int(n_components)
            if a < 1:
                raise ValueError(f"n_components must be at least 1; got {a}")
            cap = min(a, cap)
        self.method_ = "pls" if use_pls else "pca"
        A, R, P = self._latent_space(Z, eig, cap, n_components, targets)
        self.n_components_ = A
        self.rotations_, self.loadings_ = R, P
        T = Z @ R
        self.score_var_ = T.var(axis=0, ddof=1) if A else np.zeros(0)
        E = Z - T @ P.T
        self.residual_eigenvalues_ = np.sort(np.clip(np.linalg.eigvalsh(E.T @ E / (n - 1)), 0, None))[::-1]

        self.t2_limit_ = t2_limit_phase2(n, A, alpha) if A else None
        self.q_limit_, self.q_limit_method_ = self._q_limit(A, p)
        return self

    def _latent_space(self, Z, eig, cap: int, n_components: int | None, targets):
        """(components, rotations R, loadings P) of the latent model: none when ``cap`` is 0; PLS on the
        standardised stage targets when ``targets`` (rows kept, their SDs) are given; else PCA. Without
        ``n_components``, the fewest components that describe :data:`EXPLAINED_VARIANCE` of the inputs."""
        p = Z.shape[1]
        if cap == 0:
            return 0, np.zeros((p, 0)), np.zeros((p, 0))
        if targets is not None:
            Y, keep, ysd = targets
            Zk, Yk = Z[keep], Y[keep][:, ysd > 0]
            Yk = (Yk - Yk.mean(axis=0)) / Yk.std(axis=0, ddof=1)
            R, P = self._pls_rotations(Zk, Yk, cap)
            if n_components is None:
                A = self._components_for_variance(Z, R, P, cap)
                R, P = self._pls_rotations(Zk, Yk, A)
            else:
                A = cap
            return A, R, P
        _, _, vt = np.linalg.svd(Z, full_matrices=False)
        if n_components is None:
            share = np.cumsum(eig) / eig.sum()
            A = int(min(cap, np.searchsorted(share, EXPLAINED_VARIANCE - 1e-12) + 1))
        else:
            A = cap
        R = vt[:A].T
        return A, R, R

    @staticmethod
    def _pls_rotations(Z, Y, a):
        from sklearn.cross_decomposition import PLSRegression

        pls = PLSRegression(n_components=a, scale=False).fit(Z, Y)
        return pls.x_rotations_, pls.x_loadings_

    @staticmethod
    def _components_for_variance(Z, R, P, cap):
        total = float(np.sum(Z**2))
        T = Z @ R  # NIPALS scores: the first a do not depend on later components
        for a in range(1, cap + 1):
            explained = 1 - float(np.sum((Z - T[:, :a] @ P[:, :a].T) ** 2)) / total
            if explained >= EXPLAINED_VARIANCE - 1e-12:
                return a
        return cap

    def _q_limit(self, a: int, p: int):
        if a >= p:
            return None, "not applicable: the latent model uses as many components as there are inputs"
        lam = self.residual_eigenvalues_
        if not lam.size or lam[0] <= 1e-12 * p:
            return 1e-8 * p, ("numerical tolerance 1e-8·p: the training inputs have no variation outside the "
                              "latent model, so any departure from it is out of domain")
        try:
            return q_limit_jackson_mudholkar(lam, self.alpha_), "Jackson & Mudholkar (1979)"
        except ValueError as exc:
            return q_limit_box(lam, self.alpha_), f"Box (1954) scaled chi-square ({exc})"

    # -- checking --------------------------------------------------------
    def check(self, X: pd.DataFrame) -> list[DomainVerdict]:
        """One :class:`DomainVerdict` per row of ``X`` (columns by name; extra
        columns are ignored)."""
        if not isinstance(X, pd.DataFrame):
            raise TypeError("X must be a pandas DataFrame with one column per input")
        missing = [c for c in self.inputs_ if c not in X.columns]
        if missing:
            raise InputError([Problem(file="domain check", column=c,
                                      rule="column missing; the applicability domain needs every stage input")
                              for c in missing])
        values = X[self.inputs_].to_numpy(dtype=float)
        return [DomainVerdict(**v) for v in domain_verdicts(self.lean(), values)]

    def lean(self) -> SimpleNamespace:
        """The fitted numbers :func:`linkage.models.lean.domain_verdicts` reads."""
        return SimpleNamespace(
            inputs=self.inputs_, ranges=self.ranges_, mean=self.mean_, scale=self.scale_,
            rotations=self.rotations_, loadings=self.loadings_, score_var=self.score_var_,
            n_components=self.n_components_, t2_limit=self.t2_limit_, q_limit=self.q_limit_, alpha=self.alpha_)

    def to_dict(self) -> dict:
        """JSON-safe summary for the model metadata."""
        return {
            "method": self.method_,
            "n_lots": int(self.n_),
            "n_components": int(self.n_components_),
            "alpha": self.alpha_,
            "t2_limit": self.t2_limit_,
            "t2_limit_rule": "phase II, A(n²−1)/(n(n−A))·F(1−α; A, n−A), NIST/SEMATECH e-Handbook §6.5.4.3",
            "q_limit": self.q_limit_,
            "q_limit_method": self.q_limit_method_,
            "ranges": {c: [lo, hi] for c, (lo, hi) in self.ranges_.items()},
            "constant_inputs": list(self.constant_inputs_),
        }
