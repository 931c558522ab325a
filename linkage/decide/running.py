"""Guidance for a lot in progress: at-line ribbon samples against the window
and the within-lot limits, drift, and a correction of roll force (or gap).

What it answers, from the samples taken so far (``sampled_at`` order):

1. **Each sample and the running mean** against the porosity window and the
   within-lot limits. σ is the pooled within-lot SD of ribbon replicates of
   the model's training lots (:func:`linkage.decide.watch.pooled_within_sd`);
   the centre is the mean of the lot's first ``baseline`` samples (the
   lot's own level when the run began: lots differ from one another by more
   than their samples do, so a centre from other lots would flag every lot).
   Each sample also carries the flags of
   :func:`linkage.decide.watch.porosity_within` (outside the window; more
   than 3σ from the mean of the samples before it).
2. **Drift**: the individuals (Shewhart) chart with limits centre ± 3σ, the
   Western Electric run rules and the EWMA chart (λ = 0.2, L = 3, as the
   drift watch uses) of :mod:`linkage.charts`, applied to the samples in
   order. The run is drifting from the first sample where any of them
   signals; the output names each rule at each sample.
3. **The level now**: when a drift is signalled, the least-squares line of
   porosity on hours since the first sample, at the last sample; its
   standard error with σ known is σ·sqrt(1/n + (t_n − t̄)²/S_tt) (the
   variance of a fitted mean response, e.g. Montgomery, Peck & Vining 2012,
   Introduction to Linear Regression Analysis, 5th ed., §2.4.2). Without a
   drift, the running mean, with standard error σ/√n.
4. **The correction**: the ribbon stage's local sensitivity s = ∂ε/∂x of the
   setting x (roll force, or gap) at the lot's settings is the central
   difference (f(x + h) − f(x − h)) / 2h of the stage's prediction, h = 5 %
   of the training range of x (a secant wide enough for piecewise-constant
   trees; exact for a stage linear or quadratic in x). Its uncertainty is
   the SD of the same difference over the model's lot-level bootstrap
   replicates (:mod:`linkage.models.bootstrap`; Efron & Tibshirani 1993, §6.2,
   the bootstrap estimate of standard error). The change Δx = (c − L)/s
   brings the level L to the window's centre c; its standard uncertainty by
   the law of propagation of uncertainty (JCGM 100:2008, GUM, eq. (10),
   first order, L and s independent):
   u(Δx)² = (u(L)/s)² + (Δx·u(s)/s)².
5. **Samples to confirm**: the number n of further samples whose mean tells
   an offset of δ = ``confirm_shift_sd``·σ from the centre with a two-sided
   z-test at level α and power 1 − β: n = ⌈((z_{1−α/2} + z_{1−β})·σ/δ)²⌉
   (Montgomery & Runger 2014, Applied Statistics and Probability for
   Engineers, 6th ed., §9.2.2, eq. 9-22; the term of the far tail is left out,
   as there).

6. **Where the model does not hold**: the ribbon stage's applicability-domain
   verdict at the lot's settings (the what-if's check), and the lot's starting
   level against the model's prediction interval; outside the domain, or
   beyond twice the interval's half-width, the correction is flagged
   unsupported (``correction.supported``) and the text says so first. A
   change whose 95 % interval holds 0 is no change needed now. A stage saved
   without a domain (a model of an older linkage) is said first too: nothing
   is checked there (``domain`` null, a ``warnings`` item).

The guidance answers "where is this run going and what would bring it back";
it is decision support, not release testing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from linkage import CAUTION
from linkage.charts import Reference, ewma, run_rules, shewhart_limits
from linkage.decide.watch import EWMA_L, EWMA_LAMBDA

__all__ = ["ADJUSTABLE", "STEP_SHARE", "sensitivity", "replicate_sensitivities", "replicate_secants",
           "solve_setting", "correction",
           "sample_size", "samples_to_confirm", "shewhart_run_length", "level_now", "chart_signals", "advise",
           "RunningResult",
           "METHOD", "read_samples", "process_settings", "draw_chart"]

POROSITY = "ribbon_porosity"
#: settings whose correction is suggested
ADJUSTABLE = ("roll_force_kn_per_cm", "roll_gap_mm")
#: finite-difference half step as a share of the setting's training range
STEP_SHARE = 0.05
#: the two-sided 95 % normal quantile
Z95 = 1.959963984540054

METHOD = {
    "limits": "centre = mean of the lot's first baseline samples; σ = pooled within-lot SD of the training lots' "
              "ribbon replicates; individuals chart centre ± 3σ with the Western Electric run rules and EWMA "
              "(λ = 0.2, L = 3), linkage.charts (NIST/SEMATECH e-Handbook §6.3.2; Montgomery 2009 §9.2)",
    "level": "with a drift: least-squares line of porosity on hours at the last sample, SE σ·sqrt(1/n + "
             "(t_n − t̄)²/S_tt) (Montgomery, Peck & Vining 2012 §2.4.2); without: the running mean, SE σ/√n",
    "sensitivity": "central difference of the ribbon stage's prediction at the lot's settings, half step 5% of the "
                   "setting's training range; uncertainty = SD over the lot-level bootstrap replicates "
                   "(Efron & Tibshirani 1993 §6.2)",
    "correction": "Δx = (centre − level)/s; u(Δx)² = (u(level)/s)² + (Δx·u(s)/s)², first-order law of "
                  "propagation of uncertainty (JCGM 100:2008 eq. 10); 95% interval ± 1.96·u(Δx)",
    "model_fit": "the lot's starting level (baseline centre) against the model's conformal prediction interval at "
                 "its nominal coverage at these settings; beyond twice its half-width from the expectation (about "
                 "3.3 prediction SD with normal errors; a rule of thumb, no source) the model is taken not to "
                 "describe the lot and the correction is not supported",
    "confirm": "n = ⌈((z_{1−α/2} + z_{1−β})·σ/δ)²⌉, two-sided z-test on the mean of the next n samples "
               "(Montgomery & Runger 2014 §9.2.2, eq. 9-22)",
}


# --------------------------------------------------------------------------- pieces


def sensitivity(predict, settings: dict[str, float], name: str, step: float) -> np.ndarray:
    """Central difference (f(x + h) − f(x − h)) / 2h of ``predict`` in
    ``name`` at ``settings``.

    ``predict`` maps {input: array of 2 values} to an array of shape
    (..., 2) (one model, or B bootstrap replicates stacked in front); the
    result has the leading shape. Exact for f linear or quadratic in x; for a
    smooth f the error is h²·f'''(ξ)/6 (the central-difference error term,
    e.g. Burden & Faires 2011, Numerical Analysis, 9th ed., §4.1, eq. 4.5).
    """
    if not step > 0:
        raise ValueError(f"step must be positive; got {step}")
    x = float(settings[name])
    columns = {k: np.full(2, float(v)) for k, v in settings.items()}
    columns[name] = np.array([x + step, x - step])
    y = np.asarray(predict(columns), float)
    return (y[..., 0] - y[..., 1]) / (2 * step)


def replicate_sensitivities(lean, settings: dict[str, float], name: str, step: float,
                            target: str = POROSITY) -> np.ndarray | None:
    """The sensitivity of every bootstrap replicate of ``target`` (None when
    the model has no replicates)."""
    from linkage.decide.bound import replicates_of

    reps = replicates_of(lean)
    if not reps.available or target not in reps.models:
        return None
    inputs = lean.targets[target].inputs
    models = reps.models[target]

    def predict(columns):
        X = np.column_stack([columns[c] for c in inputs])
        return models.predict(np.broadcast_to(X, (len(models), *X.shape)))

    values = sensitivity(predict, {k: settings[k] for k in inputs}, name, step)
    return values[np.isfinite(values)]


def solve_setting(change_at, x0: float, target: float, slope_at, *, tol: float = 1e-7,
                  max_iter: int = 30) -> tuple[float, bool]:
    """The setting x with change_at(x) = target, by Newton steps from x0
    with the local sensitivity ``slope_at(x)`` (Burden & Faires 2011, §2.3):
    x ← x + (target − change_at(x)) / slope_at(x). Returns (x, converged);
    a step that leaves x ≤ 0 is halved. Where the stage is linear in x the
    first step is exact."""
    x = float(x0)
    for _ in range(max_iter):
        miss = target - change_at(x)
        if abs(miss) <= tol:
            return x, True
        slope = slope_at(x)
        if not (math.isfinite(slope) and slope != 0):
            return x, False
        step = miss / slope
        while x + step <= 0:
            step /= 2
        x += step
    return x, abs(target - change_at(x)) <= tol


def replicate_secants(lean, settings: dict[str, float], name: str, x0: float, x1: float,
                      target: str = POROSITY) -> np.ndarray | None:
    """(f_b(x1) − f_b(x0)) / (x1 − x0) for every bootstrap replicate b of
    ``target`` (None without replicates): the central difference at the
    midpoint with half the distance as its step."""
    if x1 == x0:
        raise ValueError("a secant needs two different settings")
    return replicate_sensitivities(lean, dict(settings, **{name: (x0 + x1) / 2}), name, abs(x1 - x0) / 2, target)


def correction(centre: float, level: float, level_se: float, slope: float,
               slope_se: float | None, level_slope: float | None = None) -> tuple[float, float]:
    """(Δx, u(Δx)): the change of the setting that moves ``level`` to
    ``centre`` through a stage that changes by ``slope`` per unit of the
    setting (Δx = (c − L)/s), and its standard uncertainty by the first-order
    law of propagation of uncertainty (JCGM 100:2008, eq. (10)), level and
    slope independent: u(Δx)² = (u(L)/s_L)² + (Δx·u(s)/s)², where s_L
    (``level_slope``, default ``slope``) is the stage's local sensitivity at
    the new setting, ∂Δx/∂L = −1/s_L when Δx solves f(x0 + Δx) − f(x0) = c − L.
    ``slope_se`` None counts the level's uncertainty only."""
    level_slope = slope if level_slope is None else level_slope
    if not (slope != 0 and math.isfinite(slope) and level_slope != 0 and math.isfinite(level_slope)):
        raise ValueError(f"a correction needs a non-zero finite sensitivity; got {slope}, {level_slope}")
    dx = (centre - level) / slope
    var = (level_se / level_slope) ** 2 + (0.0 if slope_se is None else (dx * slope_se / slope) ** 2)
    return float(dx), float(math.sqrt(var))


def sample_size(shift_sd: float, alpha: float = 0.05, power: float = 0.9) -> float:
    """n = ((z_{1−α/2} + z_{power}) / shift_sd)², before rounding up: the
    samples whose mean detects an offset of ``shift_sd`` standard deviations
    with a two-sided z-test at level ``alpha`` and ``power`` (Montgomery &
    Runger 2014, eq. 9-22)."""
    from scipy.stats import norm

    if not shift_sd > 0 or not 0 < alpha < 1 or not 0 < power < 1:
        raise ValueError("shift_sd must be positive, alpha and power strictly between 0 and 1")
    return float(((norm.ppf(1 - alpha / 2) + norm.ppf(power)) / shift_sd) ** 2)


def samples_to_confirm(shift_sd: float, alpha: float = 0.05, power: float = 0.9) -> int:
    """:func:`sample_size` rounded up (at least 1)."""
    return max(1, math.ceil(sample_size(shift_sd, alpha, power) - 1e-9))


def shewhart_run_length(shift_sd, L: float = 3.0) -> np.ndarray:
    """P(RL > t), t = 1..len(shift_sd): the survival function of the run
    length of an individuals chart with limits ± L·σ (rule 1 alone) when
    sample t has mean ``shift_sd[t-1]``·σ away from the centre and the
    samples are independent: P(RL > t) = Π_{i ≤ t} [Φ(L − μ_i) − Φ(−L − μ_i)].
    For a constant shift this is geometric, with ARL = 1/p (Montgomery 2009,
    §5.3.3 and §6.2; ARL₀ = 370 at L = 3). The other rules and the EWMA only
    add signals, so the run length of the whole scheme is at most this one,
    sample by sample."""
    from scipy.stats import norm

    mu = np.asarray(shift_sd, float)
    stay = norm.cdf(L - mu) - norm.cdf(-L - mu)
    return np.cumprod(stay)


def level_now(porosity, hours, sigma: float, drifting: bool) -> dict:
    """The lot's level at its last sample with its standard error (σ known):
    the least-squares line at the last sample when ``drifting`` (and three
    or more samples at two or more times), else the running mean."""
    y = np.asarray(porosity, float)
    t = np.asarray(hours, float)
    n = len(y)
    if drifting and n >= 3 and np.ptp(t) > 0:
        tbar = t.mean()
        stt = float(((t - tbar) ** 2).sum())
        slope = float(((t - tbar) * (y - y.mean())).sum() / stt)
        value = float(y.mean() + slope * (t[-1] - tbar))
        se = sigma * math.sqrt(1 / n + (t[-1] - tbar) ** 2 / stt)
        return {"value": value, "se": float(se), "basis": "trend at the last sample",
                "rate_per_hour": slope, "rate_per_hour_se": float(sigma / math.sqrt(stt))}
    return {"value": float(y.mean()), "se": float(sigma / math.sqrt(n)), "basis": "running mean",
            "rate_per_hour": None, "rate_per_hour_se": None}


def chart_signals(porosity, centre: float, sigma: float) -> tuple[list[list[str]], np.ndarray, np.ndarray,
                                                                  np.ndarray]:
    """Per sample, the signals of the individuals chart (± 3σ), the run rules
    and the EWMA (:mod:`linkage.charts`), each with its side; and the EWMA
    statistic with its limits."""
    x = np.asarray(porosity, float)
    ref = Reference(mu0=float(centre), sigma=float(sigma), n=len(x))
    rules = run_rules(x, ref)
    z, zl, zh = ewma(x, ref, lam=EWMA_LAMBDA, L=EWMA_L)
    out = []
    for i, fired in enumerate(rules):
        side = "upward" if x[i] > centre else "downward"
        reasons = [f"{r} ({side})" for r in fired]
        if z[i] > zh[i]:
            reasons.append("EWMA above its upper limit (upward)")
        elif z[i] < zl[i]:
            reasons.append("EWMA below its lower limit (downward)")
        out.append(reasons)
    return out, z, zl, zh


# --------------------------------------------------------------------------- input


def read_samples(path) -> tuple[object, str | None, list]:
    """The at-line samples of one running lot: a CSV or XLSX with the ribbon
    table's columns (``lot``, ``sample``, ``envelope_density_g_cm3``,
    ``skeletal_density_g_cm3``, ``sampled_at``), read by the template's cell
    and number rules (:func:`linkage.read.read_table`). Returns (samples, lot,
    problems): ``sampled_at`` is required in every row here, and the file
    holds one lot; each breach is a :class:`~linkage.exceptions.Problem` with
    its row. The lot rule is checked once the template's rules hold."""
    from dataclasses import replace

    from linkage.exceptions import InputError, Problem
    from linkage.read import lot_key, read_table
    from linkage.schema import TABLES

    ribbon = TABLES["ribbon"]
    strict = replace(ribbon, columns=tuple(replace(c, required=True, nonempty=True) if c.name == "sampled_at" else c
                                           for c in ribbon.columns))  # when each sample was taken is needed here
    path = Path(path)
    try:
        df = read_table(path, "ribbon", definition=strict)
    except InputError as exc:
        return None, None, list(exc.problems)
    rows = list(df.attrs.get("source_rows", range(2, len(df) + 2)))
    problems = []
    if df.empty:
        problems.append(Problem(path.name, "no samples: the file holds a header and no rows"))
        return df, None, problems
    keys = [lot_key(str(v)) for v in df["lot"]]
    first = keys[0]
    problems += [Problem(path.name, f"one running lot per file: this row's lot is not {df['lot'].iloc[0]!r} "
                         "(of the first row)", row=r, column="lot", value=str(v))
                 for r, k, v in zip(rows, keys, df["lot"]) if k != first]
    return df, str(df["lot"].iloc[0]), problems


def baseline_problems(path, samples, baseline: int) -> list:
    """The refusal of a baseline that leaves no sample to judge: the centre is
    the mean of the first ``baseline`` samples, so a file needs at least
    ``baseline + 1`` of them, or the baseline would silently shrink to the
    samples there are and drift could never be told from the centre. Judged
    only on a file read by the template's rules (``samples`` not None)."""
    from linkage.exceptions import Problem

    n = 0 if samples is None else len(samples)
    if samples is None or samples.empty or n > baseline:
        return []
    return [Problem(Path(path).name, f"the baseline asks for {baseline} samples and the file has {n}; at least "
                    f"baseline + 1 = {baseline + 1} samples are needed for any sample to be judged against the "
                    "baseline's centre (take more samples, or give a smaller --baseline)",
                    value=n)]


def process_settings(path, lot: str | None) -> tuple[dict[str, float], list]:
    """The numeric settings of ``lot``'s row of a process table (CSV or
    XLSX, the template's ``process`` columns; other lots' rows may be there),
    and the problems found."""
    from linkage.exceptions import InputError, Problem
    from linkage.read import lot_key, read_table

    path = Path(path)
    try:
        df = read_table(path, "process")
    except InputError as exc:
        return {}, list(exc.problems)
    if lot is None:
        return {}, []
    match = df[[lot_key(str(v)) == lot_key(lot) for v in df["lot"]]]
    if match.empty:
        return {}, [Problem(path.name, f"no row for lot {lot!r}, the lot of the samples", column="lot")]
    row = match.iloc[0]
    out = {}
    for name in df.columns:
        value = row[name]
        if name != "lot" and isinstance(value, (int, float, np.floating)) and np.isfinite(value):
            out[name] = float(value)
    return out, []


# --------------------------------------------------------------------------- the answer


@dataclass
class RunningResult:
    """Guidance for one running lot (see the module notes). ``to_dict()`` is
    what ``linkage running --json`` prints; ``text()`` what it prints
    otherwise."""

    lot: str
    model_id: str
    adjust: str
    settings: dict[str, float]
    #: settings of the ribbon stage given neither by --set nor by the process row: name -> how it was held
    #: (linkage.decide.propagate.fill_settings: coherently with the given ones, at the training mean when none
    #: is given, or at the training median for a model saved before coherent held settings)
    held: dict[str, str]
    window: dict
    sigma: dict
    centre: float
    baseline: int
    samples: list[dict]
    drift: dict
    level: dict
    expected_porosity: float
    sensitivity: dict
    correction: dict | None
    confirm: dict
    notes: list[str] = field(default_factory=list)
    recorded: bool = False
    #: the store's lots set aside (``linkage set-aside``), left out of the training lots' within-lot spread
    set_aside_lots: list[str] = field(default_factory=list)
    #: the ribbon stage's applicability-domain verdict at the lot's settings (None: no domain saved)
    domain: dict | None = None
    #: the level now against the model's prediction interval at these settings
    model_fit: dict | None = None
    #: what the text says first (settings outside the domain; a lot the model does not describe)
    warnings: list[str] = field(default_factory=list)

    @property
    def limits(self) -> tuple[float, float]:
        return shewhart_limits(Reference(self.centre, self.sigma["value"], len(self.samples)))

    def to_dict(self) -> dict:
        last = self.samples[-1]
        return {
            "lot": self.lot, "model_id": self.model_id, "adjust": self.adjust,
            "settings": self.settings, "held": self.held,
            "window": self.window,
            "within_lot_sd": self.sigma,
            "centre": self.centre, "baseline_samples": self.baseline,
            "limits": list(self.limits),
            "samples": self.samples,
            "running_mean": last["running_mean"], "running_mean_se": last["running_mean_se"],
            "drift": self.drift,
            "level": self.level,
            "expected_porosity": self.expected_porosity,
            "sensitivity": self.sensitivity,
            "correction": self.correction,
            "confirm": self.confirm,
            "method": METHOD,
            "notes": self.notes,
            "recorded": self.recorded,
            "set_aside_lots": list(self.set_aside_lots),
            "domain": self.domain, "model_fit": self.model_fit, "warnings": list(self.warnings),
            "caution": CAUTION,
        }

    def text(self) -> str:
        w, s = self.window, self.sigma
        lo, hi = self.limits
        lines = [f"Running lot {self.lot} (model {self.model_id}), {len(self.samples)} samples",
                 f"Window {w['low']:.3f}–{w['high']:.3f} (centre {w['centre']:.3f}; {w['source']}); within-lot SD "
                 f"{s['value']:.4f} from {s['lots']} training lots; limits {lo:.3f}–{hi:.3f} around the first "
                 f"{self.baseline} samples' mean {self.centre:.3f}"]
        from linkage.results import units_shown

        lines += [f"WARNING: {units_shown(warning)}." for warning in self.warnings]  # µm as every text writes it
        lines += ["",
                 f"{'sample':<10} {'sampled_at':<20} {'porosity':>8} {'run.mean':>8}  signals"]
        for r in self.samples:
            marks = "; ".join(r["signals"] + r["flags"])
            lines.append(f"{r['sample']:<10} {(r['sampled_at'] or '')[:19]:<20} {r['porosity']:>8.4f} "
                         f"{r['running_mean']:>8.4f}  {marks}")
        d = self.drift
        lines.append("")
        if d["drifting"]:
            lines.append(f"Drifting {d['direction']}: first signal at {_sample_text(d)}: {'; '.join(d['rules'])}")
        else:
            lines.append("No drift signalled.")
        lv = self.level
        lines.append(f"Level now {lv['value']:.4f} ± {lv['se']:.4f} (SE; {lv['basis']}); the model expects "
                     f"{self.expected_porosity:.4f} at these settings")
        sn = self.sensitivity
        unit = _unit(self.adjust)
        se = f" ± {sn['se']:.4g}" if sn["se"] is not None else " (no bootstrap replicates: uncertainty unknown)"
        lines.append(f"Sensitivity d porosity / d {self.adjust}: {sn['value']:.4g}{se} per {unit}")
        c = self.correction
        if c is None:
            lines.append("No correction: " + "; ".join(self.notes))
        elif not c.get("supported", True):
            lines.append(f"No supported correction of {self.adjust} (see the warnings above). The computed one "
                         f"({c['suggested']:.3g} {unit}, change {c['change']:+.3g}) rests on "
                         "the model where it does not hold; it is kept in --json (correction.supported = false), "
                         "not to be acted on")
        else:
            if c.get("no_change_needed"):
                lines.append("No change needed now (the suggested change is within its uncertainty of zero).")
            lines.append(f"Suggested {self.adjust}: {c['suggested']:.3g} {unit} (now {c['current']:.3g}; change "
                         f"{c['change']:+.3g} ± {c['se']:.2g}, 95% {c['interval_95'][0]:.3g} to "
                         f"{c['interval_95'][1]:.3g}); the running level moved by the model's predicted change: "
                         f"{c['expected_porosity']:.4f} against the centre {w['centre']:.4f}"
                         + ("" if c.get("model_porosity") is None else
                            f"; the model alone predicts {c['model_porosity']:.4f} at the suggested "
                            "setting"))
        exit_ = self.level.get("window_exit")
        if exit_ is not None:
            rate = self.level["rate_per_hour"]
            trend = f"at the fitted trend ({rate:+.4g} ± {self.level['rate_per_hour_se']:.2g} per hour)"
            if exit_["already_outside"]:
                lines.append(f"The level is already outside the window ({trend}).")
            else:
                lines.append(f"{trend[0].upper()}{trend[1:]} the level would reach the window's {exit_['side']} edge "
                             f"{exit_['edge']:.3f} about {exit_['hours_after_last_sample']:.2g} h after the last "
                             "sample" + ("" if exit_["rate_told_from_zero"] else
                                         " (the trend is within its uncertainty of zero: it may not leave)") + ".")
        cf = self.confirm
        lines.append(f"Confirm with {cf['samples']} further samples (detects an offset of {cf['shift_sd']:g} "
                     f"within-lot SD from the centre, two-sided α = {cf['alpha']:g}, power {cf['power']:g})")
        for note in self.notes if c is not None else []:
            lines.append(f"Note: {note}")
        if self.set_aside_lots:
            from linkage.store import set_aside_note

            lines.append(f"Note: {set_aside_note(self.set_aside_lots, 'left out of the within-lot SD')}")
        if self.held:
            lines.append("Held (not given): " + "; ".join(f"{k} = {self.settings[k]:.4g} ({v})"
                                                           for k, v in self.held.items()))
        lines.append("")
        lines.append(CAUTION)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.text()


def _sample_text(drift: dict) -> str:
    """"sample 9", and its place in time order where that is not the sample's own label ("sample A3 (the 9th
    in time order)")."""
    label, place = str(drift["first_signal_sample"]), drift["first_signal_index"] + 1
    if label == str(place):
        return f"sample {label}"
    return f"sample {label} (the {place}{_ordinal_suffix(place)} in time order)"


def _ordinal_suffix(n: int) -> str:
    """"st", "nd", "rd" or "th" for n."""
    return "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")


def _unit(name: str) -> str:
    return {"roll_force_kn_per_cm": "kN/cm", "roll_gap_mm": "mm"}.get(name, "unit")


def _hours(sampled_at) -> np.ndarray:
    """Hours since the first sample."""
    import pandas as pd

    t = pd.to_datetime(pd.Series(list(sampled_at)), utc=True)
    return ((t - t.iloc[0]).dt.total_seconds() / 3600.0).to_numpy(float)


def advise(lean, samples, settings: dict[str, float], window: tuple[float, float], training_ribbon,
           training_lots, *, lot: str, window_source: str = "given", adjust: str = "roll_force_kn_per_cm",
           baseline: int = 5, confirm_shift_sd: float = 1.0, alpha: float = 0.05, power: float = 0.9,
           held: dict[str, str] | None = None) -> RunningResult:
    """The guidance for one running lot (see the module notes).

    ``samples``: a DataFrame with ``sample``, ``sampled_at`` and the two
    densities (the ribbon table of the template), one lot; ``settings``: every
    input of the ribbon stage; ``window``: (low, high) porosity;
    ``training_ribbon``: the ribbon replicates of the store, of which those of
    ``training_lots`` give the within-lot SD."""
    from linkage.exceptions import UsageError

    if adjust not in ADJUSTABLE:
        raise UsageError(f"--adjust must be one of {', '.join(ADJUSTABLE)}; got {adjust!r}")
    sigma, sigma_lots, sigma_dof, trained = _within_lot_sd(lean, training_ribbon, training_lots, lot)
    stage = next(st for st in lean.stages if POROSITY in st.targets)
    target = lean.targets[POROSITY]
    if adjust not in target.inputs:
        raise UsageError(f"the ribbon stage of model {lean.model_id} does not use {adjust}; no correction of it "
                         f"can be computed (its inputs: {', '.join(target.inputs)})")
    low, high = float(window[0]), float(window[1])
    centre_w = (low + high) / 2

    watched = _watched_samples(samples, lot, training_ribbon, trained, (low, high), sigma, baseline)
    rows, first = watched.rows, watched.first
    level = level_now(watched.eps, watched.hours, sigma, watched.drifting)
    values = {k: float(settings[k]) for k in target.inputs}
    expected = float(target.predict({k: np.array([v]) for k, v in values.items()})[0])
    domain = _domain_verdict(stage, dict(settings, **values))
    fit = _model_fit(target, values, watched.centre, watched.baseline, level, expected, sigma)
    lo_x, hi_x = stage.domain.ranges[adjust] if stage.domain is not None else (values[adjust], values[adjust])
    step = STEP_SHARE * (hi_x - lo_x) if hi_x > lo_x else STEP_SHARE * abs(values[adjust]) or 1e-3
    slope = float(sensitivity(lambda c: target.predict(c, raw=True), values, adjust, step))
    reps = replicate_sensitivities(lean, values, adjust, step)
    slope_se = float(np.std(reps, ddof=1)) if reps is not None and reps.size >= 2 else None
    sens = {"input": adjust, "value": slope, "se": slope_se, "half_step": float(step),
            "replicates": 0 if reps is None else int(reps.size)}

    notes: list[str] = []
    corr = None
    if slope == 0:
        notes.append(f"the ribbon stage's prediction does not change with {adjust} at these settings")
    else:
        known = (lo_x, hi_x) if stage.domain is not None else None  # no domain: no training range to judge by
        corr = _suggested_correction(lean, target, values, adjust, step, sens, reps, level, expected, centre_w,
                                     known, notes)
    warnings = _warnings(domain, fit, level, expected, corr)
    if domain is None:  # a stage saved without a domain (a model of an older linkage): said, not left silent
        warnings.insert(0, _no_domain_warning(lean.model_id, adjust))
    if fit["describes_lot"] and not fit["inside_interval"]:
        notes.append(fit["reason"] + ": the correction assumes the model's slope holds at this lot's offset")
    if corr is not None:
        outside = domain is not None and not domain["in_domain"]
        unsupported = [f"the current settings are outside the ribbon stage's applicability domain: {r}"
                       for r in (domain["reasons"] if outside else [])]
        if not fit["describes_lot"]:
            unsupported.append(fit["reason"])
        corr["supported"] = not unsupported
        corr["unsupported_reasons"] = unsupported
        # the 95 % interval of the change includes 0: no change is needed now
        corr["no_change_needed"] = bool(abs(corr["change"]) <= Z95 * corr["se"])
    level = dict(level, window_exit=_window_exit(level, low, high))
    confirm = {"samples": samples_to_confirm(confirm_shift_sd, alpha, power), "shift_sd": float(confirm_shift_sd),
               "shift": float(confirm_shift_sd * sigma), "alpha": float(alpha), "power": float(power)}
    drift = {"drifting": watched.drifting, "direction": watched.direction,
             "first_signal_sample": None if first is None else rows[first]["sample"],
             "first_signal_index": first, "rules": [] if first is None else watched.signals[first],
             "signalled_samples": [r["sample"] for r in rows if r["signals"]]}
    return RunningResult(
        lot=str(lot), model_id=lean.model_id, adjust=adjust, settings=values,
        held=dict(held or {}),
        window={"low": low, "high": high, "centre": centre_w, "source": window_source},
        sigma={"value": float(sigma), "lots": int(sigma_lots), "dof": int(sigma_dof)},
        centre=watched.centre, baseline=watched.baseline, samples=rows, drift=drift, level=level,
        expected_porosity=expected, sensitivity=sens, correction=corr, confirm=confirm, notes=notes,
        domain=domain, model_fit=fit, warnings=warnings)


def _num(v) -> float | None:
    """A finite float, or None (JSON has no NaN)."""
    return None if v is None or not np.isfinite(float(v)) else float(v)


def _domain_verdict(stage, settings: dict[str, float]) -> dict | None:
    """The ribbon stage's applicability-domain verdict at the lot's settings: the check the what-if makes
    (:meth:`linkage.models.lean.Domain.check`: training ranges, Hotelling T² and Q) where every input of the stage
    is known, else :func:`linkage.models.lean.given_inputs_verdict` (the training ranges of those known). None
    for a stage saved without a domain."""
    from linkage.models.lean import given_inputs_verdict

    d = stage.domain
    if d is None:
        return None
    known = {c: np.array([float(settings[c])]) for c in d.inputs if c in settings}
    if len(known) == len(d.inputs):
        verdict, checked = d.check(known)[0], "training ranges, T² and Q at the lot's settings (as the what-if)"
    else:
        verdict, checked = given_inputs_verdict(d, known), "training ranges of the settings known"
    return {"in_domain": bool(verdict["in_domain"]), "reasons": list(verdict["reasons"]),
            "t2": _num(verdict["t2"]), "t2_limit": _num(verdict["t2_limit"]), "q": _num(verdict["q"]),
            "q_limit": _num(verdict["q_limit"]), "checked": checked}


def _model_fit(target, values: dict[str, float], start: float, baseline: int, level: dict, expected: float,
               sigma: float) -> dict:
    """Whether the model describes this lot: the lot's level when the run began (``start``, the mean of its first
    ``baseline`` samples, the centre of its limits) against the ribbon stage's prediction interval for a lot at
    these settings (the model's conformal interval at its nominal coverage, as `linkage predict` gives it). The
    start is judged, not the level now: a drift since is what the command corrects, not a fault of the model.
    A start just outside the interval is one lot in 1/(1 − coverage) of those the model describes (10 % at 0.9):
    said in a note, the correction kept. The model is taken not to describe the lot where the start lies beyond
    twice the interval's half-width on its side from the expectation: with normal errors that is about 3.3
    prediction SD at coverage 0.9 (2 × 1.645), where a lot the model describes lands about once in a thousand
    (common practice, no source: a rule of thumb). There the correction rests on the model's slope at a level
    the model does not reach, so it is not supported."""
    cover = float(target.nominal_coverage)
    lo, hi = target.interval({k: np.array([v]) for k, v in values.items()}, cover)
    lo, hi = float(lo[0]), float(hi[0])
    # each side's half-width from the expectation, never below zero (a conformal interval need not hold the
    # point prediction; then that side is judged from the expectation itself)
    far_lo, far_hi = expected - 2 * max(expected - lo, 0.0), expected + 2 * max(hi - expected, 0.0)
    inside = bool(lo <= start <= hi)
    describes = bool(far_lo <= start <= far_hi)
    gap_sd = (start - expected) / sigma
    said = (f"the lot's level when the run began, {start:.4f} (mean of its first {baseline} samples), is outside "
            f"the model's {cover:.0%} prediction interval {lo:.4f}–{hi:.4f} for a lot at these settings (expected "
            f"{expected:.4f}; {gap_sd:+.1f} within-lot SD)")
    return {"interval_level": cover, "low": lo, "high": hi, "far_low": float(far_lo), "far_high": float(far_hi),
            "judged": "baseline centre", "start": float(start), "expected": float(expected),
            "gap": float(start - expected), "gap_sd": float(gap_sd),
            "level_now_gap_sd": float((level["value"] - expected) / sigma),
            "inside_interval": inside, "describes_lot": describes,
            "rule": "the model describes the lot while its level when the run began lies within twice the "
                    "half-width of the model's prediction interval (nominal coverage) from its expectation at "
                    "these settings",
            "reason": None if inside else said + ("" if describes else ", beyond twice its half-width: the model "
                                                                         "does not describe this lot")}


def _warnings(domain: dict | None, fit: dict, level: dict, expected: float, corr: dict | None) -> list[str]:
    """What the text says first: settings outside the domain, a lot the model does not describe."""
    out = []
    if domain is not None and not domain["in_domain"]:
        out.append(f"the current settings are outside the ribbon stage's applicability domain "
                   f"({'; '.join(domain['reasons'])}): the model's expectation {expected:.4f} and any suggestion "
                   "are extrapolations, not supported")
    if not fit["describes_lot"]:
        out.append(fit["reason"] + ("; no correction is suggested from it (the computed one is kept in --json, "
                                    "correction.supported = false)" if corr is not None else ""))
    return out


def _no_domain_warning(model_id: str, adjust: str) -> str:
    """What the text says first when the ribbon stage was saved without an applicability domain (a model of an
    older linkage): the settings are not checked against the training data, and the training range of ``adjust``,
    which sets the sensitivity's step and judges the suggested setting, is not known."""
    return (f"the ribbon stage of model {model_id} was saved without an applicability domain (a model of an older "
            "linkage): whether the current settings lie inside the training data is not checked, and the training "
            f"range of {adjust} is not known (the sensitivity's step is taken from the current setting; the "
            "suggested setting is compared with the current one only)")


def _window_exit(level: dict, low: float, high: float) -> dict | None:
    """At the fitted trend (only where :func:`level_now` estimated one), when the level would leave the
    window: hours after the last sample to the edge it moves toward (0 when already outside), and whether the
    trend is told from zero (|rate| > 1.96·SE). None without a trend."""
    rate, rate_se = level.get("rate_per_hour"), level.get("rate_per_hour_se")
    if rate is None or rate == 0:
        return None
    value = float(level["value"])
    side = "upper" if rate > 0 else "lower"
    edge = high if rate > 0 else low
    hours = max(0.0, (edge - value) / rate)
    return {"edge": float(edge), "side": side, "hours_after_last_sample": float(hours),
            "already_outside": bool(not low <= value <= high),
            "rate_told_from_zero": bool(rate_se is not None and abs(rate) > Z95 * rate_se)}


def _within_lot_sd(lean, training_ribbon, training_lots, lot) -> tuple[float, int, int, set[str]]:
    """The pooled within-lot SD of porosity over the training lots (never the running lot itself), its lots
    and degrees of freedom, and those lots."""
    from linkage.decide.watch import pooled_within_sd
    from linkage.exceptions import InsufficientDataError
    from linkage.read import lot_key

    key = lot_key(str(lot))
    trained = {str(t) for t in training_lots if lot_key(str(t)) != key}  # the running lot is never its own reference
    sigma, sigma_lots, sigma_dof = pooled_within_sd(training_ribbon, trained)
    if not (math.isfinite(sigma) and sigma > 0):
        raise InsufficientDataError("no within-lot SD: the store holds no training lot of model "
                                    f"{lean.model_id} with two or more ribbon replicates")
    return sigma, sigma_lots, sigma_dof, trained


def _watched_samples(samples, lot, training_ribbon, trained, window, sigma, baseline) -> SimpleNamespace:
    """The running lot's samples in time order against the window, the within-lot chart and the drift
    watch's flags: one row per sample, the porosities, hours, centre and the first signal."""
    import pandas as pd

    from linkage.decide.watch import porosity_within

    low, high = window
    df = samples.copy()
    df["lot"] = str(lot)
    df = df.sort_values("sampled_at", kind="stable").reset_index(drop=True)
    reference = training_ribbon[training_ribbon["lot"].astype(str).isin(trained)]
    cols = ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3", "sampled_at"]
    # each sample against the window and 3σ of the earlier samples' mean (the drift watch's flags)
    # joined column by column: pandas 2.1 fails to concatenate frames whose datetime blocks differ in layout
    joined = pd.DataFrame({c: pd.concat([reference[c], df[c]], ignore_index=True) for c in cols})
    per = porosity_within(joined, trained, (low, high), lots=[str(lot)])
    eps = (1 - df["envelope_density_g_cm3"] / df["skeletal_density_g_cm3"]).to_numpy(float)
    hours = _hours(df["sampled_at"])
    n = len(eps)
    m = min(int(baseline), n)
    centre = float(eps[:m].mean())
    signals, z, zl, zh = chart_signals(eps, centre, sigma)
    first = next((i for i, s in enumerate(signals) if s), None)
    drifting = first is not None
    direction = None
    if drifting:
        direction = "upward" if any("(upward)" in r for r in signals[first]) else "downward"

    rows = []
    for i in range(n):
        flags = per[i]["flags"]
        rows.append({"sample": str(df["sample"].iloc[i]), "sampled_at": per[i]["sampled_at"],
                     "hours": float(hours[i]), "porosity": float(eps[i]),
                     "running_mean": float(eps[:i + 1].mean()), "running_mean_se": float(sigma / math.sqrt(i + 1)),
                     "running_mean_in_window": bool(low <= eps[:i + 1].mean() <= high),
                     "in_window": bool(low <= eps[i] <= high),
                     "ewma": float(z[i]), "ewma_low": float(zl[i]), "ewma_high": float(zh[i]),
                     "signals": signals[i], "flags": flags})
    return SimpleNamespace(rows=rows, eps=eps, hours=hours, centre=centre, baseline=m, signals=signals,
                           first=first, drifting=drifting, direction=direction)


def _suggested_correction(lean, target, values, adjust, step, sens, reps, level, expected, centre_w, training_range,
                          notes: list[str]) -> dict | None:
    """The setting of ``adjust`` that moves the level to the window's centre (Newton on the ribbon stage, the
    local step where that does not converge), with its uncertainty; appends its caveats to ``notes``. None,
    with a note saying why, where the stage does not move with the setting over the step or at the setting
    it comes to: there neither the change nor its uncertainty can be computed. ``training_range`` None (a stage
    saved without a domain) leaves the suggested setting unjudged against it (``training_range`` and
    ``inside_training_range`` null, no note: the warning says the range is not known)."""
    slope, slope_se = sens["value"], sens["se"]

    def at(x: float) -> dict:
        return {k: np.array([v]) for k, v in dict(values, **{adjust: x}).items()}

    def predict_at(x: float) -> float:
        return float(target.predict(at(x), raw=True)[0])

    def slope_at(x: float) -> float:
        return float(sensitivity(lambda c: target.predict(c, raw=True), dict(values, **{adjust: x}), adjust, step))

    x0 = values[adjust]
    wanted = centre_w - level["value"]
    base = predict_at(x0)
    new, converged = solve_setting(lambda x: predict_at(x) - base, x0, wanted, slope_at)
    if not converged:  # a flat or non-monotone stage: the first-order step from the local sensitivity
        new = x0 + wanted / slope
        notes.append(f"the ribbon stage's prediction does not reach the centre by changing {adjust} alone "
                     "(Newton steps did not converge); the step from the local sensitivity is given")
    dx = new - x0
    # the secant of the stage over [x0, new] moves the level to the centre; its uncertainty over the replicates
    secant = (predict_at(new) - base) / dx if dx != 0 else slope
    reps_sec = replicate_secants(lean, values, adjust, x0, new) if dx != 0 else reps
    secant_se = float(np.std(reps_sec, ddof=1)) if reps_sec is not None and reps_sec.size >= 2 else None
    slope_new = slope_at(new)
    if not (secant != 0 and math.isfinite(secant) and slope_new != 0 and math.isfinite(slope_new)):
        notes.append(f"no correction is suggested: the ribbon stage's prediction does not change with {adjust} "
                     f"between {x0:.4g} and {new:.4g} or at {new:.4g} (secant {secant:.3g}, sensitivity there "
                     f"{slope_new:.3g}), so neither the change that reaches the window's centre nor its "
                     "uncertainty can be computed; adjust another setting or by hand, and confirm by samples")
        return None
    _, u = correction(centre_w, level["value"], level["se"], secant, secant_se, level_slope=slope_new)
    model_new = float(target.predict(at(new))[0])
    corr = {"input": adjust, "current": x0, "suggested": float(new), "change": float(dx), "se": float(u),
            "interval_95": [float(new - Z95 * u), float(new + Z95 * u)],
            # the running level moved by the change the model predicts (not what the model alone predicts there)
            "expected_porosity": float(level["value"] + model_new - expected),
            # what the model alone predicts at the suggested setting (the other settings as the lot's)
            "model_porosity": model_new,
            "secant": float(secant), "secant_se": secant_se, "sensitivity_at_suggested": slope_new,
            "newton_converged": bool(converged),
            "training_range": None if training_range is None else [float(v) for v in training_range],
            "inside_training_range": None if training_range is None
            else bool(training_range[0] <= new <= training_range[1])}
    if training_range is not None and not training_range[0] <= new <= training_range[1]:
        lo_x, hi_x = training_range
        notes.append(f"the suggested {adjust} {new:.3g} lies outside the training range {lo_x:.3g}–{hi_x:.3g}: "
                     "an extrapolation")
    if slope_se is not None and abs(slope) < 2 * slope_se:
        notes.append("the sensitivity is less than twice its own uncertainty: the size of the correction is "
                     "poorly known")
    return corr


def draw_chart(result: RunningResult, path) -> None:
    """A small PNG: the samples and running mean against the window, the
    within-lot limits and the signals (matplotlib, imported here), with the
    caution in full under it."""
    import io

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = chart_figure(result)
    try:
        buf = io.BytesIO()
        fig.savefig(buf, format="png")
    finally:
        plt.close(fig)
    from linkage.export import write_atomic

    write_atomic(path, buf.getvalue())


def chart_figure(result: RunningResult):
    """The figure of :func:`draw_chart`: every line in the legend, the caution whole (wrapped)."""
    import matplotlib.pyplot as plt

    from linkage.report.figures import caution_footer

    rows = result.samples
    t = [r["hours"] for r in rows]
    fig, ax = plt.subplots(figsize=(6.4, 3.8), dpi=100)
    w = result.window
    ax.axhspan(w["low"], w["high"], color="#d8ecd8", label="window")
    ax.axhline(w["centre"], color="#4a8a4a", lw=0.8, ls=":", label="window centre")
    lo, hi = result.limits
    for k, y in enumerate((lo, hi)):
        ax.axhline(y, color="#a04040", lw=0.8, ls="--", label="within-lot limits" if k == 0 else None)
    ax.axhline(result.centre, color="#a04040", lw=0.6, label="baseline centre")
    ax.plot(t, [r["porosity"] for r in rows], "o", color="#333333", ms=4, label="sample")
    ax.plot(t, [r["running_mean"] for r in rows], "-", color="#2060a0", lw=1.2, label="running mean")
    ax.plot(t, [r["ewma"] for r in rows], "-", color="#c08020", lw=0.8, label="EWMA")
    hit = [(r["hours"], r["porosity"]) for r in rows if r["signals"]]
    if hit:
        ax.plot(*zip(*hit), "x", color="#c00000", ms=8, mew=2, label="signal")
    ax.set_xlabel("hours since the first sample")
    ax.set_ylabel("ribbon porosity [-]")
    ax.set_title(f"lot {result.lot}: running guidance", fontsize=10)
    ax.legend(fontsize=6.5, loc="best")
    caution_footer(fig)
    fig.tight_layout(rect=(0, 0.07, 1, 1))
    return fig
