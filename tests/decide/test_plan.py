"""Planning the next lots (issue 18): the new-product design, the written
plan, and the augmentation criterion."""

from __future__ import annotations

import itertools
import math
import json

import numpy as np
import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.decide.plan import (_EdgeModel, maximin_lhs, min_distance, parse_ranges, start_design,
                                 write_plan)
from linkage.exceptions import UsageError
from linkage.read import read_table

RANGES = {"roll_force_kn_per_cm": (3.0, 14.0), "roll_gap_mm": (1.5, 3.5), "roll_speed_rpm": (2.0, 8.0)}


# --------------------------------------------------------------------------- the new-product design
def test_twelve_lots_over_three_settings_no_duplicates_cover_ranges_and_reproduce(tmp_path):
    """Issue 18 acceptance: a 12-lot design over three settings has no
    duplicated point, covers every setting's range and reproduces exactly
    from its seed (the written files byte for byte)."""
    a = start_design(RANGES, 12, seed=7)
    X = np.array([[lot.settings[k] for k in RANGES] for lot in a.lots])
    assert X.shape == (12, 3)
    assert len({tuple(r) for r in X}) == 12  # no duplicated point
    for j, (lo, hi) in enumerate(RANGES.values()):
        assert X[:, j].min() == lo and X[:, j].max() == hi  # both ends of each range are made
        assert len(set(X[:, j])) == 12  # a Latin hypercube: each level once
    b = start_design(RANGES, 12, seed=7)
    assert a.to_dict() == b.to_dict()
    fa = write_plan(a, tmp_path / "a")
    fb = write_plan(b, tmp_path / "b")
    assert [p.read_bytes() for p in fa] == [p.read_bytes() for p in fb]
    c = start_design(RANGES, 12, seed=8)
    assert [lot.settings for lot in c.lots] != [lot.settings for lot in a.lots]


def test_design_is_a_latin_hypercube_on_equally_spaced_levels():
    """Each column is a permutation of the n levels 0, 1/(n-1), ..., 1: the
    Latin hypercube of McKay, Beckman & Conover (1979) on the grid of Morris &
    Mitchell (1995, J. Stat. Plan. Inference 43:381, §2)."""
    U = maximin_lhs(9, 4, seed=1)
    levels = np.arange(9) / 8
    for j in range(4):
        np.testing.assert_allclose(np.sort(U[:, j]), levels)


def test_maximin_search_finds_the_best_latin_hypercube_by_enumeration():
    """For 5 lots in 3 settings, every Latin hypercube (first column fixed,
    120² permutations of the others) is enumerated and the largest smallest
    distance found (the maximin criterion of Johnson, Moore & Ylvisaker 1990);
    the seeded search reaches it."""
    n = 5
    levels = np.arange(n) / (n - 1)
    perms = [np.array(p) for p in itertools.permutations(range(n))]
    best = max(min_distance(np.column_stack([levels, levels[p], levels[q]])) for p in perms for q in perms)
    assert min_distance(maximin_lhs(n, 3, seed=0)) == pytest.approx(best)


def test_maximin_design_is_more_spread_than_scipys_plain_latin_hypercubes():
    """Against scipy.stats.qmc.LatinHypercube (no optimisation), the reference
    library: our smallest distance between 12 lots in 3 settings (on the same
    0-1 scale) beats every one of 30 of scipy's random Latin hypercubes."""
    from scipy.stats import qmc

    ours = min_distance(maximin_lhs(12, 3, seed=0))
    theirs = [min_distance(qmc.LatinHypercube(d=3, seed=s).random(12)) for s in range(30)]
    assert ours > max(theirs)


def test_run_order_is_randomised_with_the_seed():
    """The run order is a seeded permutation: roll force does not simply rise
    with the run number (common practice, no source: randomise the run order
    against drift)."""
    plan = start_design(RANGES, 12, seed=3)
    force = [lot.settings["roll_force_kn_per_cm"] for lot in plan.lots]
    assert force != sorted(force) and force != sorted(force, reverse=True)
    assert [lot.run for lot in plan.lots] == list(range(1, 13))


# --------------------------------------------------------------------------- the written plan
def test_plan_reads_back_through_the_ingest_reader_as_template_tables(tmp_path):
    """The plan is a process table of the template (and a tablets table with
    blank results when it sets the compression force) that linkage's own
    reader accepts; a product name that a spreadsheet would evaluate is
    written with a leading quote (OWASP, CSV Injection)."""
    ranges = {**RANGES, "compression_force_kn": (8.0, 20.0)}
    plan = start_design(ranges, 6, seed=0, held={"mill_screen_mm": 1.0}, product="=QZ 200 mg", prefix="N26")
    files = write_plan(plan, tmp_path)
    assert sorted(p.name for p in files) == ["plan.json", "process.csv", "tablets.csv"]
    process = read_table(tmp_path / "process.csv")
    assert list(process["lot"]) == [f"N26-00{i}" for i in range(1, 7)]
    for k in RANGES:
        np.testing.assert_allclose(process[k].to_numpy(float), [lot.settings[k] for lot in plan.lots])
    assert (process["mill_screen_mm"] == 1.0).all()
    assert process["screw_speed_rpm"].isna().all()  # not planned: blank for the lab to fill
    assert (process["product"] == "'=QZ 200 mg").all()
    tablets = read_table(tmp_path / "tablets.csv")
    assert tablets["dissolution_pct"].isna().all() and tablets["breaking_force_n"].isna().all()
    np.testing.assert_allclose(tablets["compression_force_kn"].to_numpy(float),
                               [lot.settings["compression_force_kn"] for lot in plan.lots])
    saved = json.loads((tmp_path / "plan.json").read_text(encoding="utf-8"))
    assert saved["tables"]["process"][0] == "lot" and len(saved["lots"]) == 6


def test_bad_ranges_are_refused_all_at_once():
    with pytest.raises(UsageError) as err:
        parse_ranges(["roll_force_kn_per_cm=14:3", "foo=1:2", "roll_gap_mm=0:3", "roll_speed_rpm=2-8",
                      "roll_speed_rpm=1:x"])
    text = str(err.value)
    for part in ("low end 14 must lie below the high end 3", "foo: not a setting", "0 < roll_gap_mm <= 15",
                 "'roll_speed_rpm=2-8' is not NAME=LOW:HIGH", "'x' is"):
        assert part in text


def test_cli_new_design_writes_the_plan_and_refuses_bad_input(tmp_path):
    runner = CliRunner()
    out = tmp_path / "plan"
    args = ["plan", "--new", "--lots", "12", *sum((["--range", f"{k}={lo}:{hi}"] for k, (lo, hi) in RANGES.items()),
                                                   []), "--out", str(out), "--json"]
    res = runner.invoke(cli, args)
    assert res.exit_code == 0, res.output
    data = json.loads(res.output)
    assert data["n_lots"] == 12 and data["kind"] == "start" and len(data["written"]) == 2
    assert (out / "process.csv").is_file()
    bad = runner.invoke(cli, ["plan", "--new", "--lots", "12", "--range", "roll_gap_mm=3:1",
                              "--out", str(tmp_path / "nothing")])
    assert bad.exit_code == 2 and "low end 3 must lie below" in bad.output
    assert not (tmp_path / "nothing").exists()


# --------------------------------------------------------------------------- the augmentation criterion
def test_edge_variance_matches_weighted_least_squares_and_the_rank_one_update():
    """The variance of the local linear fit at an edge, up to σ², is
    [(ZᵀWZ)⁻¹]₀₀ (Fan & Gijbels 1996, §3.2): checked against the same
    element from scipy's QR decomposition of W^½Z ((ZᵀWZ)⁻¹ = R⁻¹R⁻ᵀ; Golub &
    Van Loan 2013, §5.3), and the gain of one added lot (Sherman & Morrison
    1950) against a direct inverse."""
    from scipy.linalg import qr, solve_triangular

    rng = np.random.default_rng(0)
    eps = rng.uniform(0.2, 0.45, 25)
    em = _EdgeModel("low", "", np.array([0.3]), np.array([1.0]), 0.04)
    em.start(eps[:, None])
    Z, w = em.rows(eps[:, None])
    R = qr(np.sqrt(w)[:, None] * Z, mode="economic")[1]
    R_inv = solve_triangular(R, np.eye(2))
    assert em.v0 == pytest.approx((R_inv @ R_inv.T)[0, 0], rel=1e-4)
    new = np.array([[0.29], [0.41]])
    gains = em.gains(new)
    for x, g in zip(new, gains):
        Zx, wx = em.rows(x[None, :])
        M = (Z * w[:, None]).T @ Z + (Zx * wx[:, None]).T @ Zx + 1e-6 * np.eye(2)
        assert em.v0 - np.linalg.inv(M)[0, 0] == pytest.approx(g, rel=1e-8)
    assert gains[0] > gains[1]  # a lot near the edge informs it more than one far away


# --------------------------------------------------------------------------- augmenting a campaign
@pytest.fixture(scope="module")
def campaign():
    """A 30-lot campaign of the window scenario, trained quickly (two candidates, no bootstrap)."""
    from linkage.assemble import assemble
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SPEC, make_lots

    table = assemble(make_lots(30, seed=5).tables)
    chain = train_chain(table, seed=0, n_bootstrap=0, candidates=["mean", "linear_select"])
    return chain, table, Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})


@pytest.mark.slow
def test_augmentation_proposes_lots_inside_the_ranges_at_the_edges(campaign):
    """The proposed lots lie inside the ranges given, hold the window's
    settings, say which edge they inform and where they are against the
    domain, reproduce from the seed, and lower the I-criterion more than 20
    random picks of as many lots from the same candidates (the greedy exchange
    of Atkinson, Donev & Tobias 2007, ch. 12, does at least as well as random
    choice by construction of each step; checked here on the whole plan)."""
    from linkage.decide.plan import augment_design
    from linkage.decide.window import find_window

    chain, table, spec = campaign
    held = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}
    window = find_window(chain, spec, settings=held, n_draws=500)
    ranges = {"roll_force_kn_per_cm": (5.0, 12.0)}
    plan = augment_design(chain, table, spec, 8, ranges=ranges, settings=held, seed=4, window=window,
                          criterion="local")
    assert len(plan.lots) == 8
    edges = {e["name"] for e in plan.edges}
    for lot in plan.lots:
        assert 5.0 <= lot.settings["roll_force_kn_per_cm"] <= 12.0
        assert lot.settings["mill_screen_mm"] == 1.0 and lot.settings["compression_force_kn"] == 14.0
        assert lot.informs in edges and lot.informs in lot.reason
        assert isinstance(lot.in_domain, bool) and all(" stage: " in r for r in lot.domain_reasons)
    assert all(e["relative_variance"] < 1.0 for e in plan.edges)
    again = augment_design(chain, table, spec, 8, ranges=ranges, settings=held, seed=4, window=window,
                           criterion="local")
    assert again.to_dict() == plan.to_dict()

    # the same criterion for random picks of 8 lots from the same candidate set (inside the domain)
    from scipy.stats import qmc

    from linkage.decide.plan import POROSITY, _ribbon_stage, edge_models
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    stage = _ribbon_stage(lean)
    inputs = list(stage.inputs)
    names = list(plan.ranges)
    unit = qmc.Sobol(len(names), scramble=True, seed=4).random(2048)
    cand = {k: plan.ranges[k][0] + unit[:, j] * (plan.ranges[k][1] - plan.ranges[k][0]) for j, k in enumerate(names)}
    pool = np.flatnonzero([v["in_domain"] for v in stage.domain.check(cand)])
    eps = stage.targets[POROSITY].predict(cand)
    X = np.column_stack([cand[k] for k in inputs])
    rng = np.random.default_rng(0)
    for _ in range(20):
        pick = rng.choice(pool, 8, replace=False)
        models, _ = edge_models(window, table, inputs, lean.medians, chain.training["ranges"][POROSITY])
        for em, kind in models:
            for i in pick:
                em.add(eps[[i]][:, None] if kind == "porosity" else X[[i]])
        assert plan.criterion["after"] < sum(em.relative for em, _ in models)


@pytest.mark.slow
def test_augmentation_refuses_clashing_lot_ids_and_ranges_it_cannot_use(campaign):
    from linkage.decide.plan import augment_design

    chain, table, spec = campaign
    with pytest.raises(UsageError, match="already in the lot store"):
        augment_design(chain, table, spec, 3, prefix="LOT")
    with pytest.raises(UsageError, match="varies only the ribbon stage's settings"):
        augment_design(chain, table, spec, 3, ranges={"compression_force_kn": (8.0, 20.0)})


# --------------------------------------------------------------------------- the report's plan section
def test_report_plan_section_draws_planned_and_training_lots(tmp_path):
    """The section names every planned lot with its run and reason, draws one
    figure (planned over training lots, roll force × gap) and escapes what the
    user typed (the product/lot prefix) as HTML (Python's html.escape)."""
    import pandas as pd

    from linkage.report.html import _Builder
    from linkage.report.plan_section import plan_section, read_plan

    plan = start_design(RANGES, 5, seed=2, prefix="<b>N")
    write_plan(plan, tmp_path)
    data = read_plan(tmp_path / "plan.json")
    table = pd.DataFrame({"lot": ["A", "B", "C"], "roll_force_kn_per_cm": [4.0, 8.0, 12.0],
                          "roll_gap_mm": [2.0, 2.5, 3.0]})
    b = _Builder()
    plan_section(b, None, table, data)
    html_text = "".join(b.parts)
    assert len(b.figures) == 1 and "roll force" in b.figures[0]
    assert "&lt;b&gt;N-001" in html_text and "<b>N" not in html_text
    assert html_text.count("space-filling start") == 5


def test_a_file_that_is_not_a_plan_is_refused(tmp_path):
    from linkage.exceptions import InputError
    from linkage.report.plan_section import read_plan

    bad = tmp_path / "plan.json"
    bad.write_text('{"kind": "start"}', encoding="utf-8")
    with pytest.raises(InputError, match="plan.json: not a plan written by 'linkage plan'"):
        read_plan(bad)
    bad.write_text("not json", encoding="utf-8")
    with pytest.raises(InputError, match="not JSON"):
        read_plan(bad)


def test_cli_augmentation_needs_a_spec_and_new_takes_none(tmp_path):
    """Usage mistakes exit 2 before any store or model is read."""
    runner = CliRunner()
    res = runner.invoke(cli, ["plan", "--lots", "8", "--store", str(tmp_path / "none.db")])
    assert res.exit_code == 2 and "needs a spec" in res.output
    spec = tmp_path / "spec.toml"
    spec.write_text("[dissolution_pct]\nmin = 80\n", encoding="utf-8")
    res = runner.invoke(cli, ["plan", "--new", "--lots", "8", "--range", "roll_gap_mm=1:3", "--spec", str(spec)])
    assert res.exit_code == 2 and "--new plans with no lots" in res.output


# --------------------------------------------------------------------------- the factorial start
def _resolution_from_columns(X: np.ndarray) -> float:
    """The length of the shortest product of columns that is constant: the
    shortest word of the defining relation (Box, Hunter & Hunter 2005, §6.4,
    definition of resolution), found from the design itself."""
    k = X.shape[1]
    for length in range(1, k + 1):
        for cols in itertools.combinations(range(k), length):
            if len(set(np.prod(X[:, cols], axis=1))) == 1:
                return length
    return math.inf


@pytest.mark.parametrize("k, runs", [(3, 4), (4, 8), (5, 16), (5, 8), (6, 32), (6, 16), (6, 8), (7, 64), (7, 32),
                                     (7, 16), (7, 8), (3, 8)])
def test_fractional_factorials_have_the_resolution_of_the_published_table(k, runs):
    """Each kept design's resolution, derived from its columns, is the one the
    table of selected 2^(k-p) designs gives (Montgomery, Design and Analysis
    of Experiments, Table 8.14; Box, Hunter & Hunter 2005, Table 6.22; from
    memory: III for the 8-run designs of 5-7 factors and 4 runs of 3, IV for
    2^(4-1), 2^(6-2), 2^(7-2), 2^(7-3), V for 2^(5-1), VI and VII for the half
    fractions of 6 and 7); every column is balanced and the columns are
    orthogonal (XᵀX = N·I)."""
    from linkage.decide.plan import FACTORIAL_RESOLUTION, two_level_factorial

    published = {(3, 4): 3, (4, 8): 4, (5, 16): 5, (5, 8): 3, (6, 32): 6, (6, 16): 4, (6, 8): 3, (7, 64): 7,
                 (7, 32): 4, (7, 16): 4, (7, 8): 3}
    X = two_level_factorial(k, runs)
    assert X.shape == (runs, k)
    assert len({tuple(r) for r in X}) == runs  # no run twice
    np.testing.assert_array_equal(X.T @ X, runs * np.eye(k, dtype=int))
    expected = published.get((k, runs), math.inf)  # (3, 8): the full factorial, no defining relation
    assert _resolution_from_columns(X) == expected
    assert FACTORIAL_RESOLUTION.get((k, runs), math.inf) == expected


def test_factorial_start_puts_corners_at_the_range_ends_and_the_rest_at_the_centre():
    """12 lots over three settings: the 2^3 corners at the ends of the ranges
    and 4 centre points (Montgomery, §6.8, centre points added to a 2^k
    design), run order randomised by the seed."""
    plan = start_design(RANGES, 12, seed=5, design="factorial")
    X = np.array([[lot.settings[k] for k in RANGES] for lot in plan.lots])
    centre = np.array([(lo + hi) / 2 for lo, hi in RANGES.values()])
    is_centre = np.all(np.isclose(X, centre), axis=1)
    assert is_centre.sum() == 4
    corners = X[~is_centre]
    assert len({tuple(r) for r in corners}) == 8
    for j, (lo, hi) in enumerate(RANGES.values()):
        assert set(corners[:, j]) == {lo, hi}
    assert start_design(RANGES, 12, seed=5, design="factorial").to_dict() == plan.to_dict()
    with pytest.raises(UsageError, match="needs at least 5 lots"):
        start_design(RANGES, 4, design="factorial")


def test_synthetic_lots_at_planned_settings():
    """make_lots(settings=) makes the lots at the settings given and leaves
    every other draw as it was; the lot's porosity is the truth's at those
    settings (Truth.porosity_mean, the generator's own model)."""
    from linkage.synthetic import Truth, make_lots

    truth = Truth()
    planned = {"roll_force_kn_per_cm": [5.0, 9.0, 13.0], "roll_gap_mm": [2.0, 2.5, 3.0]}
    a = make_lots(3, seed=4, truth=truth)
    b = make_lots(3, seed=4, truth=truth, settings=planned)
    for k, v in planned.items():
        np.testing.assert_array_equal(b.tables["process"][k].to_numpy(float), v)
    others = ["roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm"]
    np.testing.assert_array_equal(a.tables["process"][others].to_numpy(), b.tables["process"][others].to_numpy())
    p = b.tables["process"]
    expected = truth.porosity_mean(p["roll_force_kn_per_cm"], p["roll_gap_mm"], p["roll_speed_rpm"],
                                   p["screw_speed_rpm"], compactor=p["compactor"].to_numpy())
    np.testing.assert_allclose(b.lot_truth["ribbon_porosity_chain"], expected, atol=1e-12)
    with pytest.raises(UsageError, match="not a setting of the design"):
        make_lots(3, seed=4, settings={"colour": [1, 2, 3]})
    with pytest.raises(UsageError, match="has 2 values for 3 lots"):
        make_lots(3, seed=4, settings={"roll_gap_mm": [2.0, 2.5]})


def test_new_design_refuses_held_values_it_cannot_write():
    with pytest.raises(UsageError) as err:
        start_design(RANGES, 6, held={"colour": 1.0, "roll_gap_mm": 2.0, "mill_screen_mm": 20.0})
    text = str(err.value)
    assert "--set colour: not a setting" in text and "roll_gap_mm: also given a --range" in text
    assert "mill_screen_mm=20 leaves the physical bounds 0 < mill_screen_mm <= 10" in text
