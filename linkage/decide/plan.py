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

Augmenting a campaign (:func:`augment_design`)
----------------------------------------------
The window's edges are uncertain because the models are uncertain *there*:
the tablet attributes against ribbon porosity near the two edge porosities,
and the ribbon stage (settings → porosity) near the roll forces that give
them. Lots are chosen by a sequential I-optimal augmentation (Atkinson,
Donev & Tobias 2007, Optimum Experimental Designs, with SAS, ch. 10.6 on
I-optimality — the prediction variance averaged over a region of interest —
and ch. 12 on exchange algorithms; from memory) of local linear models
weighted to the edges:

* for each porosity edge e: a local linear model in porosity, rows
  ``[1, (ε − e)/h]`` with Gaussian kernel weights ``exp(−½((ε − e)/h)²)``
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

What this does not do: it does not simulate the bootstrap spread of
P(all pass) for each candidate set (a slower, more direct criterion); the
benefit over random lots is measured by ``tests/benchmarks/plan_benefit.py``
and recorded in ``reports/plan-benefit.md``.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from linkage import CAUTION
from linkage.exceptions import UsageError

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
            problems.append(f"--range {name}: not a setting of the template; settings: {', '.join(settings)}")
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
            "tables": {t: list(df.columns) for t, df in self.tables().items()},
            "caution": CAUTION,
        }

    def tables(self) -> dict:
        """Template tables of the plan (pandas DataFrames): ``process`` (every
        template column: planned lot ids, product, planned settings; blank
        where the plan says nothing, e.g. ``manufactured_at``), and
        ``tablets`` when the plan sets the compression force (blank results)."""
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
            lines.append(f"  edge {e['name']}: {e['where']}; relative variance after the plan "
                         f"{e['relative_variance']:.2f}")
        if self.held:
            lines.append("Held: " + ", ".join(f"{k} = {v:g}" for k, v in self.held.items()))
        names = list(self.ranges)
        head = ["run", "lot", *names]
        rows = [[str(lot.run), lot.lot, *(f"{lot.settings[n]:g}" for n in names)] for lot in self.lots]
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


def start_design(ranges: dict[str, tuple[float, float]], n_lots: int, *, seed: int = 0,
                 held: dict[str, float] | None = None, prefix: str = "PLAN", product: str | None = None) -> Plan:
    """A starting design of ``n_lots`` lots over ``ranges`` (name -> (low, high)):
    a maximin Latin hypercube, run order randomised, all seeded."""
    if not ranges:
        raise UsageError("a new-product design needs at least one --range NAME=LOW:HIGH")
    n = int(n_lots)
    if n < 2:
        raise UsageError(f"--lots must be at least 2 for a design; got {n_lots}")
    names = list(ranges)
    unit = maximin_lhs(n, len(names), seed=seed)
    order = np.random.default_rng([seed, 1]).permutation(n)  # the run order, randomised
    unit = unit[order]
    lo = np.array([ranges[k][0] for k in names])
    hi = np.array([ranges[k][1] for k in names])
    values = np.round(lo + unit * (hi - lo), DECIMALS)
    ids = _lot_ids(prefix, n)
    held = dict(held or {})
    lots = [PlannedLot(lot=ids[i], run=i + 1, settings={**{k: float(values[i, j]) for j, k in enumerate(names)},
                                                          **held},
                       reason="space-filling start (maximin Latin hypercube)") for i in range(n)]
    return Plan(kind="start", method="maximin Latin hypercube", seed=seed, ranges=dict(ranges), held=held,
                lots=lots, product=product, min_distance=min_distance(unit))


# ---------------------------------------------------------------------------
# written out
# ---------------------------------------------------------------------------
def write_plan(plan: Plan, folder) -> list[Path]:
    """Write ``process.csv`` (and ``tablets.csv`` when the plan sets the
    compression force) in the template's columns, formula-safe and atomic
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
