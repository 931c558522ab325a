"""Tests of linkage.physics.pharmacopeia against /work/shared/references.md §7.

Status labels as in the reference sheet: VERIFIED, VERIFIED (secondary), COMPUTED, FROM MEMORY.
"""

import math
import statistics

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from linkage.physics.pharmacopeia import (
    FRIABILITY_LIMIT_PCT,
    L1_PCT,
    L2_PCT,
    acceptance_value,
    acceptance_value_from_summary,
    carr_index_pct,
    dissolution_s1_pass,
    dissolution_stage,
    f1_difference,
    f2_similarity,
    flow_character,
    friability_pct,
    hausner_ratio,
    reference_value_pct,
    relative_sd_pct,
    stage2_unit_range_pct,
    uniformity_stage,
    weight_variation_contents_pct,
)

FAST = settings(max_examples=60, deadline=None, derandomize=True)

# references.md §7a, COMPUTED: 10 units -> mean 100.000, s 1.488474, AV 3.572338
TEN_UNITS = [98.2, 101.5, 99.7, 100.3, 97.9, 102.1, 100.8, 99.1, 98.8, 101.6]


def _with_mean_sd(mean, sd, n):
    """n contents with exactly the given mean and sample SD (standardised normal scores)."""
    z = stats.norm.ppf((np.arange(1, n + 1) - 0.5) / n)
    z = (z - z.mean()) / z.std(ddof=1)
    return mean + sd * z


# ---- USP <905> uniformity of dosage units ---------------------------------------------------------

def test_limits_are_the_chapter_values():
    # USP <905> (VERIFIED, references.md §7a): L1 = 15.0, L2 = 25.0; USP <1216> (VERIFIED): friability 1.0 %
    assert (L1_PCT, L2_PCT, FRIABILITY_LIMIT_PCT) == (15.0, 25.0, 1.0)


def test_usp_faq_worked_example():
    # USP FAQ on uniformity of dosage units, VERIFIED: n 10, mean 105.9, s 5.0 -> M 101.5, AV 4.4 + 12.0 = 16.4
    assert reference_value_pct(105.9) == 101.5
    assert acceptance_value_from_summary(105.9, 5.0, 10) == pytest.approx(16.4, abs=1e-9)
    res = acceptance_value(_with_mean_sd(105.9, 5.0, 10))
    assert res["m"] == 101.5 and res["k"] == 2.4 and res["n"] == 10
    assert res["av"] == pytest.approx(16.4, abs=1e-9)


def test_usp_faq_stage2_range():
    # USP FAQ, VERIFIED: with M = 101.5 the stage-2 range is 76.125 % to 126.875 %
    low, high = stage2_unit_range_pct(101.5)
    assert low == pytest.approx(76.125) and high == pytest.approx(126.875)


@pytest.mark.parametrize(
    "mean, sd, n, target, m, av",
    [
        (100.0, 2.0, 10, 100.0, 100.0, 4.8),  # COMPUTED, references.md §7a
        (97.0, 3.0, 10, 100.0, 98.5, 8.7),  # COMPUTED: 1.5 + 7.2
        (103.0, 4.0, 10, 100.0, 101.5, 11.1),  # COMPUTED
        (99.0, 4.0, 30, 100.0, 99.0, 8.0),  # COMPUTED: k = 2.0 for 30 units
        (103.0, 2.0, 10, 102.0, 102.0, 5.8),  # COMPUTED: case 2, T > 101.5
        (101.8, 2.0, 10, 102.0, 101.8, 4.8),  # COMPUTED: case 2, mean within [98.5, T]
    ],
)
def test_acceptance_value_sheet_rows(mean, sd, n, target, m, av):
    assert reference_value_pct(mean, target) == pytest.approx(m)
    assert acceptance_value_from_summary(mean, sd, n, target) == pytest.approx(av, abs=1e-9)
    res = acceptance_value(_with_mean_sd(mean, sd, n), target)
    assert res["m"] == pytest.approx(m) and res["av"] == pytest.approx(av, abs=1e-9)


def test_acceptance_value_ten_unit_list():
    # references.md §7a, COMPUTED: mean 100.000, s 1.488474, AV 3.572338; SD cross-checked with statistics.stdev
    res = acceptance_value(TEN_UNITS)
    assert res["mean"] == pytest.approx(100.0, abs=1e-9)
    assert res["sd"] == pytest.approx(1.488474, abs=1e-6)
    assert res["sd"] == pytest.approx(statistics.stdev(TEN_UNITS), rel=1e-12)
    assert res["av"] == pytest.approx(3.572338, abs=1e-6)


@FAST
@given(st.lists(st.floats(50.0, 150.0), min_size=10, max_size=10), st.floats(90.0, 110.0))
def test_property_av_non_negative(contents, target):
    # property: AV = |M - mean| + k s >= 0, and at least k s
    res = acceptance_value(contents, target)
    assert res["av"] >= 0
    assert res["av"] >= res["k"] * res["sd"] - 1e-9


def test_uniformity_stage1_pass_and_needs_stage2():
    res = uniformity_stage(TEN_UNITS)
    assert res["stage"] == 1 and res["passed"] and not res["needs_stage_2"]
    assert res["av_stage1"] == pytest.approx(3.572338, abs=1e-6)
    faq = uniformity_stage(_with_mean_sd(105.9, 5.0, 10))  # AV 16.4 > L1 (USP FAQ): go to stage 2
    assert faq["stage"] == 1 and not faq["passed"] and faq["needs_stage_2"]
    assert "test 20 more units" in faq["reason"]


def test_uniformity_stage2_pass():
    # first 10 as in the USP FAQ (AV 16.4, fails stage 1); 20 more at 99-101 %. Stage 2 judged by hand:
    first = _with_mean_sd(105.9, 5.0, 10)
    more = np.tile([99.0, 100.0, 101.0, 100.5, 99.5], 4)
    x = np.concatenate([first, more])
    mean, sd = statistics.fmean(x), statistics.stdev(x)
    m = min(max(mean, 98.5), 101.5)
    av30 = abs(m - mean) + 2.0 * sd  # USP <905>, k = 2.0 for 30 units
    assert av30 <= 15.0 and x.min() >= 0.75 * m and x.max() <= 1.25 * m
    res = uniformity_stage(x)
    assert res["stage"] == 2 and res["passed"]
    assert res["av_stage2"] == pytest.approx(av30)
    assert res["unit_range_pct"] == pytest.approx((0.75 * m, 1.25 * m))


def test_uniformity_stage2_fails_on_a_unit_outside_l2():
    # one unit at 74 %: AV of 30 is below 15 but 74 < 0.75 M (M = mean = 100.003); fails on L2
    x = np.array([74.0] + [100.9] * 29)
    x10 = x[:10]
    assert abs(min(max(x10.mean(), 98.5), 101.5) - x10.mean()) + 2.4 * x10.std(ddof=1) > 15  # stage 1 fails
    res = uniformity_stage(x)
    assert res["stage"] == 2 and not res["passed"]
    assert res["av_stage2"] <= 15.0
    assert "outside" in res["reason"]


def test_uniformity_stage2_fails_on_av():
    x = np.concatenate([_with_mean_sd(105.9, 5.0, 10), _with_mean_sd(112.0, 4.0, 20)])
    res = uniformity_stage(x)
    assert res["stage"] == 2 and not res["passed"] and res["av_stage2"] > 15.0
    assert "AV of 30 units" in res["reason"]


def test_weight_variation_contents():
    # USP <905> weight variation (USP FAQ Q4, VERIFIED in substance): x_i = w_i A / mean(w); by hand
    out = weight_variation_contents_pct([200.0, 210.0, 190.0], 99.0)
    np.testing.assert_allclose(out, [99.0, 103.95, 94.05])


def test_relative_sd_matches_scipy_variation():
    # cross-check: scipy.stats.variation with ddof=1 is s / mean
    w = [251.2, 248.9, 250.4, 252.8, 247.5, 249.9]
    assert relative_sd_pct(w) == pytest.approx(100 * stats.variation(w, ddof=1), rel=1e-12)


def test_uniformity_errors():
    with pytest.raises(ValueError, match="must hold 10 or 30 units"):
        acceptance_value(TEN_UNITS[:9])
    with pytest.raises(ValueError, match="must hold 10 or 30 units"):
        uniformity_stage(TEN_UNITS * 2)
    with pytest.raises(ValueError, match="must hold 10 or 30 units"):
        acceptance_value_from_summary(100, 2, 20)
    with pytest.raises(ValueError, match=r"contents_pct cannot hold missing values \(NaN\)"):
        acceptance_value(TEN_UNITS[:9] + [np.nan])
    with pytest.raises(ValueError, match="contents_pct cannot be negative"):
        acceptance_value(TEN_UNITS[:9] + [-1.0])
    with pytest.raises(ValueError, match="contents_pct is empty"):
        acceptance_value([])
    with pytest.raises(ValueError, match="sd_pct cannot be negative"):
        acceptance_value_from_summary(100, -2, 10)
    with pytest.raises(ValueError, match="target_pct must be positive"):
        reference_value_pct(100, 0)
    with pytest.raises(ValueError, match="l2_pct cannot be negative"):
        stage2_unit_range_pct(100, -25)
    with pytest.raises(ValueError, match="weights_mg must be positive"):
        weight_variation_contents_pct([200, 0], 100)
    with pytest.raises(ValueError, match="assay_pct cannot be negative"):
        weight_variation_contents_pct([200, 210], -1)
    with pytest.raises(ValueError, match="at least 2 numbers"):
        relative_sd_pct([5.0])
    with pytest.raises(ValueError, match="mean zero"):
        relative_sd_pct([-1.0, 1.0])


# ---- USP <711> dissolution, immediate release -----------------------------------------------------

S1_PASS = [88, 90, 86, 92, 87, 89]
S1_FAIL = [84, 90, 86, 92, 87, 89]
S2_MORE = [78, 83, 81, 80, 82, 79]


def test_dissolution_sheet_cases():
    # references.md §7b, COMPUTED from the USP <711> Table 1 rules (VERIFIED), Q = 80 %
    r = dissolution_stage(S1_PASS, 80)
    assert (r["stage"], r["passed"], r["next_stage"]) == ("S1", True, None)
    r = dissolution_stage(S1_FAIL, 80)  # 84 < Q + 5 = 85
    assert (r["stage"], r["passed"], r["next_stage"]) == ("S1", False, "S2")
    r = dissolution_stage(S1_FAIL + S2_MORE, 80)  # mean of 12 = 84.25, min 78 >= 65
    assert (r["stage"], r["passed"]) == ("S2", True)
    assert statistics.fmean(S1_FAIL + S2_MORE) == pytest.approx(84.25)
    # dataset of bioanalyticx.com "Interpreting dissolution results" with Q = 80: S1 fails
    r = dissolution_stage([96, 88, 65, 110, 66, 65], 80)
    assert (r["stage"], r["passed"]) == ("S1", False)
    assert dissolution_s1_pass(S1_PASS, 80) is True
    assert dissolution_s1_pass(S1_FAIL, 80) is False


def test_dissolution_s1_boundary_is_inclusive():
    # USP <711> Table 1: S1 requires each unit "not less than" Q + 5
    assert dissolution_s1_pass([85, 85, 85, 85, 85, 85], 80)


def test_dissolution_s2_fails_then_s3_rules():
    # S2 fails on a unit below Q - 15 = 65 (rule of USP <711> Table 1), with 12 units -> go to S3
    twelve = S1_FAIL + [64, 83, 81, 80, 82, 79]
    r = dissolution_stage(twelve, 80)
    assert (r["stage"], r["passed"], r["next_stage"]) == ("S2", False, "S3")
    # S3: mean of 24 >= Q, at most 2 units < Q - 15, none < Q - 25 (by hand below)
    ok = twelve + [64, 90, 88, 86, 87, 89, 90, 91, 85, 88, 86, 87]
    assert statistics.fmean(ok) >= 80 and sum(v < 65 for v in ok) == 2 and min(ok) >= 55
    assert dissolution_stage(ok, 80)["passed"] and dissolution_stage(ok, 80)["stage"] == "S3"
    three_low = twelve + [64, 64, 88, 86, 87, 89, 90, 91, 85, 88, 86, 87]  # 3 units < 65
    r = dissolution_stage(three_low, 80)
    assert (r["stage"], r["passed"], r["next_stage"]) == ("S3", False, None)
    very_low = twelve + [54, 90, 88, 86, 87, 89, 90, 91, 85, 88, 86, 87]  # one unit < Q - 25 = 55
    assert not dissolution_stage(very_low, 80)["passed"]
    low_mean = twelve + [70] * 12  # mean of 24 below Q
    assert statistics.fmean(low_mean) < 80
    assert not dissolution_stage(low_mean, 80)["passed"]


def test_dissolution_errors():
    with pytest.raises(ValueError, match="must hold 6, 12 or 24 units"):
        dissolution_stage([90] * 7, 80)
    with pytest.raises(ValueError, match="released_pct cannot be negative"):
        dissolution_stage([90] * 5 + [-1], 80)
    with pytest.raises(ValueError, match="q_pct must lie between 0 and 100"):
        dissolution_stage([90] * 6, 180)
    with pytest.raises(ValueError, match=r"released_pct cannot hold missing values \(NaN\)"):
        dissolution_stage([90] * 5 + [np.nan], 80)
    with pytest.raises(ValueError, match="must hold 6 units for S1"):
        dissolution_s1_pass([90] * 12, 80)


# ---- USP <1216> friability ----------------------------------------------------------------------

def test_friability_sheet_value():
    # references.md §7c, COMPUTED from USP <1216> (VERIFIED): W0 6.512 g, W1 6.481 g -> 0.476044 %, pass
    f = friability_pct(6.512, 6.481)
    assert f == pytest.approx(0.476044, abs=1e-6)
    assert f <= FRIABILITY_LIMIT_PCT
    np.testing.assert_allclose(friability_pct([6.5, 6.5], [6.5, 6.435]), [0.0, 1.0])


def test_friability_errors():
    with pytest.raises(ValueError, match="initial_mass_g must be positive"):
        friability_pct(0, 1)
    with pytest.raises(ValueError, match="final_mass_g cannot be negative"):
        friability_pct(6.5, -1)


# ---- f1 / f2 (FDA 1997) -------------------------------------------------------------------------

def test_f2_f1_sheet_values():
    # references.md §7e, COMPUTED from the FDA 1997 formulas: R [35, 55, 72, 86], T [28, 47, 66, 83]
    r, t = [35, 55, 72, 86], [28, 47, 66, 83]
    assert f2_similarity(r, t) == pytest.approx(59.8136, abs=5e-5)
    assert f1_difference(r, t) == pytest.approx(9.6774, abs=5e-5)
    assert f1_difference(r, t) == pytest.approx(100 * 24 / 248)  # by hand: sum |R-T| = 24, sum R = 248
    # every difference 10 -> 49.8920 (fails), every difference 5 -> 64.6257, identical -> 100
    assert f2_similarity([20, 40, 60, 80], [30, 50, 70, 90]) == pytest.approx(49.8920, abs=5e-5)
    assert f2_similarity([20, 40, 60, 80], [15, 35, 55, 75]) == pytest.approx(64.6257, abs=5e-5)
    assert f2_similarity(r, r) == 100.0
    # f2 = 50 exactly when the RMS difference is sqrt(99)
    d = math.sqrt(99)
    assert f2_similarity([30, 50, 70], [30 + d, 50 - d, 70 + d]) == pytest.approx(50.0, abs=1e-12)


@FAST
@given(
    ref=st.lists(st.floats(0.0, 100.0), min_size=3, max_size=12),
    a=st.floats(0.0, 40.0),
    b=st.floats(0.0, 40.0),
)
def test_property_f2(ref, a, b):
    # property: f2 = 100 for identical profiles and falls as a uniform offset grows
    r = np.array(ref)
    assert f2_similarity(r, r) == pytest.approx(100.0)
    lo, hi = sorted((a, b))
    if hi - lo > 1e-6:
        assert f2_similarity(r, r + hi) < f2_similarity(r, r + lo)


def test_f_errors():
    with pytest.raises(ValueError, match="must have the same time points"):
        f2_similarity([1, 2, 3], [1, 2])
    with pytest.raises(ValueError, match="reference_pct is empty"):
        f2_similarity([], [])
    with pytest.raises(ValueError, match=r"test_pct cannot hold missing values \(NaN\)"):
        f1_difference([1, 2], [1, np.nan])
    with pytest.raises(ValueError, match="reference_pct sums to zero"):
        f1_difference([0, 0], [1, 2])


# ---- USP <1174> flow ----------------------------------------------------------------------------

def test_carr_hausner_sheet_values():
    # references.md §7d, COMPUTED: bulk 0.45, tapped 0.56 g/mL -> CI 19.6429 % (Fair), HR 1.244444 (Fair)
    ci = carr_index_pct(0.45, 0.56)
    hr = hausner_ratio(0.45, 0.56)
    assert ci == pytest.approx(19.6429, abs=5e-5)
    assert hr == pytest.approx(1.244444, abs=1e-6)
    assert hr == pytest.approx(100 / (100 - ci))  # USP <1174>: HR = 100 / (100 - CI)
    assert flow_character(ci) == "fair"  # USP <1174> scale, VERIFIED (secondary)


@pytest.mark.parametrize(
    "ci, expected",
    [
        (5.0, "excellent"), (10.0, "excellent"), (10.5, "good"), (15.0, "good"), (18.0, "fair"),
        (23.0, "passable"), (31.0, "poor"), (35.0, "very poor"), (37.0, "very poor"),
        (38.0, "very, very poor"), (45.0, "very, very poor"),
    ],
)
def test_flow_character_bins(ci, expected):
    # USP <1174> scale of flowability (VERIFIED secondary); gaps closed upper-inclusive (our rule, pinned here)
    assert flow_character(ci) == expected


def test_flow_errors_and_nan():
    assert flow_character(float("nan")) == ""
    with pytest.raises(ValueError, match=r"carr_index_pct must lie in \[0, 100\)"):
        flow_character(-1)
    with pytest.raises(ValueError, match="bulk_density_g_ml cannot exceed tapped_density_g_ml"):
        carr_index_pct(0.6, 0.5)
    with pytest.raises(ValueError, match="bulk_density_g_ml must be positive"):
        hausner_ratio(0, 0.5)
    with pytest.raises(ValueError, match="tapped_density_g_ml must be positive"):
        hausner_ratio(0.4, -0.5)
