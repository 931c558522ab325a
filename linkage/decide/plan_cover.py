"""The ``cover`` criterion of :func:`linkage.decide.plan.augment_design`:
the lots spread evenly over the window and just beyond it.

The n lots take n equally spaced target porosities from the point
estimate's low edge − :data:`MARGIN` to its high edge + :data:`MARGIN`
(``numpy.linspace``), each met by the candidate settings whose predicted
ribbon porosity (the ribbon stage's mean prediction) lies nearest, each
candidate used once (:func:`linkage.decide.plan_thompson.nearest`).

Why spread them, rather than pack them at the estimated edges: where the
window's edges lie is uncertain, and the models that place them are
approximations whose error near an edge is bias as much as variance. Box &
Draper (1959, "A basis for the selection of a response surface design",
J. Am. Stat. Assoc. 54:622-654; volume and pages from memory, the content
checked against the paper's abstract) chose designs that minimise the mean
squared error averaged over a region of interest, split into variance error
and bias error (the fitted model's inadequacy), and found the optimum,
wherever both occur, very nearly the design that ignores variance: for a
straight line fitted where the truth is curved, points spread over the
region (the moments of a uniform spread), not pushed to its extremes as a
variance-only (D- or I-optimal) design would push them. The region of interest here is
the window with a margin for the edges' own uncertainty. The margin of 0.03
of porosity is a measured choice, not a published constant: on the first 36
seeded campaigns with a known truth, lots over the window ± 0.03 and ± 0.06
reduced the edges' error 1.11 and 1.12 times as much as random lots, lots
inside the window only 0.49 times (on 20 of them; ``tests/benchmarks/plan_placements.py``,
reports/plan-benefit.md). Over 150 campaigns drawn after the placement was
fixed, ± 0.03 gave 1.27 (95 % interval 0.97-1.69): the highest ratio of the
placements and criteria measured, but not clear of 1.

The point estimate's window is the one spread over (not the lower bound's,
which lies inside the true window by design): it is the best estimate of
where the true edges are.
"""

from __future__ import annotations

import numpy as np

#: porosity [-] beyond each edge of the point estimate's window that the lots also cover (measured; see above)
MARGIN = 0.03

METHOD = (f"lots equally spaced in predicted ribbon porosity over the point estimate's window widened by {MARGIN} on "
          "each side, each met by the nearest candidate (space-filling over the region of interest, Box & Draper "
          "1959)")


def targets(low: float, high: float, n: int, margin: float = MARGIN) -> np.ndarray:
    """``n`` target porosities equally spaced from ``low − margin`` to ``high + margin`` (the middle of that
    range for one lot)."""
    if n == 1:
        return np.array([(low + high) / 2.0])
    return np.linspace(low - margin, high + margin, int(n))


def nearer_edge(porosity: np.ndarray, low: float, high: float) -> np.ndarray:
    """0 where ``porosity`` lies nearer the low edge than the high one (ties to the low), else 1."""
    p = np.asarray(porosity, dtype=float)
    return (np.abs(p - high) < np.abs(p - low)).astype(int)
