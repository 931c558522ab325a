"""Tests of linkage.physics.rolling (Johanson 1965 roll force, peak pressure, ribbon solid fraction).

No published worked example with numbers was found (references.md §5), so the checks are against outside
references of another kind:
- scipy.integrate.quad for the force integral (independent adaptive quadrature);
- the small-angle limit of the integral, a Beta-function integral evaluated with scipy.special.gamma
  (Abramowitz & Stegun 1964, 6.2.1 with 6.2.2: int_0^inf (1 + x^2)^-K dx = sqrt(pi) Gamma(K - 1/2) / (2 Gamma(K)));
- linkage.physics.compaction.johanson_nip_angle_deg (scalar Brent root, checked there against scipy root_scalar);
- the scaling limits named in references.md §11 ("roll force grows with roll width linearly", nip angle falls as
  S/D falls) and the consistency of each function with its inverse.
"""

import numpy as np
import pytest
from scipy import integrate, special

from linkage.physics.compaction import johanson_nip_angle_deg
from linkage.physics.rolling import (
    fit_johanson_ribbon,
    johanson_force_integral,
    johanson_largest_gap_ratio,
    johanson_nip_angles_deg,
    johanson_peak_pressure_mpa,
    johanson_pressure_profile_ratio,
    johanson_ribbon_porosity,
    johanson_roll_force_for_porosity_kn_per_cm,
    johanson_specific_roll_force_kn_per_cm,
    peak_pressure_for_solid_fraction_mpa,
    ribbon_solid_fraction_from_peak_pressure,
)

CASES = [(2.0, 200.0, 5.0), (2.0, 250.0, 6.0), (3.5, 200.0, 4.0), (1.5, 200.0, 12.0), (2.0, 400.0, 2.5)]


@pytest.mark.parametrize("gap, diameter, k", CASES)
def test_vectorised_nip_angle_matches_the_scalar_root(gap, diameter, k):
    # reference: compaction.johanson_nip_angle_deg (Brent's method on the same gradient difference)
    ref = johanson_nip_angle_deg(diameter / 1000, gap / 1000, 40, 25, k)
    assert johanson_nip_angles_deg(gap, diameter, k, 40, 25) == pytest.approx(ref, abs=1e-5)


def test_nip_angles_of_many_compressibilities_at_one_gap():
    """The path of the transfer's draws of K on one pair of rolls (the gap ratio's terms computed once for every
    row): each angle is the scalar root for its own K, and the same as that K computed alone."""
    # reference: compaction.johanson_nip_angle_deg (Brent's method on the same gradient difference)
    ks = np.array([2.5, 4.0, 5.0, 6.5, 8.0, 12.0])
    out = johanson_nip_angles_deg(2.0, 250.0, ks, 40, 25)
    ref = [johanson_nip_angle_deg(0.25, 0.002, 40, 25, k) for k in ks]
    np.testing.assert_allclose(out, ref, atol=1e-5)
    alone = [johanson_nip_angles_deg(np.array([2.0, 2.0 + 1e-9]), 250.0, k, 40, 25)[0] for k in ks]
    np.testing.assert_allclose(out, alone, atol=1e-8)  # rows of other gap ratios beside it change nothing


def test_nip_angles_broadcast_over_lots_and_compressibility():
    gaps = np.array([1.5, 2.0, 3.0])
    out = johanson_nip_angles_deg(gaps[:, None], 200.0, np.array([4.0, 8.0])[None, :])
    assert out.shape == (3, 2)
    ref = [[johanson_nip_angle_deg(0.2, g / 1000, 40, 25, k) for k in (4.0, 8.0)] for g in gaps]
    np.testing.assert_allclose(out, ref, atol=1e-5)
    # references.md §5/§11: alpha falls as K rises, and falls as S/D falls
    assert np.all(np.diff(out, axis=1) < 0) and np.all(np.diff(out, axis=0) > 0)


@pytest.mark.parametrize("gap, diameter, k", CASES)
def test_force_integral_against_scipy_quad(gap, diameter, k):
    # reference: scipy.integrate.quad of P(theta)/Pmax * cos(theta) from 0 to alpha
    alpha = johanson_nip_angles_deg(gap, diameter, k)
    ref, _ = integrate.quad(lambda t: johanson_pressure_profile_ratio(np.degrees(t), gap, diameter, k) * np.cos(t),
                            0, np.radians(alpha), epsabs=0, epsrel=1e-12, limit=200)
    assert johanson_force_integral(alpha, gap, diameter, k) == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("k", [3.0, 5.0, 8.0, 12.0])
def test_force_integral_small_gap_limit(k):
    # for S/D -> 0 the integrand tends to (1 + theta^2 / (2 S/D))^-K and the integral to
    # sqrt(2 S/D) * sqrt(pi) Gamma(K - 1/2) / (2 Gamma(K)) (Abramowitz & Stegun 6.2.1-6.2.2; scipy.special.gamma);
    # the relative difference is of order S/D
    gap, diameter = 0.2, 1000.0  # S/D = 2e-4
    s_d = gap / diameter
    limit = np.sqrt(2 * s_d) * np.sqrt(np.pi) * special.gamma(k - 0.5) / (2 * special.gamma(k))
    alpha = johanson_nip_angles_deg(gap, diameter, k)
    assert johanson_force_integral(alpha, gap, diameter, k) == pytest.approx(limit, rel=2e-3)


def test_profile_is_one_at_the_gap_and_falls_to_the_nip():
    theta = np.linspace(0, 12, 50)
    p = johanson_pressure_profile_ratio(theta, 2.0, 200.0, 6.0)
    assert p[0] == pytest.approx(1.0)
    assert np.all(np.diff(p) < 0)


def test_specific_force_units_and_inverse():
    # F/W [N/mm] = R [mm] * Pmax [MPa] * F_theta; 1 kN/cm = 100 N/mm (unit definition)
    gap, diameter, k, p = 2.0, 200.0, 6.0, 120.0
    f_theta = johanson_force_integral(johanson_nip_angles_deg(gap, diameter, k), gap, diameter, k)
    f = johanson_specific_roll_force_kn_per_cm(p, gap, diameter, k)
    assert f == pytest.approx(diameter / 2 * p * f_theta / 100)
    assert johanson_peak_pressure_mpa(f, gap, diameter, k) == pytest.approx(p)


def test_force_scales_as_sqrt_radius_times_gap_for_small_gaps():
    # from the small-gap limit above: F/W ~ R * sqrt(2 S/D) = sqrt(R S), so quadrupling D x S doubles the force
    f1 = johanson_specific_roll_force_kn_per_cm(100.0, 0.5, 500.0, 6.0)
    f2 = johanson_specific_roll_force_kn_per_cm(100.0, 1.0, 1000.0, 6.0)
    assert f2 / f1 == pytest.approx(2.0, rel=2e-3)


def test_solid_fraction_power_law_and_inverse():
    # Johanson's P/P0 = (rho/rho0)^K with the reference at full density: gamma = (P/C)^(1/K)
    assert ribbon_solid_fraction_from_peak_pressure(700.0, 5.0, 700.0) == pytest.approx(1.0)
    assert ribbon_solid_fraction_from_peak_pressure(100.0, 5.0, 700.0) == pytest.approx((1 / 7) ** 0.2)
    assert peak_pressure_for_solid_fraction_mpa((1 / 7) ** 0.2, 5.0, 700.0) == pytest.approx(100.0)


def test_porosity_and_force_are_inverse():
    forces = np.array([4.0, 8.0, 13.0])
    eps = johanson_ribbon_porosity(forces, 2.5, 250.0, 5.5, 700.0)
    assert np.all(np.diff(eps) < 0)  # more force, denser ribbon
    np.testing.assert_allclose(johanson_roll_force_for_porosity_kn_per_cm(eps, 2.5, 250.0, 5.5, 700.0), forces,
                               rtol=1e-9)


def test_larger_rolls_need_more_specific_force_for_the_same_ribbon():
    # same peak pressure (same ribbon) on larger rolls or a wider gap needs more force per width (references.md §11)
    small = johanson_roll_force_for_porosity_kn_per_cm(0.3, 2.0, 200.0, 5.5, 700.0)
    large = johanson_roll_force_for_porosity_kn_per_cm(0.3, 2.0, 400.0, 5.5, 700.0)
    wide_gap = johanson_roll_force_for_porosity_kn_per_cm(0.3, 3.0, 200.0, 5.5, 700.0)
    assert large > small and wide_gap > small


def test_fit_recovers_parameters_without_noise():
    # parameter recovery (lifelines-style: simulate from known parameters, fit, compare)
    rng = np.random.default_rng(0)
    f = rng.uniform(4, 14, 20)
    s = rng.uniform(1.5, 3.5, 20)
    d = np.where(np.arange(20) < 12, 200.0, 400.0)
    eps = johanson_ribbon_porosity(f, s, d, 5.5, 700.0)
    fit = fit_johanson_ribbon(f, s, d, eps)
    assert fit["compressibility"] == pytest.approx(5.5, rel=1e-5)
    assert fit["pressure_constant_mpa"] == pytest.approx(700.0, rel=1e-5)
    assert fit["residual_sd"] < 1e-6


def test_rolling_errors():
    with pytest.raises(ValueError, match="roll_gap_mm must be positive"):
        johanson_nip_angles_deg(0.0, 200.0, 5.0)
    with pytest.raises(ValueError, match="compressibility must be positive"):
        johanson_force_integral(10.0, 2.0, 200.0, -1.0)
    with pytest.raises(ValueError, match="peak_pressure_mpa must be positive"):
        johanson_specific_roll_force_kn_per_cm(0.0, 2.0, 200.0, 5.0)
    with pytest.raises(ValueError, match="solid_fraction must lie in"):
        peak_pressure_for_solid_fraction_mpa(1.2, 5.0, 700.0)
    with pytest.raises(ValueError, match="ribbon_porosity must lie in"):
        johanson_roll_force_for_porosity_kn_per_cm(1.0, 2.0, 200.0, 5.0, 700.0)
    with pytest.raises(ValueError, match="at least 3 lots"):
        fit_johanson_ribbon([5, 6], [2, 2], [200, 200], [0.3, 0.28])
    with pytest.raises(ValueError, match="ribbon_porosity must lie in"):
        fit_johanson_ribbon([5, 6, 7], [2, 2, 2], [200, 200, 200], [0.3, 0.28, 1.2])


@pytest.mark.parametrize("k", [3.0, 5.0, 8.0])
def test_the_largest_gap_with_a_nip_is_where_the_gradients_stop_crossing(k):
    """Above johanson_largest_gap_ratio the slip- and nip-region gradients (Johanson 1965, the forms of
    linkage.physics.compaction) no longer cross below 45 deg; just under it they do. Reference for the
    minimum over the angle: scipy.optimize.minimize_scalar (bounded Brent), independent of the scan and
    bisection of johanson_nip_angles_deg. The nip-region gradient is positive only where
    2 cos(theta) > 1 + S/D (its numerator), so the ratio lies below 1 whatever K is (from the formula)."""
    from scipy import optimize

    from linkage.physics.compaction import _gradient_difference_times_radius, johanson_nu_deg

    ratio = johanson_largest_gap_ratio(k, 40.0, 25.0)
    assert 0 < ratio < 1
    delta, nu = np.radians(40.0), np.radians(johanson_nu_deg(40.0, 25.0))

    def lowest(s_d):  # the lowest slip-minus-nip gradient over (0, 45 deg]: negative when they cross
        return optimize.minimize_scalar(lambda t: _gradient_difference_times_radius(t, s_d, delta, nu, k),
                                        bounds=(1e-4, np.radians(45)), method="bounded",
                                        options={"xatol": 1e-10}).fun

    assert lowest(ratio * (1 - 1e-3)) < 0 < lowest(ratio * (1 + 1e-3))
    assert np.isfinite(johanson_nip_angles_deg(ratio * 0.999, 1.0, k, 40.0, 25.0))
    assert np.isnan(johanson_nip_angles_deg(ratio * 1.001, 1.0, k, 40.0, 25.0))
