"""The ribbon porosity window: where every tablet specification passes
together with a stated probability, and the roll force that lands there.

Method
------
``ribbon_porosity`` is scanned over the range the training lots cover, never
beyond it. At each porosity the chain is simulated downstream
(:func:`linkage.decide.propagate.simulate`): granule attributes from the
granule stage, then every tablet attribute, each with residuals of unseen
lots. The probability that a lot at that porosity meets all specifications
at once is the share of draws that pass every limit. The window is the
porosity range where that probability is at least the confidence; its edges
are interpolated linearly between grid points.

Beside it, the mean-response window: where the chain of mean predictions
passes every limit. It is always at least as wide, and overstates what can
be promised (Peterson 2008, J. Biopharm. Stat. 18:959–975); the decision is
taken on probability.

The window is a promise only where the chain is on known ground: the
held settings, the scanned porosity and the mean predictions of the earlier
stages are checked against each stage's applicability domain at every grid
point inside the window (the whole scan when there is none), and the ribbon
stage at every roll force of its range (:func:`window_domain`). Where any is
outside, ``promise`` is false with the reasons: the numbers are shown, as
extrapolations.

The probability has its own uncertainty: it is estimated from a few dozen
lots. The window's edges are where the *lower bound* at assurance a
(``assurance``, default 0.9) of P(all pass) reaches the confidence: the
(1 − a) quantile over the lot-level bootstrap replicates of the chain
(:mod:`linkage.models.bootstrap`, :mod:`linkage.decide.bound`; Efron &
Tibshirani 1993, §13.3). The window of the point estimate is given beside
it (``point_low``/``point_high``). A model trained without replicates has no
bound: the window is then the point estimate's, ``bound.available`` is
false and nothing is promised.

The roll force range runs through the whole chain: at the stated gap, roll
speed, screw speed and held downstream settings, the forces where the lower
bound of P(all pass) reaches the confidence, ribbon scatter, granule and
tablet scatter included (``low``/``high``); beside it the point estimate's
range, the forces where the chain of mean predictions passes every limit
(``mean_response_low``/``high``), the forces whose lot-mean porosity lands
in the window with the confidence (``in_window_low``/``high``) and those
whose mean porosity does (``mean_low``/``mean_high``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from linkage import CAUTION
from linkage.decide import compendial
from linkage.decide.bound import NO_BOUND, chain_probabilities, check_assurance, with_unit_level
from linkage.decide.defaults import WINDOW_DRAWS
from linkage.decide.held import held_point
from linkage.decide.propagate import fill_settings, mean_passes, pass_matrix, simulate, within
from linkage.exceptions import UnsupportedConfidenceError, UsageError, confidence_lots_text
from linkage.models.lean import project
from linkage.numbers import percent_text

POROSITY = "ribbon_porosity"
#: names the window cannot hold (``--set``), each with the rule said after the name: the window is a
#: porosity range, so porosity is what it scans (``window`` and ``plan`` leave them out of the names they take)
SCANNED = {POROSITY: "is what the window scans; do not set it (use 'linkage predict' for one porosity)"}
FORCE = "roll_force_kn_per_cm"


@dataclass
class Edge:
    value: float | None
    limited_by: str | None  # an attribute, or "data range"


@dataclass
class WindowResult:
    model_id: str
    confidence: float
    data_range: tuple[float, float]
    low: Edge
    high: Edge
    mean_low: float | None
    mean_high: float | None
    segments: list[tuple[float, float]]
    settings: dict[str, dict]
    attributes: list[str]
    not_modelled: list[str]
    roll_force: dict
    grid: np.ndarray = field(repr=False)
    p_all: np.ndarray = field(repr=False)
    p_each: dict[str, np.ndarray] = field(repr=False)
    bands: dict[str, dict[str, np.ndarray]] = field(repr=False)
    mean_ok: np.ndarray = field(repr=False)
    n_draws: int = 0
    seed: int = 0
    #: does the window promise its probability: every point it rests on inside every stage's domain (see
    #: :func:`window_domain`); the reasons where not, and per grid point whether every stage is in its domain
    promise: bool = True
    promise_reasons: list[str] = field(default_factory=list)
    in_domain: np.ndarray | None = field(repr=False, default=None)
    #: attribute -> how the spec judges it, in words (linkage.decide.compendial.judge_text)
    judges: dict[str, str] = field(default_factory=dict)
    #: the spec judged against (:meth:`linkage.spec.Spec.describe`: file, SHA-256, judge and time point per
    #: attribute); the model's dissolution time point, and a note when the model does not record it
    spec: dict | None = None
    dissolution_time_min: float | None = None
    time_point_note: str | None = None
    #: the lower bound at ``assurance`` of P(all pass) and of each P(pass) on ``grid`` (None without replicates)
    assurance: float = 0.9
    p_all_low: np.ndarray | None = field(repr=False, default=None)
    p_each_low: dict[str, np.ndarray] | None = field(repr=False, default=None)
    bound: dict = field(default_factory=dict)
    #: the window of the point estimate of P(all pass) (the edges above are the bound's)
    point_low: float | None = None
    point_high: float | None = None
    #: the pointwise lower bound of P(all pass) on ``grid`` (each point alone at the assurance); ``p_all_low``
    #: is the band that holds over the window at once (bound.simultaneous_lower_bound)
    p_all_low_pointwise: np.ndarray | None = field(repr=False, default=None)
    #: the held settings at the middle of the window (the training median porosity without one), checked
    #: against every stage's domain, and the rule that held them (:func:`linkage.decide.held.held_point`)
    held_point: dict | None = None
    #: why each attribute of ``not_modelled`` is not judged (not predicted from porosity, or given with --set)
    not_modelled_reasons: dict[str, str] = field(default_factory=dict)

    @property
    def found(self) -> bool:
        return self.low.value is not None

    @property
    def edges(self) -> tuple[float, float] | None:
        """(low, high) ribbon porosity of the window found, None when there is none: the edges the watch judges
        each ribbon sample against and the report's figures shade."""
        return (self.low.value, self.high.value) if self.found else None

    def to_dict(self, curve: bool = True) -> dict:
        out = {
            "model_id": self.model_id,
            "confidence": self.confidence,
            "found": self.found,
            "ribbon_porosity": {
                "low": self.low.value, "high": self.high.value,
                "low_limited_by": self.low.limited_by, "high_limited_by": self.high.limited_by,
                "data_range": list(self.data_range),
                "segments": [list(s) for s in self.segments],
                "point_low": self.point_low, "point_high": self.point_high,
            },
            "assurance": self.assurance,
            "bound": dict(self.bound),
            "mean_response_window": {"low": self.mean_low, "high": self.mean_high},
            "limiting_attribute": {"low": self.low.limited_by, "high": self.high.limited_by},
            "settings": self.settings,
            # every attribute judged: those simulated, and a porosity limit, which cuts the scan directly
            "attributes": self.attributes + ([POROSITY] if POROSITY in (self.spec or {}).get("attributes", {})
                                             else []),
            "not_modelled": self.not_modelled,
            "not_modelled_reasons": {a: self.not_modelled_reasons.get(a, NOT_FROM_POROSITY) for a in self.not_modelled},
            "roll_force_kn_per_cm": {k: v for k, v in self.roll_force.items() if curve or k != "curve"},
            "n_draws": self.n_draws,
            "seed": self.seed,
            "promise": self.promise,
            "promise_reasons": list(self.promise_reasons),
            "judges": dict(self.judges),
            "spec": self.spec,
            "dissolution_time_min": self.dissolution_time_min,
            "time_point_note": self.time_point_note,
            "held_point": self.held_point,
            "caution": CAUTION,
        }
        if curve:
            out["curve"] = {
                "ribbon_porosity": _floats(self.grid),
                "p_all": _floats(self.p_all),
                "p_all_low": None if self.p_all_low is None else _floats(self.p_all_low),
                "p_all_low_pointwise": (None if self.p_all_low_pointwise is None
                                        else _floats(self.p_all_low_pointwise)),
                "p_each": {k: _floats(v) for k, v in self.p_each.items()},
                "p_each_low": None if self.p_each_low is None else {k: _floats(v) for k, v in self.p_each_low.items()},
                "mean_pass": [bool(b) for b in self.mean_ok],
            }
            if self.in_domain is not None:
                out["curve"]["in_domain"] = [bool(b) for b in self.in_domain]
        return out


def _floats(a) -> list[float]:
    return [round(float(x), 6) for x in np.asarray(a)]


def find_window(chain, spec, *, settings: dict[str, float] | None = None, confidence: float = 0.9,
                n_grid: int = 121, n_draws: int = WINDOW_DRAWS, seed: int = 0, assurance: float = 0.9,
                command: str = "window") -> WindowResult:
    """Scan ribbon porosity over the training range and find the window.

    Parameters
    ----------
    chain : a fitted chain (:class:`linkage.models.train.FittedChain`).
    spec : a :class:`linkage.spec.Spec`.
    settings : values of settings to hold (``--set``); the rest are held
        coherently with them (:func:`linkage.decide.propagate.fill_settings`),
        and the result says which is which and whether the held point is in
        the domain (``held_point``).
    confidence : the probability of passing every specification together
        that the window must reach, in (0, 1).
    assurance : the assurance of the lower bound on that probability, in
        (0, 1): the window is where the bound reaches ``confidence``.
    command : the command its refusals name (``plan``, ``running`` find the window too).
    """
    if not 0 < confidence < 1:
        raise UsageError(f"confidence must lie between 0 and 1; got {confidence}")
    assurance = check_assurance(assurance)
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    from linkage.timepoint import UNRECORDED_NOTE, check_time_point, model_time_point

    check_time_point(chain, spec, command)
    time_min, recorded = model_time_point(chain)
    settings = dict(settings or {})
    if POROSITY in settings:
        raise UsageError(f"{POROSITY} {SCANNED[POROSITY]}")
    produced = set(chain.targets)
    attributes, not_modelled = _window_attributes(chain, spec, given=[k for k in settings if k in produced])
    check_confidence_supported(lean, judged_residuals(attributes, spec), confidence)
    lo, hi = (float(v) for v in chain.training["ranges"][POROSITY])
    grid = np.linspace(lo, hi, n_grid)

    roots, values, source, frame = _scan_frame(chain, settings, produced, grid)
    draws = simulate(chain, frame, n_draws=n_draws, seed=seed)

    limited = [a for a in attributes if a in spec.limits]
    p_all, p_each, mean_ok = _point_scan(chain, spec, draws, grid, attributes, limited, seed)
    columns = {k: frame[k].to_numpy(float) for k in frame.columns}  # the grid's settings, as simulated
    chain_p, p_all_low, p_all_pointwise, p_each_low, band_level = _bound_curves(
        lean, spec, columns, limited, p_all, p_each, confidence, assurance, seed)
    point_low, point_high, low_edge, high_edge, segments = _window_edges(grid, p_all, p_each, p_all_low,
                                                                         p_each_low, confidence)
    bound = _bound_record(lean, chain_p, assurance, band_level)
    mean_idx = np.flatnonzero(mean_ok)
    mean_low = float(grid[mean_idx[0]]) if len(mean_idx) else None
    mean_high = float(grid[mean_idx[-1]]) if len(mean_idx) else None

    bands = _draw_bands(draws, limited, confidence)
    force = _window_roll_force(chain, lean, spec, roots, low_edge.value, high_edge.value, confidence, assurance,
                               seed)
    domain = window_domain(chain, draws, grid, low_edge.value, high_edge.value, force)
    if not bound["available"]:
        domain["promise"] = False
        domain["reasons"] = [bound["reason"]] + domain["reasons"]
    middle = ((low_edge.value + high_edge.value) / 2 if low_edge.value is not None
              else float(chain.training["medians"].get(POROSITY) or (lo + hi) / 2))
    held_at = held_point(lean, {**values, POROSITY: middle,
                                **{k: v for k, v in settings.items() if k in produced}})
    return WindowResult(
        model_id=getattr(chain, "model_id", None) or "unsaved",
        confidence=confidence, data_range=(lo, hi), low=low_edge, high=high_edge,
        mean_low=mean_low, mean_high=mean_high,
        segments=[s[1] for s in segments], settings=_used_settings(values, source, settings, produced),
        attributes=attributes,
        not_modelled=not_modelled, roll_force=force, grid=grid, p_all=p_all, p_each=p_each,
        bands=bands, mean_ok=mean_ok, n_draws=n_draws, seed=seed,
        promise=domain["promise"], promise_reasons=domain["reasons"], in_domain=domain["in_domain"],
        judges={a: t for a, t in compendial.judge_text(spec).items() if a in attributes},
        spec=spec.describe() if hasattr(spec, "describe") else None,
        dissolution_time_min=time_min if "dissolution_pct" in chain.targets else None,
        time_point_note=None if recorded or "dissolution_pct" not in chain.targets else UNRECORDED_NOTE,
        assurance=assurance, p_all_low=p_all_low, p_each_low=p_each_low, bound=bound,
        point_low=point_low.value, point_high=point_high.value, p_all_low_pointwise=p_all_pointwise,
        held_point=held_at,
        not_modelled_reasons={a: GIVEN_NOT_JUDGED if a in settings else NOT_FROM_POROSITY for a in not_modelled},
    )


def _window_edges(grid, p_all, p_each, p_all_low, p_each_low, confidence: float):
    """The point estimate's widest window (low, high), then the window's own edges and segments: those of the
    lower bound where there is one, else the point estimate's."""
    point_low, point_high = _widest(grid, p_all, p_each, confidence)
    if p_all_low is not None:
        low_edge, high_edge = _widest(grid, p_all_low, p_each_low, confidence)
        segments = _segments(grid, p_all_low, confidence)
    else:
        low_edge, high_edge = point_low, point_high
        segments = _segments(grid, p_all, confidence)
    return point_low, point_high, low_edge, high_edge, segments


def _window_roll_force(chain, lean, spec, roots: dict, low: float | None, high: float | None, confidence: float,
                       assurance: float, seed: int) -> dict:
    """The window's roll force record: the forces whose lot-mean porosity lands in the window (``low``,
    ``high``), the whole chain's range at the bound beside it, why there is none, and the compactors pooled
    in the ribbon stage's fit."""
    force = roll_force_range(chain, low, high, settings=roots, confidence=confidence, seed=seed)
    force = chain_force_range(lean, spec, settings=roots, confidence=confidence, assurance=assurance,
                              seed=seed, in_window=force, force_range=tuple(chain.training["ranges"][FORCE])
                              if FORCE in chain.training["ranges"] and chain.training["ranges"][FORCE] else None)
    if low is None and force.get("low") is None:
        force["reason"] = "no porosity window to translate"
    ribbon = next((s for s in lean.stages if POROSITY in s.targets), None)
    pooled = pooled_compactors(getattr(chain, "training", None), ribbon.inputs if ribbon is not None else ())
    if pooled:
        force["compactors"], force["compactors_note"] = pooled
    units = compendial.judged_on_units(spec, lean.targets)
    if units:  # the range is simulated on lot values (chain_force_range): said beside it, as the map says it
        force["lot_values_note"] = compendial.lot_values_text(units, "the roll force range rests")
    return force


def _used_settings(values: dict, source: dict, settings: dict, produced: set) -> dict:
    """Each setting the window was found at, with its value and where it came from (given, or how it was
    held); a given value of a modelled attribute is marked given."""
    used = {k: {"value": float(v), "source": source[k]} for k, v in sorted(values.items())}
    used.update({k: {"value": float(settings[k]), "source": "given"} for k in settings if k in produced})
    return used


def _scan_frame(chain, settings: dict, produced: set, grid: np.ndarray):
    """The settings the window holds along its porosity grid: the given root settings, the others
    held coherently with them (:func:`fill_settings`, porosity aside), and measured downstream values
    given (e.g. fines_pct) held too. Returns (given roots, held values, their sources, the grid's frame)."""
    roots = {k: v for k, v in settings.items() if k not in produced}
    values, source = fill_settings(chain, {**roots, POROSITY: 0.0})
    values.pop(POROSITY)
    source.pop(POROSITY)
    frame = pd.DataFrame({**{k: np.full(len(grid), v) for k, v in values.items()}, POROSITY: grid})
    for k, v in settings.items():
        if k in produced:
            frame[k] = v
            source[k] = "given"
    return roots, values, source, frame


#: why an attribute of the spec is not judged by the window (``not_modelled_reasons``)
NOT_FROM_POROSITY = "not predicted from porosity by this model"
GIVEN_NOT_JUDGED = "given with --set, not predicted: not judged"


def _window_attributes(chain, spec, given=()) -> tuple[list[str], list[str]]:
    """The spec's attributes the window judges (predicted downstream of
    ribbon porosity, and the acceptance value where the spec has one) and
    those it cannot (a porosity limit is neither: it cuts the scan directly).
    An attribute ``given`` (``--set``, a measured value held along the scan)
    is not predicted, so not judged, as ``predict`` does not judge it."""
    given = set(given)
    downstream = downstream_targets(chain)
    attributes = [a for a in spec.limits if a in downstream and a not in given]
    if spec.acceptance_value_max is not None:  # judged on simulated unit weights (linkage.decide.compendial)
        attributes.append(compendial.ACCEPTANCE_VALUE)
    not_modelled = [a for a in spec.limits if (a not in downstream or a in given) and a != POROSITY]
    if not attributes and given & set(spec.limits):
        raise UsageError(f"every attribute of the spec predicted downstream of ribbon_porosity is given with --set "
                         f"({', '.join(a for a in spec.limits if a in given)}), and a given value is not "
                         "predicted, so not judged: nothing to judge; leave it unset")
    if not attributes:
        raise UsageError("none of the spec's attributes is predicted downstream of ribbon_porosity "
                         f"(spec names {', '.join(spec.limits)}; the chain predicts "
                         f"{', '.join(sorted(set(chain.targets)))})")
    return attributes, not_modelled


def judged_residuals(attributes, spec) -> list[str]:
    """The attributes whose out-of-fold residuals a judged probability is summed over: those with limits, and
    the weight RSD where the acceptance value is judged (its units are simulated from each lot's RSD,
    :mod:`linkage.decide.compendial`)."""
    out = [a for a in attributes if a in spec.limits]
    if compendial.ACCEPTANCE_VALUE in attributes and compendial.WEIGHT_RSD not in out:
        out.append(compendial.WEIGHT_RSD)
    return out


def check_confidence_supported(lean, attributes, confidence: float) -> None:
    """Refuse a confidence the lots cannot show. A probability of passing is summed over the attribute's
    out-of-fold residuals, one a lot; with n of them, a new lot's residual lies beyond all n with probability
    1/(n + 1) (exchangeable residuals; the rank argument of conformal prediction, Vovk, Gammerman & Shafer
    2005, ch. 2; the level limit of the CV+ interval, Barber et al. 2021, Ann. Statist. 49:486), so no
    probability above n/(n + 1) can be told from 1 on these lots: a window "at 99.99 %" on 48 lots would be
    where every residual passes, a claim the lots do not hold. The limit is the attribute with the fewest
    residual lots among those judged."""
    worst = None
    for stage in lean.stages:
        for name in stage.targets:
            if name in attributes:
                n = int(np.isfinite(stage.residual_column(name)).sum())
                if worst is None or n < worst[1]:
                    worst = (name, n)
    if worst is None:
        return
    name, n = worst
    if confidence > n / (n + 1):
        raise UnsupportedConfidenceError(
            f"--confidence {confidence:g} asks more than the lots can show: {confidence_lots_text(name, n)} (a new "
            f"lot falls beyond all {n} with probability 1/(n + 1)); use a confidence of at most "
            f"{math.floor(n / (n + 1) * 1e4) / 1e4:g}, or add lots", confidence=confidence, attribute=name, n_lots=n)


def _point_scan(chain, spec, draws, grid, attributes: list[str], limited: list[str], seed: int):
    """On the Monte Carlo draws at each porosity of ``grid``: P(all pass),
    P(pass) of each attribute (units simulated where the spec judges them),
    and whether the chain of mean predictions passes every limit."""
    passes = pass_matrix(draws, spec, limited)
    if compendial.needs_units(spec):  # units simulated around each lot: USP <711> stages, USP <905>
        passes.update(compendial.judge_draws(chain, draws, spec, seed=seed).passes)
    all_pass = np.logical_and.reduce(list(passes.values()))
    if POROSITY in spec.limits:  # a porosity limit of its own cuts the grid directly
        all_pass &= within(grid, spec.limits[POROSITY])[:, None]
    p_all = all_pass.mean(axis=1)
    p_each = {a: passes[a].mean(axis=1) for a in attributes}
    mean_ok = np.logical_and.reduce(list(mean_passes(draws, spec, limited).values())
                                    or [np.ones(len(grid), dtype=bool)])
    av_mean = compendial.mean_av_pass(draws, spec, chain)
    if av_mean is not None:
        mean_ok &= av_mean
    if POROSITY in spec.limits:
        mean_ok &= within(grid, spec.limits[POROSITY])
    return p_all, p_each, mean_ok


def _bound_curves(lean, spec, columns: dict, limited: list[str], p_all, p_each, confidence: float,
                  assurance: float, seed: int):
    """The lower bounds along the scan (:func:`linkage.decide.bound.chain_probabilities`
    at ``columns``): the chain's probabilities, the band of P(all pass) that holds over
    the window at once, the pointwise bound, each attribute's bound, and the band's
    quantile level (None without replicates); the unit-level step and a porosity limit
    applied as to the point estimate."""
    grid = columns[POROSITY]
    chain_p = chain_probabilities(lean, columns, spec.limits, limited, seed=seed)
    p_each_low = chain_p.low_each(assurance)
    p_all_pointwise = chain_p.low_all(assurance)
    band = chain_p.band_all(assurance, confidence)  # the window is a statement over a range: simultaneous
    p_all_low, band_level = (None, None) if band is None else band
    if p_all_low is not None and compendial.needs_units(spec):  # units judged too (bound.with_unit_level)
        p_all_low = with_unit_level(p_all_low, chain_p.p_all, p_all)
        p_all_pointwise = with_unit_level(p_all_pointwise, chain_p.p_all, p_all)
        p_each_low = {a: with_unit_level(p_each_low[a], chain_p.p_each[a], p_each[a])
                      if spec.judge_of(a) == "stages" else p_each_low[a] for a in limited}
        if compendial.ACCEPTANCE_VALUE in p_each:  # its point estimate scaled as the bound scales P(all)
            scale = np.clip(np.divide(p_all_low, p_all, out=np.zeros_like(p_all_low), where=p_all > 0), 0.0, 1.0)
            p_each_low[compendial.ACCEPTANCE_VALUE] = p_each[compendial.ACCEPTANCE_VALUE] * scale
    if p_all_low is not None and POROSITY in spec.limits:
        p_all_low = p_all_low * within(grid, spec.limits[POROSITY])
        p_all_pointwise = p_all_pointwise * within(grid, spec.limits[POROSITY])
    return chain_p, p_all_low, p_all_pointwise, p_each_low, band_level


def _draw_bands(draws, limited: list[str], confidence: float) -> dict[str, dict[str, np.ndarray]]:
    """Per limited attribute, the mean prediction and the central range at
    ``confidence`` of its draws along the scan."""
    bands = {}
    q = (1 - confidence) / 2
    for a in limited:
        v = draws.values[a]
        bands[a] = {"mean": draws.means[a], "low": np.quantile(v, q, axis=1), "high": np.quantile(v, 1 - q, axis=1)}
    return bands


def _widest(grid, p, p_each, confidence) -> tuple[Edge, Edge]:
    """The edges of the widest run of ``grid`` where ``p`` reaches the
    confidence, each with what limits it."""
    segments = _segments(grid, p, confidence)
    if not segments:
        return Edge(None, None), Edge(None, None)
    (i0, i1), (low, high) = max(segments, key=lambda s: s[1][1] - s[1][0])
    n = len(grid)
    return (Edge(low, "data range" if i0 == 0 else _limiting(p_each, i0 - 1, i0)),
            Edge(high, "data range" if i1 == n - 1 else _limiting(p_each, i1 + 1, i1)))


def _bound_record(lean, chain_p, assurance: float, band_level: float | None = None) -> dict:
    """What a result says of its bound: available, the method, B, or why not;
    and how it is made simultaneous over the range (``band_level``: the
    quantile level of :func:`linkage.decide.bound.simultaneous_lower_bound`)."""
    from linkage.decide.bound import SIMULTANEOUS_METHOD, replicates_of

    reps = replicates_of(lean)
    if chain_p.reps_all is None:
        return {"available": False, "assurance": assurance, "n_replicates": 0, "method": None,
                "reason": chain_p.reason or NO_BOUND, "simultaneous": None}
    return {"available": True, "assurance": assurance, "n_replicates": reps.n, "method": reps.method,
            "reason": None,
            "simultaneous": None if band_level is None else {"quantile": band_level, "method": SIMULTANEOUS_METHOD}}


def pooled_compactors(training: dict | None, ribbon_inputs) -> tuple[dict[str, int], str] | None:
    """(training lots per compactor, a note) when the roll force range is pooled over several compactors: the
    training lots come from more than one (``training["compactor_lots"]``, :func:`linkage.models.train`'s record)
    and the ribbon stage has no roll geometry among its inputs, so the range is no one compactor's. None
    otherwise, and for a model trained before the counts were kept."""
    counts = (training or {}).get("compactor_lots") or {}
    if len(counts) < 2 or "roll_diameter_mm" in ribbon_inputs:
        return None
    listed = ", ".join(f"{name}: {n} lot{'' if n == 1 else 's'}" for name, n in counts.items())
    return dict(counts), (
        f"pooled over the training lots of {len(counts)} compactors ({listed}): the ribbon stage has no roll "
        "geometry among its inputs, so this range is no one compactor's. For one compactor's rolls: linkage "
        "transfer --roll-diameter-mm D --roll-width-mm W --gap-mm S --window LOW:HIGH")


def window_domain(chain, draws, grid, low: float | None, high: float | None, roll_force: dict) -> dict:
    """Applicability-domain verdicts of the points a window rests on.

    At each porosity of ``grid``, each simulated stage is checked at its
    inputs on the chain of mean predictions (held settings, the porosity,
    earlier stages' means) with its domain model (training ranges, Hotelling
    T² and Q residual; :func:`linkage.models.lean.domain_verdicts`); and the
    ribbon stage at the forces of the roll force range with the settings held
    for it. The window promises its probability only when every grid point
    from ``low`` to ``high`` (the whole grid when there is no window) and
    every force of the range is inside every domain. Returns ``promise``,
    ``reasons`` (per stage, the porosities or forces outside and the
    verdict's reasons at the first of them) and ``in_domain`` per grid point.
    """
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    grid = np.asarray(grid, float)
    inside = np.ones(len(grid), dtype=bool) if low is None else (grid >= low - 1e-12) & (grid <= high + 1e-12)
    ok_all = np.ones(len(grid), dtype=bool)
    reasons: list[str] = []
    for stage in lean.stages:
        if stage.domain is None or all(t in draws.fixed for t in stage.targets) or POROSITY in stage.targets:
            continue
        verdicts = stage.domain.check({c: draws.means[c] for c in stage.inputs})
        ok = np.array([v["in_domain"] for v in verdicts], dtype=bool)
        ok_all &= ok
        bad = np.flatnonzero(inside & ~ok)
        if len(bad):
            where = (f"ribbon porosity {grid[bad[0]]:.3f}" if len(bad) == 1
                     else f"ribbon porosity {grid[bad[0]]:.3f}–{grid[bad[-1]]:.3f}")
            reasons += [f"{stage.name} stage at {where} ({len(bad)} of {int(inside.sum())} points"
                        f"{' in the window' if low is not None else ' scanned'}): {r}"
                        for r in verdicts[bad[0]]["reasons"]]
    ribbon = next((s for s in lean.stages if POROSITY in s.targets), None)
    if ribbon is not None and ribbon.domain is not None and roll_force.get("low") is not None:
        curve = roll_force.get("chain_curve") or roll_force["curve"]
        forces = np.asarray(curve["roll_force_kn_per_cm"], float)
        inside_range = (forces >= roll_force["low"] - 1e-9) & (forces <= roll_force["high"] + 1e-9)
        forces = np.concatenate([[roll_force["low"]], forces[inside_range], [roll_force["high"]]])
        held = {k: v["value"] for k, v in (roll_force.get("held_chain") or roll_force.get("held", {})).items()}
        x = {c: (forces if c == FORCE else np.full(len(forces), held.get(c, lean.medians.get(c, np.nan))))
             for c in ribbon.domain.inputs}
        verdicts = ribbon.domain.check(x)
        bad = [i for i, v in enumerate(verdicts) if not v["in_domain"]]
        if bad:
            reasons += [f"{ribbon.name} stage at roll force {forces[bad[0]]:.2f}–{forces[bad[-1]]:.2f} kN/cm "
                        f"({len(bad)} of {len(forces)} forces of the range): {r}" for r in verdicts[bad[0]]["reasons"]]
    return {"promise": not reasons, "reasons": reasons, "in_domain": ok_all}


def downstream_targets(chain) -> set[str]:
    """Targets of stages that (directly or through earlier stages) take ribbon porosity."""
    reach = {POROSITY}
    for stage in chain.stages:
        if reach & set(stage.inputs):
            reach.update(stage.targets)
    return reach - {POROSITY}


def _segments(grid, p, confidence):
    """Contiguous runs of grid points with p >= confidence, as
    ((first index, last index), (low, high)); inner edges interpolated."""
    ok = p >= confidence
    runs = []
    i = 0
    n = len(grid)
    while i < n:
        if not ok[i]:
            i += 1
            continue
        j = i
        while j + 1 < n and ok[j + 1]:
            j += 1
        low = grid[i] if i == 0 else _cross(grid[i - 1], grid[i], p[i - 1], p[i], confidence)
        high = grid[j] if j == n - 1 else _cross(grid[j], grid[j + 1], p[j], p[j + 1], confidence)
        runs.append(((i, j), (float(low), float(high))))
        i = j + 1
    return runs


def _cross(x0, x1, p0, p1, level):
    if p1 == p0:
        return x1
    return x0 + (level - p0) * (x1 - x0) / (p1 - p0)


def _limiting(p_each, outside: int, inside: int) -> str:
    """The attribute whose pass probability falls most across the edge."""
    return min(p_each, key=lambda a: (p_each[a][outside], -p_each[a][inside]))


def roll_force_range(chain, low: float | None, high: float | None, *, settings: dict[str, float],
                     confidence: float, n_grid: int = 161, seed: int = 0) -> dict:
    """Roll forces whose ribbons land in [low, high] of porosity.

    Returns the range where the probability that a lot's mean porosity lies
    in the window is at least ``confidence`` (``low``/``high``), the range where
    the mean prediction does (``mean_low``/``mean_high``), and the settings held.
    """
    stage = next((s for s in chain.stages if POROSITY in s.targets), None)
    if stage is None or FORCE not in stage.inputs:
        return {"low": None, "high": None, "reason": "the chain has no ribbon stage driven by roll force"}
    if low is None:
        return {"low": None, "high": None, "reason": "no porosity window to translate"}
    target = stage.targets[POROSITY]
    f_lo, f_hi = (float(v) for v in chain.training["ranges"][FORCE])
    forces = np.linspace(f_lo, f_hi, n_grid)
    held, source = fill_settings(chain, {k: v for k, v in settings.items() if k in stage.inputs and k != FORCE}
                                 | {FORCE: 0.0}, scan=(FORCE,))
    held.pop(FORCE)
    source.pop(FORCE)
    held = {k: v for k, v in held.items() if k in target.inputs}
    x = pd.DataFrame({**{k: np.full(n_grid, v) for k, v in held.items()}, FORCE: forces})[target.inputs]
    mean = np.asarray(target.predict(x), float)
    r = stage.residual_table()[POROSITY].dropna().to_numpy(float)
    draws = project(POROSITY, np.asarray(target.predict(x, raw=True), float)[:, None] + r[None, :])[0]
    p_in = ((draws >= low) & (draws <= high)).mean(axis=1)
    ok = np.flatnonzero(p_in >= confidence)
    in_mean = np.flatnonzero((mean >= low) & (mean <= high))
    return {
        "low": float(forces[ok[0]]) if len(ok) else None,
        "high": float(forces[ok[-1]]) if len(ok) else None,
        "mean_low": float(forces[in_mean[0]]) if len(in_mean) else None,
        "mean_high": float(forces[in_mean[-1]]) if len(in_mean) else None,
        "confidence": confidence,
        "data_range": [f_lo, f_hi],
        "held": {k: {"value": float(v), "source": source[k]} for k, v in sorted(held.items())},
        "curve": {"roll_force_kn_per_cm": _floats(forces), "porosity_mean": _floats(mean),
                  "p_in_window": _floats(p_in)},
        "reason": None if len(ok) else "no roll force in the training range lands in the window with that confidence",
    }


def chain_force_range(chain, spec, *, settings: dict[str, float], confidence: float, assurance: float,
                      seed: int = 0, n_grid: int = 61, in_window: dict | None = None,
                      force_range: tuple[float, float] | None = None) -> dict:
    """Roll forces where a lot passes every specification, through the whole chain.

    At the stated gap, roll and screw speed and the held downstream settings
    (``settings``, the rest held coherently with them), each force of the
    training range is simulated from the ribbon stage on (ribbon scatter,
    granule and tablet scatter included; :func:`linkage.decide.bound.chain_probabilities`).
    ``low``/``high``: the widest run of forces where the lower bound at
    ``assurance`` of P(all pass) reaches ``confidence`` (the point
    estimate's when the model has no bootstrap replicates);
    ``point_low``/``point_high``: where the point estimate does;
    ``mean_response_low``/``high``: where the chain of mean predictions
    passes every limit. ``in_window`` (from :func:`roll_force_range`) is
    kept: its ``low``/``high`` become ``in_window_low``/``in_window_high``
    (forces whose lot-mean porosity lands in the window with the confidence),
    its mean range and curve stay as they are.
    """
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    out = dict(in_window or {})
    out["in_window_low"], out["in_window_high"] = out.pop("low", None), out.pop("high", None)
    out["in_window_reason"] = out.pop("reason", None)
    out.update(low=None, high=None, point_low=None, point_high=None, mean_response_low=None,
               mean_response_high=None, confidence=confidence, assurance=assurance)
    stage = next((s for s in lean.stages if POROSITY in s.targets), None)
    if stage is None or FORCE not in stage.inputs:
        out["reason"] = "the chain has no ribbon stage driven by roll force"
        return out
    attributes = [a for a in spec.limits if a in lean.targets]
    if not attributes:
        out["reason"] = "no specification limit is on an attribute the chain predicts"
        return out
    if force_range is None:  # the training range of roll force: the ribbon stage's domain holds it
        force_range = chain.training["ranges"][FORCE] if hasattr(chain, "training") else stage.domain.ranges[FORCE]
    f_lo, f_hi = (float(v) for v in force_range)
    forces = np.linspace(f_lo, f_hi, n_grid)
    given = {k: v for k, v in settings.items() if k != FORCE and k not in lean.targets}
    held, source = fill_settings(lean, {**given, FORCE: 0.0}, scan=(FORCE,))
    held.pop(FORCE)
    source.pop(FORCE)
    columns = {**{k: np.full(n_grid, v) for k, v in held.items()}, FORCE: forces}
    cp = chain_probabilities(lean, columns, spec.limits, attributes, seed=seed)
    band = cp.band_all(assurance, confidence)  # a range of forces: simultaneous, as the window's bound
    p_low = None if band is None else band[0]
    means = simulate(lean, columns, n_draws=1, seed=seed)
    mean_ok = np.logical_and.reduce([within(means.means[a], spec.limits[a]) for a in attributes])
    point = _segments(forces, cp.p_all, confidence)
    if point:
        out["point_low"], out["point_high"] = max((s[1] for s in point), key=lambda s: s[1] - s[0])
    idx = np.flatnonzero(mean_ok)
    if len(idx):
        out["mean_response_low"], out["mean_response_high"] = float(forces[idx[0]]), float(forces[idx[-1]])
    if p_low is not None:
        runs = _segments(forces, p_low, confidence)
        if runs:
            out["low"], out["high"] = max((s[1] for s in runs), key=lambda s: s[1] - s[0])
    else:
        out["low"], out["high"] = out["point_low"], out["point_high"]
    out["held_chain"] = {k: {"value": float(v), "source": source[k]} for k, v in sorted(held.items())}
    at = (out["low"] + out["high"]) / 2 if out["low"] is not None else float(np.median(forces))
    out["held_point"] = held_point(lean, {**held, FORCE: at})  # at the middle of the range (of the scan without one)
    out["chain_curve"] = {"roll_force_kn_per_cm": _floats(forces), "p_all": _floats(cp.p_all),
                          "p_all_low": None if p_low is None else _floats(p_low),
                          "p_all_low_pointwise": None if p_low is None else _floats(cp.low_all(assurance)),
                          "mean_pass": [bool(b) for b in mean_ok]}
    out["bound_quantile"] = None if band is None else band[1]
    out["bound_available"] = p_low is not None
    if out["low"] is not None:
        out["reason"] = None
    elif p_low is None and cp.reason:
        out["reason"] = cp.reason
    else:
        out["reason"] = (f"at no roll force in the training range does the "
                         f"{'lower bound' if p_low is not None else 'point estimate'} of the chance that a lot "
                         f"passes every specification reach {percent_text(confidence)}")
    return out
