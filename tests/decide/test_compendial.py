"""Unit-level compendial judgement (linkage.decide.compendial).

The vectorised rules are held to the pure functions of
linkage.physics.pharmacopeia and to the rules and worked examples of
/work/shared/references.md: §7b USP <711> Acceptance Table 1 (immediate
release; VERIFIED from USP 31 <711>) and §7a USP <905> (VERIFIED: Table 2,
the USP FAQ worked example AV 16.4, L1 = 15.0, L2 = 25.0). Probabilities of
normal units are checked against scipy's normal and chi-square distributions.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special, stats

from linkage.decide import compendial as C
from linkage.decide.propagate import Draws
from linkage.exceptions import UsageError
from linkage.physics import pharmacopeia as ph
from linkage.spec import Limit, Spec

Q = 80.0


def _pad24(first, fill=100.0):
    return np.concatenate([np.asarray(first, float), np.full(24 - len(first), fill)])


# ---- USP <711> Table 1 ------------------------------------------------------------------------------------
@pytest.mark.parametrize("units, s1, s2, s3", [
    # references.md §7b check values, Q = 80 (COMPUTED from the VERIFIED rules)
    ([88, 90, 86, 92, 87, 89], True, True, True),                    # S1: every unit >= Q + 5
    ([84, 90, 86, 92, 87, 89] + [78, 83, 81, 80, 82, 79], False, True, True),  # S1 fails (84 < 85); S2 mean 84.25
    ([96, 88, 65, 110, 66, 65], False, None, None),                  # S1 fails (bioanalyticx data set, §7b)
    ([85] * 6, True, True, True),                                    # S1 boundary: Q + 5 itself passes
    ([84.9] + [80] * 5 + [80 - 15] + [79] * 5, False, False, None),  # S2: mean of 12 = 78.7 < Q fails S2
])
def test_dissolution_stages_reference_cases(units, s1, s2, s3):
    x = _pad24(units, fill=Q) if len(units) == 12 else _pad24(units, fill=100.0)
    got = C.dissolution_stages(x[None], Q)
    ref = ph.dissolution_stage(x, Q)  # the pure function, USP <711> Table 1
    assert bool(got["S1"][0]) is s1
    if s2 is not None:
        assert bool(got["S2"][0]) is s2
    if s3 is not None:
        assert bool(got["S3"][0]) is s3
    assert bool(got["S3"][0]) == ref["passed"]
    assert bool(got["S1"][0]) == (ref["passed"] and ref["stage"] == "S1")


def test_dissolution_s3_rules():
    # USP <711> Table 1, S3: mean of 24 >= Q, at most 2 units < Q - 15, none < Q - 25
    base = np.r_[[70.0] * 12, [95.0] * 12]           # S1 and S2 fail (units < Q - 15 in the first 12? 70 > 65: no)
    two_low = base.copy()
    two_low[[0, 1]] = 64.0                           # 2 units < Q - 15 = 65: S3 may pass
    three_low = base.copy()
    three_low[[0, 1, 2]] = 64.0                      # 3 units < Q - 15: S3 fails
    one_very_low = base.copy()
    one_very_low[0] = 54.0                           # a unit < Q - 25 = 55: S3 fails
    x = np.stack([base, two_low, three_low, one_very_low])
    got = C.dissolution_stages(x, Q)
    assert got["S1"].tolist() == [False] * 4
    assert got["S3"].tolist() == [True, True, False, False]
    for row, passed in zip(x, got["S3"]):
        assert ph.dissolution_stage(row, Q)["passed"] == bool(passed)


def test_dissolution_stages_agree_with_the_pure_function_on_random_lots():
    rng = np.random.default_rng(0)
    x = np.round(rng.normal(84.0, 7.0, (3000, 24)) + rng.normal(0, 3.0, (3000, 1)), 1)
    got = C.dissolution_stages(x, Q)
    for i in range(len(x)):
        ref = ph.dissolution_stage(x[i], Q)
        stage = {"S1": 0, "S2": 1, "S3": 2}[ref["stage"]]
        expected = [ref["passed"] and stage <= k for k in range(3)]
        assert [bool(got[k][i]) for k in ("S1", "S2", "S3")] == expected


# ---- USP <905> ---------------------------------------------------------------------------------------------
def _with_mean_sd(mean, sd, n):
    z = stats.norm.ppf((np.arange(1, n + 1) - 0.5) / n)
    z = (z - z.mean()) / z.std(ddof=1)
    return mean + sd * z


@pytest.mark.parametrize("mean, sd, n, av", [
    (105.9, 5.0, 10, 16.4),  # USP FAQ worked example (VERIFIED): M 101.5, AV 4.4 + 12.0
    (100.0, 2.0, 10, 4.8),   # references.md §7a, COMPUTED from Table 2 (k = 2.4)
    (97.0, 3.0, 10, 8.7),    # M = 98.5
    (103.0, 4.0, 10, 11.1),  # M = 101.5
    (99.0, 4.0, 30, 8.0),    # k = 2.0 for 30 units
])
def test_acceptance_values_worked_examples(mean, sd, n, av):
    assert C.acceptance_values(_with_mean_sd(mean, sd, n)[None])[0] == pytest.approx(av, abs=1e-9)


def test_acceptance_values_ten_unit_list():
    # references.md §7a, COMPUTED: mean 100.000, s 1.488474, AV 3.572338
    units = [98.2, 101.5, 99.7, 100.3, 97.9, 102.1, 100.8, 99.1, 98.8, 101.6]
    assert C.acceptance_values(np.array([units]))[0] == pytest.approx(3.572338, abs=1e-6)


def test_uniformity_from_weights_agrees_with_the_pure_functions():
    # USP <905>: stage 1 on 10 units, AV <= L1 = 15; stage 2 on 30, AV <= L1 and every unit in (1 -/+ 0.01 L2) M
    rng = np.random.default_rng(1)
    w = 400.0 * (1.0 + rng.uniform(0.02, 0.10, (2000, 1)) * rng.standard_normal((2000, 30)))
    got = C.uniformity_from_weights(w)
    n_stage2 = 0
    for i in range(len(w)):
        av1 = ph.acceptance_value(ph.weight_variation_contents_pct(w[i, :10]))["av"]
        assert got["av1"][i] == pytest.approx(av1, rel=1e-12)
        assert bool(got["stage1"][i]) == (av1 <= ph.L1_PCT)
        if av1 <= ph.L1_PCT:
            assert got["stage2"][i]
            continue
        n_stage2 += 1
        c = ph.weight_variation_contents_pct(w[i])
        res = ph.acceptance_value(c)
        low, high = ph.stage2_unit_range_pct(res["m"])
        assert bool(got["stage2"][i]) == (res["av"] <= ph.L1_PCT and bool(np.all((c >= low) & (c <= high))))
    assert n_stage2 > 100  # the stage-2 branch was exercised


def test_stage2_fails_on_one_unit_outside_l2():
    # USP <905> (FAQ): L2 = 25 % sets the range of single units at stage 2; with contents averaging 100, M = 100
    w = np.empty(30)
    w[:10] = _with_mean_sd(100.0, 7.0, 10)  # stage 1: AV = 2.4 * 7.0 = 16.8 > 15
    w[10] = 127.0  # one unit beyond 125 % of M
    w[11:] = _with_mean_sd((2000.0 - 127.0) / 19, 3.0, 19)  # the 30 average 100, so M = 100
    got = C.uniformity_from_weights(w[None])
    c = 100.0 * w / w.mean()
    assert got["av1"][0] > 15 and got["av2"][0] <= 15  # AV of 30 passes ...
    assert c.max() > 1.25 * 100.0 and not got["stage2"][0]  # ... but a unit is outside L2


# ---- within-lot spread ------------------------------------------------------------------------------------
def test_log_variance_bias_is_the_chi_square_mean():
    # E[ln(s²/σ²)] = ψ(ν/2) − ln(ν/2) for normal units (Bartlett & Kendall 1946, from memory): check with scipy
    for nu in (2, 5, 11):
        expected, _ = integrate.quad(lambda x: np.log(x / nu) * stats.chi2.pdf(x, nu), 0, np.inf)
        assert special.digamma(nu / 2) - np.log(nu / 2) == pytest.approx(expected, abs=1e-7)


def test_fit_within_lot_recovers_the_variance_function():
    # lots of 6 normal vessels whose SD follows a Weibull-like plateau, sd = 0.12 (100 - mu) ln(100 / (100 - mu)):
    # the local-linear fit of the bias-corrected log variance recovers it inside the range of lot means
    rng = np.random.default_rng(2)
    mu = rng.uniform(70, 98, 800)
    true_sd = 0.12 * (100 - mu) * np.log(100 / (100 - mu))
    x = mu[:, None] + true_sd[:, None] * rng.standard_normal((800, 6))
    fit = C.fit_within_lot(dissolution_pct=x.mean(1), dissolution_sd_pct=x.std(1, ddof=1),
                           dissolution_vessels=np.full(800, 6.0))["dissolution"]
    assert fit["method"] == "local-linear" and fit["units_per_lot"] == 6
    for at in (75.0, 85.0, 90.0, 95.0):
        expected = 0.12 * (100 - at) * np.log(100 / (100 - at))
        assert np.sqrt(C.dissolution_variance(fit, at)) == pytest.approx(expected, rel=0.1)
    # held at the ends of the range of lot means (no extrapolation)
    assert C.dissolution_variance(fit, 150.0) == C.dissolution_variance(fit, fit["mean_range"][1])


def test_fit_within_lot_pools_with_few_lots():
    # pooled variance sum(nu s²) / sum(nu) (common practice, no source) below MIN_SPREAD_LOTS lots
    sd = np.array([2.0, 3.0, 4.0])
    n = np.array([6.0, 6.0, 12.0])
    fit = C.fit_within_lot(dissolution_pct=[80, 85, 90], dissolution_sd_pct=sd, dissolution_vessels=n,
                           weight_rsd_pct=[1.0, 2.0, np.nan], weight_units=[10, 30, 10])
    pooled = np.sum((n - 1) * sd ** 2) / np.sum(n - 1)
    assert fit["dissolution"]["method"] == "pooled"
    assert C.dissolution_variance(fit["dissolution"], 70.0) == pytest.approx(pooled)
    assert fit["weight"]["pooled_rsd_pct"] == pytest.approx(np.sqrt((9 * 1.0 + 29 * 4.0) / 38))
    assert fit["weight"]["n_lots"] == 2
    assert C.fit_within_lot() == {}


def test_shrinking_removes_the_sampling_spread():
    # lot means mu ~ N(85, 2²); measured means of 6 vessels with SD 4 add N(0, 4²/6): shrinking gives back Var mu
    rng = np.random.default_rng(3)
    mu = 85 + 2.0 * rng.standard_normal((1, 200_000))
    measured = mu + 4.0 / np.sqrt(6) * rng.standard_normal(mu.shape)
    lot = C.shrink_means(measured, np.array([16.0 / 6]))
    assert lot.var() == pytest.approx(4.0, rel=0.02) and lot.mean() == pytest.approx(85.0, abs=0.02)
    # lot variances sigma² ~ 25 (1 + 0.2 N); sample variances of 10 normal units: s² = sigma² chi²_9 / 9
    sig2 = 25.0 * (1 + 0.2 * rng.standard_normal((1, 200_000)))
    s2 = sig2 * stats.chi2.rvs(9, size=sig2.shape, random_state=4) / 9
    back = C.shrink_variances(s2, 10)
    assert back.var() == pytest.approx(sig2.var(), rel=0.05) and back.mean() == pytest.approx(25.0, rel=0.01)
    # a value given by the user (no spread across draws) is taken as it is
    assert np.all(C.shrink_means(np.full((1, 10), 90.0), np.array([3.0])) == 90.0)


# ---- judging simulated lots ---------------------------------------------------------------------------------
class _Chain:
    model_id = "toy"

    def __init__(self, within_lot):
        self.within_lot = within_lot


def _draws(values: dict) -> Draws:
    v = {k: np.full((1, 8000), x) for k, x in values.items()}
    return Draws(values=v, means={k: np.full(1, x) for k, x in values.items()}, fixed=set())


def test_judged_probabilities_of_normal_units():
    # a lot mean of 90 %, vessel SD 3 % (pooled): P(S1) = P(all 6 >= 85) = Phi(5/3)^6 (scipy); USP <711> Table 1
    spread = {"dissolution": {"method": "pooled", "grid": [80.0, 95.0], "log_var": [float(np.log(9.0))] * 2,
                              "mean_range": [80.0, 95.0], "pooled_sd_pct": 3.0, "n_lots": 10, "units_per_lot": 6},
              "weight": {"pooled_rsd_pct": 6.0, "n_lots": 10, "units_per_lot": 10}}
    spec = Spec(limits={"dissolution_pct": Limit(85.0 - 5.0, None)}, dissolution_judge="stages",
                dissolution_pass_by="S1", acceptance_value_max=15.0)
    judged = C.judge_draws(_Chain(spread), _draws({"dissolution_pct": 90.0}), spec, seed=0)
    p_s1 = stats.norm.cdf(5.0 / 3.0) ** 6
    assert judged.stages["S1"].mean() == pytest.approx(p_s1, abs=0.02)
    assert np.array_equal(judged.passes["dissolution_pct"], judged.stages["S1"])  # pass_by = "S1"
    # USP <905> stage 1 by weight variation: AV = 2.4 s (contents average 100, so M = mean), so
    # P(AV <= 15) = P(s <= 6.25) with 9 s²/sigma² ~ chi²_9 for normal units (Cochran's theorem; the division by
    # the sample mean weight makes it approximate)
    p_av1 = stats.chi2.cdf(9 * (6.25 / 6.0) ** 2, 9)
    assert judged.av_stages["1"].mean() == pytest.approx(p_av1, abs=0.03)
    assert np.all(judged.av_stages["2"] >= judged.av_stages["1"])  # cumulative
    assert judged.rsd_source.startswith("pooled")


def test_judgement_needs_the_within_lot_spread():
    spec = Spec(limits={"dissolution_pct": Limit(80.0, None)}, dissolution_judge="stages")
    with pytest.raises(UsageError, match="within-lot vessel SD"):
        C.judge_draws(_Chain({}), _draws({"dissolution_pct": 90.0}), spec)
    spec = Spec(limits={}, acceptance_value_max=15.0)
    with pytest.raises(UsageError, match="tablet_weights"):
        C.judge_draws(_Chain({}), _draws({"dissolution_pct": 90.0}), spec)


def test_judge_text_names_each_judge():
    spec = Spec(limits={"dissolution_pct": Limit(80.0, None), "friability_pct": Limit(None, 1.0)},
                dissolution_judge="stages", dissolution_pass_by="S2", acceptance_value_max=15.0)
    text = C.judge_text(spec)
    assert "USP <711>" in text["dissolution_pct"] and "pass by S2" in text["dissolution_pct"]
    assert text["friability_pct"] == "lot mean <= 1"
    assert "USP <905>" in text["acceptance_value"] and "L1 = 15" in text["acceptance_value"]


def _needs_units_before(spec) -> bool:
    """``needs_units`` as it was defined beside :func:`judged_on_units` until both became one definition: a spec
    judges units when dissolution is judged by the USP <711> stages or it has a USP <905> acceptance value."""
    return spec is not None and (spec.dissolution_judge == "stages" or spec.acceptance_value_max is not None)


def _spec_shapes(tmp_path) -> list:
    """The spec shapes the tests use: the window scenario's lot-mean limits, read from a file and made in code;
    dissolution by stages alone, with pass_by and with an acceptance value; an acceptance value alone; a dissolution
    limit at another time point; none."""
    from linkage.spec import read_spec
    from linkage.synthetic import WINDOW_SPEC, spec_toml

    shapes = [None, Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()}),
              Spec(limits={"dissolution_pct": Limit(80.0, None)}, dissolution_judge="stages"),
              Spec(limits={"dissolution_pct": Limit(80.0, None), "friability_pct": Limit(None, 1.0)},
                   dissolution_judge="stages", dissolution_pass_by="S2", acceptance_value_max=15.0),
              Spec(limits={}, acceptance_value_max=15.0), Spec({"dissolution_pct": Limit(75.0)}, 15.0),
              Spec({"breaking_force_n": Limit(50.0)})]
    for k, (judge, av) in enumerate([(None, None), ("mean", None), ("stages", None), (None, 15.0), ("stages", 15.0)]):
        path = tmp_path / f"spec{k}.toml"
        path.write_text(spec_toml(WINDOW_SPEC, dissolution_judge=judge, acceptance_value_max=av), encoding="utf-8")
        shapes.append(read_spec(path))
    return shapes + [Spec.from_dict(s.to_dict()) for s in shapes if s is not None]


def test_needs_units_is_judged_on_units_of_every_limit_and_answers_as_before(tmp_path):
    """One definition (``needs_units`` is :func:`judged_on_units` of the spec's own limits): the same answer as
    the former definition on every spec shape the tests use, each one judging units exactly where its judge texts
    name simulated units (USP <711> stages, USP <905> acceptance value)."""
    shapes = _spec_shapes(tmp_path)
    assert {C.needs_units(s) for s in shapes} == {True, False}  # both answers are met
    for spec in shapes:
        assert C.needs_units(spec) == _needs_units_before(spec), spec
        said = [] if spec is None else [a for a, text in C.judge_text(spec).items() if "simulated units" in text]
        assert C.needs_units(spec) == bool(said) and C.judged_on_units(spec, C.DISSOLUTION) == said, spec


def test_stages_without_a_dissolution_limit_is_no_spec_a_file_gives(tmp_path):
    """The one shape on which the former definition answered otherwise (dissolution judged by stages with no
    dissolution limit: no Q to judge against) is refused when read: ``judge = "stages"`` needs min (USP <711>
    Table 1 judges units against Q)."""
    from linkage.exceptions import SpecError
    from linkage.spec import read_spec

    path = tmp_path / "spec.toml"
    for limit, refusal in (("", "has neither min nor max"), ("max = 90\n", "needs min")):
        path.write_text(f'[dissolution_pct]\njudge = "stages"\n{limit}', encoding="utf-8")
        with pytest.raises(SpecError, match=refusal):
            read_spec(path)
    made = Spec(limits={}, dissolution_judge="stages")  # made in code only: nothing on units to judge
    assert C.judged_on_units(made, [C.DISSOLUTION]) == [] and not C.needs_units(made)


def test_stages_made_in_code_without_a_dissolution_limit_judge_only_the_acceptance_value():
    """A spec made in code with dissolution judged by stages but no dissolution limit (no Q: USP <711> Table 1
    judges units against Q) and an acceptance value judges the acceptance value alone, as needs_units and
    judged_on_units say: judge_draws went into the stages and failed on the missing limit (a review)."""
    spread = {"dissolution": {"method": "pooled", "grid": [80.0, 95.0], "log_var": [float(np.log(9.0))] * 2,
                              "mean_range": [80.0, 95.0], "pooled_sd_pct": 3.0, "n_lots": 10, "units_per_lot": 6},
              "weight": {"pooled_rsd_pct": 6.0, "n_lots": 10, "units_per_lot": 10}}
    spec = Spec(limits={}, dissolution_judge="stages", acceptance_value_max=15.0)
    judged = C.judge_draws(_Chain(spread), _draws({"dissolution_pct": 90.0}), spec, seed=0)
    assert list(judged.passes) == ["acceptance_value"] and not judged.stages
    assert C.judged_on_units(spec, [C.DISSOLUTION]) == ["acceptance_value"]
