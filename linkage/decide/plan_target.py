"""The ``target`` criterion of :func:`linkage.decide.plan.augment_design`:
lots chosen where the bootstrap replicates disagree about whether P(all
pass) reaches the confidence.

The window's porosity edges are the level set {ε : P(all pass)(ε) = c} of
the probability curve. Choosing experiments to learn a level set is the
problem of Bryan, Schneider, Nichol, Miller, Genovese & Wasserman (2005,
"Active learning for identifying function threshold boundaries", NIPS 18;
the "straddle" heuristic 1.96 σ(x) − |μ(x) − c|) and of Picheny,
Ginsbourger, Roustant, Haftka & Kim (2010, "Adaptive designs of experiments
for accurate approximation of a target region", J. Mech. Des. 132:071008),
whose criterion is used here: the integrated mean squared error of the
estimate weighted by the chance that a point lies on the level set,

    J = Σ_g W(g) s²(g),    W(g) = φ((P̂(g) − c)/√(σ_ε² + s²(g))) / √(σ_ε² + s²(g)),

over a porosity grid g (φ the standard normal density; their eq. 8, the
weight; eq. 9, the weighted IMSE; from memory). P̂ is the point estimate and
s² the variance of P(all pass) over the chain's lot-level bootstrap
replicates (:func:`linkage.decide.bound.chain_probabilities`); σ_ε is a
tolerance on P around c (:data:`TOLERANCE`; common practice, no source).
Lots are added one at a time, each the candidate that lowers J most.

How a lot lowers s²: Picheny et al. use the kriging variance, which a new
point lowers without its response being known. The chain's models are not
kriging models, so the variance after a lot at porosity ε is approximated by
the bootstrap variance scaled by the change of a local linear fit's variance
at g (Fan & Gijbels 1996, Local Polynomial Modelling, §3.2; Gaussian kernel
of bandwidth h, :data:`BANDWIDTH_SHARE` of the training porosity range):

    s²_new(g) = s²(g) · [M_new(g)⁻¹]₀₀ / [M(g)⁻¹]₀₀,

with ``M(g)`` the kernel-weighted information of the existing lots'
measured porosities and of the planned lots' predicted porosities (the
ribbon stage's mean prediction of their settings), updated by
Sherman & Morrison (1950). A stated approximation, not a refit.

Without bootstrap replicates s² is unknown: the weight is then taken at
s = 0 and the variance of the local fit alone is integrated (a note says
so).
"""

from __future__ import annotations

import numpy as np

#: σ_ε of Picheny et al. (2010): the tolerance on P(all pass) around the confidence (common practice, no source)
TOLERANCE = 0.05
#: kernel bandwidth of the local linear variance, as a share of the training porosity range (no source)
BANDWIDTH_SHARE = 1.0 / 6.0
#: grid points kept (those of largest weight × variance), to bound the work
MAX_POINTS = 96
#: small ridge on the information matrices
RIDGE = 1e-6


def probability_curve(chain, spec, window, seed: int = 0):
    """(grid, P̂, replicates or None, note): P(all pass) on the window's
    porosity grid at the window's held settings, the usable bootstrap
    replicates' curves (B × grid), and why there are none when the model
    lacks replicates or fewer than two are usable."""
    from linkage.decide.bound import chain_probabilities
    from linkage.decide.window import downstream_targets
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    por = "ribbon_porosity"
    grid = np.asarray(window.grid, float)
    values = {k: v["value"] for k, v in window.settings.items() if k != por and v.get("value") is not None}
    columns = {k: np.full(grid.size, float(v)) for k, v in values.items()} | {por: grid}
    limited = [a for a in spec.limits if a in downstream_targets(chain)]
    cp = chain_probabilities(lean, columns, spec.limits, limited, seed=seed, each=False)
    if cp.reps_all is None:
        return grid, cp.p_all, None, cp.reason
    reps = usable(cp.reps_all)
    return grid, cp.p_all, reps, None if reps is not None else "fewer than two usable bootstrap replicates"


def usable(reps) -> np.ndarray | None:
    """The replicates' curves with no missing value (None when fewer than two)."""
    reps = np.asarray(reps, float)
    ok = np.isfinite(reps).all(axis=1)
    return reps[ok] if ok.sum() >= 2 else None


def weights(p_hat: np.ndarray, var: np.ndarray | None, confidence: float,
            tolerance: float = TOLERANCE) -> np.ndarray:
    """Picheny et al.'s (2010) weight W(g): the normal density of P̂ − c with
    variance σ_ε² + s²."""
    from scipy.stats import norm

    s2 = np.zeros_like(p_hat) if var is None else var
    sd = np.sqrt(tolerance ** 2 + s2)
    return norm.pdf((p_hat - confidence) / sd) / sd


class LocalVariance:
    """Variance of a local linear fit at each grid point g, up to σ²: rows
    ``[1, (ε − g)/h]``, Gaussian kernel weights; ``A`` holds the inverse
    information matrices (points × 2 × 2)."""

    def __init__(self, points: np.ndarray, bandwidth: float, porosity: np.ndarray):
        self.g = np.asarray(points, float)
        self.h = float(bandwidth)
        Z, w = self._rows(np.asarray(porosity, float))
        M = np.einsum("gi,gia,gib->gab", w, Z, Z) + RIDGE * np.eye(2)
        self.A = np.linalg.inv(M)
        self.v0 = self.A[:, 0, 0].copy()

    def _rows(self, eps: np.ndarray):
        u = (eps[None, :] - self.g[:, None]) / self.h  # points × lots
        w = np.exp(-0.5 * u ** 2)
        return np.stack([np.ones_like(u), u], axis=-1), w

    def gains(self, eps: np.ndarray) -> np.ndarray:
        """points × candidates: the drop of [M⁻¹]₀₀ at each point by adding each candidate alone."""
        Z, w = self._rows(eps)
        AZ = np.einsum("gab,gcb->gca", self.A, Z)
        return w * AZ[..., 0] ** 2 / (1.0 + w * np.sum(AZ * Z, axis=-1))

    def add(self, eps: float) -> None:
        Z, w = self._rows(np.array([float(eps)]))
        z, wt = Z[:, 0, :], w[:, 0]
        Az = np.einsum("gab,gb->ga", self.A, z)
        denom = 1.0 + wt * np.sum(Az * z, axis=1)
        self.A = self.A - (wt / denom)[:, None, None] * np.einsum("ga,gb->gab", Az, Az)

    @property
    def ratio(self) -> np.ndarray:
        return self.A[:, 0, 0] / self.v0


def choose(eps_candidates: np.ndarray, pool: np.ndarray, n: int, *, grid, p_hat, var, confidence: float,
           porosity_known: np.ndarray, porosity_range, edges: list[tuple[str, float]]):
    """Greedy minimisation of the weighted IMSE J over the candidates ``pool``
    (indices into ``eps_candidates``, their predicted porosities). Returns the
    chosen (index, name of the edge whose side of the grid it lowered most),
    and per edge its J share before and after, relative."""
    W = weights(p_hat, var, confidence)
    s2 = np.ones_like(p_hat) if var is None else np.maximum(var, 0.0)
    score = W * s2
    keep = np.flatnonzero(score > 1e-9 * max(score.max(), 1e-300))
    if keep.size > MAX_POINTS:
        keep = keep[np.argsort(score[keep])[::-1][:MAX_POINTS]]
    keep = np.sort(keep)
    g = np.asarray(grid, float)[keep]
    lo, hi = (float(v) for v in porosity_range)
    lv = LocalVariance(g, BANDWIDTH_SHARE * (hi - lo), porosity_known)
    # each grid point belongs to the nearest edge planned for
    centres = np.array([e for _, e in edges]) if edges else np.array([g.mean()])
    side = np.argmin(np.abs(g[:, None] - centres[None, :]), axis=1)
    weight = score[keep] / lv.v0  # J = Σ weight · [M⁻¹]₀₀
    before = np.array([np.sum(score[keep][side == k]) for k in range(len(centres))])
    available = np.ones(eps_candidates.size, dtype=bool)
    chosen = []
    for _ in range(n):
        idx = pool[available[pool]]
        if not idx.size:
            break
        gain = lv.gains(eps_candidates[idx]) * weight[:, None]  # points × candidates
        k = int(np.argmax(gain.sum(axis=0)))
        c = int(idx[k])
        by_edge = np.array([gain[side == e, k].sum() for e in range(len(centres))])
        chosen.append((c, int(np.argmax(by_edge))))
        lv.add(eps_candidates[c])
        available[c] = False
    after = np.array([np.sum((score[keep] * lv.ratio)[side == k]) for k in range(len(centres))])
    relative = np.divide(after, before, out=np.ones_like(after), where=before > 0)
    return chosen, relative, float(after.sum() / max(before.sum(), 1e-300))
