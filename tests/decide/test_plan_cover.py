"""The ``cover`` criterion of the augmentation (issue 18,
``linkage.decide.plan_cover``): the lots spread evenly over the point
estimate's window ± 0.03 of porosity, each at the candidate nearest its
target. Its benefit over random lots is measured by
``tests/benchmarks/plan_placements.py`` (reports/plan-benefit.md), not here."""

from __future__ import annotations

import numpy as np
import pytest

from tests.decide.test_plan import campaign  # noqa: F401 - its 30-lot campaign fixture, shared


def test_targets_are_numpys_equal_spacing_over_the_widened_window():
    """n targets from low − 0.03 to high + 0.03, equally spaced: numpy.linspace's (the reference); one lot
    takes the window's middle."""
    from linkage.decide.plan_cover import MARGIN, targets

    assert MARGIN == 0.03
    np.testing.assert_array_equal(targets(0.25, 0.36, 8), np.linspace(0.22, 0.39, 8))
    got = targets(0.25, 0.36, 8)
    assert np.allclose(np.diff(got), (0.39 - 0.22) / 7, rtol=0, atol=1e-15)
    assert targets(0.25, 0.36, 1).tolist() == [pytest.approx(0.305, abs=1e-15)]


def test_each_lot_informs_the_edge_its_porosity_lies_nearer():
    from linkage.decide.plan_cover import nearer_edge

    assert nearer_edge(np.array([0.20, 0.29, 0.30, 0.31, 0.50]), 0.25, 0.35).tolist() == [0, 0, 0, 1, 1]


@pytest.mark.slow
def test_cover_takes_the_candidate_nearest_each_target_and_says_which_edge_it_informs(campaign):
    """Brute force over the same candidate set: the i-th target (in order) gets the unused candidate inside
    the domain whose predicted porosity lies nearest. The plan keeps the ranges and the held settings,
    names the point estimate's edges, lowers each edge's local variance, and reproduces from its seed."""
    from scipy.stats import qmc

    from linkage.decide.plan import POROSITY, _ribbon_stage, augment_design
    from linkage.decide.window import find_window
    from linkage.models.lean import as_lean

    chain, table, spec = campaign
    held = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}
    window = find_window(chain, spec, settings=held, n_draws=500)
    assert window.point_low is not None
    ranges = {"roll_force_kn_per_cm": (5.0, 12.0)}
    plan = augment_design(chain, table, spec, 8, ranges=ranges, settings=held, seed=4, window=window,
                          criterion="cover")
    assert len(plan.lots) == 8 and "Box & Draper" in plan.method
    assert [e["value"] for e in plan.edges] == [window.point_low, window.point_high]
    assert all(e["relative_variance"] < 1.0 for e in plan.edges)
    for lot in plan.lots:
        assert 5.0 <= lot.settings["roll_force_kn_per_cm"] <= 12.0
        assert lot.settings["mill_screen_mm"] == 1.0 and lot.settings["compression_force_kn"] == 14.0
        side = 0 if abs(lot.predicted_porosity - window.point_low) <= abs(lot.predicted_porosity
                                                                          - window.point_high) else 1
        assert lot.informs == plan.edges[side]["name"] and lot.informs in lot.reason
    assert augment_design(chain, table, spec, 8, ranges=ranges, settings=held, seed=4, window=window,
                          criterion="cover").to_dict() == plan.to_dict()

    # the same candidates, chosen by brute force
    stage = _ribbon_stage(as_lean(chain))
    inputs = list(stage.inputs)
    names = list(plan.ranges)
    unit = qmc.Sobol(len(names), scramble=True, seed=4).random(2048)
    cand = {k: plan.ranges[k][0] + unit[:, j] * (plan.ranges[k][1] - plan.ranges[k][0]) for j, k in enumerate(names)}
    eps = stage.targets[POROSITY].predict(cand)
    free = [i for i, v in enumerate(stage.domain.check(cand)) if v["in_domain"]]
    want = []
    for t in np.linspace(window.point_low - 0.03, window.point_high + 0.03, 8):
        best = min(free, key=lambda i: (abs(eps[i] - t), i))
        free.remove(best)
        want.append(round(float(eps[best]), 12))
    assert sorted(want) == sorted(round(lot.predicted_porosity, 12) for lot in plan.lots)

    # each edge's relative variance: [M⁻¹]₀₀ of the kernel-weighted local linear fit with the planned lots over
    # that without, rows z = [1, ε − e], weights exp(−½((ε − e)/h)²), M = Σ w z zᵀ + ridge·I, inverted by numpy
    # directly (not the rank-one updates, Sherman & Morrison 1950, the plan uses)
    from linkage.decide.plan import POROSITY_BANDWIDTH_SHARE, RIDGE

    lo_p, hi_p = chain.training["ranges"][POROSITY]
    h = POROSITY_BANDWIDTH_SHARE * (hi_p - lo_p)
    known = table.dropna(subset=[POROSITY, *inputs])[POROSITY].to_numpy(float)
    added = np.array([lot.predicted_porosity for lot in plan.lots])

    def v00(eps, edge):
        Z = np.column_stack([np.ones_like(eps), eps - edge])
        w = np.exp(-0.5 * ((eps - edge) / h) ** 2)
        return np.linalg.inv((Z * w[:, None]).T @ Z + RIDGE * np.eye(2))[0, 0]

    for e in plan.edges:
        want = v00(np.r_[known, added], e["value"]) / v00(known, e["value"])
        assert e["relative_variance"] == pytest.approx(want, rel=1e-9)
    assert any("roll force edges" in n for n in plan.notes)


@pytest.mark.slow
def test_cover_without_a_window_plans_by_the_local_criterion_and_says_so(campaign):
    from linkage.decide.plan import augment_design
    from linkage.decide.window import find_window
    from linkage.spec import Limit, Spec

    chain, table, _ = campaign
    held = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}
    impossible = Spec(limits={"dissolution_pct": Limit(101.0, None)})
    window = find_window(chain, impossible, settings=held, n_draws=500)
    assert window.point_low is None
    plan = augment_design(chain, table, impossible, 4, settings=held, seed=4, window=window, criterion="cover")
    assert "I-optimal" in plan.method
    assert any("no window to spread the lots over" in n for n in plan.notes)


def test_cli_lists_cover_among_the_criteria():
    from click.testing import CliRunner

    from linkage.cli.main import cli

    res = CliRunner().invoke(cli, ["plan", "--lots", "8", "--criterion", "straddle"])
    assert res.exit_code == 2 and "cover" in res.output


def test_the_planned_lots_take_the_one_product_the_model_was_trained_on(campaign):
    """A user test found the plan's process table with a blank product although the model was trained on one
    product (no outside reference: a default of the record). Given a product, it is kept; trained on several,
    none is guessed."""
    from dataclasses import replace

    from linkage.decide.plan import augment_design

    chain, table, spec = campaign
    one = replace(chain, training={**chain.training, "products": ["QX-1 50 mg"]})
    several = replace(chain, training={**chain.training, "products": ["QX-1 50 mg", "QX-2 100 mg"]})
    held = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}
    plan = augment_design(one, table, spec, 2, settings=held, seed=1)
    assert plan.product == "QX-1 50 mg" and set(plan.tables()["process"]["product"]) == {"QX-1 50 mg"}
    assert augment_design(one, table, spec, 2, settings=held, seed=1, product="QX-9").product == "QX-9"
    assert augment_design(several, table, spec, 2, settings=held, seed=1).product is None


def test_held_settings_are_written_to_the_plan_as_run_at_three_decimals(campaign):
    """A setting held at its conditional mean was written 13.841666666666669 into the plan's tablets table (a
    second user test); every planned setting is written to 3 decimals (plan.DECIMALS), as the planned ones are.
    No outside source: a regression test of what is written."""
    import numpy as np

    from linkage.decide.plan import DECIMALS, augment_design

    chain, table, spec = campaign
    plan = augment_design(chain, table, spec, 2, settings={"mill_screen_mm": 1.0}, seed=1)
    for lot in plan.lots:
        for name, value in lot.settings.items():
            assert value == float(np.round(value, DECIMALS)), (name, value)
