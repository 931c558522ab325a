r"""Roll force, peak pressure and ribbon solid fraction after Johanson's rolling theory.

The functions here carry :mod:`linkage.physics.compaction` from the nip
angle to the quantities a process scientist sets and measures: the specific
roll force [kN/cm], the peak pressure at the gap [MPa] and the ribbon
porosity [-]. Chained, they give the scale-up rule of the ribbon stage: the
same peak pressure gives the same ribbon on any rolls, and the specific roll
force that makes it grows with the roll radius and gap.

Equations (symbols of ``references.md`` §5; :math:`\theta` from the gap,
D roll diameter, R = D/2, S gap, W width, K compressibility):

1. Pressure profile in the nip region, from mass conservation between the
   rolls and :math:`P \propto \rho^K` (Johanson 1965; the form is read in
   the 2024 International Mineral Processing Congress proceedings, p. 1086,
   eq. 5, which reproduces it with a roll-surface profile depth added):

   .. math:: \frac{P(\theta)}{P_{max}} =
             \left[\frac{S/D}{(1 + S/D - \cos\theta)\cos\theta}\right]^K

2. Roll separating force per unit width (Johanson 1965; references.md §5;
   Reynolds et al. 2010 write it as :math:`P_{max} = 2F/(W D F_\theta)`,
   from memory):

   .. math:: \frac{F}{W} = R\,P_{max}\,F_\theta,\qquad
             F_\theta = \int_0^{\alpha} \frac{P(\theta)}{P_{max}}\cos\theta\,d\theta

3. Ribbon solid fraction from the peak pressure, Johanson's uniaxial
   compressibility relation :math:`P/P_0 = (\rho/\rho_0)^K` (Johanson 1965;
   form read in the same proceedings, eq. 6) with the reference state put at
   full density, so one constant remains:

   .. math:: \gamma_R = (P_{max}/C)^{1/K},\qquad \varepsilon_R = 1 - \gamma_R

   where C [MPa] is the pressure at which the power law would reach solid
   fraction 1 (the material's pressure constant).

What the model leaves out: roll speed (dwell time; Bindhumadhavan et al.
2005 found the theory does not capture it), powder leaking past the roll
edges and the side seals (cheek plates or rimmed rolls), the feed pressure
and screw feeding, the elastic recovery of the ribbon after the gap (the
ribbon solid fraction is taken equal to the at-gap one), roll-surface
texture, the density gradient across the ribbon width, and the
over-prediction of in-gap density by the one-dimensional theory
(Muliadi et al. 2012, Powder Technol. 221:90-100, abstract read). The
friction angles enter only through the nip angle; above a nip angle of
about 10 deg the force integral hardly depends on them (the integrand has
decayed), which the 2021 "virtual roller compactor" paper (Int. J. Pharm.
601:120579, abstract) also reports.

Lengths in mm at the interface, pressures in MPa, specific force in
kN/cm (1 kN/cm = 100 N/mm = 100 MPa mm).
"""

from __future__ import annotations

import functools

import numpy as np

from linkage.physics.compaction import _check_friction, _gradient_difference_times_radius, johanson_nu_deg

__all__ = [
    "DEFAULT_INTERNAL_FRICTION_DEG",
    "DEFAULT_WALL_FRICTION_DEG",
    "johanson_nip_angles_deg",
    "johanson_largest_gap_ratio",
    "johanson_pressure_profile_ratio",
    "johanson_force_integral",
    "johanson_specific_roll_force_kn_per_cm",
    "johanson_peak_pressure_mpa",
    "ribbon_solid_fraction_from_peak_pressure",
    "peak_pressure_for_solid_fraction_mpa",
    "johanson_ribbon_porosity",
    "johanson_roll_force_for_porosity_kn_per_cm",
    "fit_johanson_ribbon",
]

#: effective angle of internal friction used when none is measured [deg] (typical of pharmaceutical blends;
#: from memory, no source)
DEFAULT_INTERNAL_FRICTION_DEG = 40.0
#: wall friction angle used when none is measured [deg] (from memory, no source)
DEFAULT_WALL_FRICTION_DEG = 25.0

_SCAN_MAX_DEG = 45.0
_SCAN_STEP_DEG = 0.1
_BISECTIONS = 26
#: Gauss-Legendre nodes of the force integral (after the substitution theta = alpha u^2)
_GL_NODES = 96
#: specific force [kN/cm] per (roll radius [mm] x pressure [MPa]): 1 kN/cm = 100 N/mm
_MPA_MM_PER_KN_CM = 100.0


@functools.lru_cache(maxsize=1)
def _unit_nodes():
    """Gauss-Legendre nodes and weights on [0, 1] (computed once)."""
    u, w = np.polynomial.legendre.leggauss(_GL_NODES)
    return (u + 1) / 2, w / 2


def _positive(name, value):
    arr = np.asarray(value, dtype=float)
    if np.any(~(arr > 0)):
        raise ValueError(f"{name} must be positive")
    return arr


def _out(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def johanson_nip_angles_deg(roll_gap_mm, roll_diameter_mm, compressibility,
                            internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                            wall_friction_deg=DEFAULT_WALL_FRICTION_DEG):
    r"""Nip angle :math:`\alpha` for arrays of gaps, diameters and compressibilities.

    The same root as :func:`linkage.physics.compaction.johanson_nip_angle_deg`
    (slip- and nip-region pressure gradients equal, Johanson 1965), found for
    many lots at once: a scan from the gap up to 45 deg in 0.1 deg steps,
    then bisection on the first sign change. The roll radius divides both
    gradients, so only S/D, the friction angles and K matter.

    Parameters
    ----------
    roll_gap_mm, roll_diameter_mm : float or array-like
        Roll gap S and roll diameter D [mm]; broadcast together.
    compressibility : float or array-like
        Compressibility K [-]; broadcast with the geometry.
    internal_friction_deg, wall_friction_deg : float
        Effective angle of internal friction and wall friction angle [deg].

    Returns
    -------
    float or numpy.ndarray
        :math:`\alpha` [deg]; NaN where the gradients do not cross below 45 deg.

    References
    ----------
    Johanson J.R. (1965). A rolling theory for granular solids. ASME J. Appl.
    Mech. 32(4):842-848 (equations from memory, references.md §5).
    """
    _check_friction(internal_friction_deg, wall_friction_deg)
    s = _positive("roll_gap_mm", roll_gap_mm)
    d = _positive("roll_diameter_mm", roll_diameter_mm)
    k = _positive("compressibility", compressibility)
    s_d, k = np.broadcast_arrays(s / d, k)
    shape = s_d.shape
    s_d, k = s_d.reshape(-1, 1), k.reshape(-1, 1)
    delta = np.radians(internal_friction_deg)
    nu = np.radians(johanson_nu_deg(internal_friction_deg, wall_friction_deg))
    n_steps = int(round(_SCAN_MAX_DEG / _SCAN_STEP_DEG))
    grid = np.radians(np.linspace(_SCAN_STEP_DEG / 100, _SCAN_MAX_DEG, n_steps + 1))
    # one gap ratio for every row (the draws of K on one pair of rolls): its terms are computed once, not per row
    # (the same operations on the same numbers, so the same values; broadcast against K as before)
    s_scan = s_d[:1] if s_d.size and np.all(s_d == s_d[0, 0]) else s_d
    diff = _gradient_difference_times_radius(grid[None, :], s_scan, delta, nu, k)
    sign = np.sign(diff)
    change = sign[:, :-1] != sign[:, 1:]
    found = change.any(axis=1)
    first = np.argmax(change, axis=1)
    lo, hi = grid[first].copy(), grid[first + 1].copy()
    f_lo = np.take_along_axis(diff, first[:, None], axis=1)[:, 0]
    for _ in range(_BISECTIONS):  # vectorised bisection on the bracketing step
        mid = (lo + hi) / 2
        f_mid = _gradient_difference_times_radius(mid, s_d[:, 0], delta, nu, k[:, 0])
        same = np.sign(f_mid) == np.sign(f_lo)
        lo, f_lo = np.where(same, mid, lo), np.where(same, f_mid, f_lo)
        hi = np.where(same, hi, mid)
    alpha = np.where(found, np.degrees((lo + hi) / 2), np.nan)
    return _out(alpha.reshape(shape))


def johanson_largest_gap_ratio(compressibility, internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                               wall_friction_deg=DEFAULT_WALL_FRICTION_DEG) -> float:
    r"""The largest gap over roll diameter S/D at which the rolls still nip the material (a nip angle exists).

    The nip angle is where the nip-region gradient
    :math:`K (2\cos\theta - 1 - S/D) \tan\theta / ((1 + S/D - \cos\theta)\cos\theta)` reaches the
    slip-region one (:func:`johanson_nip_angles_deg`). Both share the factor :math:`1/(1 + S/D - \cos\theta)`,
    so whether they cross depends on S/D only through :math:`2\cos\theta - 1 - S/D`, which falls as S/D grows:
    the nip-region gradient is positive only below :math:`\arccos((1 + S/D)/2)` and never for S/D ≥ 1.
    Above the ratio returned, the nip-region gradient stays under the slip-region one at every angle: the
    theory gives no nip angle, hence no roll force. Found by bisection on S/D in (0, 1) (the scan of
    :func:`johanson_nip_angles_deg` decides each step); 0 when even a vanishing gap gives no nip.

    Parameters
    ----------
    compressibility : float
        Compressibility K [-].
    internal_friction_deg, wall_friction_deg : float
        Effective angle of internal friction and wall friction angle [deg].

    Returns
    -------
    float
        The largest S/D with a nip [-] (to 1e-6).
    """
    def nips(ratio: float) -> bool:
        return bool(np.isfinite(johanson_nip_angles_deg(ratio, 1.0, compressibility, internal_friction_deg,
                                                        wall_friction_deg)))

    lo, hi = 1e-9, 1.0
    if not nips(lo):
        return 0.0
    while hi - lo > 1e-6:
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if nips(mid) else (lo, mid)
    return lo


def johanson_pressure_profile_ratio(theta_deg, roll_gap_mm, roll_diameter_mm, compressibility):
    r"""Pressure in the nip region over the peak pressure at the gap.

    .. math:: \frac{P(\theta)}{P_{max}} =
              \left[\frac{S/D}{(1 + S/D - \cos\theta)\cos\theta}\right]^K

    Parameters
    ----------
    theta_deg : float or array-like
        Angular position from the gap [deg], between 0 and the nip angle.
    roll_gap_mm, roll_diameter_mm : float or array-like
        Roll gap S and diameter D [mm].
    compressibility : float or array-like
        Compressibility K [-].

    Returns
    -------
    float or numpy.ndarray
        :math:`P(\theta)/P_{max}` [-], 1 at the gap, falling towards the nip.

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (references.md
    §5, from memory); form read in Proc. XXXI Int. Mineral Processing
    Congress (2024), p. 1086, eq. 5.
    """
    s = _positive("roll_gap_mm", roll_gap_mm)
    d = _positive("roll_diameter_mm", roll_diameter_mm)
    k = _positive("compressibility", compressibility)
    theta = np.radians(np.asarray(theta_deg, dtype=float))
    s_d = s / d
    return _out((s_d / ((1 + s_d - np.cos(theta)) * np.cos(theta))) ** k)


def johanson_force_integral(nip_angle_deg, roll_gap_mm, roll_diameter_mm, compressibility):
    r"""Johanson's force factor :math:`F_\theta = \int_0^\alpha (P/P_{max}) \cos\theta\, d\theta`.

    Computed by Gauss-Legendre quadrature after the substitution
    :math:`\theta = \alpha u^2`, which gathers the nodes near the gap where
    the pressure peaks (checked against :func:`scipy.integrate.quad` in the
    tests).

    Parameters
    ----------
    nip_angle_deg : float or array-like
        Nip angle :math:`\alpha` [deg].
    roll_gap_mm, roll_diameter_mm : float or array-like
        Roll gap S and diameter D [mm].
    compressibility : float or array-like
        Compressibility K [-].

    Returns
    -------
    float or numpy.ndarray
        :math:`F_\theta` [rad]; NaN where the nip angle is NaN.

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (references.md
    §5, from memory).
    """
    s = _positive("roll_gap_mm", roll_gap_mm)
    d = _positive("roll_diameter_mm", roll_diameter_mm)
    k = _positive("compressibility", compressibility)
    alpha = np.radians(np.asarray(nip_angle_deg, dtype=float))
    alpha, s_d, k = np.broadcast_arrays(alpha, s / d, k)
    u, w = _unit_nodes()
    theta = alpha[..., None] * u ** 2
    ratio = (s_d[..., None] / ((1 + s_d[..., None] - np.cos(theta)) * np.cos(theta))) ** k[..., None]
    out = np.sum(w * ratio * np.cos(theta) * 2 * alpha[..., None] * u, axis=-1)  # d theta = 2 alpha u du
    return _out(out)


def _force_factor_mm(roll_gap_mm, roll_diameter_mm, compressibility, internal_friction_deg, wall_friction_deg):
    """R * F_theta [mm]: specific force per peak pressure, in MPa mm per MPa."""
    alpha = johanson_nip_angles_deg(roll_gap_mm, roll_diameter_mm, compressibility, internal_friction_deg,
                                    wall_friction_deg)
    return np.asarray(roll_diameter_mm, dtype=float) / 2 * np.asarray(
        johanson_force_integral(alpha, roll_gap_mm, roll_diameter_mm, compressibility))


def johanson_specific_roll_force_kn_per_cm(peak_pressure_mpa, roll_gap_mm, roll_diameter_mm, compressibility,
                                           internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                                           wall_friction_deg=DEFAULT_WALL_FRICTION_DEG):
    r"""Roll separating force per unit roll width from the peak pressure.

    .. math:: F/W = \frac{D}{2}\,P_{max}\int_0^{\alpha}
              \left[\frac{S/D}{(1 + S/D - \cos\theta)\cos\theta}\right]^K\cos\theta\,d\theta

    divided by 100 to go from N/mm to kN/cm.

    Parameters
    ----------
    peak_pressure_mpa : float or array-like
        Peak pressure at the gap :math:`P_{max}` [MPa].
    roll_gap_mm, roll_diameter_mm : float or array-like
        Roll gap S and diameter D [mm].
    compressibility : float or array-like
        Compressibility K [-].
    internal_friction_deg, wall_friction_deg : float
        Friction angles [deg] for the nip angle (defaults from memory).

    Returns
    -------
    float or numpy.ndarray
        Specific roll force [kN/cm]; multiply by the roll width [cm] for the
        total separating force [kN].

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848; references.md §5
    ("roll separating force per roll", from memory). Reynolds G., Ingale R.,
    Roberts R., Kothari S., Gururajan B. (2010). Practical application of
    roller compaction process modeling. Comput. Chem. Eng. 34:1049-1057
    (from memory).
    """
    p = _positive("peak_pressure_mpa", peak_pressure_mpa)
    factor = _force_factor_mm(roll_gap_mm, roll_diameter_mm, compressibility, internal_friction_deg,
                              wall_friction_deg)
    return _out(p * factor / _MPA_MM_PER_KN_CM)


def johanson_peak_pressure_mpa(roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm, compressibility,
                               internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                               wall_friction_deg=DEFAULT_WALL_FRICTION_DEG):
    r"""Peak pressure at the gap from the specific roll force (inverse of the force integral).

    .. math:: P_{max} = \frac{2\,(F/W)}{D\,F_\theta}

    Parameters
    ----------
    roll_force_kn_per_cm : float or array-like
        Specific roll force F/W [kN/cm].
    roll_gap_mm, roll_diameter_mm : float or array-like
        Roll gap S and diameter D [mm].
    compressibility : float or array-like
        Compressibility K [-].
    internal_friction_deg, wall_friction_deg : float
        Friction angles [deg].

    Returns
    -------
    float or numpy.ndarray
        :math:`P_{max}` [MPa].

    References
    ----------
    Johanson J.R. (1965); Reynolds et al. (2010), see
    :func:`johanson_specific_roll_force_kn_per_cm` (from memory).
    """
    f = _positive("roll_force_kn_per_cm", roll_force_kn_per_cm)
    factor = _force_factor_mm(roll_gap_mm, roll_diameter_mm, compressibility, internal_friction_deg,
                              wall_friction_deg)
    return _out(f * _MPA_MM_PER_KN_CM / factor)


def ribbon_solid_fraction_from_peak_pressure(peak_pressure_mpa, compressibility, pressure_constant_mpa):
    r"""Ribbon solid fraction from the peak pressure, :math:`\gamma = (P_{max}/C)^{1/K}`.

    Johanson's compressibility relation :math:`P/P_0 = (\rho/\rho_0)^K` with
    the reference state at full density (:math:`C = P_0 (\rho_{true}/\rho_0)^K`).

    Parameters
    ----------
    peak_pressure_mpa : float or array-like
        Peak pressure [MPa].
    compressibility : float or array-like
        Compressibility K [-].
    pressure_constant_mpa : float or array-like
        Pressure C [MPa] at which the power law reaches solid fraction 1.

    Returns
    -------
    float or numpy.ndarray
        Solid fraction [-]; at the pressure constant it is 1 (the power law is
        not meant to be used that far).

    References
    ----------
    Johanson J.R. (1965). ASME J. Appl. Mech. 32(4):842-848 (from memory);
    form read in Proc. XXXI Int. Mineral Processing Congress (2024), p. 1086,
    eq. 6.
    """
    p = _positive("peak_pressure_mpa", peak_pressure_mpa)
    k = _positive("compressibility", compressibility)
    c = _positive("pressure_constant_mpa", pressure_constant_mpa)
    return _out((p / c) ** (1 / k))


def peak_pressure_for_solid_fraction_mpa(solid_fraction, compressibility, pressure_constant_mpa):
    r"""Peak pressure that gives a solid fraction, :math:`P_{max} = C\,\gamma^K`.

    Inverse of :func:`ribbon_solid_fraction_from_peak_pressure`.

    Parameters
    ----------
    solid_fraction : float or array-like
        Ribbon solid fraction [-], in (0, 1].
    compressibility : float or array-like
        Compressibility K [-].
    pressure_constant_mpa : float or array-like
        Pressure constant C [MPa].

    Returns
    -------
    float or numpy.ndarray
        Peak pressure [MPa].

    References
    ----------
    As :func:`ribbon_solid_fraction_from_peak_pressure`.
    """
    g = np.asarray(solid_fraction, dtype=float)
    if np.any(~((g > 0) & (g <= 1))):
        raise ValueError("solid_fraction must lie in (0, 1]")
    k = _positive("compressibility", compressibility)
    c = _positive("pressure_constant_mpa", pressure_constant_mpa)
    return _out(c * g ** k)


def johanson_ribbon_porosity(roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm, compressibility,
                             pressure_constant_mpa, internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                             wall_friction_deg=DEFAULT_WALL_FRICTION_DEG):
    r"""Ribbon porosity from the specific roll force, gap and roll diameter.

    .. math:: \varepsilon_R = 1 - \left(\frac{2\,(F/W)}{D\,F_\theta\,C}\right)^{1/K}

    (equations 2 and 3 of the module docstring). Roll width cancels in the
    specific force; roll speed, leakage, side seals and elastic recovery are
    left out.

    Parameters
    ----------
    roll_force_kn_per_cm : float or array-like
        Specific roll force [kN/cm].
    roll_gap_mm, roll_diameter_mm : float or array-like
        Roll gap and diameter [mm].
    compressibility : float or array-like
        Compressibility K [-].
    pressure_constant_mpa : float or array-like
        Pressure constant C [MPa].
    internal_friction_deg, wall_friction_deg : float
        Friction angles [deg].

    Returns
    -------
    float or numpy.ndarray
        Ribbon porosity [-].

    References
    ----------
    Johanson (1965); Reynolds et al. (2010) (from memory), see the module
    docstring.
    """
    p = johanson_peak_pressure_mpa(roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm, compressibility,
                                   internal_friction_deg, wall_friction_deg)
    return _out(1 - np.asarray(ribbon_solid_fraction_from_peak_pressure(p, compressibility,
                                                                        pressure_constant_mpa)))


def johanson_roll_force_for_porosity_kn_per_cm(ribbon_porosity, roll_gap_mm, roll_diameter_mm, compressibility,
                                               pressure_constant_mpa,
                                               internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                                               wall_friction_deg=DEFAULT_WALL_FRICTION_DEG):
    r"""Specific roll force that gives a ribbon porosity on rolls of a given diameter and gap.

    .. math:: F/W = \frac{D}{2}\,F_\theta\,C\,(1 - \varepsilon_R)^K / 100

    the inverse of :func:`johanson_ribbon_porosity`: the peak pressure is held
    (same ribbon), the force follows the roll geometry.

    Parameters
    ----------
    ribbon_porosity : float or array-like
        Target ribbon porosity [-], in [0, 1).
    roll_gap_mm, roll_diameter_mm, compressibility, pressure_constant_mpa, internal_friction_deg, wall_friction_deg
        Of the target compactor and the material, as in :func:`johanson_ribbon_porosity`.

    Returns
    -------
    float or numpy.ndarray
        Specific roll force [kN/cm].

    References
    ----------
    Johanson (1965); Reynolds et al. (2010) (from memory), see the module
    docstring.
    """
    eps = np.asarray(ribbon_porosity, dtype=float)
    if np.any(~((eps >= 0) & (eps < 1))):
        raise ValueError("ribbon_porosity must lie in [0, 1)")
    p = peak_pressure_for_solid_fraction_mpa(1 - eps, compressibility, pressure_constant_mpa)
    return johanson_specific_roll_force_kn_per_cm(p, roll_gap_mm, roll_diameter_mm, compressibility,
                                                  internal_friction_deg, wall_friction_deg)


def fit_johanson_ribbon(roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm, ribbon_porosity,
                        internal_friction_deg=DEFAULT_INTERNAL_FRICTION_DEG,
                        wall_friction_deg=DEFAULT_WALL_FRICTION_DEG, compressibility_bounds=(1.2, 60.0)):
    r"""Fit the compressibility K and pressure constant C to lots of any compactors at once.

    Least squares on the ribbon porosity (:func:`johanson_ribbon_porosity`,
    each lot with its own gap and roll diameter) over :math:`\ln K` and
    :math:`\ln C` with :func:`scipy.optimize.least_squares`. The covariance of
    the log parameters is :math:`s^2 (J^T J)^{-1}` at the optimum, with
    :math:`s^2` the residual sum of squares over n - 2 (Gauss-Newton
    approximation; Bates & Watts 1988, Nonlinear Regression Analysis, ch. 2,
    from memory).

    Parameters
    ----------
    roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm, ribbon_porosity : array-like
        One value per lot: specific roll force [kN/cm], gap [mm], roll
        diameter [mm], measured ribbon porosity [-].
    internal_friction_deg, wall_friction_deg : float
        Friction angles [deg] for the nip angle (held, not fitted).
    compressibility_bounds : (float, float)
        Bounds on K [-].

    Returns
    -------
    dict
        ``compressibility``, ``pressure_constant_mpa``, ``log_params`` (ln K,
        ln C), ``log_covariance`` (2 x 2), ``residual_sd`` (porosity, n - 2
        degrees of freedom), ``n_lots``, ``success``.

    Raises
    ------
    ValueError
        With fewer than 3 lots, or a porosity outside (0, 1).
    """
    from scipy.optimize import least_squares

    f, s, d, eps = (np.asarray(x, dtype=float).ravel() for x in
                    (roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm, ribbon_porosity))
    if not f.size == s.size == d.size == eps.size:
        raise ValueError("roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm and ribbon_porosity need one value "
                         "per lot each")
    if f.size < 3:
        raise ValueError(f"fitting K and C needs at least 3 lots; got {f.size}")
    for name, x in (("roll_force_kn_per_cm", f), ("roll_gap_mm", s), ("roll_diameter_mm", d)):
        _positive(name, x)
    if np.any(~((eps > 0) & (eps < 1))):
        raise ValueError("ribbon_porosity must lie in (0, 1)")
    k_lo, k_hi = compressibility_bounds

    def porosity(params):
        k, c = np.exp(params)
        return np.asarray(johanson_ribbon_porosity(f, s, d, k, c, internal_friction_deg, wall_friction_deg))

    k0 = 6.0  # start: K of a typical excipient (from memory), C from the median lot
    p0 = np.asarray(johanson_peak_pressure_mpa(f, s, d, k0, internal_friction_deg, wall_friction_deg))
    c0 = float(np.median(p0 / (1 - eps) ** k0))
    fit = least_squares(lambda p: porosity(p) - eps, x0=[np.log(k0), np.log(c0)],
                        bounds=([np.log(k_lo), np.log(1e-3)], [np.log(k_hi), np.log(1e9)]), x_scale="jac")
    dof = max(f.size - 2, 1)
    s2 = float(np.sum(fit.fun ** 2) / dof)
    jtj = fit.jac.T @ fit.jac
    cov = s2 * np.linalg.pinv(jtj)
    k, c = np.exp(fit.x)
    return {"compressibility": float(k), "pressure_constant_mpa": float(c), "log_params": fit.x.copy(),
            "log_covariance": cov, "residual_sd": float(np.sqrt(s2)), "n_lots": int(f.size),
            "success": bool(fit.success)}
