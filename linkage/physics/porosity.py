"""Solid fraction and porosity of ribbons from density measurements.

Glossary (the same names are used as table columns):

- ``envelope_density_g_cm3`` [g/cm^3]: mass over the volume inside the
  particle's or ribbon's outer surface, pores included (powder displacement
  or calliper measurement).
- ``skeletal_density_g_cm3`` [g/cm^3]: mass over the volume of solid only,
  as measured by gas pycnometry ("true" density).
- ``solid_fraction`` [-] and ``porosity`` [-]: fractions between 0 and 1.

All functions take scalars or array-likes and return a float for scalar
input, a numpy array otherwise. NaN passes through as NaN.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "solid_fraction",
    "porosity",
    "envelope_density_g_cm3",
    "true_density_of_mixture_g_cm3",
    "at_gap_density_kg_m3",
]


def _out(x):
    """Float for a 0-d result, numpy array otherwise."""
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def _check_positive(name, x):
    if np.any(x <= 0):
        raise ValueError(f"{name} must be positive; got {x[x <= 0].ravel()[0]!r}")


def _check_non_negative(name, x):
    if np.any(x < 0):
        raise ValueError(f"{name} cannot be negative; got {x[x < 0].ravel()[0]!r}")


def _check_densities(envelope, skeletal):
    _check_positive("envelope_density_g_cm3", envelope)
    _check_positive("skeletal_density_g_cm3", skeletal)
    env_b, skel_b = np.broadcast_arrays(envelope, skeletal)
    above = env_b > skel_b
    if np.any(above):
        i = np.flatnonzero(above)[0]
        raise ValueError(
            "envelope_density_g_cm3 cannot exceed skeletal_density_g_cm3 "
            f"(got {env_b.ravel()[i]!r} > {skel_b.ravel()[i]!r}); "
            "this usually means a pycnometer or volume error"
        )


def solid_fraction(envelope_density_g_cm3, skeletal_density_g_cm3):
    r"""Solid fraction (relative density) of a porous body.

    .. math:: SF = \rho_{env} / \rho_{true}

    Parameters
    ----------
    envelope_density_g_cm3 : float or array-like
        Envelope (apparent) density, pores included [g/cm^3].
    skeletal_density_g_cm3 : float or array-like
        Skeletal (true) density from gas pycnometry [g/cm^3].

    Returns
    -------
    float or numpy.ndarray
        Solid fraction [-], in (0, 1].

    Raises
    ------
    ValueError
        If a density is zero or negative, or an envelope density exceeds the
        skeletal density (a body cannot be denser than its solid).

    Notes
    -----
    The definition is standard; a tablet's solid fraction is its density over
    the pore-free particle density (Solids Development trade note on solid
    fraction and porosity). Any consistent density unit works, since only
    the ratio enters.

    References
    ----------
    Akseli I., Iyer S., Lee H.P., Cuitino A.M. (2011). A quantitative
    correlation of the effect of density distributions in roller-compacted
    ribbons on the mechanical properties of tablets using ultrasonics and
    X-ray tomography. AAPS PharmSciTech 12(3):834-853.
    doi:10.1208/s12249-011-9640-z
    """
    env = np.asarray(envelope_density_g_cm3, dtype=float)
    skel = np.asarray(skeletal_density_g_cm3, dtype=float)
    _check_densities(env, skel)
    return _out(env / skel)  # SF = rho_env / rho_true


def porosity(envelope_density_g_cm3, skeletal_density_g_cm3):
    r"""Porosity of a porous body from envelope and skeletal density.

    .. math:: \varepsilon = 1 - \rho_{env} / \rho_{true}

    Parameters
    ----------
    envelope_density_g_cm3 : float or array-like
        Envelope (apparent) density, pores included [g/cm^3].
    skeletal_density_g_cm3 : float or array-like
        Skeletal (true) density from gas pycnometry [g/cm^3].

    Returns
    -------
    float or numpy.ndarray
        Porosity [-], in [0, 1). NaN where an input is NaN.

    Raises
    ------
    ValueError
        If a density is zero or negative, or an envelope density exceeds the
        skeletal density.

    References
    ----------
    Akseli I. et al. (2011). AAPS PharmSciTech 12(3):834-853 (solid fraction
    and porosity of roller-compacted ribbons). doi:10.1208/s12249-011-9640-z
    """
    env = np.asarray(envelope_density_g_cm3, dtype=float)
    skel = np.asarray(skeletal_density_g_cm3, dtype=float)
    _check_densities(env, skel)
    return _out(1.0 - env / skel)  # eps = 1 - SF


def envelope_density_g_cm3(mass_g, length_cm, width_cm, thickness_cm):
    r"""Geometric envelope density of a rectangular ribbon piece.

    .. math:: \rho_{env} = m / (L \cdot W \cdot T)

    Parameters
    ----------
    mass_g : float or array-like
        Mass of the piece [g].
    length_cm, width_cm, thickness_cm : float or array-like
        Dimensions of the piece [cm].

    Returns
    -------
    float or numpy.ndarray
        Envelope density [g/cm^3].

    Raises
    ------
    ValueError
        If the mass or a dimension is zero or negative.

    Notes
    -----
    The calliper method assumes a rectangular block; ribbon edges that are
    thinner than the centre make the result low.

    References
    ----------
    Nkansah P. et al. (2008). A novel method for estimating solid fraction of
    roller-compacted ribbons. Drug Dev. Ind. Pharm. (volume and pages not
    read).
    """
    m = np.asarray(mass_g, dtype=float)
    dims = {
        "length_cm": np.asarray(length_cm, dtype=float),
        "width_cm": np.asarray(width_cm, dtype=float),
        "thickness_cm": np.asarray(thickness_cm, dtype=float),
    }
    _check_positive("mass_g", m)
    for name, value in dims.items():
        _check_positive(name, value)
    volume_cm3 = dims["length_cm"] * dims["width_cm"] * dims["thickness_cm"]
    return _out(m / volume_cm3)  # rho_env = m / (L W T)


def true_density_of_mixture_g_cm3(mass_fractions, true_densities_g_cm3):
    r"""Skeletal density of a blend from its components (volume additivity).

    .. math:: 1/\rho_{true} = \sum_i w_i / \rho_{true,i}

    Parameters
    ----------
    mass_fractions : array-like
        Mass fraction of each component [-]; must sum to 1 (within 1e-6).
        A 2-D array is read as one blend per row.
    true_densities_g_cm3 : array-like
        Skeletal density of each component [g/cm^3], same shape (or
        broadcastable to it).

    Returns
    -------
    float or numpy.ndarray
        Skeletal density of the blend [g/cm^3]; one value per row for 2-D
        input.

    Raises
    ------
    ValueError
        If a fraction is negative, the fractions do not sum to 1, or a
        density is zero or negative.

    Notes
    -----
    Volumes of the components are assumed to add with no change on mixing,
    so 1 g of blend occupies :math:`\sum_i w_i/\rho_i` cm^3. This is the
    usual assumption for dry powder blends; no source states it for
    pharmaceutical blends in particular (common practice, no source).
    """
    w = np.asarray(mass_fractions, dtype=float)
    rho = np.asarray(true_densities_g_cm3, dtype=float)
    if w.ndim == 0:
        raise ValueError("mass_fractions must be a sequence, one value per component")
    _check_non_negative("mass_fractions", w)
    _check_positive("true_densities_g_cm3", rho)
    try:
        w, rho = np.broadcast_arrays(w, rho)
    except ValueError:
        raise ValueError(
            "mass_fractions and true_densities_g_cm3 must have the same length "
            f"(got shapes {w.shape} and {rho.shape})"
        ) from None
    total = w.sum(axis=-1)
    if not np.all(np.isclose(total, 1.0, rtol=0.0, atol=1e-6)):
        raise ValueError(f"mass_fractions must sum to 1; got {np.ravel(total)[0]!r}")
    return _out(1.0 / np.sum(w / rho, axis=-1))  # 1/rho = sum(w_i / rho_i)


def at_gap_density_kg_m3(mass_flow_kg_h, roll_width_mm, roll_gap_mm,
                         roll_diameter_mm, roll_speed_rpm):
    r"""Density of the compact in the roll gap from a mass balance.

    .. math::

        \rho_{gap} = \dot m / (W \cdot S \cdot u), \qquad u = \pi D N

    with the roll surface speed :math:`u` and :math:`N` in revolutions per
    second.

    Parameters
    ----------
    mass_flow_kg_h : float or array-like
        Ribbon mass throughput [kg/h].
    roll_width_mm : float or array-like
        Roll width W [mm].
    roll_gap_mm : float or array-like
        Roll gap S [mm].
    roll_diameter_mm : float or array-like
        Roll diameter D [mm].
    roll_speed_rpm : float or array-like
        Roll speed N [rev/min].

    Returns
    -------
    float or numpy.ndarray
        At-gap density [kg/m^3]. Divide by 1000 for g/cm^3.

    Raises
    ------
    ValueError
        If the mass flow is negative or a geometry value or the speed is zero
        or negative.

    Notes
    -----
    The compact is measured under load in the gap, so the at-gap density is
    slightly above the density of the relaxed ribbon (Solids Development trade
    note on at-gap density). Material leaking past the roll edges makes the
    result high.

    References
    ----------
    Toson P. et al. (2019). Model-based approach to the design of
    pharmaceutical roller-compaction processes. Int. J. Pharm. X 1:100005.
    """
    m_dot = np.asarray(mass_flow_kg_h, dtype=float)
    _check_non_negative("mass_flow_kg_h", m_dot)
    geometry = {
        "roll_width_mm": np.asarray(roll_width_mm, dtype=float),
        "roll_gap_mm": np.asarray(roll_gap_mm, dtype=float),
        "roll_diameter_mm": np.asarray(roll_diameter_mm, dtype=float),
        "roll_speed_rpm": np.asarray(roll_speed_rpm, dtype=float),
    }
    for name, value in geometry.items():
        _check_positive(name, value)
    m_dot_kg_s = m_dot / 3600.0
    width_m = geometry["roll_width_mm"] / 1000.0
    gap_m = geometry["roll_gap_mm"] / 1000.0
    surface_speed_m_s = np.pi * geometry["roll_diameter_mm"] / 1000.0 * geometry["roll_speed_rpm"] / 60.0  # u = pi D N
    return _out(m_dot_kg_s / (width_m * gap_m * surface_speed_m_s))  # rho = m_dot / (W S u)
