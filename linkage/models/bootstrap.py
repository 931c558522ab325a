"""Lot-level bootstrap of the fitted chain: the estimation uncertainty of
every probability of passing.

Why
---
P(pass) and P(all pass) are computed from fitted stage models and their
out-of-fold residuals, estimated from a few dozen lots. A different set of
lots from the same process would give other models and another
probability. The window, the roll force range and the what-if promise a
probability "at least" the confidence, so they use a lower confidence bound
on it, not the point estimate (Peterson 2008, J. Biopharm. Stat.
18:959–975: the design space is where the *reliability* of meeting every
specification is high enough; a point estimate of that reliability is
right only on average).

Method (trained here, evaluated by :mod:`linkage.decide.bound`)
--------------------------------------------------------------------
A nonparametric bootstrap with the lot as the resampled unit (Efron &
Tibshirani 1993, *An Introduction to the Bootstrap*, ch. 6 and §13.3
(percentile interval); Davison & Hinkley 1997, *Bootstrap Methods and their
Application*, §3.8, resampling clusters). Replicate b draws n lots with
replacement from the n training lots (one draw for the whole chain, so that
a lot's ribbon, granule and tablet results stay together), and

1. refits every stage's *selected* candidate with its selected (full-data)
   hyper-parameters on the drawn lots (each lot as many times as drawn),
   through the candidate's own ``build`` (:mod:`linkage.models.candidates`);
2. takes as the replicate's scatter the out-of-fold residuals of the drawn
   lots, each as many times as drawn.

Residuals, and why these: the point estimate simulates a lot as mean
prediction + an out-of-fold residual (an error on a lot the model did not
see, :mod:`linkage.decide.propagate`); the replicate does the same with the
refitted means and the resampled residual set, so both the mean and the
spread estimate vary from replicate to replicate as they would between
campaigns. The replicate's *in-bag* residuals would understate the scatter
(each model has seen its lots), and its *out-of-bag* residuals come from
about 0.368·n lots and a model fitted on about 0.632·n distinct lots
(Efron & Tibshirani 1993, §17.7), which overstates both the scatter and its
noise; the out-of-fold residuals of the cross-validation are the
unseen-lot errors the point estimate already uses, and they are resampled
with the lots. What is not carried: the choice of candidate and its
hyper-parameters are held at those selected on all lots (the selection's
own uncertainty is not resampled), and so is the applicability domain.

The lower bound at assurance a is the percentile bound: the (1 − a)
quantile of the replicates' P (numpy's linear interpolation between order
statistics, Hyndman & Fan 1996 type 7), and never above the point estimate
computed the same way. B = 200 replicates by default; the stability of the
bound to ±0.01 is measured by rerunning with another seed
(reports/bound-stability.md).

A replicate in which a refit fails (too few distinct lots for a candidate,
say) is left out for the whole chain and counted in ``failed``; when more
than a tenth fail, no bound is stored and ``reason`` says why.
"""

from __future__ import annotations

import numpy as np

__all__ = ["METHOD", "DEFAULT_REPLICATES", "resample_counts", "bootstrap_chain", "pack_specs", "unpack_specs"]

#: replicates by default (see the module notes for the stability check)
DEFAULT_REPLICATES = 200

#: largest share of replicates that may fail before no bound is stored
MAX_FAILED_SHARE = 0.1

METHOD = (
    "lot-level bootstrap (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 6 and §13.3; "
    "Davison & Hinkley 1997, §3.8): whole lots resampled with replacement, every stage's selected "
    "candidate refitted with its selected hyper-parameters on the resampled lots, the resampled lots' "
    "out-of-fold residuals as the scatter; the lower bound at assurance a is the (1 − a) quantile of the "
    "replicates' probability of passing (percentile bound), never above the point estimate; a "
    "probability-based design space as in Peterson 2008, J. Biopharm. Stat. 18:959–975"
)


def resample_counts(n: int, n_replicates: int, seed: int) -> np.ndarray:
    """(B, n) counts: how many times replicate b drew lot i.

    The draws are ``numpy.random.default_rng(seed).integers(0, n, (B, n))``,
    the index matrix ``scipy.stats.bootstrap`` draws for the same generator
    (a test compares the two)."""
    idx = np.random.default_rng(seed).integers(0, n, (int(n_replicates), int(n)))
    return np.stack([np.bincount(row, minlength=n) for row in idx]).astype(np.int64)


# ---------------------------------------------------------------------------
# many lean model specs as a few arrays
# ---------------------------------------------------------------------------
def pack_specs(specs: list[dict]) -> dict:
    """B lean model specs of one kind (:meth:`Candidate.lean_spec`) as a few
    arrays: a field that is the same scalar or string in every spec is kept
    once; numbers are stacked to (B,); arrays of one shape to (B, ...);
    arrays whose shape varies (boosted trees) are flattened and concatenated,
    with each one's shape. Nested values are refused (TypeError)."""
    if not specs:
        raise ValueError("no specs to pack")
    keys = list(specs[0])
    if any(list(s) != keys for s in specs):
        raise TypeError("the replicate models have different fields")
    out: dict = {"n": len(specs), "same": {}, "stacked": {}, "ragged": {}}
    for k in keys:
        vals = [s[k] for s in specs]
        if isinstance(vals[0], (dict, list, tuple)):
            raise TypeError(f"field {k!r} of the lean model is nested; it cannot be packed")
        if isinstance(vals[0], (str, bool, int, float, np.integer, np.floating, type(None))) and \
                all(v == vals[0] for v in vals):
            out["same"][k] = vals[0].item() if isinstance(vals[0], np.generic) else vals[0]
            continue
        arrays = [np.asarray(v) for v in vals]
        if any(a.dtype == object for a in arrays):
            raise TypeError(f"field {k!r} of the lean model is not numeric")
        if all(a.shape == arrays[0].shape for a in arrays):
            out["stacked"][k] = np.stack(arrays)
        else:
            out["ragged"][k] = {"flat": np.concatenate([a.ravel() for a in arrays]),
                                "shapes": np.array([list(a.shape) for a in arrays], dtype=np.int64)}
    return out


def unpack_specs(packed: dict) -> list[dict]:
    """The B specs :func:`pack_specs` packed (arrays are views where possible)."""
    n = int(packed["n"])
    specs = [dict(packed["same"]) for _ in range(n)]
    for k, a in packed["stacked"].items():
        a = np.asarray(a)
        for b in range(n):
            v = a[b]
            specs[b][k] = v.item() if v.ndim == 0 else v
    for k, r in packed["ragged"].items():
        flat, shapes = np.asarray(r["flat"]), np.asarray(r["shapes"], dtype=np.int64).reshape(n, -1)
        start = 0
        for b in range(n):
            size = int(np.prod(shapes[b])) if shapes.shape[1] else 1
            specs[b][k] = flat[start:start + size].reshape(tuple(int(s) for s in shapes[b]))
            start += size
    return specs


# ---------------------------------------------------------------------------
# the replicates
# ---------------------------------------------------------------------------
def bootstrap_chain(fitted, data, *, n_replicates: int = DEFAULT_REPLICATES, seed: int = 0) -> dict:
    """The bootstrap replicates of a fitted chain (see the module notes).

    Parameters
    ----------
    fitted : the :class:`linkage.models.fitted.FittedChain` just trained.
    data : the prepared training table (one row per lot, column ``lot`` and
        every input and target), as ``train_chain`` fitted on.
    n_replicates : B; 0 stores none (no bound).
    seed : seed of the lot draws (the boosting candidate refits with the
        training seed).

    Returns a dict of plain numbers and arrays (stored in the model and in
    ``whatif.npz``): ``method``, ``n_replicates`` (kept), ``requested``,
    ``seed``, ``failed``, ``lots`` (training lots, in the order of the
    columns of ``counts``), ``counts`` (kept replicates × lots), ``targets``
    {name: packed lean specs}, ``reason`` (None, or why no bound).
    """
    from threadpoolctl import threadpool_limits

    from linkage.exceptions import InsufficientDataError
    from linkage.models.candidates import CANDIDATES, CandidateError

    B = int(n_replicates)
    lots = [str(v) for v in data["lot"]]
    base = {"method": METHOD, "requested": B, "seed": int(seed), "lots": lots}
    if B <= 0:
        return {**base, "n_replicates": 0, "failed": 0, "counts": np.zeros((0, len(lots)), np.int64),
                "targets": {}, "reason": "trained without bootstrap replicates (n_bootstrap = 0)"}
    counts = resample_counts(len(lots), B, seed)
    where = {lot: i for i, lot in enumerate(lots)}
    indexed = data.set_index("lot")
    ok = np.ones(B, dtype=bool)
    specs: dict[str, list] = {}
    with threadpool_limits(limits=1):
        for name, t in fitted.targets.items():
            cand = CANDIDATES[t.selected]
            params = dict(t.hyperparameters["full_data"][t.selected])
            monotone = dict(fitted.chain.stage_of(name).monotone.get(name, {}))
            sub = indexed.loc[t.lots, list(t.inputs) + [name]].to_numpy(float)
            X, y = sub[:, :-1], sub[:, -1]
            col = np.array([where[lot] for lot in t.lots])
            out = []
            for b in range(B):
                reps = counts[b, col]
                rows = np.repeat(np.arange(len(col)), reps)
                try:
                    if len(np.unique(rows)) < 2:
                        raise CandidateError("fewer than two distinct lots drawn")
                    est = cand.build(params, list(t.inputs), n=len(rows), monotone=monotone,
                                     seed=fitted.seed).fit(X[rows], y[rows])
                    spec = est.lean_spec()
                    if not np.all(np.isfinite(np.asarray(est.predict(X[:1]), float))):
                        raise CandidateError("non-finite prediction")
                    out.append(spec)
                except (CandidateError, InsufficientDataError, np.linalg.LinAlgError, ValueError):
                    ok[b] = False
                    out.append(None)
            specs[name] = out
    failed = int((~ok).sum())
    if failed > MAX_FAILED_SHARE * B:
        return {**base, "n_replicates": 0, "failed": failed, "counts": np.zeros((0, len(lots)), np.int64),
                "targets": {}, "reason": f"{failed} of {B} bootstrap replicates could not refit every stage "
                                         "(too few distinct lots); no bound is stored"}
    keep = np.flatnonzero(ok)
    targets = {}
    for name, out in specs.items():
        try:
            targets[name] = pack_specs([out[b] for b in keep])
        except TypeError as exc:
            return {**base, "n_replicates": 0, "failed": failed, "counts": np.zeros((0, len(lots)), np.int64),
                    "targets": {}, "reason": f"the replicate models of {name} cannot be stored: {exc}"}
    return {**base, "n_replicates": int(len(keep)), "failed": failed, "counts": counts[keep],
            "targets": targets, "reason": None}
