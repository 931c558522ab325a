"""Tests of linkage.physics.psd against /work/shared/references.md §6 and outside sources.

Status labels as in the reference sheet: VERIFIED, VERIFIED (secondary), COMPUTED, FROM MEMORY.
"""

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from linkage.physics.psd import (
    cumulative_undersize_pct,
    fines_pct,
    fit_rrsb,
    percentile_size_um,
    rrsb_size_um,
    rrsb_undersize,
    span,
    undersize_at_size_pct,
)

FAST = settings(max_examples=60, deadline=None, derandomize=True)

# references.md §6 worked example (COMPUTED): apertures [um] and % retained, 6 % in the pan (0)
SIEVE_UM = [45, 90, 125, 180, 250, 355, 500, 710, 1000, 0]
RETAINED = [5, 8, 12, 15, 18, 16, 12, 8, 0, 6]
UNDERSIZE = [6, 11, 19, 31, 46, 64, 80, 92, 100]


def test_worked_example_cumulative_undersize():
    # references.md §6, COMPUTED: cumulative undersize 6, 11, 19, 31, 46, 64, 80, 92, 100
    x, q = cumulative_undersize_pct(SIEVE_UM, RETAINED)
    np.testing.assert_array_equal(x, [45, 90, 125, 180, 250, 355, 500, 710, 1000])
    np.testing.assert_allclose(q, UNDERSIZE, atol=1e-12)


def test_cumulative_undersize_independent_of_order_and_mass_unit():
    rng = np.random.default_rng(20240601)
    order = rng.permutation(len(SIEVE_UM))
    x, q = cumulative_undersize_pct(np.array(SIEVE_UM)[order], 0.37 * np.array(RETAINED, float)[order])
    np.testing.assert_allclose(q, UNDERSIZE, atol=1e-12)


def test_percent_finer_matches_textbook_table():
    # Sieve analysis problem of a soil-mechanics textbook as worked on askfilo.com
    # (https://askfilo.com/user-question-answers-smart-solutions/from-the-results-of-a-sieve-analysis-shown-in-the-table-3335363133333939),
    # VERIFIED (secondary): retained 28, 42, 48, 128, 221, 86, 40 g on 4.75 ... 0.075 mm, pan 24 g; the
    # solution's cumulative retained column is 28, 70, 118, 246, 467, 553, 593, 617 g and its rule is
    # percent finer = 100 - 100 * cumulative retained / total (also NPTEL soil-mechanics lab, sieve analysis,
    # https://nptel.ac.in/courses/105103097/web/exp-3-final/s2.htm, VERIFIED (secondary)).
    mm = [4.750, 2.000, 0.850, 0.425, 0.250, 0.150, 0.075, 0]
    g = [28, 42, 48, 128, 221, 86, 40, 24]
    cum_from_source = np.array([28, 70, 118, 246, 467, 553, 593])
    x, q = cumulative_undersize_pct(np.array(mm) * 1000, g)
    np.testing.assert_allclose(q[::-1], 100 - 100 * cum_from_source / 617)
    assert q[3] == pytest.approx(100 - 100 * 246 / 617)  # 0.425 mm: 60.13 % finer


def test_worked_example_percentiles_linear_and_log():
    # references.md §6, COMPUTED: linear d10/d50/d90 = 81.000/273.333/675.000 (span 2.1732),
    # log 78.350/270.260/669.695 (span 2.1881)
    x, q = cumulative_undersize_pct(SIEVE_UM, RETAINED)
    lin = percentile_size_um(x, q, [10, 50, 90], method="linear")
    log = percentile_size_um(x, q, [10, 50, 90])
    np.testing.assert_allclose(lin, [81.000, 273.333, 675.000], atol=5e-4)
    np.testing.assert_allclose(log, [78.350, 270.260, 669.695], atol=5e-4)
    assert span(*lin) == pytest.approx(2.1732, abs=5e-5)
    assert span(*log) == pytest.approx(2.1881, abs=5e-5)
    # by hand, linear d10 between 45 um (6 %) and 90 um (11 %): 45 + (10 - 6)/(11 - 6) * 45 = 81
    assert lin[0] == pytest.approx(45 + 4 / 5 * 45)
    assert isinstance(percentile_size_um(x, q, 50), float)


def test_percentile_matches_numpy_interp_on_ln_x():
    # cross-check: for a strictly increasing curve, log interpolation is numpy.interp on ln x, linear is
    # numpy.interp on x (numpy as the reference implementation)
    x, q = cumulative_undersize_pct(SIEVE_UM, RETAINED)
    qs = np.linspace(6, 100, 95)
    np.testing.assert_allclose(percentile_size_um(x, q, qs), np.exp(np.interp(qs, q, np.log(x))), rtol=1e-12)
    np.testing.assert_allclose(percentile_size_um(x, q, qs, method="linear"), np.interp(qs, q, x), rtol=1e-12)


@FAST
@given(st.lists(st.floats(0.5, 50.0), min_size=3, max_size=10), st.floats(0, 100))
def test_property_percentile_equals_numpy_interp(increments, qq):
    # strictly increasing undersize on a sqrt(2) sieve series; numpy.interp on ln x as the reference
    q = np.cumsum(increments)
    q = 100 * q / q[-1]
    q[-1] = 100.0  # exactly, as cumulative_undersize_pct gives it
    x = 38.0 * np.sqrt(2) ** np.arange(q.size)
    got = percentile_size_um(x, q, qq)
    if qq < q[0]:
        assert math.isnan(got)
    else:
        assert got == pytest.approx(math.exp(np.interp(qq, q, np.log(x))), rel=1e-9)


def test_nan_below_finest_and_above_coarsest():
    # references.md §6 edge case: q below the finest aperture's Q3 (pan holds 6 %) cannot be interpolated
    x, q = cumulative_undersize_pct(SIEVE_UM, RETAINED)
    assert math.isnan(percentile_size_um(x, q, 5))
    assert percentile_size_um(x, q, 6) == 45.0  # exactly the finest aperture's undersize
    # top sieve retains material: undersize at 710 um is 92 %, nothing is known above
    x2, q2 = cumulative_undersize_pct([45, 90, 710, 0], [10, 50, 30, 10])
    assert q2[-1] == pytest.approx(70.0)
    out = percentile_size_um(x2, q2, [10, 50, 90, np.nan])
    assert not np.isnan(out[0]) and not np.isnan(out[1])
    assert np.isnan(out[2]) and np.isnan(out[3])


def test_flat_segment_gives_smallest_aperture():
    # an empty sieve makes the curve flat; d at that level is where the curve first reaches it
    x, q = cumulative_undersize_pct([100, 200, 400, 0], [50, 0, 30, 20])
    np.testing.assert_allclose(q, [20, 70, 70])
    assert percentile_size_um(x, q, 70) == 200.0
    assert math.isnan(percentile_size_um(x, q, 80))


@FAST
@given(
    masses=st.lists(st.floats(0.0, 100.0), min_size=2, max_size=9),
    ratio=st.floats(1.1, 2.5),
)
def test_property_percentiles_ordered(masses, ratio):
    # property: d10 <= d50 <= d90 for any valid sieve data, whichever method, where defined
    assume(sum(masses) > 0)
    apertures = [0.0] + list(45.0 * ratio ** np.arange(len(masses) - 1))
    x, q = cumulative_undersize_pct(apertures, masses)
    for method in ("log", "linear"):
        d = percentile_size_um(x, q, [10, 50, 90], method=method)
        finite = d[~np.isnan(d)]
        assert np.all(np.diff(finite) >= -1e-9)
        assert np.all((finite >= x[0]) & (finite <= x[-1]))


def test_undersize_at_size_is_inverse_of_percentile():
    x, q = cumulative_undersize_pct(SIEVE_UM, RETAINED)
    for method in ("log", "linear"):
        d = percentile_size_um(x, q, [10, 33.3, 50, 90], method=method)
        np.testing.assert_allclose(undersize_at_size_pct(x, q, d, method=method), [10, 33.3, 50, 90])
    assert undersize_at_size_pct(x, q, 2000) == 100.0  # above the top sieve, all passed
    assert math.isnan(undersize_at_size_pct(x, q, 10))  # below the finest, pan holds 6 %
    assert math.isnan(undersize_at_size_pct(x, q, np.nan))
    x0, q0 = cumulative_undersize_pct([100, 200, 0], [1, 1, 0])
    assert undersize_at_size_pct(x0, q0, 50) == 0.0  # nothing in the pan: nothing below the finest sieve
    x1, q1 = cumulative_undersize_pct([100, 200, 0], [1, 1, 1])
    assert math.isnan(undersize_at_size_pct(x1, q1, 300))  # top sieve retained material


def test_fines_pct_at_aperture_and_interpolated():
    # cutoff on an aperture: exactly the undersize there (references.md §6: 19 % at 125 um, COMPUTED)
    assert fines_pct(SIEVE_UM, RETAINED, 125.0) == 19.0
    assert fines_pct(SIEVE_UM, RETAINED) == 19.0  # default cutoff 125 um
    # between apertures: linear in ln x, by hand between 125 um (19 %) and 180 um (31 %)
    expected = 19 + 12 * math.log(150 / 125) / math.log(180 / 125)
    assert fines_pct(SIEVE_UM, RETAINED, 150.0) == pytest.approx(expected, rel=1e-12)
    assert math.isnan(fines_pct(SIEVE_UM, RETAINED, 40.0))


def test_rrsb_sheet_values():
    # references.md §6, COMPUTED: x' = 400 um, n = 2 -> d10 129.837, d50 333.022, d90 606.971, span 1.4327,
    # Q3(x') = 1 - 1/e = 0.632121
    d = rrsb_size_um([0.1, 0.5, 0.9], 400, 2)
    np.testing.assert_allclose(d, [129.837, 333.022, 606.971], atol=5e-4)
    assert span(*d) == pytest.approx(1.4327, abs=5e-5)
    assert rrsb_undersize(400, 400, 2) == pytest.approx(0.632121, abs=1e-6)
    # by hand: d50 = x' (ln 2)^(1/n)
    assert d[1] == pytest.approx(400 * math.sqrt(math.log(2)))
    np.testing.assert_allclose(rrsb_undersize(d, 400, 2), [0.1, 0.5, 0.9])
    assert rrsb_size_um(1.0, 400, 2) == math.inf
    assert rrsb_size_um(0.0, 400, 2) == 0.0


def test_rrsb_is_scipy_weibull_min_cdf():
    # the RRSB distribution is the Weibull distribution: scipy.stats.weibull_min(c=n, scale=x') as reference
    x = np.linspace(10, 1500, 40)
    np.testing.assert_allclose(rrsb_undersize(x, 400, 2.3), stats.weibull_min.cdf(x, 2.3, scale=400), rtol=1e-12)
    qs = np.array([0.05, 0.1, 0.5, 0.9, 0.99])
    np.testing.assert_allclose(rrsb_size_um(qs, 400, 2.3), stats.weibull_min.ppf(qs, 2.3, scale=400), rtol=1e-12)


def test_fit_rrsb_noise_free_refit():
    # references.md §6, COMPUTED: linearised refit of noise-free Q3 at 100..600 um returns n = 2, x' = 400
    x = np.arange(100.0, 601.0, 100.0)
    fit = fit_rrsb(x, 100 * rrsb_undersize(x, 400, 2))
    assert fit["n"] == pytest.approx(2.0, abs=1e-9)
    assert fit["x_prime_um"] == pytest.approx(400.0, abs=1e-6)
    assert fit["r2"] == pytest.approx(1.0)
    assert fit["n_points"] == 6


def test_fit_rrsb_uses_only_interior_points():
    # 0 % and 100 % points are left out (the linearised transform is infinite there)
    x = np.array([20.0, 100, 200, 300, 400, 600, 5000])
    q = 100 * rrsb_undersize(x, 400, 2)
    q[0], q[-1] = 0.0, 100.0
    fit = fit_rrsb(x, q)
    assert fit["n_points"] == 5
    assert fit["n"] == pytest.approx(2.0)


def test_fit_rrsb_noisy_matches_scipy():
    # cross-check on seeded noisy data: n and its SE against scipy.stats.linregress; x' and its delta-method
    # SE against scipy.optimize.curve_fit of the same linearised model parameterised in (n, x')
    rng = np.random.default_rng(7)
    x = np.array([63.0, 90, 125, 180, 250, 355, 500, 710])
    q = 100 * rrsb_undersize(x, 300, 1.6)
    q = np.clip(q + rng.normal(0, 1.5, q.size), 0.5, 99.5)
    fit = fit_rrsb(x, q)
    u, v = np.log(x), np.log(-np.log(1 - q / 100))
    lr = stats.linregress(u, v)
    assert fit["n"] == pytest.approx(lr.slope, rel=1e-10)
    assert fit["n_se"] == pytest.approx(lr.stderr, rel=1e-8)
    assert fit["r2"] == pytest.approx(lr.rvalue**2, rel=1e-10)
    popt, pcov = optimize.curve_fit(lambda uu, n, xp: n * uu - n * np.log(xp), u, v, p0=[1.0, 200.0])
    assert fit["x_prime_um"] == pytest.approx(popt[1], rel=1e-6)
    assert fit["x_prime_um_se"] == pytest.approx(math.sqrt(pcov[1, 1]), rel=1e-4)


def test_fit_rrsb_two_points_has_nan_se():
    x = np.array([200.0, 400.0])
    fit = fit_rrsb(x, 100 * rrsb_undersize(x, 400, 2))
    assert fit["n"] == pytest.approx(2.0)
    assert math.isnan(fit["n_se"]) and math.isnan(fit["x_prime_um_se"])


# ---- every ValueError path ------------------------------------------------------------------------

@pytest.mark.parametrize(
    "sieve, mass, match",
    [
        ([100, 0], [1, -1], "retained_g cannot be negative"),
        ([100, 0], [0, 0], "retained_g sums to zero"),
        ([100, 100, 0], [1, 1, 1], "duplicate aperture"),
        ([100, 0, 0], [1, 1, 1], "duplicate aperture"),
        ([100, 0], [1, np.nan], r"retained_g cannot be missing \(NaN\)"),
        ([100, np.nan], [1, 1], r"sieve_um cannot be missing \(NaN\)"),
        ([100, 0], [1, 1, 1], "must have the same length"),
        ([0], [1], "holds only the pan"),
        ([-5, 0], [1, 1], "sieve_um cannot be negative"),
    ],
)
def test_cumulative_undersize_errors(sieve, mass, match):
    with pytest.raises(ValueError, match=match):
        cumulative_undersize_pct(sieve, mass)


@pytest.mark.parametrize(
    "x, q, qq, method, match",
    [
        ([100, 200], [10, 90], 101, "log", "q_pct must lie between 0 and 100"),
        ([100, 200], [10, 90], -1, "log", "q_pct must lie between 0 and 100"),
        ([100, 200], [10, 90], 50, "cubic", "method must be one of"),
        ([200, 100], [10, 90], 50, "log", "aperture_um must be strictly increasing"),
        ([100, 200], [90, 10], 50, "log", "undersize_pct cannot decrease"),
        ([100, 200], [10, 190], 50, "log", "undersize_pct must lie between 0 and 100"),
        ([0, 200], [10, 90], 50, "log", "aperture_um must be positive"),
        ([100, 200], [10], 50, "log", "must have the same length"),
        ([], [], 50, "log", "aperture_um is empty"),
        ([100, 200], [10, np.nan], 50, "log", "cannot be missing"),
    ],
)
def test_percentile_errors(x, q, qq, method, match):
    with pytest.raises(ValueError, match=match):
        percentile_size_um(x, q, qq, method=method)


def test_undersize_at_size_and_fines_errors():
    with pytest.raises(ValueError, match="size_um cannot be negative"):
        undersize_at_size_pct([100, 200], [10, 90], -1)
    with pytest.raises(ValueError, match="method must be one of"):
        undersize_at_size_pct([100, 200], [10, 90], 150, method="spline")
    with pytest.raises(ValueError, match="cutoff_um must be positive"):
        fines_pct(SIEVE_UM, RETAINED, 0.0)


def test_span_errors_and_nan():
    assert span(10, 20, 40) == pytest.approx(1.5)
    assert math.isnan(span(np.nan, 20, 40))
    with pytest.raises(ValueError, match="d50_um must be positive"):
        span(0, 0, 10)
    with pytest.raises(ValueError, match="d10_um cannot be negative"):
        span(-1, 10, 20)
    with pytest.raises(ValueError, match="percentiles out of order"):
        span(30, 20, 40)


def test_rrsb_errors():
    with pytest.raises(ValueError, match="size_um cannot be negative"):
        rrsb_undersize(-1, 400, 2)
    with pytest.raises(ValueError, match="x_prime_um must be positive"):
        rrsb_undersize(100, 0, 2)
    with pytest.raises(ValueError, match="n must be positive"):
        rrsb_undersize(100, 400, 0)
    with pytest.raises(ValueError, match="q_fraction must lie between 0 and 1"):
        rrsb_size_um(50, 400, 2)
    with pytest.raises(ValueError, match="x_prime_um must be positive"):
        rrsb_size_um(0.5, -4, 2)
    with pytest.raises(ValueError, match="n must be positive"):
        rrsb_size_um(0.5, 400, -2)


def test_fit_rrsb_errors():
    with pytest.raises(ValueError, match="at least two points"):
        fit_rrsb([100, 200, 300], [0, 50, 100])
    with pytest.raises(ValueError, match="two different apertures"):
        fit_rrsb([200, 200], [30, 40])
    with pytest.raises(ValueError, match="must have the same length"):
        fit_rrsb([100, 200], [30])
