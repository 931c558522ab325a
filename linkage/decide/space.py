"""Maps of the probability of passing over two settings, and acceptable ranges.

Map
---
On a grid of two settings (default specific roll force × roll gap, each over
its training range), every other setting is held coherently at each grid
point: its conditional mean given the two mapped settings and any setting
given with ``--set`` (:mod:`linkage.decide.held`; the training median for a
model saved before that rule). At each grid point the probability that a lot
meets every specification at once is computed through the whole chain
(ribbon, granule and tablet scatter; :func:`linkage.decide.bound.chain_probabilities`,
the computation of :func:`linkage.decide.window.chain_force_range`): the
point estimate and its lower bound at ``assurance`` over the lot-level
bootstrap replicates (Efron & Tibshirani 1993, §13.3; Peterson 2008, J.
Biopharm. Stat. 18:959–975, for the probability-based design space). Limits
are judged on lot means, as the roll force range judges them; compendial
stages on units are not simulated on the map.

Each grid point's held point (the two settings, the held ones, and the chain
of mean predictions) is checked against every stage's applicability domain
(training ranges, Hotelling T² and Q residual; :mod:`linkage.models.domain`):
the domain mask. A probability outside the mask is an extrapolation.

Boundaries
----------
Two boundaries are reported at the confidence. The *estimated boundary* is
the contour of the point estimate of P(all pass) at the confidence: the best
estimate of where the true boundary lies (it errs either way). The
*conservative boundary* is the contour of the lower bound: by design it lies
inside the true region, by the spread the lot count leaves. Each is given by
its crossings of the grid lines: along every row of the grid (one value of
y) the x at which the surface crosses the confidence, and along every column
the y, by linear interpolation between the two neighbouring grid points
(the vertices marching squares would draw; Lorensen & Cline 1987, SIGGRAPH
21(4):163-169, from memory), counting only crossings between two grid points
inside the applicability domain (:func:`boundary_lines`).

Acceptable ranges
-----------------
The largest axis-aligned box of grid points inside {bound ≥ confidence} ∩
domain (all its grid points pass; area counted in grid cells, which on the
uniform grid is area in units of each setting's range), found by the
row-histogram maximal-rectangle search (each row's column heights, then the
largest rectangle under a histogram with a stack; Morgan 2005 surveys it, a
textbook exercise; the tests compare it with a brute-force search). Its
ends, one range per mapped setting, are grid points that pass: the ranges
are conservative by up to one grid step. With bootstrap replicates the box
rests on the same simultaneous rule as the window: the band that holds over
all the box's points at once (:func:`linkage.decide.bound.simultaneous_lower_bound`)
must reach the confidence at each of them; when the band over the largest
box falls short, the points where it does are dropped and the search runs
again (:func:`simultaneous_box`). The suggested set point is the
centre of the box, in each setting farthest from both ends of its range.
The held settings vary with the mapped ones; their range over the box is
reported beside.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from linkage import CAUTION
from linkage.decide.defaults import MAP_GRID, MAP_X, MAP_Y
from linkage.exceptions import UsageError
from linkage.nearest import did_you_mean
from linkage.numbers import percent_text

FORCE = MAP_X  # the map's default axes (linkage.decide.defaults)
GAP = MAP_Y


@dataclass
class SpaceResult:
    model_id: str
    x: str
    y: str
    xs: np.ndarray = field(repr=False)
    ys: np.ndarray = field(repr=False)
    #: (len(ys), len(xs)): row i is ys[i], column j is xs[j]
    p_all: np.ndarray = field(repr=False)
    p_all_low: np.ndarray | None = field(repr=False)
    in_domain: np.ndarray = field(repr=False)
    held: dict[str, np.ndarray] = field(repr=False)
    held_sources: dict[str, str]
    held_rule: str
    given: dict[str, float]
    attributes: list[str]
    confidence: float
    assurance: float
    bound: dict
    seed: int
    ranges: dict = field(default_factory=dict)
    domain_reasons: list[str] = field(default_factory=list)
    #: P(all pass) of each bootstrap replicate at each grid point (B × points; None without replicates)
    replicates: np.ndarray | None = field(repr=False, default=None)
    #: the model's training lots that the lot store now holds set aside, and the note that says so, as
    #: ``linkage window`` says it (:func:`linkage.api.space` reads the store; the map itself does not change)
    set_aside_in_training: tuple[str, ...] = ()
    set_aside_note: str | None = None
    #: why the store was not read for them (it does not exist, or could not be read); None when it was, or when no
    #: store was given (the command line says it on stderr)
    set_aside_unread: str | None = None
    #: where the spec judges attributes on simulated units (USP <711> stages, USP <905>), the sentence saying that
    #: the map's acceptable ranges and set point rest on lot means instead (linkage.decide.compendial.lot_values_text)
    lot_values_note: str | None = None

    @property
    def surface(self) -> np.ndarray:
        """What the region rests on: the lower bound, else the point estimate."""
        return self.p_all if self.p_all_low is None else self.p_all_low

    @property
    def estimated_region(self) -> np.ndarray:
        """Grid points where the point estimate reaches the confidence inside the domain."""
        return (self.p_all >= self.confidence) & self.in_domain

    @property
    def region(self) -> np.ndarray:
        """Grid points where the bound (point estimate without one) reaches the
        confidence and the held point is inside the domain."""
        return (self.surface >= self.confidence) & self.in_domain

    def to_dict(self) -> dict:
        from linkage.report.figures import shown_unit

        def grid(a):
            return None if a is None else [[round(float(v), 6) for v in row] for row in np.asarray(a)]

        return {
            "model_id": self.model_id,
            "x": {"name": self.x, "unit": shown_unit(self.x), "values": [round(float(v), 6) for v in self.xs]},
            "y": {"name": self.y, "unit": shown_unit(self.y), "values": [round(float(v), 6) for v in self.ys]},
            "grid_layout": "p_all[i][j] is at y.values[i], x.values[j]",
            "p_all": grid(self.p_all),
            "p_all_low": grid(self.p_all_low),
            "in_domain": [[bool(v) for v in row] for row in self.in_domain],
            "in_region": [[bool(v) for v in row] for row in self.region],
            "in_estimated_region": [[bool(v) for v in row] for row in self.estimated_region],
            "estimated_boundary": self.boundary(self.p_all, "point estimate of P(all pass)"),
            "conservative_boundary": (None if self.p_all_low is None else
                                      self.boundary(self.p_all_low, "lower bound of P(all pass)")),
            "confidence": self.confidence,
            "assurance": self.assurance,
            "bound": dict(self.bound),
            "attributes": list(self.attributes),
            "judged_on": "lot means against each limit; compendial unit stages not simulated on the map",
            "lot_values_note": self.lot_values_note,
            "given": dict(self.given),
            "held": {"rule": self.held_rule, "sources": dict(self.held_sources),
                     "values": {k: grid(v) for k, v in self.held.items()}},
            "domain_reasons": list(self.domain_reasons),
            "acceptable_ranges": self.ranges,
            "seed": self.seed,
            "set_aside_in_training": list(self.set_aside_in_training),
            "caution": CAUTION,
        }


    def boundary(self, surface, basis: str) -> dict:
        """Where ``surface`` crosses the confidence inside the domain, as its
        crossings of the grid lines (:func:`boundary_lines`), JSON-safe."""
        lines = boundary_lines(surface, self.xs, self.ys, self.confidence, self.in_domain)
        return {"basis": basis, "level": self.confidence,
                "x_at_y": [[round(v, 6) for v in row] for row in lines["x_at_y"]],
                "y_at_x": [[round(v, 6) for v in col] for col in lines["y_at_x"]],
                "layout": "x_at_y[i]: the x values where the surface crosses the level along y.values[i]; "
                          "y_at_x[j]: the y values where it does along x.values[j] (linear interpolation between "
                          "neighbouring grid points, both inside the domain)"}


def crossings(values, coords, level: float, inside=None, edges: bool = False) -> list[float]:
    """Where a sequence of values along one grid line crosses ``level``:
    between neighbouring points on opposite sides (one at or above, one
    below), at the linear interpolation between them. Points not ``inside``
    count as below the level; a crossing next to one is kept only with
    ``edges``, at the inside point (the edge of the region), and so are the
    ends of the line where the region reaches them."""
    v = np.asarray(values, float)
    c = np.asarray(coords, float)
    ok = np.ones(v.shape, bool) if inside is None else np.asarray(inside, bool)
    up = (v >= level) & ok
    out: list[float] = []
    if edges and up[0]:
        out.append(float(c[0]))
    for j in range(len(v) - 1):
        if up[j] == up[j + 1]:
            continue
        if ok[j] and ok[j + 1]:
            t = (level - v[j]) / (v[j + 1] - v[j])
            out.append(float(c[j] + t * (c[j + 1] - c[j])))
        elif edges:
            out.append(float(c[j] if up[j] else c[j + 1]))
    if edges and up[-1] and len(v) > 1:
        out.append(float(c[-1]))
    return out


def boundary_lines(surface, xs, ys, level: float, inside=None, edges: bool = False) -> dict:
    """The contour of ``surface`` (rows follow ``ys``, columns ``xs``) at
    ``level`` as its crossings of the grid lines (:func:`crossings`):
    ``x_at_y`` per row, ``y_at_x`` per column."""
    S = np.asarray(surface, float)
    ok = np.ones(S.shape, bool) if inside is None else np.asarray(inside, bool)
    return {"x_at_y": [crossings(S[i], xs, level, ok[i], edges) for i in range(S.shape[0])],
            "y_at_x": [crossings(S[:, j], ys, level, ok[:, j], edges) for j in range(S.shape[1])]}


def boundary_points(lines: dict, xs, ys) -> np.ndarray:
    """The (x, y) points of :func:`boundary_lines`."""
    pts = [(x, float(y)) for y, row in zip(ys, lines["x_at_y"]) for x in row]
    pts += [(float(x), y) for x, col in zip(xs, lines["y_at_x"]) for y in col]
    return np.array(pts, float).reshape(-1, 2)


def _range_of(lean, name: str) -> tuple[float, float]:
    from linkage.decide import held

    model = held.of_chain(lean)
    if model is not None and name in model.names:
        i = model.names.index(name)
        return float(model.low[i]), float(model.high[i])
    for stage in lean.stages:
        if stage.domain is not None and name in stage.domain.ranges:
            return tuple(float(v) for v in stage.domain.ranges[name])
    raise UsageError(f"no training range for {name}")


def hold_grid(lean, given: dict[str, np.ndarray]) -> tuple[dict[str, np.ndarray], dict[str, str], str]:
    """Every root setting the chain needs, one value per row of ``given``:
    the given columns, the rest held coherently at each row (the conditional
    mean, :mod:`linkage.decide.held`), or at the training median for a model
    saved before that rule. Returns (held columns, source per held name, rule)."""
    from linkage.decide import held
    from linkage.decide.propagate import needed_settings

    rows = max(np.size(v) for v in given.values())
    needed = needed_settings(lean, set(given))
    model = held.of_chain(lean)
    out: dict[str, np.ndarray] = {}
    sources: dict[str, str] = {}
    if model is not None:
        out, sources = held.hold_with_sources(model, given, needed)
    for name in needed:
        if name in out:
            continue
        med = lean.medians.get(name)
        if med is None or not np.isfinite(med):
            raise UsageError(f"{name} was not given and the training lots have no median for it; "
                             f"give it with --set {name}=VALUE")
        out[name] = np.full(rows, float(med))
        sources[name] = held.MEDIAN
    return out, sources, held.rule_of(lean)


def domain_mask(lean, columns: dict[str, np.ndarray]) -> tuple[np.ndarray, list[str]]:
    """Per row of ``columns`` (every root setting), is the held point inside
    every stage's applicability domain: each stage checked at its inputs on
    the chain of mean predictions (:func:`linkage.models.lean.domain_verdicts`).
    Returns the boolean mask and the distinct reasons (at most one per stage
    and kind) of the rows outside."""
    from linkage.decide.propagate import simulate

    draws = simulate(lean, columns, n_draws=1, seed=0)
    rows = np.size(next(iter(columns.values())))
    ok = np.ones(rows, dtype=bool)
    reasons: list[str] = []
    for stage in lean.stages:
        if stage.domain is None or all(t in draws.fixed for t in stage.targets):
            continue
        verdicts = stage.domain.check({c: draws.means[c] for c in stage.inputs})
        inside = np.array([v["in_domain"] for v in verdicts], dtype=bool)
        ok &= inside
        seen = set()
        for v in verdicts:
            for r in v["reasons"]:
                kind = r.split(" ")[0] + (" Q" if "Q residual" in r else "")
                if kind not in seen:
                    seen.add(kind)
                    reasons.append(f"{stage.name} stage, e.g.: {r}")
    return ok, reasons


def design_space(chain, spec, *, x: str = FORCE, y: str = GAP, n_grid: int = MAP_GRID, confidence: float = 0.9,
                 assurance: float = 0.9, settings: dict[str, float] | None = None, seed: int = 0,
                 cells: int | None = None) -> SpaceResult:
    """The map of P(all pass) and its lower bound over ``x`` × ``y`` (each
    over its training range, ``n_grid`` points), the domain mask and the
    acceptable ranges (see the module notes). ``settings`` holds other root
    settings at given values (``--set``); ``cells`` is passed to
    :func:`linkage.decide.bound.chain_probabilities` (default: 20 draws per
    grid point through the upstream stages)."""
    from linkage.decide.bound import NO_BOUND, chain_probabilities, check_assurance, replicates_of
    from linkage.models.lean import as_lean

    if not 0 < confidence < 1:
        raise UsageError(f"confidence must lie between 0 and 1; got {confidence}")
    assurance = check_assurance(assurance)
    n_grid = int(n_grid)
    if not 3 <= n_grid <= 200:
        raise UsageError(f"the grid needs 3 to 200 points per setting; got {n_grid}")
    from linkage.timepoint import check_time_point

    lean = as_lean(chain)
    check_time_point(lean, spec, "space")
    roots = lean.root_inputs()
    problems = [f"--x/--y: {n!r} is not a setting of this model's chain (settings: {', '.join(roots)})"
                for n in (x, y) if n not in roots]
    if x == y:
        problems.append(f"--x and --y are both {x}; map two different settings")
    settings = dict(settings or {})
    holdable = [r for r in roots if r not in (x, y)]  # what --set takes: the mapped two are refused below
    for k in settings:
        if k in (x, y):
            problems.append(f"{k} is mapped; do not also give it with --set")
        elif k not in roots:
            near = did_you_mean(k, holdable).strip().strip("()")  # 'did you mean ...?' in the same brackets
            problems.append(f"--set {k}: not a setting of this model's chain (the map holds settings only; "
                            f"--set takes: {', '.join(holdable)}{'; ' + near if near else ''})")
    if problems:
        raise UsageError("; ".join(problems))
    attributes = [a for a in spec.limits if a in lean.targets]
    if not attributes:
        raise UsageError("no specification limit is on an attribute the chain predicts")
    from linkage.decide.compendial import judged_on_units, lot_values_text
    from linkage.decide.window import check_confidence_supported, judged_residuals

    check_confidence_supported(lean, judged_residuals(attributes, spec), confidence)
    xs = np.linspace(*_range_of(lean, x), n_grid)
    ys = np.linspace(*_range_of(lean, y), n_grid)
    X, Y = np.meshgrid(xs, ys)  # (ny, nx)
    rows = X.size
    given = {x: X.ravel(), y: Y.ravel(), **{k: np.full(rows, float(v)) for k, v in settings.items()}}
    held_cols, sources, rule = hold_grid(lean, given)
    columns = {**given, **held_cols}
    cp = chain_probabilities(lean, columns, spec.limits, attributes, seed=seed,
                             cells=int(cells) if cells is not None else 20 * rows, each=False)
    low = cp.low_all(assurance)
    mask, reasons = domain_mask(lean, columns)
    reps = replicates_of(lean)
    bound = ({"available": True, "assurance": assurance, "n_replicates": reps.n, "method": reps.method,
              "reason": None} if low is not None else
             {"available": False, "assurance": assurance, "n_replicates": 0, "method": None,
              "reason": cp.reason or NO_BOUND})
    shape = X.shape
    result = SpaceResult(
        model_id=getattr(lean, "model_id", None) or "unsaved", x=x, y=y, xs=xs, ys=ys,
        p_all=cp.p_all.reshape(shape), p_all_low=None if low is None else np.asarray(low).reshape(shape),
        in_domain=mask.reshape(shape), held={k: v.reshape(shape) for k, v in held_cols.items()},
        held_sources=sources, held_rule=rule, given={k: float(v) for k, v in settings.items()},
        attributes=attributes, confidence=float(confidence), assurance=assurance, bound=bound, seed=int(seed),
        domain_reasons=reasons, replicates=cp.reps_all,
        lot_values_note=lot_values_text(judged_on_units(spec, lean.targets),
                                        "the acceptable ranges and set point of this map rest"))
    result.ranges = acceptable_ranges(result)
    return result


# ---------------------------------------------------------------------------
# acceptable ranges
# ---------------------------------------------------------------------------
def largest_rectangle(mask) -> tuple[int, int, int, int] | None:
    """The largest axis-aligned rectangle of True cells of a boolean matrix,
    as (row0, row1, col0, col1), inclusive; None when no cell is True. Ties:
    the first found scanning rows top-down, then columns left to right.

    Each row's histogram of consecutive True cells above and including it,
    then the largest rectangle under that histogram with a stack of
    increasing heights: O(rows × cols)."""
    m = np.asarray(mask, dtype=bool)
    if m.ndim != 2 or not m.any():
        return None
    nr, nc = m.shape
    heights = np.zeros(nc, dtype=int)
    best, best_area = None, 0
    for r in range(nr):
        heights = np.where(m[r], heights + 1, 0)
        stack: list[int] = []  # column indices with increasing heights
        for c in range(nc + 1):
            h = heights[c] if c < nc else 0
            while stack and heights[stack[-1]] >= h:
                top = stack.pop()
                left = stack[-1] + 1 if stack else 0
                area = int(heights[top]) * (c - left)
                if area > best_area:
                    best_area = area
                    best = (r - int(heights[top]) + 1, r, left, c - 1)
            if c < nc:
                stack.append(c)
    return best


def simultaneous_box(result: SpaceResult, max_rounds: int = 200) -> tuple[tuple | None, dict]:
    """The largest box of the region on which the band simultaneous over the
    box itself (:func:`linkage.decide.bound.simultaneous_lower_bound`, the
    window's rule) reaches the confidence at every point.

    Start from the largest box of the region (pointwise bound); while the
    band over the current box falls below the confidence somewhere in it,
    drop from the candidate points every point where that band falls short
    and take the largest box of what is left. Each round drops at least one
    point of the current box, so the search ends; the box it returns holds
    under the band made over exactly that box. Without replicates the box of
    the region is returned as it is. Returns (box or None, record)."""
    from linkage.decide.bound import simultaneous_lower_bound

    candidates = result.region.copy()
    first = largest_rectangle(candidates)
    if result.replicates is None or first is None:
        return first, {}
    box, rounds = first, 0
    point = result.p_all.ravel()
    while box is not None and rounds < max_rounds:
        r0, r1, c0, c1 = box
        in_box = np.zeros(result.p_all.shape, dtype=bool)
        in_box[r0:r1 + 1, c0:c1 + 1] = True
        band, q = simultaneous_lower_bound(result.replicates, result.assurance, point, in_box.ravel())
        band = band.reshape(result.p_all.shape)
        low = float(band[in_box].min())
        if low >= result.confidence:
            break
        rounds += 1
        candidates &= ~(in_box & (band < result.confidence))
        box = largest_rectangle(candidates)
    record = {"simultaneous_low_min": low, "simultaneous_quantile": q,
              "simultaneous_holds": bool(box is not None and low >= result.confidence),
              "pointwise_box": {"rows": [int(first[0]), int(first[1])], "columns": [int(first[2]), int(first[3])],
                                "ranges": {result.x: [float(result.xs[first[2]]), float(result.xs[first[3]])],
                                           result.y: [float(result.ys[first[0]]), float(result.ys[first[1]])]}},
              "shrunk": box != first, "shrink_rounds": rounds}
    return (box if record["simultaneous_holds"] else None), record


def acceptable_ranges(result: SpaceResult) -> dict:
    """The largest box inside the region (:attr:`SpaceResult.region`) on
    which the band simultaneous over the box reaches the confidence
    (:func:`simultaneous_box`), one range per mapped setting, the suggested
    set point (its centre), the held settings' range over the box and at the
    set point; ``found`` false with the reason when no grid point qualifies."""
    box, simultaneous = simultaneous_box(result)
    basis = "lower bound" if result.p_all_low is not None else "point estimate (no lower bound available)"
    if box is None:
        reason = (f"at no grid point inside the applicability domain does the {basis} of P(all pass) "
                  f"reach {percent_text(result.confidence)}")
        if simultaneous:
            reason = (f"no box of grid points inside the applicability domain keeps the band simultaneous over "
                      f"it at {percent_text(result.confidence)} or more "
                      f"(lowest {simultaneous['simultaneous_low_min']:.3f})")
        return {"found": False, "basis": basis, "reason": reason, **simultaneous}
    r0, r1, c0, c1 = box
    xs, ys = result.xs, result.ys
    centre = {result.x: float((xs[c0] + xs[c1]) / 2), result.y: float((ys[r0] + ys[r1]) / 2)}
    ci, cj = (r0 + r1) // 2, (c0 + c1) // 2  # the grid point at (or just below) the centre
    ranges = {result.x: [float(xs[c0]), float(xs[c1])], result.y: [float(ys[r0]), float(ys[r1])]}
    held = {k: [float(v[r0:r1 + 1, c0:c1 + 1].min()), float(v[r0:r1 + 1, c0:c1 + 1].max())]
            for k, v in result.held.items()}
    return {
        "found": True, "basis": basis,
        "ranges": ranges,
        "grid_cells": {"rows": [int(r0), int(r1)], "columns": [int(c0), int(c1)],
                       "n_points": int((r1 - r0 + 1) * (c1 - c0 + 1))},
        "set_point": centre,
        "set_point_rule": "centre of the box: in each mapped setting, farthest from both ends of its range",
        "held_over_box": held,
        "held_at_set_point": {k: float(v[ci, cj]) for k, v in result.held.items()},
        "p_all_low_at_set_point_grid": None if result.p_all_low is None else float(result.p_all_low[ci, cj]),
        "p_all_at_set_point_grid": float(result.p_all[ci, cj]),
        **simultaneous,
        "note": ("the ranges' ends are grid points inside the domain where the band that holds over the whole box "
                 "at once (the window's rule; simultaneous_low_min its lowest point over the box) reaches the "
                 "confidence; the box is the largest of the pointwise region (pointwise_box), shrunk until that "
                 "holds (shrunk, shrink_rounds); without bootstrap replicates it rests on the point estimate; the "
                 "held settings follow the mapped ones (their range over the box is given), they are not "
                 "independent ranges"),
    }


def space_text(result: SpaceResult) -> str:
    """What ``linkage space`` prints."""
    from linkage.report.figures import shown_unit
    from linkage.results import units_shown

    d = result.to_dict()
    b = d["bound"]
    n = result.p_all.size
    lines = [f"Model {d['model_id']}; map of P(every specification passes together) over {result.x} × {result.y} "
             f"({len(result.xs)} × {len(result.ys)} grid over the training ranges).",
             f"Judged: {', '.join(result.attributes)} ({d['judged_on']}).",
             *([f"!! {result.lot_values_note}"] if result.lot_values_note else []),
             f"Held: {result.held_rule}."]
    if result.given:
        lines.append("Given: " + ", ".join(f"{k} = {v:g}" for k, v in result.given.items()))
    if b["available"]:
        lines.append(f"Lower bound at {percent_text(result.assurance)} assurance over {b['n_replicates']} lot-level "
                     "bootstrap replicates of the chain.")
    else:
        lines.append(f"!! {b['reason']}")
    inside = int(result.in_domain.sum())
    lines.append(f"Inside the applicability domain: {inside} of {n} grid points.")
    for r in result.domain_reasons[:6]:
        lines.append(f"   outside, {units_shown(r)}")
    lines.append(f"Reaching {percent_text(result.confidence)} ({'bound' if b['available'] else 'point estimate'}) "
                 f"inside the domain: {int(result.region.sum())} of {n} grid points; point estimate anywhere: "
                 f"{int((result.p_all >= result.confidence).sum())}.")
    lines.append(f"Estimated boundary: where the point estimate crosses {percent_text(result.confidence)} inside the "
                 f"domain ({int(result.estimated_region.sum())} grid points within it)"
                 + ("; the bound's region inside it is the conservative one." if b["available"] else "."))
    ar = result.ranges
    if ar.get("found"):
        lines.append("Acceptable ranges (largest box inside the region):")
        for k, (lo, hi) in ar["ranges"].items():
            lines.append(f"  {k}: {lo:.4g} – {hi:.4g} {shown_unit(k)}")
        lines.append("Suggested set point (centre of the box): "
                     + ", ".join(f"{k} = {v:.4g} {shown_unit(k)}" for k, v in ar["set_point"].items()))
        if "simultaneous_holds" in ar:
            lines.append(f"  over the whole box at once (simultaneous band, {percent_text(result.assurance)} "
                         f"assurance) the lowest bound is {ar['simultaneous_low_min']:.3f}: the box keeps the "
                         "confidence"
                         + (f" (shrunk from the pointwise bound's box in {ar['shrink_rounds']} "
                            f"round{'' if ar['shrink_rounds'] == 1 else 's'})"
                            if ar["shrunk"] else ""))
        lines.append("  held there: " + ", ".join(f"{k} = {v:.4g}" for k, v in ar["held_at_set_point"].items()))
        lines.append("  held settings over the box (they follow the mapped ones): "
                     + ", ".join(f"{k} {lo:.4g}–{hi:.4g}" for k, (lo, hi) in ar["held_over_box"].items()))
    else:
        lines.append(f"No acceptable ranges: {ar.get('reason')}")
    if result.set_aside_note:  # before the caution, which ends every text (as window's note)
        lines.append(f"Note: {result.set_aside_note}.")
    lines.append(CAUTION)
    return "\n".join(lines)
