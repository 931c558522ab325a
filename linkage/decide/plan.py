"""Plan the next lots: a starting design for a new product, or the lots that
narrow an existing campaign's window fastest.

Starting design (:func:`start_design`)
--------------------------------------
With no lots yet, the settings the user names are spread over their ranges
by a maximin Latin hypercube: each setting takes ``n`` equally spaced levels
from the low to the high end of its range, each level once (a Latin
hypercube, McKay, Beckman & Conover 1979, Technometrics 21:239; on the grid
of levels 0, 1/(n−1), …, 1 of Morris & Mitchell 1995, J. Stat. Plan.
Inference 43:381), and among the Latin hypercubes tried the one whose
smallest distance between two lots (settings scaled to 0–1) is largest is
kept (the maximin criterion, Johnson, Moore & Ylvisaker 1990, J. Stat. Plan.
Inference 26:131). The search is seeded random restarts followed by
exchanges of two lots' levels of one setting while the smallest distance
grows. So no two lots share a level of any setting (no duplicated point),
both ends of every range are made, and the same seed gives the same design.
The run order is then randomised with the same seed.

``design="factorial"`` gives instead a two-level full or fractional factorial
at the ends of the ranges (the largest of resolution III or more that leaves
at least one lot; generators in :data:`FACTORIAL_GENERATORS`) and puts every
other lot at the centre of the ranges (centre points: a check of curvature
and an estimate of the pure error, Montgomery, Design and Analysis of
Experiments, §6.8), run order randomised.

Augmenting a campaign (:func:`augment_design`)
----------------------------------------------
The window's edges are uncertain because the models are uncertain *there*:
the tablet attributes against ribbon porosity near the two edge porosities,
and the ribbon stage (settings → porosity) near the roll forces that give
them. By default (``criterion="cover"``, below) the lots are spread evenly
over the point estimate's window ± 0.03 of porosity. With
``criterion="local"`` they are chosen by a sequential I-optimal augmentation (Atkinson,
Donev & Tobias 2007, Optimum Experimental Designs, with SAS, ch. 10.6 on
I-optimality — the prediction variance averaged over a region of interest —
and ch. 12 on exchange algorithms; from memory) of local linear models
weighted to the edges:

* for each porosity edge e: a local linear model in porosity, rows
  ``[1, ε − e]`` with Gaussian kernel weights ``exp(−½((ε − e)/h)²)``
  (h = one sixth of the training porosity range; common practice, no
  source); its variance of the fitted value at e is ``[M⁻¹]₀₀`` with
  ``M = Σ w zzᵀ`` (Fan & Gijbels 1996, Local Polynomial Modelling, §3.2,
  variance of the local linear estimator, up to σ²);
* for each roll force edge (the whole-chain force range at the held
  settings, ``roll_force_kn_per_cm.low``/``high`` of ``linkage window``): the
  same in the ribbon stage's inputs, standardised by the training SD, rows
  ``[1, (x − x_e)/s]``, kernel bandwidth 1 SD.

Existing lots enter at their measured porosity and settings; a candidate at
the ribbon stage's mean prediction of its settings. The criterion is the sum
over the edges of each edge's variance relative to its variance with the
existing lots alone, so each edge counts alike. Lots are added one at a time
(greedy, with the rank-one update of the inverse, Sherman & Morrison 1950),
each time the candidate that lowers the criterion most; a lot says which
edge it lowered most. Candidates are a scrambled Sobol' set over the ranges
(scipy.stats.qmc, seeded) and, where enough of them are, only those inside
the ribbon stage's applicability domain (Hotelling T², Q residual, ranges,
:mod:`linkage.models.domain`); settings outside the ranges given are never
proposed. Each lot carries its own domain verdict.

``criterion="cover"`` (the default) spreads the lots evenly over the point
estimate's window ± 0.03 of porosity (:mod:`linkage.decide.plan_cover`); it
plans for the porosity edges only. Of the four criteria it has the highest
measured ratio to random lots' reduction of the edges' error: 1.27 over 150
campaigns, 95 % interval 0.97-1.69, so not clear of 1 nor of issue 18's
1.33 (``tests/benchmarks/plan_placements.py``).
``criterion="target"`` chooses instead by the bootstrap spread of
P(all pass) near the confidence (Picheny et al. 2010's weighted integrated
variance, :mod:`linkage.decide.plan_target`); it does not refit the models
for each candidate set either. The benefit of ``local``, ``target`` and
``thompson`` over random lots is measured by
``tests/benchmarks/plan_benefit.py``, that of ``cover`` by
``tests/benchmarks/plan_placements.py``; both are recorded in
``reports/plan-benefit.md``.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from linkage import CAUTION
from linkage.decide.defaults import PLAN_CRITERIA
from linkage.exceptions import UsageError
from linkage.nearest import did_you_mean

POROSITY = "ribbon_porosity"
FORCE = "roll_force_kn_per_cm"
#: settings a plan may name that are not columns of ``process`` (table they belong to)
OTHER_SETTINGS = {"compression_force_kn": "tablets"}
#: decimals the planned settings are written with
DECIMALS = 3


# ---------------------------------------------------------------------------
# ranges
# ---------------------------------------------------------------------------
def plannable_settings() -> dict[str, tuple[str, object]]:
    """Setting name -> (template table, schema column): the numeric columns of
    ``process`` and the tablet press's compression force."""
    from linkage.schema import NUMBER, TABLES

    out = {c.name: ("process", c) for c in TABLES["process"].columns if c.kind == NUMBER}
    for name, table in OTHER_SETTINGS.items():
        out[name] = (table, TABLES[table].column(name))
    return out


def parse_ranges(texts) -> dict[str, tuple[float, float]]:
    """``["roll_force_kn_per_cm=3:14", ...]`` -> {name: (low, high)}.

    Refuses, all at once: a text not ``NAME=LOW:HIGH``, a name that is not a
    setting of the template, a number not written as a plain number, low not
    below high, a range outside the column's physical bounds
    (:mod:`linkage.schema`), a setting named twice.
    """
    from linkage.numbers import parse_plain_number

    settings = plannable_settings()
    out: dict[str, tuple[float, float]] = {}
    problems: list[str] = []
    for text in texts:
        name, sep, rest = str(text).partition("=")
        name = name.strip()
        lo_text, colon, hi_text = rest.partition(":")
        if not sep or not colon or not name:
            problems.append(f"--range '{text}' is not NAME=LOW:HIGH (e.g. roll_force_kn_per_cm=3:14)")
            continue
        if name not in settings:
            problems.append(f"--range {name}: not a setting of the template{did_you_mean(name, settings)}; settings: "
                            f"{', '.join(settings)}")
            continue
        lo, hi = parse_plain_number(lo_text), parse_plain_number(hi_text)
        bad = [f"'{t.strip()}' is {v}" for t, v in ((lo_text, lo), (hi_text, hi)) if isinstance(v, str)]
        if bad:
            problems.append(f"--range {name}: " + "; ".join(bad))
            continue
        if not lo < hi:
            problems.append(f"--range {name}: the low end {lo:g} must lie below the high end {hi:g}")
            continue
        col = settings[name][1]
        if (col.low is not None and (lo < col.low or (lo == col.low and not col.low_inclusive))) or \
                (col.high is not None and (hi > col.high or (hi == col.high and not col.high_inclusive))):
            problems.append(f"--range {name}={lo:g}:{hi:g} leaves the physical bounds {col.bound_text()}")
            continue
        if name in out:
            problems.append(f"--range {name} is given twice")
        out[name] = (float(lo), float(hi))
    if problems:
        raise UsageError("; ".join(problems))
    return out


# ---------------------------------------------------------------------------
# the plan
# ---------------------------------------------------------------------------
@dataclass
class PlannedLot:
    lot: str
    run: int  # position in the run order, from 1
    settings: dict[str, float]
    reason: str
    #: predicted lot-mean ribbon porosity (augmentation only)
    predicted_porosity: float | None = None
    #: inside the ribbon stage's applicability domain (None: no model to judge by)
    in_domain: bool | None = None
    domain_reasons: list[str] = field(default_factory=list)
    informs: str | None = None  # the edge this lot informs most (augmentation)

    def to_dict(self) -> dict:
        return {"lot": self.lot, "run": self.run, "settings": dict(self.settings), "reason": self.reason,
                "informs": self.informs, "predicted_porosity": self.predicted_porosity,
                "in_domain": self.in_domain, "domain_reasons": list(self.domain_reasons)}


@dataclass
class Plan:
    kind: str  # "start" or "augment"
    method: str
    seed: int
    ranges: dict[str, tuple[float, float]]
    held: dict[str, float]
    lots: list[PlannedLot]
    product: str | None = None
    model_id: str | None = None
    #: augmentation: the edges planned for and the criterion before/after (relative variance per edge)
    edges: list[dict] = field(default_factory=list)
    criterion: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    min_distance: float | None = None  # start: smallest distance between two lots, settings scaled to 0-1
    #: augmentation: the store's lots set aside (``linkage set-aside``) that the plan did not start from
    set_aside_lots: list[str] = field(default_factory=list)

    @property
    def names(self) -> list[str]:
        return list(self.ranges) + [k for k in self.held if k not in self.ranges]

    def to_dict(self) -> dict:
        return {
            "kind": self.kind, "method": self.method, "seed": self.seed, "model_id": self.model_id,
            "product": self.product, "n_lots": len(self.lots),
            "ranges": {k: list(v) for k, v in self.ranges.items()}, "held": dict(self.held),
            "lots": [lot.to_dict() for lot in self.lots],
            "edges": [dict(e) for e in self.edges], "criterion": dict(self.criterion),
            "min_distance": self.min_distance, "notes": list(self.notes),
            "set_aside_lots": list(self.set_aside_lots),
            "tables": {t: list(df.columns) for t, df in self.tables().items()},
            "caution": CAUTION,
        }

    def tables(self) -> dict:
        """Template tables of the plan (pandas DataFrames): ``process`` (every
        template column: planned lot ids, product, planned settings; blank
        where the plan says nothing, e.g. ``manufactured_at``), and
        ``tablets`` when the plan sets or holds the compression force (blank results)."""
        import pandas as pd

        from linkage.schema import TABLES

        process = {c.name: [None] * len(self.lots) for c in TABLES["process"].columns}
        process["lot"] = [lot.lot for lot in self.lots]
        if self.product is not None:
            process["product"] = [self.product] * len(self.lots)
        extra = {}
        for name in self.names:
            values = [lot.settings.get(name) for lot in self.lots]
            table = plannable_settings().get(name, ("process",))[0]
            if table == "process":
                process[name] = values
            else:
                extra.setdefault(table, {})[name] = values
        out = {"process": pd.DataFrame(process)}
        if "tablets" in extra:
            tablets = {c.name: [None] * len(self.lots) for c in TABLES["tablets"].columns}
            tablets["lot"] = process["lot"]
            tablets.update(extra["tablets"])
            out["tablets"] = pd.DataFrame(tablets)
        return out

    def text(self) -> str:
        lines = [f"Plan of {len(self.lots)} lots ({'new product' if self.kind == 'start' else 'next lots'}): "
                 f"{self.method}, seed {self.seed}"]
        if self.model_id:
            lines.append(f"Model {self.model_id}")
        for e in self.edges:
            lines.append(f"  {e['name']}: {e['where']}; relative variance after the plan "
                         f"{e['relative_variance']:.2f}")
        if self.held:
            lines.append("Held: " + ", ".join(f"{k} = {v:.4g}" for k, v in self.held.items()))
        names = list(self.ranges)
        domain = {True: "inside", False: "OUTSIDE", None: "-"}
        judged = self.kind == "augment"
        head = ["run", "lot", *names, *(["domain"] if judged else [])]
        rows = [[str(lot.run), lot.lot, *(f"{lot.settings[n]:g}" for n in names),
                 *([domain[lot.in_domain]] if judged else [])] for lot in self.lots]
        widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
        lines.append("  ".join(h.ljust(w) for h, w in zip(head, widths)))
        for lot, r in zip(self.lots, rows):
            line = "  ".join(c.ljust(w) for c, w in zip(r, widths))
            lines.append(f"{line}  {lot.reason}")
        lines += [f"Note: {n}" for n in self.notes]
        lines.append(CAUTION)
        return "\n".join(lines)


def _lot_ids(prefix: str, n: int, taken=()) -> list[str]:
    from linkage.read import lot_id_rule, lot_key

    width = max(3, len(str(n)))
    ids = [f"{prefix}-{i:0{width}d}" for i in range(1, n + 1)]
    rule = lot_id_rule(ids[0])
    if rule:
        raise UsageError(f"--prefix {prefix!r}: {rule}")
    clash = sorted({lot_key(t) for t in taken} & {lot_key(i) for i in ids})
    if clash:
        raise UsageError(f"planned lot ids {', '.join(clash)} are already in the lot store; choose another --prefix")
    return ids


# ---------------------------------------------------------------------------
# a new product: maximin Latin hypercube
# ---------------------------------------------------------------------------
def min_distance(unit: np.ndarray) -> float:
    """Smallest Euclidean distance between two rows (the maximin criterion)."""
    from scipy.spatial.distance import pdist

    return float(pdist(unit).min()) if len(unit) > 1 else math.inf


def maximin_lhs(n: int, d: int, *, seed: int = 0, restarts: int = 50, sweeps: int = 20) -> np.ndarray:
    """An n × d Latin hypercube on the levels 0, 1/(n−1), …, 1 with a large
    smallest distance between rows (see the module notes). Seeded."""
    if n < 2:
        raise UsageError(f"a design needs at least 2 lots; got {n}")
    rng = np.random.default_rng(seed)
    levels = np.arange(n) / (n - 1)
    best, best_d = None, -1.0
    for _ in range(restarts):
        perm = np.array([rng.permutation(n) for _ in range(d)]).T
        dist = min_distance(levels[perm])
        for _ in range(sweeps):  # exchanges of two lots' levels of one setting, kept when the criterion grows
            improved = False
            for j in range(d):
                i1, i2 = rng.choice(n, 2, replace=False)
                trial = perm.copy()
                trial[[i1, i2], j] = trial[[i2, i1], j]
                t = min_distance(levels[trial])
                if t > dist:
                    perm, dist, improved = trial, t, True
            if not improved and rng.uniform() < 0.5:
                break
        if dist > best_d:
            best, best_d = perm, dist
    return levels[best]


#: generators of two-level fractional factorials of the highest resolution, by (factors k, runs 2^(k-p)):
#: each added factor (the letters after the basic ones) is the product of the basic factors named.
#: Montgomery, Design and Analysis of Experiments, table of selected 2^(k-p) designs (Table 8.14 in the
#: 8th edition), and Box, Hunter & Hunter 2005, Statistics for Experimenters, 2nd ed., Table 6.22; from
#: memory. tests/decide/test_plan.py derives each design's resolution from its columns.
FACTORIAL_GENERATORS: dict[tuple[int, int], tuple[str, ...]] = {
    (3, 4): ("AB",),
    (4, 8): ("ABC",),
    (5, 16): ("ABCD",),
    (5, 8): ("AB", "AC"),
    (6, 32): ("ABCDE",),
    (6, 16): ("ABC", "BCD"),
    (6, 8): ("AB", "AC", "BC"),
    (7, 64): ("ABCDEF",),
    (7, 32): ("ABCD", "ABDE"),
    (7, 16): ("ABC", "BCD", "ACD"),
    (7, 8): ("AB", "AC", "BC", "ABC"),
}
#: resolution of each design above (the length of the shortest word of its defining relation)
FACTORIAL_RESOLUTION = {(3, 4): 3, (4, 8): 4, (5, 16): 5, (5, 8): 3, (6, 32): 6, (6, 16): 4, (6, 8): 3,
                        (7, 64): 7, (7, 32): 4, (7, 16): 4, (7, 8): 3}
DESIGNS = ("maximin", "factorial")


def two_level_factorial(k: int, runs: int) -> np.ndarray:
    """The ``runs`` × ``k`` matrix of ±1 of the full factorial (``runs`` = 2^k,
    standard order) or of the fractional factorial of
    :data:`FACTORIAL_GENERATORS`."""
    if runs == 2 ** k:
        q, generators = k, ()
    elif (k, runs) in FACTORIAL_GENERATORS:
        q, generators = int(round(math.log2(runs))), FACTORIAL_GENERATORS[(k, runs)]
    else:
        raise UsageError(f"no two-level design of {runs} runs for {k} settings is kept; sizes: "
                         + ", ".join(f"{r}" for (kk, r) in FACTORIAL_GENERATORS if kk == k) + f" or {2 ** k}")
    # basic factors in standard order: A alternates fastest (Box, Hunter & Hunter 2005, ch. 5)
    base = np.array([[1 if (i >> j) & 1 else -1 for j in range(q)] for i in range(runs)], dtype=int)
    cols = [base[:, j] for j in range(q)]
    for word in generators:
        cols.append(np.prod([base[:, ord(ch) - ord("A")] for ch in word], axis=0))
    return np.column_stack(cols)


def factorial_size(k: int, n_lots: int) -> tuple[int, int]:
    """(runs of the two-level part, its resolution) for ``k`` settings and
    ``n_lots`` lots: the largest full or fractional factorial of resolution
    at least III that leaves at least one lot for the centre point."""
    sizes = [(2 ** k, math.inf)] + [(r, FACTORIAL_RESOLUTION[(kk, r)]) for (kk, r) in FACTORIAL_GENERATORS if kk == k]
    fits = [(r, res) for r, res in sizes if r <= n_lots - 1]
    if not fits:
        least = min(r for r, _ in sizes) + 1
        raise UsageError(f"a two-level design of {k} settings with a centre point needs at least {least} lots; "
                         f"--lots is {n_lots} (use the default maximin design, or more lots)")
    return max(fits)


def _check_held(held: dict[str, float], ranges: dict) -> None:
    """Refuse, all at once, a held setting that is not a setting of the
    template, one also given a range, or a value outside its physical bounds."""
    settings = plannable_settings()
    problems = []
    for name, value in held.items():
        if name not in settings:
            problems.append(f"--set {name}: not a setting of the template{did_you_mean(name, settings)}; settings: "
                            f"{', '.join(settings)}")
        elif name in ranges:
            problems.append(f"--set {name}: also given a --range; give one")
        else:
            col = settings[name][1]
            low_ok = col.low is None or value > col.low or (value == col.low and col.low_inclusive)
            high_ok = col.high is None or value < col.high or (value == col.high and col.high_inclusive)
            if not (low_ok and high_ok and math.isfinite(value)):
                problems.append(f"--set {name}={value:g} leaves the physical bounds {col.bound_text()}")
    if problems:
        raise UsageError("; ".join(problems))


def start_design(ranges: dict[str, tuple[float, float]], n_lots: int, *, seed: int = 0,
                 held: dict[str, float] | None = None, prefix: str = "PLAN", product: str | None = None,
                 design: str = "maximin") -> Plan:
    """A starting design of ``n_lots`` lots over ``ranges`` (name -> (low, high)),
    run order randomised, all seeded. ``design``: ``"maximin"`` (a maximin
    Latin hypercube; the default) or ``"factorial"`` (a two-level full or
    fractional factorial at the ends of the ranges, the rest of the lots at
    the centre: 2 to 7 settings)."""
    if not ranges:
        raise UsageError("a new-product design needs at least one --range NAME=LOW:HIGH")
    if design not in DESIGNS:
        raise UsageError(f"--design must be one of {', '.join(DESIGNS)}; got {design!r}")
    n = int(n_lots)
    if n < 2:
        raise UsageError(f"--lots must be at least 2 for a design; got {n_lots}")
    names = list(ranges)
    k = len(names)
    notes: list[str] = []
    _check_held(held or {}, ranges)
    if design == "factorial":
        if not 2 <= k <= 7:
            raise UsageError(f"a two-level factorial start takes 2 to 7 settings; {k} given")
        runs, resolution = factorial_size(k, n)
        corners = (two_level_factorial(k, runs) + 1) / 2.0
        unit = np.vstack([corners, np.full((n - runs, k), 0.5)])
        kinds = ["corner"] * runs + ["centre point"] * (n - runs)
        method = (f"two-level {'full' if runs == 2 ** k else 'fractional'} factorial, {runs} runs"
                  + ("" if runs == 2 ** k else f" (resolution {resolution})") + f", {n - runs} centre points")
        if runs < 2 ** k:
            notes.append("generators: " + ", ".join(f"{chr(ord('A') + int(round(math.log2(runs))) + i)} = {w}"
                                                    for i, w in enumerate(FACTORIAL_GENERATORS[(k, runs)]))
                         + "; settings lettered A, B, ... in the order given")
    else:
        unit = maximin_lhs(n, k, seed=seed)
        kinds = ["space-filling start (maximin Latin hypercube)"] * n
        method = "maximin Latin hypercube"
    order = np.random.default_rng([seed, 1]).permutation(n)  # the run order, randomised
    unit = unit[order]
    kinds = [kinds[i] for i in order]
    lo = np.array([ranges[key][0] for key in names])
    hi = np.array([ranges[key][1] for key in names])
    values = np.round(lo + unit * (hi - lo), DECIMALS)
    ids = _lot_ids(prefix, n)
    held = dict(held or {})
    lots = [PlannedLot(lot=ids[i], run=i + 1, settings={**{key: float(values[i, j]) for j, key in enumerate(names)},
                                                          **held},
                       reason=kinds[i] if design == "maximin" else f"factorial {kinds[i]}") for i in range(n)]
    return Plan(kind="start", method=method, seed=seed, ranges=dict(ranges), held=held, lots=lots, product=product,
                min_distance=min_distance(unit) if design == "maximin" else None, notes=notes)


# ---------------------------------------------------------------------------
# written out
# ---------------------------------------------------------------------------
def write_plan(plan: Plan, folder) -> list[Path]:
    """Write ``process.csv`` (and ``tablets.csv`` when the plan sets or holds
    the compression force) in the template's columns, formula-safe and atomic
    (:mod:`linkage.export`), and ``plan.json``, into ``folder``."""
    from linkage.export import write_atomic, write_table_csv

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    written = [write_table_csv(table, folder / f"{name}.csv") for name, table in plan.tables().items()]
    buf = io.StringIO()
    json.dump(_jsonable(plan.to_dict()), buf, indent=2, allow_nan=False)
    written.append(write_atomic(folder / "plan.json", buf.getvalue().encode("utf-8")))
    return written


def _jsonable(obj):
    from linkage.jsonable import jsonable

    return jsonable(obj)


# ---------------------------------------------------------------------------
# augmenting a campaign: I-optimal local linear models weighted to the edges
# ---------------------------------------------------------------------------
#: kernel bandwidth in porosity, as a share of the training porosity range; in SDs for the ribbon inputs
POROSITY_BANDWIDTH_SHARE = 1.0 / 6.0
SETTINGS_BANDWIDTH_SD = 1.0
#: a small ridge on the information matrices, so an edge no lot is near still has a finite variance
RIDGE = 1e-6


@dataclass
class _EdgeModel:
    """A local linear model weighted to one edge: rows ``[1, (x − x_e)/s]``,
    Gaussian kernel weights; ``A`` is the inverse information matrix."""

    name: str
    where: str
    centre: np.ndarray
    scale: np.ndarray
    bandwidth: float
    A: np.ndarray = field(default=None, repr=False)
    v0: float = math.nan
    value: float = math.nan  # the edge: a porosity, or a roll force

    def rows(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        u = (np.atleast_2d(X) - self.centre) / self.scale
        w = np.exp(-0.5 * np.sum(u ** 2, axis=1) / self.bandwidth ** 2)  # Gaussian kernel
        return np.column_stack([np.ones(len(u)), u]), w

    def start(self, X: np.ndarray) -> None:
        Z, w = self.rows(X)
        M = (Z * w[:, None]).T @ Z + RIDGE * np.eye(Z.shape[1])
        self.A = np.linalg.inv(M)
        self.v0 = float(self.A[0, 0])  # variance of the fitted value at the edge, up to σ² (Fan & Gijbels 1996)

    def gains(self, X: np.ndarray) -> np.ndarray:
        """Reduction of [M⁻¹]₀₀ by adding each row of X alone (Sherman & Morrison 1950)."""
        Z, w = self.rows(X)
        AZ = Z @ self.A  # A is symmetric
        return w * AZ[:, 0] ** 2 / (1.0 + w * np.sum(AZ * Z, axis=1))

    def add(self, x: np.ndarray) -> None:
        Z, w = self.rows(x)
        z = Z[0]
        Az = self.A @ z
        self.A = self.A - w[0] * np.outer(Az, Az) / (1.0 + w[0] * z @ Az)

    @property
    def relative(self) -> float:
        return float(self.A[0, 0] / self.v0)


def _ribbon_stage(lean):
    stage = next((s for s in lean.stages if POROSITY in s.targets), None)
    if stage is None:
        raise UsageError("the model has no stage predicting ribbon_porosity from settings; nothing to plan against")
    return stage


def _edges_of(window) -> tuple[list[tuple[str, float]], list[tuple[str, float]], list[str]]:
    """Porosity edges and roll force edges to plan for, and notes."""
    notes = []
    lo, hi = window.low.value, window.high.value
    kind = "lower bound's window" if window.p_all_low is not None else "point estimate's window"
    if lo is None and window.point_low is not None:
        lo, hi, kind = window.point_low, window.point_high, "point estimate's window"
        notes.append("the lower bound reaches the confidence nowhere; planned for the point estimate's window")
    por = []
    if lo is None:
        i = int(np.argmax(window.p_all))
        por = [("highest P(all pass)", float(window.grid[i]))]
        notes.append("no porosity reaches the confidence; planned for the porosity where P(all pass) is highest "
                     f"({window.grid[i]:.3f})")
    else:
        if window.low.limited_by != "data range":
            por.append((f"low porosity edge of the {kind} (limited by {window.low.limited_by})", float(lo)))
        if window.high.limited_by != "data range":
            por.append((f"high porosity edge of the {kind} (limited by {window.high.limited_by})", float(hi)))
        if not por:
            notes.append("both window edges are the ends of the training range; planned for those ends")
            por = [("low end of the training porosity range", float(lo)),
                   ("high end of the training porosity range", float(hi))]
    rf = window.roll_force or {}
    f_lo = rf.get("low") if rf.get("low") is not None else rf.get("point_low")
    f_hi = rf.get("high") if rf.get("high") is not None else rf.get("point_high")
    force = []
    data = rf.get("data_range") or [None, None]
    for name, v, end in (("low roll force edge", f_lo, data[0]), ("high roll force edge", f_hi, data[1])):
        if v is not None and (end is None or abs(v - end) > 1e-9):
            force.append((name, float(v)))
    return por, force, notes


def edge_models(window, table, inputs: list[str], medians: dict, porosity_range,
                edges: str = "all") -> tuple[list, list[str]]:
    """The local linear models weighted to each edge of ``window``, started on
    the lots of ``table``: a list of (model, ``"porosity"`` or ``"settings"``),
    and notes. ``edges="porosity"`` leaves out the roll force edges."""
    por_edges, force_edges, notes = _edges_of(window)
    if edges == "porosity":
        force_edges = []
    known = table.dropna(subset=[POROSITY, *inputs])
    models: list[tuple[_EdgeModel, str]] = [(em, "porosity") for em in
                                            _porosity_edge_models(por_edges, known, porosity_range)]
    X_known = known[inputs].to_numpy(float)
    sd = np.where(X_known.std(axis=0, ddof=1) > 0, X_known.std(axis=0, ddof=1), 1.0) if len(X_known) > 1 \
        else np.ones(len(inputs))
    held_force = {k: v["value"] for k, v in (window.roll_force.get("held_chain") or {}).items()}
    for name, f in force_edges:
        centre = np.array([f if k == FORCE else held_force.get(k, medians.get(k, np.nan)) for k in inputs])
        em = _EdgeModel(name, f"roll force {f:.2f} kN/cm (ribbon stage)", centre, sd, SETTINGS_BANDWIDTH_SD,
                        value=f)
        em.start(X_known)
        models.append((em, "settings"))
    if not models:
        raise UsageError("the window has no edge to plan for")
    return models, notes


def chain_domain(lean, rows: list[dict]) -> list[tuple[bool | None, list[str]]]:
    """Each row of settings checked against every stage's applicability
    domain along the chain of mean predictions (as ``linkage window`` checks
    its points): (inside every domain, the reasons, each with its stage)."""
    from linkage.decide.propagate import fill_settings, simulate

    if not rows:
        return []
    filled = [fill_settings(lean, r)[0] for r in rows]
    names = sorted({k for r in filled for k in r})
    means = simulate(lean, {k: np.array([r[k] for r in filled], float) for k in names}, n_draws=1, seed=0).means
    inside = [None] * len(rows)
    reasons: list[list[str]] = [[] for _ in rows]
    for stage in lean.stages:
        if stage.domain is None:
            continue
        for i, v in enumerate(stage.domain.check({c: means[c] for c in stage.inputs})):
            inside[i] = bool(v["in_domain"]) and inside[i] is not False
            reasons[i] += [f"{stage.name} stage: {r}" for r in v["reasons"]]
    return list(zip(inside, reasons))


def augment_design(chain, table, spec, n_lots: int = 8, *, ranges: dict[str, tuple[float, float]] | None = None,
                   settings: dict[str, float] | None = None, confidence: float = 0.9, assurance: float = 0.9,
                   seed: int = 0, n_candidates: int = 2048, prefix: str = "PLAN", window=None,
                   product: str | None = None, edges: str = "all", criterion: str = "cover") -> Plan:
    """The next ``n_lots`` lots for narrowing the window's edges: spread over the
    point estimate's window (``cover``, the default) or by another criterion
    (see the module notes).

    Parameters
    ----------
    chain : the fitted chain (:class:`linkage.models.fitted.FittedChain`).
    table : the assembled table of the lots it was trained on (one row per lot).
    spec : the :class:`linkage.spec.Spec` the window is judged against.
    ranges : name -> (low, high) for the ribbon stage's settings; a setting
        not named runs over its training range.
    settings : held values (``--set``) of the settings outside the ribbon
        stage; the rest are held at the training median, as ``linkage window``
        holds them.
    window : a :class:`linkage.decide.window.WindowResult` already found at
        these settings (found here when None).
    product : the planned lots' product (the ``product`` column of the plan's
        process table); by default the one product the model was trained on,
        none when it was trained on several or on lots without one.
    edges : ``"all"`` (the porosity edges and the whole-chain roll force
        edges) or ``"porosity"`` (the porosity edges only).
    criterion : ``"cover"`` (the default: the lots spread evenly over the
        point estimate's window ± 0.03 of porosity,
        :mod:`linkage.decide.plan_cover`; porosity edges only, ``edges`` is
        then not used; the local criterion where there is no window),
        ``"local"`` (the I-optimal augmentation of the module notes),
        ``"target"`` (the bootstrap-weighted integrated variance of P(all
        pass) near the confidence, :mod:`linkage.decide.plan_target`;
        porosity edges only) or ``"thompson"``
        (:mod:`linkage.decide.plan_thompson`).
    """
    from linkage.decide.window import find_window
    from linkage.models.lean import as_lean

    n = int(n_lots)
    if n < 1:
        raise UsageError(f"--lots must be at least 1; got {n_lots}")
    if product is None:  # the planned lots are of the one product the model was trained on, if it names one
        product = chain.trained_product
    if edges not in ("all", "porosity"):
        raise UsageError(f"edges must be 'all' or 'porosity'; got {edges!r}")
    if criterion not in CRITERIA:
        raise UsageError(f"criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}")
    lean = as_lean(chain)
    stage = _ribbon_stage(lean)
    inputs = list(stage.inputs)
    ranges = dict(ranges or {})
    settings = dict(settings or {})
    _check_ranges_and_settings(ranges, settings, inputs)
    if window is None:
        window = find_window(chain, spec, settings=settings, confidence=confidence, seed=seed, assurance=assurance,
                             command="plan")
    training = chain.training["ranges"]
    full = {k: tuple(float(v) for v in (ranges.get(k) or training[k])) for k in inputs if k not in settings}
    held_ribbon = {k: float(settings[k]) for k in inputs if k in settings}
    held = {**held_ribbon, **{k: v["value"] for k, v in window.settings.items()
                              if k not in inputs and k not in lean.targets}}
    cand, Xc, eps_c, pool, notes = _candidates(stage, inputs, full, held_ribbon, n_candidates, n, seed)
    chosen, edge_list, crit, method = _chosen_lots(criterion, chain, lean, table, spec, window, inputs, Xc, eps_c,
                                                   pool, n, confidence, seed, edges, notes)
    return _augmented(chain, lean, table, cand, inputs, held, eps_c, chosen, edge_list, crit, notes, full, seed,
                      prefix, product, method)


def _chosen_lots(criterion, chain, lean, table, spec, window, inputs, Xc, eps_c, pool, n, confidence, seed, edges,
                 notes: list[str]):
    """The candidates :func:`augment_design` chooses by ``criterion``, with the edges they inform, the
    criterion's record and the method's text; ``thompson`` and ``cover`` fall back to the local criterion where
    they cannot plan. Every note (the fallback's too) is appended to ``notes``."""
    porosity_range = chain.training["ranges"][POROSITY]
    if criterion == "thompson":
        got = _thompson_choice(chain, table, spec, window, eps_c, pool, n, confidence, porosity_range, seed)
        if got is None:
            notes.append("no bootstrap replicates, or no porosity edge that the replicates can place: planned by "
                         "the local criterion instead")
        else:
            chosen, edge_list, crit, more = got
            notes += more
            return chosen, edge_list, crit, THOMPSON_METHOD
    if criterion == "cover":
        got = _cover_choice(window, table.dropna(subset=[POROSITY, *inputs]), porosity_range, eps_c, pool, n)
        if got is None:
            notes.append("the point estimate of P(all pass) reaches the confidence nowhere: no window to spread "
                         "the lots over; planned by the local criterion instead")
        else:
            from linkage.decide.plan_cover import METHOD as COVER_METHOD

            chosen, edge_list, crit = got
            notes.append("planned for the porosity edges only: criterion cover does not plan for the roll force "
                         "edges (--criterion local does)")
            return chosen, edge_list, crit, COVER_METHOD
    if criterion == "target":
        chosen, edge_list, crit, more = _target_choice(chain, table, spec, window, eps_c, pool, n, confidence,
                                                       porosity_range, seed)
        notes += more
        return chosen, edge_list, crit, TARGET_METHOD
    return _local_lots(window, table, inputs, lean, porosity_range, edges, Xc, eps_c, pool, n, notes)


def _local_lots(window, table, inputs, lean, porosity_range, edges, Xc, eps_c, pool, n, notes: list[str]):
    """The local criterion's choice (the I-optimal augmentation of the module notes): the edges and their local
    linear models, started on the existing lots, then the greedy choice; its edge notes appended to ``notes``."""
    models, edge_notes = edge_models(window, table, inputs, lean.medians, porosity_range, edges)
    notes += edge_notes
    chosen = _local_choice(models, eps_c, Xc, pool, n)
    edge_list = [{"name": em.name, "kind": kind, "value": em.value, "where": em.where,
                  "relative_variance": em.relative} for em, kind in models]
    crit = {"before": float(len(models)), "after": float(sum(em.relative for em, _ in models)),
            "rule": "sum over the edges of each edge's variance of the local linear fit relative to the "
                    "existing lots alone"}
    return chosen, edge_list, crit, LOCAL_METHOD


def _porosity_edge_models(por_edges, known, porosity_range) -> list:
    """The local linear model of each porosity edge (name, value), weighted to it and started on the
    porosities of the ``known`` lots (rows with their porosity and the ribbon stage's inputs)."""
    p_lo, p_hi = (float(v) for v in porosity_range)
    out = []
    for name, e in por_edges:
        em = _EdgeModel(name, f"ribbon porosity {e:.3f}", np.array([e]), np.array([1.0]),
                        POROSITY_BANDWIDTH_SHARE * (p_hi - p_lo), value=e)
        em.start(known[[POROSITY]].to_numpy(float))
        out.append(em)
    return out


def _cover_choice(window, table, porosity_range, eps_c, pool, n):
    """The ``cover`` criterion (:mod:`linkage.decide.plan_cover`), or None when the point estimate has no
    window: chosen (candidate, the edge its porosity lies nearer), the two edges' entries (each with the
    variance of its local linear fit after the lots, relative to the existing lots alone, as the local
    criterion counts it), the criterion entry."""
    from linkage.decide import plan_cover, plan_thompson

    lo, hi = window.point_low, window.point_high
    if lo is None:
        return None
    por_edges = [("low porosity edge of the point estimate's window", float(lo)),
                 ("high porosity edge of the point estimate's window", float(hi))]
    picked = plan_thompson.nearest(eps_c, pool, list(plan_cover.targets(lo, hi, n)))
    side = plan_cover.nearer_edge(eps_c[picked], lo, hi)
    chosen = [(c, por_edges[k][0]) for c, k in zip(picked, side)]
    models = _porosity_edge_models(por_edges, table, porosity_range)
    for em in models:
        for c in picked:
            em.add(eps_c[[c]][:, None])
    edge_list = [{"name": em.name, "kind": "porosity", "value": em.value, "where": em.where,
                  "relative_variance": em.relative} for em in models]
    crit = {"before": float(len(models)), "after": float(sum(em.relative for em in models)),
            "rule": f"none optimised: lots spread evenly over the point estimate's window ± {plan_cover.MARGIN}; "
                    "before/after: "
                    "sum over the two porosity edges of each edge's variance of the local linear fit relative to "
                    "the existing lots alone (as the local criterion counts it)"}
    return chosen, edge_list, crit


def _check_ranges_and_settings(ranges: dict, settings: dict, inputs: list[str]) -> None:
    """A --range only for the ribbon stage's settings, and never both a --range and a --set for one."""
    wrong = [k for k in ranges if k not in inputs]
    if wrong:
        raise UsageError(f"--range {', '.join(wrong)}: a plan varies only the ribbon stage's settings "
                         f"({', '.join(inputs)}); hold the others with --set NAME=VALUE")
    both = [k for k in ranges if k in settings]
    if both:
        raise UsageError(f"{', '.join(both)} given both a --range and a --set value; give one")


def _candidates(stage, inputs, full, held_ribbon, n_candidates, n, seed):
    """Candidate settings: a scrambled Sobol' set over the ranges ``full`` (seeded), the held ones fixed;
    their ribbon porosity, and the pool to choose from (those inside the ribbon stage's domain when enough
    are). Returns (candidates by name, candidates × inputs, porosity, pool indices, notes)."""
    from scipy.stats import qmc

    target = stage.targets[POROSITY]
    names = list(full)
    lo = np.array([full[k][0] for k in names])
    hi = np.array([full[k][1] for k in names])
    m = int(2 ** math.ceil(math.log2(max(n_candidates, 16))))
    unit = qmc.Sobol(len(names), scramble=True, seed=seed).random(m)
    cand = {k: lo[j] + unit[:, j] * (hi[j] - lo[j]) for j, k in enumerate(names)}
    cand.update({k: np.full(m, v) for k, v in held_ribbon.items()})
    Xc = np.column_stack([cand[k] for k in inputs])
    eps_c = target.predict(cand)
    notes = []
    verdicts = stage.domain.check(cand) if stage.domain is not None else [{"in_domain": None, "reasons": []}] * m
    inside = np.array([bool(v["in_domain"]) for v in verdicts])
    pool = np.flatnonzero(inside)
    if stage.domain is not None and len(pool) < max(4 * n, 32):
        notes.append(f"only {len(pool)} of {m} candidate settings lie inside the ribbon stage's applicability "
                     "domain; candidates outside it were kept (each lot says where it is)")
        pool = np.arange(m)
    elif stage.domain is not None:
        notes.append(f"candidates: {len(pool)} of {m} settings inside the ribbon stage's applicability domain")
    return cand, Xc, eps_c, pool, notes


def _local_choice(models, eps_c, Xc, pool, n) -> list[tuple[int, str]]:
    """Greedy I-optimal augmentation: ``n`` times the candidate of ``pool`` that most lowers the summed
    relative variance of the edges' local models, each added to them; (candidate, the edge it helps most)."""
    def features(idx):
        return {"porosity": eps_c[idx][:, None], "settings": Xc[idx]}

    chosen: list[tuple[int, str]] = []
    available = np.ones(len(eps_c), dtype=bool)
    for _ in range(n):
        idx = pool[available[pool]]
        if not len(idx):
            break
        f = features(idx)
        rel = np.vstack([em.gains(f[kind]) / em.v0 for em, kind in models])  # edges × candidates
        k = int(np.argmax(rel.sum(axis=0)))
        c = int(idx[k])
        top = models[int(np.argmax(rel[:, k]))][0].name
        for em, kind in models:
            em.add(features(np.array([c]))[kind])
        available[c] = False
        chosen.append((c, top))
    return chosen


#: augment_design's criteria (``linkage plan --criterion``), the default first
CRITERIA = PLAN_CRITERIA
THOMPSON_METHOD = ("each lot at the window edge of one bootstrap replicate: quantiles of the replicates' porosity "
                   "edges (bootstrapped Thompson sampling)")
LOCAL_METHOD = "I-optimal augmentation of local linear models weighted to the window's edges (greedy)"
TARGET_METHOD = ("lots where the bootstrap replicates of P(all pass) straddle the confidence: weighted integrated "
                 "variance of P near the window's porosity edges (Picheny et al. 2010; greedy)")


def _target_choice(chain, table, spec, window, eps_c, pool, n, confidence, porosity_range, seed):
    """The ``target`` criterion (:mod:`linkage.decide.plan_target`): chosen (candidate, edge name), the edges'
    entries, the criterion entry, notes."""
    from linkage.decide import plan_target

    notes = []
    por_edges, _, edge_notes = _edges_of(window)
    notes += edge_notes
    grid, p_hat, reps, why = plan_target.probability_curve(chain, spec, window, seed=seed)
    var = None if reps is None else reps.var(axis=0, ddof=1)
    if var is None:
        notes.append(f"no bootstrap spread of P(all pass) ({why}); the weight is taken at zero spread and the "
                     "local fit's variance alone is integrated")
    known = table[POROSITY].dropna().to_numpy(float) if POROSITY in table else np.zeros(0)
    picked, relative, total = plan_target.choose(eps_c, pool, n, grid=grid, p_hat=p_hat, var=var,
                                                 confidence=confidence, porosity_known=known,
                                                 porosity_range=porosity_range, edges=por_edges)
    chosen = [(c, por_edges[k][0] if por_edges else "porosity where P(all pass) is near the confidence")
              for c, k in picked]
    edge_list = [{"name": name, "kind": "porosity", "value": e, "where": f"ribbon porosity {e:.3f}",
                  "relative_variance": float(r)} for (name, e), r in zip(por_edges, relative)]
    crit = {"before": 1.0, "after": total,
            "rule": "weighted integrated variance of P(all pass) over the porosity grid (bootstrap variance scaled "
                    "by a local linear fit's variance; weight: chance that P lies at the confidence), relative "
                    "to the existing lots alone"}
    return chosen, edge_list, crit, notes


def _thompson_choice(chain, table, spec, window, eps_c, pool, n, confidence, porosity_range, seed):
    """The ``thompson`` criterion (:mod:`linkage.decide.plan_thompson`), or None when the model has no
    replicates or the window no low or high porosity edge: chosen (candidate, edge name), the edges' entries
    (``relative_variance`` as the ``target`` criterion would count it for these lots), the criterion entry,
    notes."""
    from linkage.decide import plan_target, plan_thompson

    por_edges, _, notes = _edges_of(window)
    cols = {0: e for e in por_edges if e[0].startswith("low ")} | {1: e for e in por_edges
                                                                   if e[0].startswith("high ")}
    if not cols:  # before the bootstrap curve, the costly part
        return None
    grid, p_hat, reps, _ = plan_target.probability_curve(chain, spec, window, seed=seed)
    if reps is None:
        return None
    edges_b = plan_thompson.replicate_edges(grid, reps, confidence)
    wanted = plan_thompson.targets(edges_b, sorted(cols), n)
    if not wanted:
        return None
    picked = plan_thompson.nearest(eps_c, pool, [t for _, t in wanted])
    chosen = [(c, cols[col][0]) for c, (col, _) in zip(picked, wanted)]
    known = table[POROSITY].dropna().to_numpy(float) if POROSITY in table else np.zeros(0)
    _, relative, total = plan_target.choose(eps_c, np.array(picked, int), len(picked), grid=grid, p_hat=p_hat,
                                            var=reps.var(axis=0, ddof=1), confidence=confidence,
                                            porosity_known=known, porosity_range=porosity_range,
                                            edges=[cols[k] for k in sorted(cols)])
    spread = {k: np.nanquantile(edges_b[:, k], [0.05, 0.95]) for k in cols}
    edge_list = [{"name": cols[k][0], "kind": "porosity", "value": cols[k][1],
                  "where": f"ribbon porosity {cols[k][1]:.3f} (replicates' edges 5-95%: {spread[k][0]:.3f}-"
                           f"{spread[k][1]:.3f})", "relative_variance": float(r)}
                 for k, r in zip(sorted(cols), relative)]
    crit = {"before": 1.0, "after": total,
            "rule": "lots at the quantiles (i + 1/2)/k of the bootstrap replicates' porosity edges; before/after: "
                    "weighted integrated variance of P(all pass) near the confidence (as criterion 'target' "
                    "counts it), relative to the existing lots alone"}
    return chosen, edge_list, crit, notes + [f"{int(np.isfinite(edges_b).all(axis=1).sum())} of {len(edges_b)} "
                                             "bootstrap replicates have a window"]


def _augmented(chain, lean, table, cand, inputs, held, eps_c, chosen, edge_list, crit, notes, full, seed, prefix,
               product, method) -> Plan:
    """The :class:`Plan` of the chosen candidates: run order randomised (seeded), lot ids, domain verdicts."""
    order = np.random.default_rng([seed, 2]).permutation(len(chosen))  # the run order, randomised
    ids = _lot_ids(prefix, len(chosen), taken=table["lot"].astype(str).tolist() if "lot" in table else ())
    picked = [chosen[i] for i in order]
    # the settings as they will be run and written to the batch record: DECIMALS places, held ones too (a held
    # conditional mean was written 13.841666666666669)
    held_run = {k: float(np.round(v, DECIMALS)) for k, v in held.items()}
    planned = [{**{k: float(np.round(cand[k][c], DECIMALS)) for k in inputs}, **held_run} for c, _ in picked]
    verdicts = chain_domain(lean, planned)
    lots = []
    for run, ((c, top), values, (inside_all, reasons)) in enumerate(zip(picked, planned, verdicts)):
        lots.append(PlannedLot(
            lot=ids[run], run=run + 1, settings=values,
            reason=f"informs the {top}; predicted ribbon porosity {eps_c[c]:.3f}"
                   + ("" if inside_all in (None, True) else "; outside the applicability domain"),
            informs=top, predicted_porosity=float(eps_c[c]), in_domain=inside_all, domain_reasons=reasons))
    return Plan(kind="augment", method=method, seed=seed, ranges=full, held=held, lots=lots, product=product,
                model_id=getattr(chain, "model_id", None) or "unsaved", edges=edge_list, criterion=crit,
                notes=notes)


# ---------------------------------------------------------------------------
# what the API returns
# ---------------------------------------------------------------------------
class Planned:
    """A plan (``linkage plan``): ``result`` is the :class:`Plan`; ``written``
    the files written (``process.csv``, maybe ``tablets.csv``, ``plan.json``);
    ``recorded`` whether the plan went into the store's audit trail."""

    def __init__(self, result: Plan, written: list[Path] | None = None, recorded: bool = False):
        self.result = result
        self.written = list(written or [])
        self.recorded = recorded

    def to_dict(self) -> dict:
        """What ``linkage plan --json`` prints."""
        return {**self.result.to_dict(), "written": [str(p) for p in self.written], "recorded": self.recorded}

    def text(self) -> str:
        out = self.result.text()
        if self.written:
            out += "\nWritten: " + ", ".join(str(p) for p in self.written)
        return out

    def __str__(self) -> str:
        return self.text()

    def summary(self):
        """One row per planned lot (index ``lot``): ``run``, the settings,
        ``informs``, ``predicted_porosity``, ``in_domain``, ``reason``."""
        import pandas as pd

        rows = [{"lot": lot.lot, "run": lot.run, **lot.settings, "informs": lot.informs,
                 "predicted_porosity": lot.predicted_porosity, "in_domain": lot.in_domain, "reason": lot.reason}
                for lot in self.result.lots]
        return pd.DataFrame(rows).set_index("lot")

    def __repr__(self) -> str:
        r = self.result
        return f"<Plan of {len(r.lots)} lots ({r.kind}; {r.method}; seed {r.seed})>"
