"""The ``thompson`` criterion of :func:`linkage.decide.plan.augment_design`:
each lot placed at the window edge of one bootstrap replicate.

The chain's lot-level bootstrap replicates (:mod:`linkage.models.bootstrap`)
stand in for a posterior over the models (Efron 2012, "Bayesian inference
and the parametric bootstrap", Ann. Appl. Stat. 6:1971, for the bootstrap
distribution as an approximate posterior). Thompson sampling (Thompson 1933,
Biometrika 25:285) makes the next experiment where a draw from the
posterior puts the quantity sought; with the bootstrap as the posterior this
is the bootstrapped Thompson sampling of Eckles & Kaptein (2014, arXiv
1410.4009) and Osband & Van Roy (2015, arXiv 1507.00300); these references
and their numbers are from memory. Here the quantity
sought is each porosity edge of the window: replicate b's P_b(all pass) on
the window's porosity grid (:func:`linkage.decide.bound.chain_probabilities`)
gives its own window (its widest run where P_b reaches the confidence), so
the replicates give a distribution of each edge. A batch of k lots for one
edge takes the k quantiles (i + ½)/k of that distribution (i = 0 … k − 1)
instead of k independent draws: a stratified sample of the same
distribution (McKay, Beckman & Conover 1979; common practice for a batch,
no source for its use here). The lots are shared between the porosity edges
planned for in turn (low, high, low, …). Each target porosity is met by the
candidate settings whose predicted ribbon porosity (the ribbon stage's mean
prediction) lies nearest, each candidate used once.

So the lots go where the edges may lie, as far out as the replicates
disagree: a well-determined edge gets lots close together, an uncertain one
lots spread over its plausible range.
"""

from __future__ import annotations

import numpy as np


def replicate_edges(grid: np.ndarray, reps: np.ndarray, confidence: float) -> np.ndarray:
    """(B, 2): each replicate's low and high edge, the ends of its widest run
    of grid points where P_b ≥ ``confidence`` (NaN where it has none)."""
    out = np.full((len(reps), 2), np.nan)
    for b, p in enumerate(reps):
        ok = np.r_[False, p >= confidence, False].astype(int)
        d = np.diff(ok)
        starts, ends = np.flatnonzero(d == 1), np.flatnonzero(d == -1) - 1
        if starts.size:
            k = int(np.argmax(ends - starts))
            out[b] = grid[starts[k]], grid[ends[k]]
    return out


def targets(edges: np.ndarray, which: list[int], n: int) -> list[tuple[int, float]]:
    """``n`` (edge column, target porosity): the lots dealt to the edges
    ``which`` (0 low, 1 high) in turn, each edge's lots at the quantiles
    (i + ½)/k of its replicates' values (numpy's linear interpolation)."""
    counts = [len(range(j, n, len(which))) for j in range(len(which))]
    out = []
    for col, k in zip(which, counts):
        values = edges[:, col][np.isfinite(edges[:, col])]
        if k and values.size:
            out += [(col, float(q)) for q in np.quantile(values, (np.arange(k) + 0.5) / k)]
    return out


def nearest(eps_candidates: np.ndarray, pool: np.ndarray, wanted: list[float]) -> list[int]:
    """For each wanted porosity, the unused candidate of ``pool`` whose
    predicted porosity lies nearest."""
    free = np.ones(eps_candidates.size, dtype=bool)
    out = []
    for t in wanted:
        idx = pool[free[pool]]
        if not idx.size:
            break
        c = int(idx[np.argmin(np.abs(eps_candidates[idx] - t))])
        free[c] = False
        out.append(c)
    return out
