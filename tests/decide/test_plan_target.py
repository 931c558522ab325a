"""The ``target`` criterion of the augmentation (issue 18,
:mod:`linkage.decide.plan_target`): Picheny et al.'s (2010) weighted
integrated variance of P(all pass) near the confidence."""

from __future__ import annotations

import math

import numpy as np
import pytest

from linkage.decide.plan_target import RIDGE, LocalVariance, choose, weights


def _direct_inverse(g, h, eps):
    """[(ZᵀWZ + ridge)⁻¹] at grid point g by scipy's QR of W^½Z ((ZᵀWZ)⁻¹ = R⁻¹R⁻ᵀ; Golub & Van
    Loan 2013, §5.3), the ridge added as two extra rows √ridge·I."""
    from scipy.linalg import qr, solve_triangular

    u = (eps - g) / h
    Z = np.column_stack([np.ones_like(u), u])
    w = np.exp(-0.5 * u ** 2)
    rows = np.vstack([np.sqrt(w)[:, None] * Z, math.sqrt(RIDGE) * np.eye(2)])
    R = qr(rows, mode="economic")[1]
    R_inv = solve_triangular(R, np.eye(2))
    return R_inv @ R_inv.T


def test_local_variance_and_its_update_match_weighted_least_squares():
    """The local linear fit's variance at each grid point, up to σ², is
    [(ZᵀWZ)⁻¹]₀₀ (Fan & Gijbels 1996, §3.2); after adding a lot (Sherman &
    Morrison 1950) it equals the same element with the lot in Z, and the gain
    each candidate alone would bring is the drop of that element."""
    rng = np.random.default_rng(3)
    eps = rng.uniform(0.2, 0.45, 18)
    g = np.array([0.24, 0.30, 0.36, 0.44])
    lv = LocalVariance(g, 0.04, eps)
    for j, gj in enumerate(g):
        assert lv.v0[j] == pytest.approx(_direct_inverse(gj, 0.04, eps)[0, 0], rel=1e-6)
    cands = np.array([0.25, 0.35, 0.5])
    gains = lv.gains(cands)
    for c, col in zip(cands, gains.T):
        for j, gj in enumerate(g):
            assert lv.v0[j] - _direct_inverse(gj, 0.04, np.append(eps, c))[0, 0] == pytest.approx(col[j], rel=1e-6)
    lv.add(0.35)
    for j, gj in enumerate(g):
        assert lv.A[j] == pytest.approx(_direct_inverse(gj, 0.04, np.append(eps, 0.35)), rel=1e-6)
    assert np.all(lv.ratio <= 1.0)


def test_weight_is_the_normal_density_of_the_distance_to_the_confidence():
    """Picheny et al. (2010, J. Mech. Des. 132:071008, weight of the targeted
    IMSE; from memory): W = exp(−½ (P̂ − c)²/(σ_ε² + s²)) / √(2π (σ_ε² + s²)),
    written out here by hand."""
    p = np.array([0.2, 0.85, 0.9, 0.97, 1.0])
    s2 = np.array([0.01, 0.002, 0.0, 0.004, 0.0])
    w = weights(p, s2, 0.9, tolerance=0.05)
    v = 0.05 ** 2 + s2
    assert w == pytest.approx(np.exp(-0.5 * (p - 0.9) ** 2 / v) / np.sqrt(2 * math.pi * v), rel=1e-12)
    assert np.argmax(weights(p, None, 0.9, tolerance=0.05)) == 2  # at zero spread, largest at the confidence


def test_greedy_choice_beats_random_picks_of_the_same_candidates():
    """Each greedy step takes the candidate that lowers the weighted
    integrated variance most, so the plan's criterion after 6 lots is lower
    than that of 30 random picks of 6 candidates from the same set (the
    greedy exchange of Atkinson, Donev & Tobias 2007, ch. 12; checked on the
    whole plan), and its lots sit by the two edges where P crosses the
    confidence rather than in the middle where P is sure."""
    grid = np.linspace(0.2, 0.45, 101)
    p_hat = 1.0 / (1.0 + np.exp(-(grid - 0.25) / 0.01)) * 1.0 / (1.0 + np.exp((grid - 0.37) / 0.01))
    var = 0.25 * p_hat * (1 - p_hat) + 1e-6  # spread largest where P is uncertain
    rng = np.random.default_rng(1)
    known = rng.uniform(0.2, 0.45, 12)
    cands = np.linspace(0.2, 0.45, 200)
    pool = np.arange(cands.size)
    edges = [("low", 0.25), ("high", 0.37)]
    kw = dict(grid=grid, p_hat=p_hat, var=var, confidence=0.9, porosity_known=known, porosity_range=(0.2, 0.45),
              edges=edges)
    chosen, relative, total = choose(cands, pool, 6, **kw)
    assert len({c for c, _ in chosen}) == 6 and 0 < total < 1 and np.all(relative < 1)
    picked = cands[[c for c, _ in chosen]]
    assert np.all(np.minimum(abs(picked - 0.25), abs(picked - 0.37)) < 0.05)
    assert {k for _, k in chosen} == {0, 1}
    for _ in range(30):
        pick = rng.choice(pool, 6, replace=False)
        _, _, t_random = choose(cands, pick, 6, **kw)  # a pool of exactly 6: those six are taken
        assert total <= t_random


@pytest.mark.slow
def test_target_plan_from_a_model_with_replicates():
    """With a model trained with bootstrap replicates, the ``target`` plan
    proposes lots inside the ranges, holding the window's settings, each
    naming the porosity edge it informs and its domain verdict, lowers each
    edge's weighted variance, and reproduces from the seed."""
    from linkage.assemble import assemble
    from linkage.decide.plan import augment_design
    from linkage.decide.window import find_window
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SPEC, make_lots

    table = assemble(make_lots(24, seed=5).tables)
    chain = train_chain(table, seed=0, n_bootstrap=40, candidates=["mean", "linear_select"])
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    held = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}
    window = find_window(chain, spec, settings=held, n_draws=500)
    ranges = {"roll_force_kn_per_cm": (5.0, 12.0)}
    plan = augment_design(chain, table, spec, 6, ranges=ranges, settings=held, seed=4, window=window,
                          criterion="target")
    assert len(plan.lots) == 6 and "Picheny" in plan.method
    edges = {e["name"] for e in plan.edges}
    assert edges and all(e["kind"] == "porosity" and e["relative_variance"] < 1.0 for e in plan.edges)
    for lot in plan.lots:
        assert 5.0 <= lot.settings["roll_force_kn_per_cm"] <= 12.0
        assert lot.settings["mill_screen_mm"] == 1.0 and lot.settings["compression_force_kn"] == 14.0
        assert lot.informs in edges and lot.informs in lot.reason
        assert isinstance(lot.in_domain, bool)
    assert not any("no bootstrap spread" in n for n in plan.notes)
    again = augment_design(chain, table, spec, 6, ranges=ranges, settings=held, seed=4, window=window,
                           criterion="target")
    assert again.to_dict() == plan.to_dict()
    with pytest.raises(Exception, match="criterion must be one of"):
        augment_design(chain, table, spec, 6, settings=held, window=window, criterion="straddle")


def test_thompson_targets_are_the_quantiles_of_the_replicates_edges():
    """Each replicate's window is its widest run of grid points where P_b
    reaches the confidence; k lots for an edge take the (i + ½)/k quantiles
    of the replicates' edges (checked against numpy's percentile of the
    edges found by hand, and the nearest candidate by a brute-force search)."""
    from linkage.decide.plan_thompson import nearest, replicate_edges, targets

    grid = np.linspace(0.2, 0.45, 51)
    rng = np.random.default_rng(2)
    lows, highs = rng.uniform(0.24, 0.27, 40), rng.uniform(0.35, 0.39, 40)
    reps = np.array([((grid >= lo) & (grid <= hi)).astype(float) for lo, hi in zip(lows, highs)])
    reps[0, 5] = 1.0  # a stray point passing alone: not the widest run
    reps[1] = 0.0  # a replicate with no window
    e = replicate_edges(grid, reps, 0.9)
    assert np.isnan(e[1]).all()
    by_hand = np.array([[grid[grid >= lo][0], grid[grid <= hi][-1]] for lo, hi in zip(lows, highs)])
    assert e[[0, *range(2, 40)]] == pytest.approx(by_hand[[0, *range(2, 40)]])
    t = targets(e, [0, 1], 5)
    assert [c for c, _ in t] == [0, 0, 0, 1, 1]
    assert [v for _, v in t[:3]] == pytest.approx(np.percentile(e[np.isfinite(e[:, 0]), 0],
                                                                [100 / 6, 50, 500 / 6]))
    assert [v for _, v in t[3:]] == pytest.approx(np.percentile(e[np.isfinite(e[:, 1]), 1], [25, 75]))
    cands = rng.uniform(0.2, 0.45, 300)
    pool = np.arange(0, 300, 2)
    got = nearest(cands, pool, [0.25, 0.25, 0.37])
    assert len(set(got)) == 3 and all(c in pool for c in got)
    assert got[0] == pool[np.argmin(abs(cands[pool] - 0.25))]


@pytest.mark.slow
def test_thompson_plan_from_a_model_with_replicates():
    """The ``thompson`` plan deals the lots to the porosity edges in turn,
    each lot naming its edge, inside the ranges and reproducible; a model
    without replicates gets the local plan, with a note."""
    from linkage.assemble import assemble
    from linkage.decide.plan import augment_design
    from linkage.decide.window import find_window
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SPEC, make_lots

    table = assemble(make_lots(24, seed=5).tables)
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    held = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}
    ranges = {"roll_force_kn_per_cm": (5.0, 12.0)}
    chain = train_chain(table, seed=0, n_bootstrap=40, candidates=["mean", "linear_select"])
    window = find_window(chain, spec, settings=held, n_draws=500)
    plan = augment_design(chain, table, spec, 6, ranges=ranges, settings=held, seed=4, window=window,
                          criterion="thompson")
    assert len(plan.lots) == 6 and "Thompson" in plan.method
    names = [e["name"] for e in plan.edges]
    assert all(lot.informs in names and lot.informs in lot.reason for lot in plan.lots)
    assert all(5.0 <= lot.settings["roll_force_kn_per_cm"] <= 12.0 for lot in plan.lots)
    counts = [sum(lot.informs == nm for lot in plan.lots) for nm in names]
    assert max(counts) - min(counts) <= 1
    again = augment_design(chain, table, spec, 6, ranges=ranges, settings=held, seed=4, window=window,
                           criterion="thompson")
    assert again.to_dict() == plan.to_dict()
    bare = train_chain(table, seed=0, n_bootstrap=0, candidates=["mean", "linear_select"])
    local = augment_design(bare, table, spec, 6, ranges=ranges, settings=held, seed=4, criterion="thompson")
    assert "I-optimal" in local.method and any("local criterion instead" in n for n in local.notes)


def test_cli_criterion_names_its_choices():
    """An unknown --criterion is a usage error (exit 2) naming the three
    criteria, before any store or model is read."""
    from click.testing import CliRunner

    from linkage.cli.main import cli

    res = CliRunner().invoke(cli, ["plan", "--lots", "8", "--criterion", "straddle"])
    assert res.exit_code == 2
    assert all(c in res.output for c in ("local", "target", "thompson"))
