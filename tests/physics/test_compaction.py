"""Tests of linkage.physics.compaction (Johanson 1965 rolling theory, at-gap solid fraction).

The Johanson equations in references.md §5 are FROM MEMORY, not verified against the paper, and no published
worked example with numbers was found. The table checks below are therefore REGRESSION ONLY: they show the
code implements the sheet's equations as written (self-consistency table, COMPUTED), not that the equations are
Johanson's. The sanity checks follow from the theory as the sheet states them.
"""

import math

import numpy as np
import pytest
from scipy import optimize

from linkage.physics.compaction import (
    johanson_density_ratio,
    johanson_gradient_difference,
    johanson_nip_angle_deg,
    johanson_nu_deg,
    johanson_pressure_ratio,
    ribbon_solid_fraction_from_at_gap,
)
from linkage.physics.porosity import at_gap_density_kg_m3

# references.md §5 self-consistency table (COMPUTED from FROM-MEMORY equations): regression only
# D [m], S [m], delta [deg], phi_w [deg], K, nu [deg], alpha [deg], rho_gap/rho_alpha, P_max/P_alpha
TABLE = [
    (0.20, 0.002, 40, 30, 5, 49.467, 16.707, 5.0008, 3128),
    (0.25, 0.002, 40, 30, 5, 49.467, 16.684, 5.9984, 7766),
    (0.20, 0.002, 45, 25, 6, 59.148, 13.717, 3.7422, 2746),
    (0.20, 0.002, 40, 30, 8, 49.467, 12.080, 3.1431, 9524),
]


@pytest.mark.parametrize("d, s, delta, phi, k, nu, alpha, rho_ratio, p_ratio", TABLE)
def test_johanson_self_consistency_table_regression_only(d, s, delta, phi, k, nu, alpha, rho_ratio, p_ratio):
    # REGRESSION ONLY (FROM MEMORY equations), references.md §5 table
    assert johanson_nu_deg(delta, phi) == pytest.approx(nu, abs=5e-4)
    a = johanson_nip_angle_deg(d, s, delta, phi, k)
    assert a == pytest.approx(alpha, abs=5e-4)
    assert johanson_density_ratio(a, d, s) == pytest.approx(rho_ratio, abs=5e-4)
    assert johanson_pressure_ratio(a, d, s, k) == pytest.approx(p_ratio, abs=0.5)
    # consistency stated in the sheet: P_max/P_alpha = (rho_gap/rho_alpha)^K
    assert johanson_pressure_ratio(a, d, s, k) == pytest.approx(johanson_density_ratio(a, d, s) ** k)


def test_nip_angle_is_a_root_of_the_gradient_difference():
    # cross-check of the root finder: the gradient difference vanishes at alpha and changes sign there
    # (scipy.optimize.root_scalar with a bracketing method as the reference)
    args = (0.20, 0.002, 40, 30, 5)
    a = johanson_nip_angle_deg(*args)
    assert johanson_gradient_difference(a - 0.1, *args) > 0 > johanson_gradient_difference(a + 0.1, *args)
    ref = optimize.root_scalar(lambda th: johanson_gradient_difference(th, *args), bracket=[10, 20],
                              method="bisect", xtol=1e-12)
    assert a == pytest.approx(ref.root, abs=1e-8)


def test_sanity_alpha_falls_as_k_rises():
    # references.md §5 sanity assertion: alpha falls as K rises
    alphas = [johanson_nip_angle_deg(0.2, 0.002, 40, 30, k) for k in (4, 5, 6, 8, 10)]
    assert np.all(np.diff(alphas) < 0)


def test_sanity_nu_depends_only_on_friction_angles():
    # references.md §5: nu depends only on delta and phi_w; by hand for delta 40, phi_w 30
    expected = math.degrees(0.5 * (math.pi - math.asin(math.sin(math.radians(30)) / math.sin(math.radians(40)))
                                   - math.radians(30)))
    assert johanson_nu_deg(40, 30) == pytest.approx(expected)
    assert johanson_nu_deg(40, 0) == pytest.approx(90.0)  # smooth wall: stress normal to the roll


def test_sanity_density_ratio_rises_with_d_over_s():
    # references.md §5: the density ratio rises with D/S
    ratios = [johanson_density_ratio(johanson_nip_angle_deg(d, 0.002, 40, 30, 5), d, 0.002)
              for d in (0.10, 0.20, 0.25, 0.40)]
    assert np.all(np.diff(ratios) > 0)


def test_sanity_alpha_in_typical_range():
    # references.md §5: alpha roughly 10-20 deg for typical inputs, consistent with the "< 17 deg" statement
    # of the 2021 "virtual roller compactor" paper (Int J Pharm 601:120579, abstract VERIFIED)
    for d, s, delta, phi, k in [(0.2, 0.002, 40, 30, 5), (0.25, 0.003, 42, 28, 7), (0.12, 0.0015, 38, 25, 9)]:
        assert 8.0 < johanson_nip_angle_deg(d, s, delta, phi, k) < 20.0


def test_first_row_in_gap_solid_fraction_is_unphysical():
    # references.md §5: row 1 compresses 5x from nip to gap; a feed at 0.35 g/cm3 would exceed the true density
    # (1.56 g/cm3 taken for MCC, §1), i.e. in-gap SF > 1 - the model is then outside its physics
    ratio = johanson_density_ratio(johanson_nip_angle_deg(0.20, 0.002, 40, 30, 5), 0.20, 0.002)
    assert 0.35 * ratio / 1.56 > 1.0


def test_vectorised_density_ratio():
    out = johanson_density_ratio(np.array([12.08, 16.707]), 0.20, 0.002)
    np.testing.assert_allclose(out, [3.1431, 5.0008], atol=5e-4)


def test_ribbon_solid_fraction_from_at_gap_sheet_value():
    # references.md §5, COMPUTED: rho_gap 1193.66 kg/m3, rho_true 1560 kg/m3 -> SF 0.765168 (no relaxation)
    rho = at_gap_density_kg_m3(18, 40, 2.0, 250, 4)
    assert ribbon_solid_fraction_from_at_gap(rho, 1.56) == pytest.approx(0.765168, abs=1e-6)
    # ribbon SF = at-gap SF divided by the elastic-recovery factor T/S (sheet §5; Nkansah 2008, Toson 2019)
    assert ribbon_solid_fraction_from_at_gap(rho, 1.56, 1.1) == pytest.approx(0.765168 / 1.1, abs=1e-6)


def test_compaction_errors():
    with pytest.raises(ValueError, match="internal_friction_deg must lie between 0 and 90"):
        johanson_nu_deg(95, 30)
    with pytest.raises(ValueError, match="wall_friction_deg must lie between 0 and internal_friction_deg"):
        johanson_nu_deg(30, 40)
    with pytest.raises(ValueError, match="roll_diameter_m must be positive"):
        johanson_nip_angle_deg(0, 0.002, 40, 30, 5)
    with pytest.raises(ValueError, match="roll_gap_m must be positive"):
        johanson_nip_angle_deg(0.2, 0, 40, 30, 5)
    with pytest.raises(ValueError, match="compressibility must be positive"):
        johanson_nip_angle_deg(0.2, 0.002, 40, 30, 0)
    with pytest.raises(ValueError, match="roll_diameter_m must be positive"):
        johanson_density_ratio(15, -0.2, 0.002)
    with pytest.raises(ValueError, match="roll_gap_m must be positive"):
        johanson_density_ratio(15, 0.2, 0)
    with pytest.raises(ValueError, match="compressibility must be positive"):
        johanson_pressure_ratio(15, 0.2, 0.002, -1)
    with pytest.raises(ValueError, match="at_gap_density_kg_m3 cannot be negative"):
        ribbon_solid_fraction_from_at_gap(-1, 1.5)
    with pytest.raises(ValueError, match="skeletal_density_g_cm3 must be positive"):
        ribbon_solid_fraction_from_at_gap(1000, 0)
    with pytest.raises(ValueError, match="relaxation_ratio cannot be below 1"):
        ribbon_solid_fraction_from_at_gap(1000, 1.5, 0.9)


def test_frictionless_wall_has_no_nip_angle():
    # with phi_w = 0 the slip-region gradient is negative from the gap on, so the gradients never cross:
    # a smooth roll cannot draw powder in (follows from the equations as written; regression only)
    assert math.isnan(johanson_nip_angle_deg(0.2, 0.002, 40, 0, 5))
