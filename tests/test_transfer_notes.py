"""``linkage transfer`` over a window says when the two edges' one-lot intervals overlap (one lot's roll force
cannot tell the edges apart at that uncertainty) and names an interval end whose peak pressure lies outside the
lots' (extrapolated, as it already says of the force itself). Regression tests (no outside source): the
overlap is checked against the intervals the answer gives, and each end's pressure against Johanson's
force per MPa of peak pressure on the same rolls (Johanson 1965, as linkage.physics.rolling computes it)."""

from __future__ import annotations

import numpy as np

from linkage.decide.transfer import RibbonPhysics, transfer
from linkage.physics import rolling

ROLLS = {"roll_diameter_mm": 400.0, "roll_width_mm": 100.0, "roll_gap_mm": 2.5}


def _physics(residual_sd: float, pressures=(50.0, 140.0), log_sd=(0.05, 0.02)) -> RibbonPhysics:
    # K and C near the demo's fit (4.99, 756 MPa)
    log_params = np.log([5.0, 756.0])
    return RibbonPhysics(5.0, 756.0, log_params, np.diag(np.square(log_sd)), residual_sd, 48, 40.0, 25.0,
                         peak_pressure_range_mpa=pressures)


def test_overlapping_edges_and_an_end_beyond_the_lots_are_said():
    done = transfer(_physics(0.0175), window=(0.293, 0.350), **ROLLS, seed=1)
    low_edge, high_edge = done.targets
    assert low_edge["force_interval_kn_per_cm"][0] <= high_edge["force_interval_kn_per_cm"][1]  # they overlap
    assert done.edges_overlap == [low_edge["force_interval_kn_per_cm"][0], high_edge["force_interval_kn_per_cm"][1]]
    text = done.text()
    assert "intervals for one lot overlap" in text and "cannot be told apart on one lot" in text
    assert done.to_dict()["edges_overlap_kn_per_cm"] == done.edges_overlap
    per_mpa = float(rolling.johanson_specific_roll_force_kn_per_cm(1.0, 2.5, 400.0, 5.0, 40.0, 25.0))
    for t in done.targets:
        expected = [e for e, f in zip(("low", "high"), t["force_interval_kn_per_cm"]) if not 50 <= f / per_mpa <= 140]
        assert t["interval_ends_outside_lots_pressure_range"] == expected
    assert low_edge["interval_ends_outside_lots_pressure_range"] == ["high"]  # ~16.5 kN/cm: ~170 MPa > 140
    assert f"upper end {low_edge['force_interval_kn_per_cm'][1]:.2f} kN/cm: OUTSIDE the peak pressures" in text


def test_edges_apart_say_nothing_of_overlap():
    done = transfer(_physics(0.002, pressures=(10.0, 400.0), log_sd=(0.005, 0.002)), window=(0.293, 0.350), **ROLLS, seed=1)
    assert done.targets[0]["force_interval_kn_per_cm"][0] > done.targets[1]["force_interval_kn_per_cm"][1]
    assert done.edges_overlap is None and "overlap" not in done.text()
    assert all(t["interval_ends_outside_lots_pressure_range"] == [] for t in done.targets)
    assert "OUTSIDE" not in done.text()
