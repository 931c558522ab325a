"""Roller compaction: Johanson's rolling theory and ribbon solid fraction.

Johanson's model divides the roll bite into a slip region (powder slides
on the rolls) and a nip region (powder moves with the rolls and is
compressed). The nip angle is where the pressure gradients of the two
regions are equal; from it follow the compression ratio and the peak
pressure at the gap.

The equations below were written from memory of the Johanson (1965) model
and were not checked against the paper; they reproduce their own
self-consistency table in the project's reference sheet only. Treat the
results as qualitative (trends with gap, diameter and compressibility).

Angles are in degrees at the interface, radians inside.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "johanson_nu_deg",
    "johanson_gradient_difference",
    "johanson_nip_angle_deg",
    "johanson_density_ratio",
    "johanson_pressure_ratio",
    "ribbon_solid_fraction_from_at_gap",
]

#: upper end of the search for the nip angle [deg]
_SCAN_MAX_DEG = 45.0
_SCAN_STEPS = 4500


def _check_friction(internal_friction_deg, wall_friction_deg):
    if not 0 < internal_friction_deg < 90:
        raise ValueError("internal_friction_deg must lie between 0 and 90")
    if not 0 <= wall_friction_deg <= internal_friction_deg:
        raise ValueError(
            "wall_friction_deg must lie between 0 and internal_friction_deg "
            "(the wall cannot grip harder than the powder shears)"
        )


def _check_geometry(roll_diameter_m, roll_gap_m):
    if not roll_diameter_m > 0:
        raise ValueError("roll_diameter_m must be positive")
    if not roll_gap_m > 0:
        raise ValueError("roll_gap_m must be positive")


def johanson_nu_deg(internal_friction_deg, wall_friction_deg):
    r"""Johanson's auxiliary angle :math:`\nu` between stress and roll surface.

    .. math:: \nu = \tfrac12\left[\pi - \arcsin\frac{\sin\phi_w}{\sin\delta} - \phi_w\right]

    Parameters
    ----------
    internal_friction_deg : float
        Effective angle of internal friction :math:`\delta` [deg].
    wall_friction_deg : float
        Wall (roll) friction angle :math:`\phi_w` [deg], at most
        :math:`\delta`.

    Returns
    -------
    float
        :math:`\nu` [deg]; depends on the friction angles only.

    References
    ----------
    Johanson J.R. (1965). A rolling theory for granular solids. ASME J. Appl.
    Mech. 32(4):842-848 (equation from memory, not verified).
    """
    _check_friction(internal_friction_deg, wall_friction_deg)
    d, w = np.radians(internal_friction_deg), np.radians(wall_friction_deg)
    return float(np.degrees(0.5 * (np.pi - np.arcsin(np.sin(w) / np.sin(d)) - w)))


def johanson_gradient_difference(theta_deg, roll_diameter_m, roll_gap_m, internal_friction_deg,
                                 wall_friction_deg, compressibility):
    r"""Slip-region minus nip-region pressure gradient, per unit stress.

    .. math::

        \left(\frac{d\sigma}{dx}\right)_{slip} = \frac{4\sigma(\pi/2 - \theta - \nu)\tan\delta}
        {\frac D2 (1 + S/D - \cos\theta)[\cot(A - \mu) - \cot(A + \mu)]}

        \left(\frac{d\sigma}{dx}\right)_{nip} = \frac{K\sigma(2\cos\theta - 1 - S/D)\tan\theta}
        {\frac D2 (1 + S/D - \cos\theta)\cos\theta}

    with :math:`\mu = \pi/4 - \delta/2` and :math:`A = (\theta + \nu + \pi/2)/2`.
    The stress :math:`\sigma` cancels; the value returned is the difference
    divided by :math:`\sigma` [1/m].

    Parameters
    ----------
    theta_deg : float or array-like
        Angular position from the gap [deg].
    roll_diameter_m : float
        Roll diameter D [m].
    roll_gap_m : float
        Roll gap S [m].
    internal_friction_deg : float
        Effective angle of internal friction :math:`\delta` [deg].
    wall_friction_deg : float
        Wall friction angle :math:`\phi_w` [deg].
    compressibility : float
        Compressibility K [-], the slope of log pressure on log density in
        uniaxial compression.

    Returns
    -------
    float or numpy.ndarray
        Gradient difference per unit stress [1/m]; positive near the gap.

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (equations from
    memory, not verified).
    """
    _check_geometry(roll_diameter_m, roll_gap_m)
    _check_friction(internal_friction_deg, wall_friction_deg)
    if not compressibility > 0:
        raise ValueError("compressibility must be positive")
    theta = np.radians(np.asarray(theta_deg, dtype=float))
    nu = np.radians(johanson_nu_deg(internal_friction_deg, wall_friction_deg))
    out = _gradient_difference_times_radius(theta, roll_gap_m / roll_diameter_m, np.radians(internal_friction_deg),
                                            nu, compressibility) / (roll_diameter_m / 2)
    return float(out) if out.ndim == 0 else out


def _gradient_difference_times_radius(theta_rad, gap_over_diameter, delta_rad, nu_rad, compressibility):
    """Slip minus nip gradient per unit stress, times D/2 (arrays broadcast; no checks).

    The roll radius divides both gradients, so the nip angle depends on S/D, the friction angles and K only.
    """
    s_d = gap_over_diameter
    mu = np.pi / 4 - delta_rad / 2
    a = (theta_rad + nu_rad + np.pi / 2) / 2
    opening = 1 + s_d - np.cos(theta_rad)
    slip = (4 * (np.pi / 2 - theta_rad - nu_rad) * np.tan(delta_rad)
            / (opening * (1 / np.tan(a - mu) - 1 / np.tan(a + mu))))  # slip-region gradient
    nip = (compressibility * (2 * np.cos(theta_rad) - 1 - s_d) * np.tan(theta_rad)
           / (opening * np.cos(theta_rad)))  # nip-region gradient
    return slip - nip


def johanson_nip_angle_deg(roll_diameter_m, roll_gap_m, internal_friction_deg, wall_friction_deg,
                           compressibility):
    r"""Nip angle :math:`\alpha` of Johanson's rolling theory.

    The angle at which the slip-region and nip-region pressure gradients are
    equal (see :func:`johanson_gradient_difference`), found as the first sign
    change of their difference scanning from the gap up to 45 deg, refined by
    Brent's method.

    Parameters
    ----------
    roll_diameter_m : float
        Roll diameter D [m].
    roll_gap_m : float
        Roll gap S [m].
    internal_friction_deg : float
        Effective angle of internal friction :math:`\delta` [deg].
    wall_friction_deg : float
        Wall friction angle :math:`\phi_w` [deg].
    compressibility : float
        Compressibility K [-].

    Returns
    -------
    float
        :math:`\alpha` [deg]; NaN if the gradients do not cross below 45 deg.

    Raises
    ------
    ValueError
        If a geometry value or K is not positive, or a friction angle is out
        of range.

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (equations from
    memory, not verified).
    Bindhumadhavan G., Seville J.P.K., Adams M.J., Greenwood R.W.,
    Fitzpatrick S. (2005). Roll compaction of a pharmaceutical excipient:
    experimental validation of rolling theory for granular solids. Chem. Eng.
    Sci. (volume and pages not read).
    """
    from scipy.optimize import brentq

    args = (roll_diameter_m, roll_gap_m, internal_friction_deg, wall_friction_deg, compressibility)
    grid = np.linspace(_SCAN_MAX_DEG / _SCAN_STEPS / 100, _SCAN_MAX_DEG, _SCAN_STEPS + 1)
    diff = johanson_gradient_difference(grid, *args)
    change = np.flatnonzero(np.sign(diff[:-1]) != np.sign(diff[1:]))
    if change.size == 0:
        return float("nan")
    i = change[0]
    return float(brentq(lambda th: johanson_gradient_difference(th, *args), grid[i], grid[i + 1], xtol=1e-12))


def johanson_density_ratio(nip_angle_deg, roll_diameter_m, roll_gap_m):
    r"""Density in the gap over density at the nip angle (mass conservation).

    .. math:: \frac{\rho_{gap}}{\rho_\alpha} = \frac{(1 + S/D - \cos\alpha)\cos\alpha}{S/D}

    Parameters
    ----------
    nip_angle_deg : float or array-like
        Nip angle :math:`\alpha` [deg].
    roll_diameter_m : float or array-like
        Roll diameter D [m].
    roll_gap_m : float or array-like
        Roll gap S [m].

    Returns
    -------
    float or numpy.ndarray
        Compression ratio [-] from the nip to the gap.

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (from memory).
    """
    d = np.asarray(roll_diameter_m, dtype=float)
    s = np.asarray(roll_gap_m, dtype=float)
    if np.any(d <= 0):
        raise ValueError("roll_diameter_m must be positive")
    if np.any(s <= 0):
        raise ValueError("roll_gap_m must be positive")
    a = np.radians(np.asarray(nip_angle_deg, dtype=float))
    s_d = s / d
    out = (1 + s_d - np.cos(a)) * np.cos(a) / s_d  # rho_gap / rho_alpha
    return float(out) if out.ndim == 0 else out


def johanson_pressure_ratio(nip_angle_deg, roll_diameter_m, roll_gap_m, compressibility):
    r"""Peak pressure at the gap over pressure at the nip angle.

    .. math:: \frac{P_{max}}{P_\alpha} = \left(\frac{\rho_{gap}}{\rho_\alpha}\right)^K

    Parameters
    ----------
    nip_angle_deg : float or array-like
        Nip angle [deg].
    roll_diameter_m, roll_gap_m : float or array-like
        Roll diameter D and gap S [m].
    compressibility : float or array-like
        Compressibility K [-].

    Returns
    -------
    float or numpy.ndarray
        Pressure ratio [-].

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (from memory).
    """
    k = np.asarray(compressibility, dtype=float)
    if np.any(k <= 0):
        raise ValueError("compressibility must be positive")
    out = np.asarray(johanson_density_ratio(nip_angle_deg, roll_diameter_m, roll_gap_m)) ** k  # P ~ rho^K
    return float(out) if out.ndim == 0 else out


def ribbon_solid_fraction_from_at_gap(at_gap_density_kg_m3, skeletal_density_g_cm3, relaxation_ratio=1.0):
    r"""Solid fraction of the ribbon from its at-gap density.

    .. math:: SF_{ribbon} = \frac{\rho_{gap} / \rho_{true}}{\beta}

    where :math:`\beta = T / S` is the elastic recovery (ribbon thickness
    over roll gap), 1 for no recovery.

    Parameters
    ----------
    at_gap_density_kg_m3 : float or array-like
        At-gap density [kg/m^3], e.g. from
        :func:`linkage.physics.porosity.at_gap_density_kg_m3`.
    skeletal_density_g_cm3 : float or array-like
        Skeletal density [g/cm^3].
    relaxation_ratio : float or array-like
        Ribbon thickness over gap [-], at least 1.

    Returns
    -------
    float or numpy.ndarray
        Ribbon solid fraction [-]. Values above 1 mean the inputs are
        inconsistent (e.g. material leaking past the roll edges is missing
        from the width).

    Raises
    ------
    ValueError
        If a density is zero or negative, the at-gap density negative, or the
        relaxation ratio below 1.

    References
    ----------
    Nkansah P. et al. (2008). A novel method for estimating solid fraction of
    roller-compacted ribbons. Drug Dev. Ind. Pharm. (relaxation correction;
    abstract only).
    Toson P. et al. (2019). Int. J. Pharm. X 1:100005 (relaxation factor).
    """
    rho_gap = np.asarray(at_gap_density_kg_m3, dtype=float)
    rho_true = np.asarray(skeletal_density_g_cm3, dtype=float)
    beta = np.asarray(relaxation_ratio, dtype=float)
    if np.any(rho_gap < 0):
        raise ValueError("at_gap_density_kg_m3 cannot be negative")
    if np.any(rho_true <= 0):
        raise ValueError("skeletal_density_g_cm3 must be positive")
    if np.any(beta < 1):
        raise ValueError("relaxation_ratio cannot be below 1 (a ribbon does not shrink after the gap)")
    out = (rho_gap / 1000.0) / rho_true / beta  # SF = (rho_gap / rho_true) / beta
    return float(out) if out.ndim == 0 else out
