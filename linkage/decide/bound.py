"""The lower confidence bound on a probability of passing, from the chain's
lot-level bootstrap replicates (numpy only: the what-if runs on it).

A replicate b of the chain (:mod:`linkage.models.bootstrap`: whole lots
resampled with replacement, every stage's selected model refitted, the
resampled lots' out-of-fold residuals as the scatter) gives its own
probability P_b that a lot at the given settings meets every limit, and its
own P_b(pass) per attribute. The lower bound at assurance a is the
percentile bound of Efron & Tibshirani (1993, *An Introduction to the
Bootstrap*, §13.3): the (1 − a) quantile of P_1 … P_B (numpy's linear
interpolation, Hyndman & Fan 1996 type 7), never above the point estimate
P_0 that the fitted models give by the same computation. "The probability is
at least x with assurance a" reads: in a fraction a of campaigns like this
one, a bound computed so lies below the true probability (Peterson 2008, J.
Biopharm. Stat. 18:959–975, for the probability-based design space; the
bootstrap stands in for his posterior).

How one replicate's probability is computed
-------------------------------------------
Through the chain, stage by stage, with the replicate's models and its
weights on the residual lots (how many times the replicate drew each lot):

* every stage but the last simulated one spreads each draw over the
  stage's residual lots. When rows × draws × lots stays within ``cells``,
  every lot is taken with its weight (an exact sum); otherwise each draw is
  paired with ``cells // (rows × draws)`` lots drawn by weight (Monte Carlo,
  the same lots for every row: common random numbers, a smooth curve);
* the last stage is summed exactly over its residual lots (at most
  ``final_max``, else drawn by weight): for each draw, the weighted share of
  the stage's lots whose residual vector, added to the draw's predictions,
  meets every limit, together with the limits met upstream.

Values are projected onto their physical ranges
(:func:`linkage.models.lean.project`) before they are judged or passed on,
as in :mod:`linkage.decide.propagate`. A stage's lots with a target missing
are left out of that stage's residual set here (the Monte Carlo of the
point estimate fills the gap with another lot instead).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from linkage.exceptions import UsageError

__all__ = ["NO_BOUND", "check_assurance", "Replicates", "replicates_of", "chain_probabilities", "lower_bound",
           "ChainProbabilities"]

#: what every output says when the model has no bootstrap replicates
NO_BOUND = ("no lower bound on the probability is available: the model was trained without bootstrap "
            "replicates (trained before linkage stored them, or with n_bootstrap = 0); the probabilities shown "
            "are point estimates only. Retrain ('linkage train') to get the bound.")

#: cells (rows × draws) of the non-final stages, and lots of the last stage, summed at most
CELLS = 8000
FINAL_MAX = 256


def check_assurance(assurance) -> float:
    """``assurance`` as a float in (0, 1), or a UsageError naming the rule."""
    try:
        a = float(assurance)
    except (TypeError, ValueError):
        raise UsageError(f"assurance must be a number between 0 and 1; got {assurance!r}") from None
    if not (0 < a < 1):  # NaN fails too
        raise UsageError(f"assurance must lie strictly between 0 and 1; got {assurance!r}")
    return a


class Replicates:
    """The bootstrap replicates of a lean chain, ready to evaluate:
    ``models[target][b]`` (lean models) and ``counts`` (B × training lots)."""

    def __init__(self, lean):
        from linkage.models.bootstrap import unpack_specs
        from linkage.models.lean import Model

        bs = getattr(lean, "bootstrap", None)
        self.reason = None
        self.n = 0
        if not bs:
            self.reason = NO_BOUND
            return
        if not bs.get("n_replicates"):
            self.reason = ("no lower bound on the probability is available: "
                           + (bs.get("reason") or "the model has no bootstrap replicates"))
            return
        self.counts = np.asarray(bs["counts"], dtype=np.int64)
        self.lot_index = {str(lot): i for i, lot in enumerate(bs["lots"])}
        self.models = {name: [Model(s) for s in unpack_specs(p)] for name, p in bs["targets"].items()}
        missing = [t for t in lean.targets if t not in self.models]
        if missing:
            self.reason = f"no lower bound: the bootstrap replicates lack {', '.join(missing)}"
            return
        self.n = int(self.counts.shape[0])
        self.method = bs.get("method")

    @property
    def available(self) -> bool:
        return self.n > 0


def replicates_of(lean) -> Replicates:
    """The :class:`Replicates` of a lean chain (made once, kept on it)."""
    cached = getattr(lean, "_replicates", None)
    if cached is None:
        cached = Replicates(lean)
        lean._replicates = cached
    return cached


@dataclass
class ChainProbabilities:
    """P(all pass) and P(pass) per attribute at each row: the point estimate
    (fitted models, every lot once) and, when the model has them, each
    bootstrap replicate's (B × rows; NaN for a replicate that drew none of a
    stage's lots)."""

    p_all: np.ndarray
    p_each: dict[str, np.ndarray]
    reps_all: np.ndarray | None
    reps_each: dict[str, np.ndarray] | None
    reason: str | None  # why there are no replicates

    def low_all(self, assurance: float) -> np.ndarray | None:
        return None if self.reps_all is None else lower_bound(self.reps_all, assurance, self.p_all)

    def low_each(self, assurance: float) -> dict[str, np.ndarray] | None:
        if self.reps_each is None:
            return None
        return {a: lower_bound(r, assurance, self.p_each[a]) for a, r in self.reps_each.items()}


def lower_bound(replicates, assurance: float, point=None) -> np.ndarray:
    """Percentile lower bound: the (1 − assurance) quantile over the
    replicates (axis 0, NaN replicates left out; numpy's default linear
    interpolation), capped at the point estimate when one is given."""
    a = check_assurance(assurance)
    reps = np.asarray(replicates, dtype=float)
    low = np.nanquantile(reps, 1 - a, axis=0)
    return low if point is None else np.minimum(low, np.asarray(point, dtype=float))


def _stage_lots(stage, todo: list[str], weights_by_lot: np.ndarray | None, lot_index: dict | None):
    """Rows of the stage's residual matrix to use (lots with every target in
    ``todo``) and their weights summing to 1; ``weights_by_lot`` are a
    replicate's counts over the training lots (None: every lot once)."""
    cols = [list(stage.targets).index(t) for t in todo]
    R = stage.residual_matrix[:, cols]
    rows = np.flatnonzero(np.all(np.isfinite(R), axis=1))
    if weights_by_lot is None:
        w = np.ones(rows.size)
    else:
        w = np.array([weights_by_lot[lot_index[str(stage.residual_lots[i])]]
                      if str(stage.residual_lots[i]) in lot_index else 0 for i in rows], dtype=float)
        rows, w = rows[w > 0], w[w > 0]
    if rows.size == 0:
        return None, None, None
    return R[rows], w / w.sum(), rows


def _one(lean, columns: dict, limits: dict, attributes: list[str], models: dict, weights_by_lot, lot_index,
         rng, cells: int, final_max: int):
    """P(all pass) (rows,) and P(pass) per attribute for one set of models and lot weights."""
    from linkage.decide.propagate import within
    from linkage.models.lean import project

    nrows = len(next(iter(columns.values())))
    fixed = set(columns)
    sim = [st for st in lean.stages if any(t not in fixed for t in st.targets)]
    values = {k: np.asarray(v, dtype=float).reshape(nrows, 1) for k, v in columns.items()}
    w = np.ones(1)
    ok = np.ones((nrows, 1), dtype=bool)
    each: dict[str, np.ndarray] = {}
    p_each: dict[str, np.ndarray] = {}
    p_all = None
    for si, st in enumerate(sim):
        todo = [t for t in st.targets if t not in fixed]
        missing = [c for c in st.inputs if c not in values]
        if missing:
            raise UsageError(f"stage '{st.name}' needs {', '.join(missing)}, which were neither given nor "
                             "predicted by an earlier stage")
        R, lw, _ = _stage_lots(st, todo, weights_by_lot, lot_index)
        if R is None:
            nan = np.full(nrows, np.nan)
            return nan, {a: nan for a in attributes}
        D = w.size
        if si < len(sim) - 1:
            if nrows * D * len(lw) <= cells:  # every lot, with its weight
                parent = np.repeat(np.arange(D), len(lw))
                pick = np.tile(np.arange(len(lw)), D)
                w = w[parent] * lw[pick]
            else:  # k lots per draw, drawn by weight
                k = max(1, cells // (nrows * D))
                parent = np.repeat(np.arange(D), k)
                pick = rng.choice(len(lw), size=D * k, p=lw)
                w = w[parent] / k
            values = {c: v[:, parent] for c, v in values.items()}
            ok = ok[:, parent]
            each = {a: e[:, parent] for a, e in each.items()}
            n_draws = w.size
            for j, t in enumerate(todo):
                target = lean.targets[t]
                X = np.column_stack([values[c].reshape(-1) for c in target.inputs])
                pred = np.asarray(models[t].predict(X), float).reshape(nrows, n_draws)
                values[t] = project(t, pred + R[pick, j][None, :])[0]
                if t in attributes:
                    each[t] = within(values[t], limits[t])
                    ok &= each[t]
        else:
            if len(lw) > final_max:
                pick = rng.choice(len(lw), size=final_max, p=lw)
                lw = np.full(final_max, 1.0 / final_max)
            else:
                pick = np.arange(len(lw))
            joint = np.broadcast_to(ok[:, :, None], ok.shape + (pick.size,)).copy()
            for j, t in enumerate(todo):
                if t not in attributes:
                    continue
                target = lean.targets[t]
                X = np.column_stack([values[c].reshape(-1) for c in target.inputs])
                pred = np.asarray(models[t].predict(X), float).reshape(nrows, w.size)
                v = project(t, pred[:, :, None] + R[pick, j][None, None, :])[0]
                pa = within(v, limits[t])
                joint &= pa
                p_each[t] = (pa.reshape(-1, pick.size) @ lw).reshape(nrows, w.size) @ w
            p_all = (joint.reshape(-1, pick.size) @ lw).reshape(nrows, w.size) @ w
    for a, e in each.items():
        p_each[a] = e @ w
    if p_all is None:
        p_all = ok @ w
    return p_all, p_each


def chain_probabilities(lean, columns: dict, limits: dict, attributes: list[str], *, replicates: bool = True,
                        seed: int = 0, cells: int = CELLS, final_max: int = FINAL_MAX) -> ChainProbabilities:
    """P(all pass) and each P(pass) at each row of ``columns`` (every root
    setting, and any measured target, one value per row), for the point
    estimate and (when ``replicates`` and the model has them) every
    bootstrap replicate. ``limits`` maps each attribute to a spec limit
    (``min``/``max``); ``attributes`` are the predicted ones to judge."""
    from linkage.models.lean import as_lean

    lean = as_lean(lean)
    columns = {str(k): np.asarray(v, dtype=float).reshape(-1) for k, v in columns.items()}
    point_models = {t: tg.model_ for t, tg in lean.targets.items()}
    p_all, p_each = _one(lean, columns, limits, attributes, point_models, None, None,
                         np.random.default_rng([seed, 0]), cells, final_max)
    if not replicates:
        return ChainProbabilities(p_all, p_each, None, None, None)
    reps = replicates_of(lean)
    if not reps.available:
        return ChainProbabilities(p_all, p_each, None, None, reps.reason)
    all_b = np.empty((reps.n, p_all.size))
    each_b = {a: np.empty((reps.n, p_all.size)) for a in p_each}
    for b in range(reps.n):
        models = {t: reps.models[t][b] for t in lean.targets}
        pa, pe = _one(lean, columns, limits, attributes, models, reps.counts[b], reps.lot_index,
                      np.random.default_rng([seed, b + 1]), cells, final_max)
        all_b[b] = pa
        for a in each_b:
            each_b[a][b] = pe[a]
    return ChainProbabilities(p_all, p_each, all_b, each_b, None)
