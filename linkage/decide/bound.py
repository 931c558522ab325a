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

Where a target has a spread model (locally weighted intervals), a lot's
residual enters as it does in :mod:`linkage.decide.propagate`: divided by
ρ̂ at the lot's own out-of-fold level and multiplied by ρ̂ at the draw's
predicted level. Every replicate uses the spread model of the full fit (a
stated approximation: the spread model is not refitted per replicate).

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
           "simultaneous_lower_bound", "SIMULTANEOUS_METHOD", "ChainProbabilities"]

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


class _Loop:
    """Models of several replicates evaluated one by one (any lean kind)."""

    def __init__(self, models: list):
        self.models = list(models)

    def __len__(self):
        return len(self.models)

    def take(self, idx) -> "_Loop":
        return _Loop([self.models[i] for i in idx])

    def predict(self, X3: np.ndarray) -> np.ndarray:
        return np.stack([np.asarray(m.predict(X), float) for m, X in zip(self.models, X3)])


class _Stacked:
    """Models of several replicates of one kind whose parameters are stacked
    (B, ...): evaluated for every replicate at once, with the arithmetic of
    :class:`linkage.models.lean.Model` (a test compares the two)."""

    KINDS = {"mean": ("mean",), "rd": ("s0", "k"), "linear": ("x_mean", "coef", "intercept"),
             "quadratic": ("x_mean", "x_scale", "beta", "intercept"),
             "link": ("x_mean", "coef", "intercept", "y_max", "log_mask")}

    def __init__(self, kind: str, params: dict, n: int):
        self.kind, self.params, self.n = kind, params, n

    @classmethod
    def from_packed(cls, packed: dict):
        kind = packed["same"].get("kind")
        if kind not in cls.KINDS:
            return None
        n = int(packed["n"])
        params = {}
        if kind == "link":
            if not isinstance(packed["same"].get("link"), str):
                return None  # links differ between replicates (a candidate never does this): one by one
            params["link"] = packed["same"]["link"]
        for k in cls.KINDS[kind] + (("porosity_index",) if kind == "rd" else ()):
            if k == "log_mask":
                if k not in packed["stacked"]:
                    return None
                params[k] = np.asarray(packed["stacked"][k], dtype=bool)
            elif k in packed["stacked"]:
                params[k] = np.asarray(packed["stacked"][k], dtype=float if k != "porosity_index" else np.int64)
            elif k in packed["same"]:
                v = packed["same"][k]
                params[k] = v if k == "porosity_index" else np.full(n, float(v)) if np.ndim(v) == 0 else v
            else:
                return None
        if kind == "rd" and np.ndim(params["porosity_index"]) != 0:
            return None
        return cls(kind, params, n)

    def __len__(self):
        return self.n

    def take(self, idx) -> "_Stacked":
        return _Stacked(self.kind, {k: v if k in ("porosity_index", "link") else v[idx]
                                    for k, v in self.params.items()}, len(idx))

    def predict(self, X3: np.ndarray) -> np.ndarray:
        p, X3 = self.params, np.asarray(X3, dtype=float)
        if self.kind == "mean":
            return np.broadcast_to(p["mean"][:, None], X3.shape[:2]).copy()
        if self.kind == "rd":
            return p["s0"][:, None] * np.exp(-p["k"][:, None] * X3[:, :, p["porosity_index"]])
        if self.kind == "linear":
            return np.einsum("bnp,bp->bn", X3 - p["x_mean"][:, None, :], p["coef"]) + p["intercept"][:, None]
        if self.kind == "link":  # linkage.models.lean.link_predict, every replicate at once
            from linkage.models.lean import _link_inputs, link_inverse

            Z = _link_inputs(X3, p["log_mask"][:, None, :])
            eta = np.einsum("bnp,bp->bn", Z - p["x_mean"][:, None, :], p["coef"]) + p["intercept"][:, None]
            return link_inverse(p["link"], eta, p["y_max"][:, None])
        from linkage.models.lean import quad_features

        B, n, q = X3.shape
        Z = (X3 - p["x_mean"][:, None, :]) / p["x_scale"][:, None, :]
        F = quad_features(Z.reshape(B * n, q)).reshape(B, n, -1)
        return np.einsum("bnf,bf->bn", F, p["beta"]) + p["intercept"][:, None]


class Replicates:
    """The bootstrap replicates of a lean chain, ready to evaluate:
    ``models[target]`` (all replicates of one target, evaluated together)
    and ``counts`` (B × training lots)."""

    def __init__(self, lean):
        from linkage.models.bootstrap import unpack_specs
        from linkage.models.lean import Model

        bs = getattr(lean, "bootstrap", None)
        self.reason = None
        self.n = 0
        self.method = None
        if not bs:
            self.reason = NO_BOUND
            return
        if not bs.get("n_replicates"):
            self.reason = ("no lower bound on the probability is available: "
                           + (bs.get("reason") or "the model has no bootstrap replicates"))
            return
        self.counts = np.asarray(bs["counts"], dtype=np.int64)
        self.lot_index = {str(lot): i for i, lot in enumerate(bs["lots"])}
        self.models = {}
        for name, packed in bs["targets"].items():
            stacked = _Stacked.from_packed(packed)
            self.models[name] = stacked if stacked is not None else _Loop([Model(s) for s in unpack_specs(packed)])
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

    def band_all(self, assurance: float, confidence: float) -> tuple[np.ndarray, float] | None:
        """The simultaneous lower band of P(all pass) (:func:`simultaneous_lower_bound`) over the rows
        where the point estimate reaches ``confidence`` (where a window or range can lie), and the
        quantile level it takes; None without replicates."""
        if self.reps_all is None:
            return None
        return simultaneous_lower_bound(self.reps_all, assurance, self.p_all, self.p_all >= confidence)

    def low_each(self, assurance: float) -> dict[str, np.ndarray] | None:
        if self.reps_each is None:
            return None
        return {a: lower_bound(r, assurance, self.p_each[a]) for a, r in self.reps_each.items()}


def _nanquantile(a: np.ndarray, q: float) -> np.ndarray:
    """``np.nanquantile(a, q, axis=0)``; where ``a`` has no NaN, by
    ``np.quantile``, which gives the same numbers without numpy's column by
    column path for NaN (a test compares the two)."""
    return np.quantile(a, q, axis=0) if not np.isnan(a).any() else np.nanquantile(a, q, axis=0)


def lower_bound(replicates, assurance: float, point=None) -> np.ndarray:
    """Percentile lower bound: the (1 − assurance) quantile over the
    replicates (axis 0, NaN replicates left out; numpy's default linear
    interpolation), capped at the point estimate when one is given."""
    a = check_assurance(assurance)
    reps = np.asarray(replicates, dtype=float)
    low = _nanquantile(reps, 1 - a)
    return low if point is None else np.minimum(low, np.asarray(point, dtype=float))


#: how a window's or a range's bound is made simultaneous, in words (window --json: bound.simultaneous)
SIMULTANEOUS_METHOD = (
    "simultaneous over the range: one quantile level q for every point, the largest at which a fraction "
    "'assurance' of the bootstrap replicates lie at or above the band at every point where the point estimate "
    "reaches the confidence (the quantile-calibrated sup-t construction of Montiel Olea & Plagborg-Møller 2019, "
    "J. Appl. Econometrics 34:1-17, made one-sided); so 'at least the confidence everywhere in the window' "
    "holds with the assurance for the window as a whole, not point by point")


def simultaneous_lower_bound(replicates, assurance: float, point, region) -> tuple[np.ndarray, float]:
    """A lower band that holds at every point of ``region`` at once.

    The pointwise bound (:func:`lower_bound`) takes the (1 − a) quantile of
    the replicates at each point, so each point alone is covered with
    assurance a, but a window resting on many points (two edges at least) is
    covered less often. Here one quantile level q ≤ 1 − a serves every
    point: the largest q at which at least a fraction a of the replicates lie
    at or above the band Q_q(x) at every x in ``region`` (a replicate's NaN
    points do not count against it). This is the quantile-calibrated
    construction of a simultaneous band from draws (Montiel Olea &
    Plagborg-Møller 2019, J. Appl. Econometrics 34:1-17, §3, there two-sided;
    from memory), one-sided. q = 0 (the lowest replicate everywhere) always
    qualifies. Returns the band on every point (numpy's linear
    interpolation, capped at ``point``) and q. With no point in ``region``
    the pointwise bound is returned with q = 1 − a."""
    a = check_assurance(assurance)
    reps = np.asarray(replicates, dtype=float)
    point = np.asarray(point, dtype=float)
    region = np.asarray(region, dtype=bool)
    if not region.any():
        return lower_bound(reps, a, point), 1.0 - a
    R = reps[:, region]
    missing = np.isnan(R)

    def joint(level: float) -> float:  # the share of replicates at or above the band everywhere in the region
        with np.errstate(invalid="ignore"):
            band_r = _nanquantile(R, level)
            return float(np.mean(np.all((R >= band_r - 1e-12) | missing, axis=1)))

    # the share falls as q rises (each point's quantile rises with q): bisection, memory B × points
    q_low, q_high = 0.0, 1.0 - a
    if joint(q_high) >= a - 1e-12:
        q = q_high
    else:
        for _ in range(30):
            mid = (q_low + q_high) / 2
            q_low, q_high = (mid, q_high) if joint(mid) >= a - 1e-12 else (q_low, mid)
        q = q_low
    band = _nanquantile(reps, q)
    return np.minimum(band, point), q


def _stage_lots(stage, todo: list[str], counts: np.ndarray | None, lot_index: dict | None):
    """The stage's residual rows with every target in ``todo`` (n_s × targets;
    each divided by ρ̂ at the lot's own out-of-fold level where the target has
    a spread model, as :meth:`linkage.models.lean.Stage.scaled_residual_column`
    gives them) and the weights of each replicate on them (B × n_s, rows summing to 1,
    NaN for a replicate that drew none of them); ``counts`` are the
    replicates' draws over the training lots (None: every lot once)."""
    cols = [list(stage.targets).index(t) for t in todo]
    R = stage.residual_matrix[:, cols] / stage.residual_scale[:, cols]
    rows = np.flatnonzero(np.all(np.isfinite(R), axis=1))
    if counts is None:
        W = np.ones((1, rows.size))
    else:
        at = np.array([lot_index.get(str(stage.residual_lots[i]), -1) for i in rows], dtype=np.int64)
        W = np.where(at[None, :] >= 0, counts[:, np.maximum(at, 0)], 0).astype(float)
    total = W.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return R[rows], W / total


def _draw(W: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Per replicate (row of W), the lots that the uniforms ``u`` pick by
    weight (inverse CDF: the same ``u`` for every replicate)."""
    cdf = np.cumsum(np.nan_to_num(W), axis=1)
    cdf[:, -1] = np.inf
    return np.stack([np.searchsorted(c, u, side="right") for c in cdf])


class _SortedLots:
    """The lots of each replicate (``pick``: (1 or B) × L indices into the
    stage's residual lots) in ascending order of one target's residual
    (``col``, one per stage lot), and what the last stage's sums take from
    that order. Each lot's rank is the first position of its value in the
    sorted column (``col_sorted``), so the replicate's lots are sorted by
    sorting integers (``order``); ``below[b, g]`` counts the replicate's lots
    of rank below g (g = 0 … n_s), a cumulative histogram; ``weight[b, i]``
    is the sum of the weights ``lw`` of the first i lots in that order (NaN
    throughout for a replicate with a NaN weight) and ``masks[b, i]`` their
    bits (:func:`_prefix_masks`)."""

    def __init__(self, col: np.ndarray, pick: np.ndarray, B: int, lw: np.ndarray):
        n_s = col.size
        self.col_sorted = np.sort(col)
        rank = np.searchsorted(self.col_sorted, col, side="left").astype(np.int16 if n_s < 2 ** 15 else np.int64)
        keys = np.broadcast_to(rank[pick], (B, pick.shape[-1]))
        self.order = np.argsort(keys, axis=1, kind="stable")
        hist = np.bincount((keys + 1 + (n_s + 1) * np.arange(B)[:, None]).ravel(), minlength=B * (n_s + 1))
        self.below = np.cumsum(hist.reshape(B, n_s + 1), axis=1)
        lw = np.broadcast_to(np.asarray(lw, dtype=float), self.order.shape)
        self.weight = np.zeros((B, self.order.shape[1] + 1))
        np.cumsum(np.take_along_axis(lw, self.order, axis=1), axis=1, out=self.weight[:, 1:])
        self.weight[np.isnan(lw).any(axis=1)] = np.nan
        self.masks = _prefix_masks(self.order, (self.order.shape[1] + 63) // 64)

    def at(self, i: np.ndarray) -> np.ndarray:
        """Flat positions of rows ``i[b, ...]`` of each replicate b's prefix weights and masks
        (``weight.reshape(-1)``, ``masks.reshape(-1, words)``): one index array for ``np.take``, which
        gathers the same elements as ``masks[b, i]`` several times faster than indexing by two arrays."""
        B, rows = self.weight.shape
        return i + (np.arange(B) * rows).reshape((-1,) + (1,) * (i.ndim - 1))  # i of 1 replicate spreads to B

    def count(self, x: np.ndarray, side: str) -> np.ndarray:
        """Per replicate b, how many of its lots' residuals lie below
        ``x[b, ...]`` (``"left"``) or at most it (``"right"``): a residual r
        lies below x exactly when its rank is below searchsorted(col_sorted,
        x, "left"), at most x exactly when its rank is below
        searchsorted(col_sorted, x, "right") (a test compares the counts with
        numpy's searchsorted row by row)."""
        g = np.searchsorted(self.col_sorted, x, side=side)
        g = g + (np.arange(self.below.shape[0]) * self.below.shape[1]).reshape((-1,) + (1,) * (x.ndim - 1))
        return np.take(self.below.reshape(-1), g)  # below[b, g[b, ...]], gathered by one index array


def _passing_run(name: str, pred: np.ndarray, lots: _SortedLots, limit, scale: np.ndarray | None):
    """The lots whose residual, added to ``pred`` (B × rows × draws) times
    ``scale`` (ones when None), meets ``limit`` after the projection onto the
    physical range, as positions [i0, i1) of each replicate's lots in
    ascending order of the residual (:class:`_SortedLots`). The projection is
    a clip onto [pl, ph], so clip(x) ≥ lo holds always when lo ≤ pl, never
    when lo > ph, and else exactly when x ≥ lo, that is r ≥ (lo − pred)/s
    since s > 0 (likewise for the upper limit): the passing residuals are one
    run of the sorted ones. A NaN threshold passes no lot, as a comparison
    with NaN fails."""
    from linkage.models.lean import physical_range

    pl, ph = physical_range(name)
    L = lots.order.shape[1]
    s = 1.0 if scale is None else scale
    i0 = np.zeros(pred.shape, dtype=np.intp)
    i1 = np.full(pred.shape, L, dtype=np.intp)
    if (limit.min is not None and limit.min > ph) or (limit.max is not None and limit.max < pl):
        return i0, i0
    if limit.min is not None and limit.min > pl:
        lo = (limit.min - pred) / s
        i0 = lots.count(lo, "left")
        i0[np.isnan(lo)] = L
    if limit.max is not None and limit.max < ph:
        hi = (limit.max - pred) / s
        i1 = lots.count(hi, "right")
        i1[np.isnan(hi)] = 0
    return i0, np.maximum(i0, i1)


def _prefix_masks(order: np.ndarray, n_words: int) -> np.ndarray:
    """(B, L + 1, n_words) bit masks: row i of replicate b has the bits of the
    lots ``order[b, :i]`` set (lot l: bit l % 64 of word l // 64, little-endian)."""
    B, L = order.shape
    onehot = np.zeros((B, L + 1, n_words), dtype="<u8")
    onehot[np.arange(B)[:, None], np.arange(1, L + 1)[None, :], order // 64] = np.left_shift(
        np.uint64(1), (order % 64).astype(np.uint64))
    return np.bitwise_or.accumulate(onehot, axis=1)


#: the number of bits set in each byte value
_BYTE_COUNTS = np.array([bin(v).count("1") for v in range(256)], dtype=np.uint8)


def _bits_set(mask: np.ndarray) -> np.ndarray:
    """The number of bits set in ``mask`` (... × words of uint64) over its last axis, as int64: numpy's
    popcount (``np.bitwise_count``, numpy 2.0 on) of each word, else the table of the bits set in each byte
    (numpy before 2.0); the same integers either way, the first with an eighth of the elements."""
    count = getattr(np, "bitwise_count", None)
    if count is not None:
        return count(mask).sum(axis=-1, dtype=np.int64)
    return _BYTE_COUNTS[mask.astype("<u8", copy=False).view(np.uint8)].sum(axis=-1, dtype=np.int64)


def _mask_sums(mask: np.ndarray, lw: np.ndarray) -> np.ndarray:
    """Σ_l lw[b, l] over the lots l whose bit is set in ``mask[b, ...]``
    (B × ... × words, as :func:`_prefix_masks` lays them out); NaN for a
    replicate with a NaN weight, as in a product sum. Where a replicate's
    weights are all equal (lots drawn by weight), the count of bits set times
    the weight; else through a table per byte of the weight sums of its 256
    bit patterns (pattern v + 2^k is pattern v plus lot k of the byte, for
    v < 2^k)."""
    B, L = lw.shape
    n_bytes = mask.shape[-1] * 8
    bytes_ = mask.astype("<u8", copy=False).view(np.uint8)  # byte j holds lots 8j … 8j + 7 (little-endian words)
    if np.all(lw == lw[:, :1]):
        counts = _bits_set(mask)
        return counts * lw[:, 0].reshape((B,) + (1,) * (counts.ndim - 1))
    padded = np.zeros((B, n_bytes * 8))
    padded[:, :L] = lw
    padded = padded.reshape(B, n_bytes, 8)
    table = np.zeros((B, n_bytes, 256))
    for k in range(8):
        table[:, :, 1 << k:2 << k] = table[:, :, :1 << k] + padded[:, :, k:k + 1]
    base = ((np.arange(B)[:, None] * n_bytes + np.arange(n_bytes)[None, :]) * 256).reshape(
        (B,) + (1,) * (mask.ndim - 2) + (n_bytes,))
    out = table.reshape(-1)[bytes_ + base].sum(axis=-1)
    out[np.isnan(lw).any(axis=1)] = np.nan
    return out


def _final_sums(items: list, lw: np.ndarray, w: np.ndarray, ok: np.ndarray, each_sums: bool = True):
    """The last stage's exact sums over its lots: P(all pass) (B × rows) and,
    with ``each_sums``, P(pass) of each target. ``items`` are (name, pred
    B × rows × draws, the replicates' lots sorted by the target's residual
    (:class:`_SortedLots`), limit, spread scale or None) for each judged
    target; ``lw`` the lots' weights, ``w`` the draws'
    weights, ``ok`` whether a draw met every limit upstream. A draw's share
    is Σ_l lw[b, l] over the lots whose residuals pass (:func:`_passing_run`)
    every target (and each target alone), summed over the draws with w.

    The same sums as judging every lot of every draw (within(project(pred +
    r · s), limit), rows × draws × lots per replicate; a test compares the
    two) without forming them: each target's passing lots are a run of its
    sorted residuals, so its share is a difference of prefix sums of the
    weights in that order, and the lots passing every target are the AND of
    the runs' bit masks (prefix masks of the order), summed by
    :func:`_mask_sums`. Only the order of the additions differs (~1e-16)."""
    B = ok.shape[0]
    L = lw.shape[-1]
    lw = np.broadcast_to(np.asarray(lw, dtype=float), (B, L))
    mask = np.where(ok, ~np.uint64(0), np.uint64(0)).astype("<u8")[..., None]
    p_each = {}
    for name, pred, lots, limit, scale in items:
        i0, i1 = _passing_run(name, pred, lots, limit, scale)
        at0, at1 = lots.at(i0), lots.at(i1)  # weight[b, i] and masks[b, i] are taken at these flat positions
        if each_sums:
            weight = lots.weight.reshape(-1)
            p_each[name] = np.einsum("brd,bd->br", np.take(weight, at1) - np.take(weight, at0), w)
        masks = lots.masks.reshape(-1, lots.masks.shape[-1])
        passing = np.take(masks, at0, axis=0)  # the lots below the run's start ...
        np.invert(passing, out=passing)  # ... left out (in place: integer masks, the same bits as a new array)
        passing &= np.take(masks, at1, axis=0)  # of those below its end
        mask = mask & passing
    return np.einsum("brd,bd->br", _mask_sums(mask, lw), w), p_each


def _wsum(a: np.ndarray, lw: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Σ_d w[b, d] Σ_l lw[b, l] a[b, r, d, l] for a boolean a (B × rows × draws × lots),
    in float64 throughout (a float32 sum differed by ~1e-7 with the BLAS's order of summation,
    and the what-if page, :mod:`linkage.report.page`, repeats this sum to 1e-9)."""
    B, r, d, L = a.shape
    lw = np.broadcast_to(np.asarray(lw, dtype=float), (B, L))
    per_draw = np.matmul(a.reshape(B, r * d, L).astype(float), lw[:, :, None])
    return np.einsum("brd,bd->br", per_draw.reshape(B, r, d), w)


def _plan(lean, fixed: set, nrows: int, B: int, counts, lot_index, seed: int, cells: int,
          final_max: int) -> list[dict]:
    """What a batch's sums take that does not depend on the values at the
    rows: per simulated stage, its residual rows ``R``, the draws' parents
    and the lots they take (``pick``), the draws' weights after it (``w``),
    and for the last stage the lots' weights (``lw``) and, filled as they are
    needed, each judged target's sorted lots (``sorted``) and their prefix
    masks and weight sums. The lots depend on the replicates' counts and on
    uniforms drawn from ``default_rng([seed, stage])`` only."""
    sim = [st for st in lean.stages if any(t not in fixed for t in st.targets)]
    w = np.ones((B, 1))
    steps = []
    for si, st in enumerate(sim):
        todo = [t for t in st.targets if t not in fixed]
        R, W = _stage_lots(st, todo, counts, lot_index)
        if R.shape[0] == 0:
            raise UsageError(f"stage '{st.name}' has no lot with out-of-fold residuals of every target; "
                             "the model cannot give it an uncertainty")
        rng = np.random.default_rng([seed, si])  # the same uniforms whatever the batch
        D, n_s = w.shape[1], R.shape[0]
        step = {"stage": st, "todo": todo, "R": R, "final": si == len(sim) - 1}
        if not step["final"]:
            if nrows * D * n_s <= cells:  # every lot, with its weight
                parent = np.repeat(np.arange(D), n_s)
                pick = np.tile(np.arange(n_s), D)[None, :]
                w = w[:, parent] * W[:, pick[0]]
            else:  # k lots per draw, drawn by weight
                k = max(1, cells // (nrows * D))
                parent = np.repeat(np.arange(D), k)
                pick = _draw(W, rng.random(D * k))
                w = w[:, parent] / k
            step["parent"] = parent
        elif n_s > final_max:
            pick = _draw(W, rng.random(final_max))
            step["lw"] = np.full((B, final_max), 1.0 / final_max)
        else:
            pick = np.arange(n_s)[None, :]
            step["lw"] = W
        step.update(pick=pick, w=w, sorted={})
        steps.append(step)
    return steps


def _batch(lean, columns: dict, limits: dict, attributes: list[str], models: dict, plan: list[dict],
           each_sums: bool = True):
    """P(all pass) (B × rows) and P(pass) per attribute for a batch of
    replicates (models of each target evaluated together) with the batch's
    :func:`_plan`; without ``each_sums`` the last stage's attributes get no
    P(pass) of their own."""
    from linkage.decide.propagate import within
    from linkage.models.lean import project

    B = len(next(iter(models.values())))
    nrows = len(next(iter(columns.values())))
    values = {k: np.asarray(v, dtype=float).reshape(1, nrows, 1) for k, v in columns.items()}
    w = np.ones((B, 1))
    ok = np.ones((B, nrows, 1), dtype=bool)
    each: dict[str, np.ndarray] = {}
    p_each: dict[str, np.ndarray] = {}
    p_all = None
    for step in plan:
        st, R, pick, final = step["stage"], step["R"], step["pick"], step["final"]
        missing = [c for c in st.inputs if c not in values]
        if missing:
            raise UsageError(f"stage '{st.name}' needs {', '.join(missing)}, which were neither given nor "
                             "predicted by an earlier stage")
        if not final:
            parent = step["parent"]
            values = {c: v[:, :, parent] for c, v in values.items()}
            ok = ok[:, :, parent]
            each = {a: e[:, :, parent] for a, e in each.items()}
        w = step["w"]
        n_draws = w.shape[1]
        judged = []  # the last stage's targets, summed by _final_sums
        for j, t in enumerate(step["todo"]):
            if final and t not in attributes:
                continue
            target = lean.targets[t]
            X3 = np.stack([np.broadcast_to(values[c], (B, nrows, n_draws)).reshape(B, -1)
                           for c in target.inputs], axis=-1)
            pred = models[t].predict(X3).reshape(B, nrows, n_draws)
            scale = None if getattr(target, "spread", None) is None else target.scale(pred)
            if not final:
                r = R[:, j][pick]  # (1 or B, draws)
                values[t] = project(t, pred + r[:, None, :] * (1.0 if scale is None else scale))[0]
                if t in attributes:
                    each[t] = within(values[t], limits[t])
                    ok = ok & each[t]
            else:
                if t not in step["sorted"]:
                    step["sorted"][t] = _SortedLots(R[:, j], pick, B, step["lw"])
                judged.append((t, pred, step["sorted"][t], limits[t], scale))
        if final and judged:
            p_all, sums = _final_sums(judged, step["lw"], w, ok, each_sums)
            p_each.update(sums)
        elif final:
            lw = step["lw"]
            p_all = _wsum(ok[..., None], lw, w) if lw.shape[-1] == 1 else np.einsum("brd,bd->br", ok, w)
    for a, e in each.items():
        p_each[a] = np.einsum("brd,bd->br", e, w)
    if p_all is None:
        p_all = np.einsum("brd,bd->br", ok, w)
    return p_all, p_each


def _plans_of(lean, signature: tuple) -> dict:
    """The plans of :func:`chain_probabilities`'s batches for one signature
    (given names, rows, seed and sizes), kept on the lean chain for the next
    call with the same signature (a what-if at other settings); one signature
    is kept, the last."""
    kept = getattr(lean, "_bound_plans", None)
    if kept is None or kept[0] != signature:
        kept = (signature, {})
        lean._bound_plans = kept
    return kept[1]


def chain_probabilities(lean, columns: dict, limits: dict, attributes: list[str], *, replicates: bool = True,
                        seed: int = 0, cells: int = CELLS, final_max: int = FINAL_MAX,
                        memory_cells: int = 4_000_000, each: bool = True) -> ChainProbabilities:
    """P(all pass) and each P(pass) at each row of ``columns`` (every root
    setting, and any measured target, one value per row), for the point
    estimate and (when ``replicates`` and the model has them) every
    bootstrap replicate. ``limits`` maps each attribute to a spec limit
    (``min``/``max``); ``attributes`` are the predicted ones to judge.
    Replicates are evaluated in batches of at most ``memory_cells`` bytes of
    the last stage's lot masks (a bit per lot and draw); the result does not
    depend on the batch size. What does not depend on the values at the rows
    (the lots each draw takes, their order; :func:`_plan`) is kept on the
    lean chain for the next call with the same given names, rows, seed and
    sizes.
    ``each=False`` skips the last stage's per-attribute sums (P(all pass)
    alone, unchanged; ``p_each`` then lacks those attributes), which a map
    of many points does not need."""
    from linkage.models.lean import as_lean

    lean = as_lean(lean)
    columns = {str(k): np.asarray(v, dtype=float).reshape(-1) for k, v in columns.items()}
    point_models = {t: _Loop([tg.model_]) for t, tg in lean.targets.items()}
    nrows = len(next(iter(columns.values())))
    plans = _plans_of(lean, (tuple(sorted(columns)), nrows, seed, cells, final_max))
    if "point" not in plans:
        plans["point"] = _plan(lean, set(columns), nrows, 1, None, None, seed, cells, final_max)
    p_all, p_each = _batch(lean, columns, limits, attributes, point_models, plans["point"], each)
    p_all, p_each = p_all[0], {a: v[0] for a, v in p_each.items()}
    if not replicates:
        return ChainProbabilities(p_all, p_each, None, None, None)
    reps = replicates_of(lean)
    if not reps.available:
        return ChainProbabilities(p_all, p_each, None, None, reps.reason)
    per_rep = nrows * max(cells // max(nrows, 1), 1) * 8 * ((final_max + 63) // 64)
    size = max(1, min(reps.n, memory_cells // max(per_rep, 1)))
    all_b = np.empty((reps.n, nrows))
    each_b = {a: np.empty((reps.n, nrows)) for a in p_each}
    for start in range(0, reps.n, size):
        idx = np.arange(start, min(start + size, reps.n))
        if (start, size) not in plans:
            plans[start, size] = _plan(lean, set(columns), nrows, idx.size, reps.counts[idx], reps.lot_index, seed,
                                       cells, final_max)
        models = {t: reps.models[t].take(idx) for t in lean.targets}
        pa, pe = _batch(lean, columns, limits, attributes, models, plans[start, size], each)
        all_b[idx] = pa
        for a in each_b:
            each_b[a][idx] = pe[a]
    return ChainProbabilities(p_all, p_each, all_b, each_b, None)


def with_unit_level(low: np.ndarray, lot_level_point: np.ndarray, unit_level_point: np.ndarray) -> np.ndarray:
    """The lower bound of a probability that includes a unit-level (compendial) judgement.

    P(pass, judged on units) = P(lot values pass) × P(units pass | lot values pass). The bootstrap
    bound ``low`` covers the first factor (the lot values judged against the limits, as
    :func:`chain_probabilities` judges them); the second factor is taken at its point estimate, the
    ratio of the Monte Carlo probability with units (``unit_level_point``) to the lot-level one
    (``lot_level_point``), capped at 1. The estimation uncertainty of the within-lot spread model
    is not carried into the bound: a stated approximation, not a proof."""
    low, lot, units = (np.array(a, dtype=float) for a in np.broadcast_arrays(low, lot_level_point, unit_level_point))
    ratio = np.divide(units, lot, out=np.zeros_like(units), where=lot > 0)
    return np.minimum(low * np.clip(ratio, 0.0, 1.0), units)
