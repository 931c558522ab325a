r"""Compendial judgement of simulated lots, unit by unit.

A specification may judge dissolution by the staged acceptance table of
USP <711> (``judge = "stages"``) and the uniformity of dosage units by the
acceptance value of USP <905> (``[acceptance_value] max = 15``). Both are
tests on units, not on a lot mean, so the probability that a lot passes is
found by simulating its units: for each lot that the chain simulates
(:func:`linkage.decide.propagate.simulate` gives lot-mean draws), units are
drawn around the lot's mean with the within-lot spread the training lots
measured, and the test's rules are applied to them.

Within-lot spread (``within_lot`` of the training record, :func:`fit_within_lot`)
    *Dissolution.* The vessel SD at the model's time point
    (``dissolution_sd_pct`` of the assembled table) is modelled per lot as a
    smooth function of the lot mean: :math:`\ln\sigma^2(\mu)` by local-linear
    kernel regression (Gaussian kernel; Fan & Gijbels 1996, Local Polynomial
    Modelling and its Applications, ch. 3; from memory) of the lots' log
    sample variances on their means, with Silverman's rule-of-thumb bandwidth
    :math:`h = 1.06\,\hat s\,n^{-1/5}` (Silverman 1986, Density Estimation,
    eq. 3.28; from memory). For normal units the log of a sample variance
    with :math:`\nu` degrees of freedom has mean :math:`\ln\sigma^2 +
    \psi(\nu/2) - \ln(\nu/2)` and variance :math:`\psi'(\nu/2)` (Bartlett &
    Kendall 1946, JRSS Suppl. 8:128–138; from memory): the bias is removed
    lot by lot and the lots are weighted by :math:`1/\psi'(\nu/2)`. Release
    varies most between units on the steep part of the profile and least
    near its plateau, so the spread moves with the lot mean, and not on a
    straight line in the log (a log-linear variance function, Harvey 1976,
    underestimated the spread near Q + 5 by a fifth on the synthetic
    scenario). The fit is kept on a grid of :data:`SPREAD_GRID` lot means
    over the training range, interpolated linearly, and held at its end
    values outside it (no extrapolation). With fewer than
    :data:`MIN_SPREAD_LOTS` lots with a vessel SD, or lot means that do not
    vary, the pooled within-lot variance :math:`\sum \nu_i s_i^2 / \sum
    \nu_i` is used for every lot.

    *Unit weight.* The relative SD of unit weight is a chain target
    (``weight_rsd_pct``, from the ``tablet_weights`` table); where the chain
    predicts it, each simulated lot has its own RSD. Otherwise every lot has
    the pooled within-lot RSD of the training lots.

Measured spread is not spread twice
    A training lot's mean dissolution is the mean of its few vessels and its
    weight RSD the sample RSD of its few units, so the chain's lot-level
    draws (its out-of-fold residuals) already hold the sampling error of
    those units. Drawing fresh units around them would count that error
    twice. Before units are drawn, the draws of each row are therefore
    shrunk towards their mean so that their variance loses the expected
    sampling variance: :math:`\sigma^2/n` for a mean of n vessels, and
    :math:`2\sigma^4/(n-1)` for the sample variance of n normal units
    (moment matching; common practice, no source). Where the draws do not
    vary more than that (a value the user measured), the lot is taken at the
    draw itself.

Units
    Units are normal around the lot's mean with the lot's SD (dissolution in %
    of label claim, clipped to the physical range 0–150 %; unit weight
    relative to the lot mean weight, the mean weight cancels from the
    acceptance value of weight variation). Every lot gets 24 vessels (enough
    for S3) and 30 units (enough for stage 2); a stage uses the first 6, 12 or
    24, 10 or 30 of them, as a laboratory tests them in order. Random numbers
    are common to every row (the same standard normals at every porosity), so
    curves over porosity are smooth.

Rules (vectorised here; the pure functions of
:mod:`linkage.physics.pharmacopeia` are the reference the tests hold them to)
    USP <711> Table 1, immediate release, Q = the spec's ``min``: S1, 6 units
    each >= Q + 5; S2, 12 units with mean >= Q and none < Q - 15; S3, 24
    units with mean >= Q, at most 2 < Q - 15 and none < Q - 25; the
    probabilities are cumulative (passing by that stage).
    USP <905>, weight variation: each unit's content estimated as
    :math:`x_i = w_i A / \bar W` with the assay A taken as 100 % of label
    claim and :math:`\bar W` the mean weight of the units tested (as
    :mod:`linkage.assemble` does); stage 1, 10 units with
    :math:`AV = |M - \bar X| + 2.4 s \le L_1`; stage 2, 30 units with
    :math:`AV = |M - \bar X| + 2.0 s \le L_1` and every unit within
    :math:`(1 \mp 0.01 L_2) M`, L2 = 25. Content uniformity from unit
    assays is not judged: the template has no table of unit contents.

numpy only: ``linkage predict`` runs this.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from linkage.exceptions import UsageError
from linkage.physics.pharmacopeia import L1_PCT, L2_PCT, reference_value_pct

__all__ = [
    "ACCEPTANCE_VALUE",
    "DISSOLUTION",
    "MIN_SPREAD_LOTS",
    "N_VESSELS",
    "N_UNITS",
    "dissolution_stages",
    "acceptance_values",
    "uniformity_from_weights",
    "fit_within_lot",
    "dissolution_variance",
    "shrink_means",
    "shrink_variances",
    "Judged",
    "judge_draws",
    "judge_text",
    "judged_on_units",
    "lot_values_text",
    "needs_units",
    "within_lot_of",
]

DISSOLUTION = "dissolution_pct"
WEIGHT_RSD = "weight_rsd_pct"
ACCEPTANCE_VALUE = "acceptance_value"
#: vessels simulated per lot (S3 tests 24) and units weighed (stage 2 tests 30)
N_VESSELS = 24
N_UNITS = 30
#: fewest lots with a vessel SD for the log-linear variance model; below, the pooled variance
#: (common practice, no source: two parameters need a few more lots than that)
MIN_SPREAD_LOTS = 5
#: lot means on which the fitted log variance is kept (interpolated between them)
SPREAD_GRID = 41
#: acceptability constant k for 10 and 30 units, USP <905> Table 2
_K10, _K30 = 2.4, 2.0
#: comparisons with a limit allow for floating-point error only (as linkage.physics.pharmacopeia)
_TOL = 1e-9
#: dissolution units are clipped to the physical range of a release (schema.PHYSICAL_BOUNDS)
_RELEASE_RANGE = (0.0, 150.0)
#: rows of the draws judged at once (bounds the memory of the unit arrays)
_CHUNK_ROWS = 8


# ---------------------------------------------------------------------------
# the rules, vectorised over lots
# ---------------------------------------------------------------------------
def dissolution_stages(released_pct, q_pct: float) -> dict[str, np.ndarray]:
    """Cumulative verdicts of USP <711> Table 1 (immediate release) for lots of 24 units.

    Parameters
    ----------
    released_pct : array (..., 24)
        Amount released by each unit [% label claim], in the order tested
        (the first 6 are S1, the first 12 S2).
    q_pct : float
        Q [% label claim].

    Returns
    -------
    dict
        ``"S1"``, ``"S2"``, ``"S3"``: boolean arrays (...): the lot passes at
        S1, by S2 (at S1 or S2), by S3.

    References
    ----------
    USP <711> Dissolution, Acceptance Table 1; the same rules as
    :func:`linkage.physics.pharmacopeia.dissolution_stage`.
    """
    x = np.asarray(released_pct, dtype=float)
    if x.shape[-1] != N_VESSELS:
        raise ValueError(f"released_pct must hold {N_VESSELS} units along its last axis; got {x.shape[-1]}")
    q = float(q_pct)
    s1 = np.all(x[..., :6] >= q + 5 - _TOL, axis=-1)  # S1: each of 6 units >= Q + 5
    x12 = x[..., :12]
    s2 = (x12.mean(axis=-1) >= q - _TOL) & np.all(x12 >= q - 15 - _TOL, axis=-1)  # S2: mean >= Q, none < Q - 15
    s3 = ((x.mean(axis=-1) >= q - _TOL) & (np.sum(x < q - 15 - _TOL, axis=-1) <= 2)  # S3: mean >= Q, <= 2 below
          & ~np.any(x < q - 25 - _TOL, axis=-1))                                      # Q - 15, none below Q - 25
    by_s2 = s1 | s2
    return {"S1": s1, "S2": by_s2, "S3": by_s2 | s3}


def acceptance_values(contents_pct, target_pct: float = 100.0) -> np.ndarray:
    r"""Acceptance value :math:`AV = |M - \bar X| + k s` of lots of 10 or 30 units, USP <905>.

    ``contents_pct``: array (..., n) of unit contents [% label claim], n = 10
    (k = 2.4) or 30 (k = 2.0). Returns the AV of each lot (...); the
    arithmetic of :func:`linkage.physics.pharmacopeia.acceptance_value`.
    """
    x = np.asarray(contents_pct, dtype=float)
    n = x.shape[-1]
    k = {10: _K10, 30: _K30}.get(n)
    if k is None:
        raise ValueError(f"contents_pct must hold 10 or 30 units along its last axis; got {n}")
    mean = x.mean(axis=-1)
    sd = x.std(axis=-1, ddof=1)
    m = reference_value_pct(mean, target_pct)  # M, USP <905> Table 2
    return np.abs(m - mean) + k * sd  # AV = |M - Xbar| + k s


def uniformity_from_weights(weights, l1_pct: float = L1_PCT, l2_pct: float = L2_PCT) -> dict[str, np.ndarray]:
    r"""Two-stage USP <905> verdict by weight variation for lots of 30 unit weights.

    Contents are estimated as :math:`x_i = 100\,w_i / \bar W` (assay 100 %
    of label claim, :math:`\bar W` the mean weight of the units tested:
    the first 10 at stage 1, all 30 at stage 2).

    Returns
    -------
    dict
        ``av1`` (AV of the first 10 units), ``av2`` (AV of all 30),
        ``stage1`` (passes at stage 1: av1 <= L1) and ``stage2`` (passes by
        stage 2: at stage 1, or av2 <= L1 with every unit within
        (1 -/+ 0.01 L2) M).
    """
    w = np.asarray(weights, dtype=float)
    if w.shape[-1] != N_UNITS:
        raise ValueError(f"weights must hold {N_UNITS} units along its last axis; got {w.shape[-1]}")
    c10 = 100.0 * w[..., :10] / w[..., :10].mean(axis=-1, keepdims=True)  # x_i = w_i A / W_bar
    c30 = 100.0 * w / w.mean(axis=-1, keepdims=True)
    av1 = acceptance_values(c10)
    av2 = acceptance_values(c30)
    m2 = reference_value_pct(c30.mean(axis=-1))
    low, high = (1.0 - 0.01 * l2_pct) * m2, (1.0 + 0.01 * l2_pct) * m2  # stage 2 unit range
    inside = np.all((c30 >= low[..., None] - _TOL) & (c30 <= high[..., None] + _TOL), axis=-1)
    stage1 = av1 <= l1_pct + _TOL
    return {"av1": av1, "av2": av2, "stage1": stage1, "stage2": stage1 | ((av2 <= l1_pct + _TOL) & inside)}


# ---------------------------------------------------------------------------
# the within-lot spread, from the training lots
# ---------------------------------------------------------------------------
def _finite(a) -> np.ndarray | None:
    return None if a is None else np.asarray(a, dtype=float).reshape(-1)


def fit_within_lot(*, dissolution_pct=None, dissolution_sd_pct=None, dissolution_vessels=None,
                   weight_rsd_pct=None, weight_units=None, time_min: float | None = None) -> dict:
    """The within-lot spread of the training lots (see the module notes).

    Arrays are one value per lot (NaN where a lot lacks it): the lot mean
    and SD of dissolution over vessels and the vessel count; the RSD of unit
    weight and the unit count. Returns a JSON-safe dict with ``dissolution``
    and ``weight`` (each absent when no lot has the data):

    ``dissolution``: ``method`` ("local-linear" or "pooled"), ``grid``
    (lot means [%]) and ``log_var`` (ln σ² at them), ``bandwidth_pct``,
    ``mean_range``, ``pooled_sd_pct``, ``n_lots``, ``units_per_lot``
    (median vessels), ``time_min``.
    ``weight``: ``pooled_rsd_pct``, ``n_lots``, ``units_per_lot`` (median units).
    """
    from scipy.special import digamma, polygamma  # training only; the what-if reads the numbers

    out: dict = {}
    m, s, n = _finite(dissolution_pct), _finite(dissolution_sd_pct), _finite(dissolution_vessels)
    if m is not None and s is not None and n is not None:
        use = np.isfinite(m) & np.isfinite(s) & np.isfinite(n) & (n >= 2) & (s > 0)
        if use.any():
            m, s2, nu = m[use], s[use] ** 2, n[use] - 1.0
            pooled = float(np.sum(nu * s2) / np.sum(nu))  # pooled within-lot variance
            lo, hi = float(m.min()), float(m.max())
            entry = {"method": "pooled", "grid": [lo, hi], "log_var": [float(np.log(pooled))] * 2,
                     "bandwidth_pct": None, "mean_range": [lo, hi], "pooled_sd_pct": float(np.sqrt(pooled)),
                     "n_lots": int(use.sum()), "units_per_lot": float(np.median(nu + 1.0)),
                     "time_min": None if time_min is None else float(time_min)}
            if use.sum() >= MIN_SPREAD_LOTS and hi - lo > 1e-9:
                # E[ln s²] = ln σ² + ψ(ν/2) − ln(ν/2), Var[ln s²] = ψ'(ν/2) (Bartlett & Kendall 1946)
                y = np.log(s2) - (digamma(nu / 2.0) - np.log(nu / 2.0))
                wt = 1.0 / polygamma(1, nu / 2.0)
                h = 1.06 * float(np.std(m, ddof=1)) * len(m) ** -0.2  # Silverman (1986) eq. 3.28
                grid = np.linspace(lo, hi, SPREAD_GRID)
                log_var = [_local_linear(x, m, y, wt, h) for x in grid]
                entry.update(method="local-linear", grid=[float(g) for g in grid],
                             log_var=[float(v) for v in log_var], bandwidth_pct=h)
            out["dissolution"] = entry
    r, k = _finite(weight_rsd_pct), _finite(weight_units)
    if r is not None and k is not None:
        use = np.isfinite(r) & np.isfinite(k) & (k >= 2)
        if use.any():
            nu = k[use] - 1.0
            out["weight"] = {"pooled_rsd_pct": float(np.sqrt(np.sum(nu * r[use] ** 2) / np.sum(nu))),
                             "n_lots": int(use.sum()), "units_per_lot": float(np.median(k[use]))}
    return out


def _local_linear(x: float, m: np.ndarray, y: np.ndarray, wt: np.ndarray, h: float) -> float:
    """Local-linear estimate at ``x`` of y on m: weighted least squares of y on
    (1, m - x) with weights wt · exp(-((m - x)/h)² / 2); the intercept."""
    k = wt * np.exp(-0.5 * ((m - x) / h) ** 2)
    X = np.column_stack([np.ones_like(m), m - x]) * np.sqrt(k)[:, None]
    return float(np.linalg.lstsq(X, y * np.sqrt(k), rcond=None)[0][0])


def dissolution_variance(spread: dict, lot_mean_pct) -> np.ndarray:
    """Within-lot vessel variance [%²] at a lot mean, from ``spread["dissolution"]``:
    ln σ² interpolated linearly on the fitted grid, held at its end values
    outside the training range of lot means."""
    mu = np.asarray(lot_mean_pct, dtype=float)
    return np.exp(np.interp(mu, spread["grid"], spread["log_var"]))


def shrink_means(draws: np.ndarray, sampling_var: np.ndarray) -> np.ndarray:
    """Lot means from draws of a mean of units: each row's draws shrunk towards
    their mean so that their variance loses ``sampling_var`` (per row, the
    expected variance of the measured mean around the lot's true mean)."""
    d = np.asarray(draws, dtype=float)
    centre = d.mean(axis=1, keepdims=True)
    total = d.var(axis=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(total > 0, np.sqrt(np.clip(1.0 - np.reshape(sampling_var, (-1, 1)) / total, 0.0, 1.0)), 0.0)
    return centre + c * (d - centre)


def shrink_variances(variances: np.ndarray, n_units: float) -> np.ndarray:
    r"""Lot variances from draws of a sample variance of ``n_units`` normal units:
    each row's draws shrunk towards their mean m so that their variance V loses
    the sampling part, :math:`E[2\sigma^4/\nu] = 2(\mathrm{Var}\,\sigma^2 + m^2)/\nu`, ν = n − 1."""
    v = np.asarray(variances, dtype=float)
    nu = float(n_units) - 1.0
    m = v.mean(axis=1, keepdims=True)
    total = v.var(axis=1, keepdims=True)
    true_var = (total - 2.0 * m ** 2 / nu) / (1.0 + 2.0 / nu)  # V = Var σ² (1 + 2/ν) + 2 m²/ν
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(total > 0, np.sqrt(np.clip(true_var / total, 0.0, 1.0)), 0.0)
    return np.maximum(m + c * (v - m), 0.0)


# ---------------------------------------------------------------------------
# judging simulated lots
# ---------------------------------------------------------------------------
def within_lot_of(chain) -> dict:
    """The within-lot spread a fitted chain or its lean form records ({} if none)."""
    if hasattr(chain, "within_lot"):
        return dict(chain.within_lot or {})
    training = getattr(chain, "training", None) or {}
    return dict(training.get("within_lot") or {})


def judge_text(spec) -> dict[str, str]:
    """Attribute -> how the spec judges it, in words."""
    out = {}
    for name, limit in spec.limits.items():
        if name == DISSOLUTION and spec.dissolution_judge == "stages":
            out[name] = (f"USP <711> stages on simulated units, Q = {limit.min:g}%, "
                         f"pass by {spec.dissolution_pass_by}")
        else:
            out[name] = f"lot mean {limit.text()}"
    if spec.acceptance_value_max is not None:
        out[ACCEPTANCE_VALUE] = (f"USP <905> acceptance value <= L1 = {spec.acceptance_value_max:g} by weight "
                                 "variation on simulated units, two stages (10, then 30 units)")
    return out


def judged_on_units(spec, predicted=()) -> list[str]:
    """The attributes ``spec`` judges on simulated units (USP <711> stages; the USP <905> acceptance value),
    dissolution only where the chain predicts it (``predicted``): what a computation on lot values alone (the roll
    force range, the design-space map) does not judge as the porosity window and ``predict`` do."""
    if spec is None:
        return []
    units = [DISSOLUTION] if (getattr(spec, "dissolution_judge", "mean") == "stages" and DISSOLUTION in spec.limits
                              and DISSOLUTION in predicted) else []
    return units + ([ACCEPTANCE_VALUE] if getattr(spec, "acceptance_value_max", None) is not None else [])


def lot_values_text(units: list[str], what: str) -> str | None:
    """Why ``what`` (its subject and verb: 'the roll force range rests') is not the same judgement as
    the porosity window's, where the spec judges ``units`` on simulated units (None where it judges none): one
    sentence, said wherever ``what`` is stated (a user test read the map's ranges beside the window's as one
    judgement)."""
    if not units:
        return None
    return (f"The spec judges {', '.join(units)} by compendial stages on simulated units, as the porosity window, "
            f"predict and the what-if sheet do; {what} on lot means against each limit, not on those stages: "
            "not the same judgement as the window's.")


def needs_units(spec) -> bool:
    """Whether ``spec`` judges anything on simulated units: :func:`judged_on_units` of every attribute it limits
    (a spec read from a file limits dissolution wherever it judges it by stages: ``judge = "stages"`` needs
    ``min``), so that the porosity window, predict and the what-if sheet simulate units around each lot."""
    return spec is not None and bool(judged_on_units(spec, spec.limits))


@dataclass
class Judged:
    """Unit-level verdicts of simulated lots, each an array (rows, draws)."""

    passes: dict[str, np.ndarray]  # attribute -> does the lot pass as the spec judges it
    stages: dict[str, np.ndarray] = field(default_factory=dict)  # "S1", "S2", "S3" (cumulative)
    av1: np.ndarray | None = None  # acceptance value of the first 10 units
    av_stages: dict[str, np.ndarray] = field(default_factory=dict)  # "1", "2" (cumulative)
    rsd_source: str | None = None


def judge_draws(chain, draws, spec, *, seed: int = 0) -> Judged:
    """Unit-level verdicts for the lots in ``draws`` under ``spec``.

    ``passes`` holds ``dissolution_pct`` when it is judged by stages and
    predicted (by the stage the spec's ``pass_by`` names) and
    ``acceptance_value`` when the spec has one. Raises :class:`UsageError`
    when the model does not record the within-lot spread the judgement needs.
    """
    spread = within_lot_of(chain)
    model = getattr(chain, "model_id", None) or "this model"
    rows, n_draws = next(iter(draws.values.values())).shape
    # a stream of its own, so switching the judgement on leaves the lot draws unchanged
    rng = np.random.default_rng([int(seed), 711])
    out = Judged(passes={})
    if DISSOLUTION in judged_on_units(spec, draws.values):  # by stages, limited and predicted: as needs_units says
        if "dissolution" not in spread:
            raise UsageError(f'judge = "stages" needs the within-lot vessel SD of dissolution, which {model} does '
                             "not record: train it on lots with vessel data (the dissolution table), or judge the "
                             'lot mean (judge = "mean")')
        sp = spread["dissolution"]
        z = rng.standard_normal((n_draws, N_VESSELS))
        q = spec.limits[DISSOLUTION].min
        mean_draws = draws.values[DISSOLUTION]
        var_at_draws = dissolution_variance(sp, mean_draws)
        mu = shrink_means(mean_draws, var_at_draws.mean(axis=1) / sp["units_per_lot"])
        sd = np.sqrt(dissolution_variance(sp, mu))
        stages = {k: np.empty((rows, n_draws), dtype=bool) for k in ("S1", "S2", "S3")}
        for r0 in range(0, rows, _CHUNK_ROWS):
            sl = slice(r0, r0 + _CHUNK_ROWS)
            units = np.clip(mu[sl, :, None] + sd[sl, :, None] * z[None], *_RELEASE_RANGE)
            for k, v in dissolution_stages(units, q).items():
                stages[k][sl] = v
        out.stages = stages
        out.passes[DISSOLUTION] = stages[spec.dissolution_pass_by]
    if spec.acceptance_value_max is not None:
        if "weight" not in spread:
            raise UsageError(f"[acceptance_value] needs the within-lot spread of unit weight, which {model} does "
                             "not record: train it on lots with unit weights (the tablet_weights table)")
        sp = spread["weight"]
        z = rng.standard_normal((n_draws, N_UNITS))
        if WEIGHT_RSD in draws.values:
            var = shrink_variances(draws.values[WEIGHT_RSD] ** 2, sp["units_per_lot"])
            out.rsd_source = f"{WEIGHT_RSD} of each simulated lot"
        else:
            var = np.full((rows, n_draws), sp["pooled_rsd_pct"] ** 2)
            out.rsd_source = f"pooled within-lot RSD of the training lots, {sp['pooled_rsd_pct']:.3g}%"
        rsd = np.sqrt(var)
        av1 = np.empty((rows, n_draws))
        st = {k: np.empty((rows, n_draws), dtype=bool) for k in ("1", "2")}
        for r0 in range(0, rows, _CHUNK_ROWS):
            sl = slice(r0, r0 + _CHUNK_ROWS)
            weights = np.maximum(1.0 + rsd[sl, :, None] / 100.0 * z[None], 1e-9)  # relative to the lot mean
            u = uniformity_from_weights(weights, l1_pct=spec.acceptance_value_max)
            av1[sl], st["1"][sl], st["2"][sl] = u["av1"], u["stage1"], u["stage2"]
        out.av1, out.av_stages = av1, st
        out.passes[ACCEPTANCE_VALUE] = st["2"]
    return out


def mean_av_pass(draws, spec, chain) -> np.ndarray | None:
    """Mean-response judgement of the acceptance value (rows,): the AV of 10
    units at the mean prediction of the weight RSD (k s, with the mean content
    at its target) against L1; None without [acceptance_value]."""
    if spec.acceptance_value_max is None:
        return None
    rows = len(next(iter(draws.means.values())))
    if WEIGHT_RSD in draws.means:
        rsd = np.asarray(draws.means[WEIGHT_RSD], float)
    else:
        rsd = np.full(rows, within_lot_of(chain).get("weight", {}).get("pooled_rsd_pct", np.nan))
    return _K10 * rsd <= spec.acceptance_value_max + _TOL


# ---------------------------------------------------------------------------
# what-if entries (row 0 of the draws)
# ---------------------------------------------------------------------------
def stage_entry(spec, judged: Judged) -> dict:
    """Keys added to ``predictions.dissolution_pct`` of a what-if judged by stages."""
    return {"judge": "stages", "pass_by": spec.dissolution_pass_by,
            "p_stage": {k: float(v[0].mean()) for k, v in judged.stages.items()}}


def av_entry(spec, judged: Judged, level: float) -> dict:
    """``predictions.acceptance_value`` of a what-if: the stage-1 AV of the
    simulated lots (median and central ``level`` range), the probability of
    passing USP <905> (by stage 2) and by stage."""
    av = judged.av1[0]
    q = (1.0 - level) / 2.0
    value = float(np.median(av))
    low, high = (float(a) for a in np.quantile(av, [q, 1.0 - q]))
    return {
        "value": value, "low": low, "high": high,
        "interval_method": "monte carlo through the chain, unit level (stage-1 AV of 10 units)",
        "selected_model": f"units drawn with the {judged.rsd_source}",
        "projected": False, "unprojected": {"value": value, "low": low, "high": high},
        "physical_range": [0.0, None],
        "judge": "USP <905>", "p_pass": float(judged.av_stages["2"][0].mean()),
        "p_stage": {k: float(v[0].mean()) for k, v in judged.av_stages.items()},
        "limits": {"min": None, "max": spec.acceptance_value_max},
    }
