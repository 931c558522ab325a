"""Tensile strength of tablets and ribbons from breaking forces.

Units: forces in newtons, lengths in millimetres, stresses in MPa
(1 MPa = 1 N/mm^2, so no conversion factors appear).

All functions take scalars or array-likes and return a float for scalar
input, a numpy array otherwise. NaN passes through as NaN.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "tensile_strength_flat_mpa",
    "tensile_strength_convex_mpa",
    "tensile_strength_mpa",
    "tensile_strength_method",
    "breaking_force_flat_n",
    "ribbon_tensile_strength_mpa",
]

FELL_NEWTON = "fell_newton_1970"
PITT = "pitt_1988"


def _out(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def _positive(name, value):
    x = np.asarray(value, dtype=float)
    if np.any(x <= 0):
        raise ValueError(f"{name} must be positive; got {x[x <= 0].ravel()[0]!r}")
    return x


def _non_negative(name, value):
    x = np.asarray(value, dtype=float)
    if np.any(x < 0):
        raise ValueError(f"{name} cannot be negative; got {x[x < 0].ravel()[0]!r}")
    return x


def tensile_strength_flat_mpa(breaking_force_n, diameter_mm, thickness_mm):
    r"""Tensile strength of a flat-faced round tablet, diametral compression.

    .. math:: \sigma_t = \frac{2F}{\pi D t}

    Parameters
    ----------
    breaking_force_n : float or array-like
        Diametral breaking force F [N].
    diameter_mm : float or array-like
        Tablet diameter D [mm].
    thickness_mm : float or array-like
        Tablet thickness t [mm].

    Returns
    -------
    float or numpy.ndarray
        Tensile strength [MPa].

    Raises
    ------
    ValueError
        If the force is negative or a dimension is zero or negative.

    Notes
    -----
    The result is a tensile strength only when the tablet breaks in tension
    along the loaded diameter; check the failure mode (Fell & Newton 1970).

    References
    ----------
    Fell J.T., Newton J.M. (1970). Determination of tablet strength by the
    diametral-compression test. J. Pharm. Sci. 59(5):688-691.
    doi:10.1002/jps.2600590523
    """
    f = _non_negative("breaking_force_n", breaking_force_n)
    d = _positive("diameter_mm", diameter_mm)
    t = _positive("thickness_mm", thickness_mm)
    return _out(2.0 * f / (np.pi * d * t))  # Fell & Newton (1970): sigma = 2F / (pi D t)


def tensile_strength_convex_mpa(breaking_force_n, diameter_mm, thickness_mm, band_thickness_mm):
    r"""Tensile strength of a doubly-convex round tablet, diametral compression.

    .. math::

        \sigma_t = \frac{10 F}{\pi D^2}
        \left(2.84 \frac{t}{D} - 0.126 \frac{t}{W} + 3.15 \frac{W}{D}
        + 0.01\right)^{-1}

    Parameters
    ----------
    breaking_force_n : float or array-like
        Diametral breaking force F [N].
    diameter_mm : float or array-like
        Tablet diameter D [mm].
    thickness_mm : float or array-like
        Overall thickness t, crown to crown [mm].
    band_thickness_mm : float or array-like
        Thickness W of the cylindrical band (wall) [mm], at most t.

    Returns
    -------
    float or numpy.ndarray
        Tensile strength [MPa].

    Raises
    ------
    ValueError
        If the force is negative, a dimension is zero or negative, or the
        band is thicker than the tablet.

    Notes
    -----
    The equation is an empirical fit for doubly-convex discs; it does not
    reduce to Fell & Newton when t = W (it gives about 12 % less), so do not
    use it for flat tablets. For elongated
    (capsule or oval) convex tablets Pitt & Heasley (2013) multiply it by 2/3
    with D the short-axis width.

    References
    ----------
    Pitt K.G., Newton J.M., Stanley P. (1988). Tensile fracture of
    doubly-convex cylindrical discs under diametral loading. J. Mater. Sci.
    23:2723-2728 (citation details from memory).
    Pitt K.G., Heasley M.G. (2013). Determination of the tensile strength of
    elongated tablets. Powder Technol. 238:169-175 (quotes the equation).
    """
    f = _non_negative("breaking_force_n", breaking_force_n)
    d = _positive("diameter_mm", diameter_mm)
    t = _positive("thickness_mm", thickness_mm)
    w = _positive("band_thickness_mm", band_thickness_mm)
    t_b, w_b = np.broadcast_arrays(t, w)
    if np.any(w_b > t_b):
        raise ValueError("band_thickness_mm cannot exceed thickness_mm")
    bracket = 2.84 * t / d - 0.126 * t / w + 3.15 * w / d + 0.01
    # Pitt, Newton & Stanley (1988), as quoted by Pitt & Heasley (2013)
    return _out(10.0 * f / (np.pi * d**2) / bracket)


def _flat_mask(cup):
    return np.isnan(cup) | (cup == 0)


def tensile_strength_method(cup_depth_mm):
    """Which tensile-strength equation :func:`tensile_strength_mpa` uses.

    Parameters
    ----------
    cup_depth_mm : float or array-like
        Depth of each convex face [mm]; 0 or NaN for flat-faced.

    Returns
    -------
    str or numpy.ndarray of str
        ``"fell_newton_1970"`` where the cup depth is 0 or NaN,
        ``"pitt_1988"`` otherwise.

    Raises
    ------
    ValueError
        If a cup depth is negative.
    """
    cup = _non_negative("cup_depth_mm", cup_depth_mm)
    methods = np.where(_flat_mask(cup), FELL_NEWTON, PITT)
    return str(methods) if methods.ndim == 0 else methods


def tensile_strength_mpa(breaking_force_n, diameter_mm, thickness_mm, cup_depth_mm=0.0):
    r"""Tensile strength of round tablets, flat or convex, element by element.

    Flat-faced tablets (cup depth 0 or NaN) use Fell & Newton (1970),

    .. math:: \sigma_t = 2F / (\pi D t),

    convex tablets Pitt, Newton & Stanley (1988) with the band thickness
    :math:`W = t - 2 c` for the cup depth :math:`c` of each face (see
    :func:`tensile_strength_convex_mpa`). :func:`tensile_strength_method`
    tells which one was used.

    Parameters
    ----------
    breaking_force_n : float or array-like
        Diametral breaking force [N].
    diameter_mm : float or array-like
        Tablet diameter [mm].
    thickness_mm : float or array-like
        Overall thickness [mm].
    cup_depth_mm : float or array-like, default 0
        Depth of each convex face [mm]; 0 or NaN for flat-faced.

    Returns
    -------
    float or numpy.ndarray
        Tensile strength [MPa].

    Raises
    ------
    ValueError
        As the two equations; also if a cup depth is negative or two cups
        leave no band (2 c >= t).

    References
    ----------
    Fell J.T., Newton J.M. (1970). J. Pharm. Sci. 59(5):688-691.
    Pitt K.G., Newton J.M., Stanley P. (1988). J. Mater. Sci. 23:2723-2728.
    """
    f = _non_negative("breaking_force_n", breaking_force_n)
    d = _positive("diameter_mm", diameter_mm)
    t = _positive("thickness_mm", thickness_mm)
    cup = _non_negative("cup_depth_mm", cup_depth_mm)
    f, d, t, cup = np.broadcast_arrays(f, d, t, cup)
    flat = _flat_mask(cup)
    band = t - 2.0 * cup  # W = t - 2 c
    if np.any(~flat & (band <= 0)):
        raise ValueError("cup_depth_mm too large: 2 * cup_depth_mm must be less than thickness_mm")
    safe_band = np.where(flat, t, band)
    flat_ts = tensile_strength_flat_mpa(f, d, t)
    convex_ts = tensile_strength_convex_mpa(f, d, t, safe_band)
    return _out(np.where(flat, flat_ts, convex_ts))


def breaking_force_flat_n(tensile_strength_mpa, diameter_mm, thickness_mm):
    r"""Breaking force of a flat-faced round tablet at a given tensile strength.

    The inverse of Fell & Newton (1970):

    .. math:: F = \sigma_t \pi D t / 2

    Parameters
    ----------
    tensile_strength_mpa : float or array-like
        Tensile strength [MPa].
    diameter_mm : float or array-like
        Tablet diameter [mm].
    thickness_mm : float or array-like
        Tablet thickness [mm].

    Returns
    -------
    float or numpy.ndarray
        Breaking force [N].

    Raises
    ------
    ValueError
        If the strength is negative or a dimension is zero or negative.

    References
    ----------
    Fell J.T., Newton J.M. (1970). J. Pharm. Sci. 59(5):688-691.
    """
    s = _non_negative("tensile_strength_mpa", tensile_strength_mpa)
    d = _positive("diameter_mm", diameter_mm)
    t = _positive("thickness_mm", thickness_mm)
    return _out(s * np.pi * d * t / 2.0)  # F = sigma pi D t / 2 (Fell & Newton 1970 inverted)


def ribbon_tensile_strength_mpa(break_force_n, span_mm, width_mm, thickness_mm):
    r"""Flexural (three-point bend) strength of a rectangular ribbon piece.

    .. math:: \sigma_f = \frac{3 F L}{2 b h^2}

    the largest tensile stress, at the lower face under the load, of a simply
    supported beam of rectangular section loaded at mid-span.

    Parameters
    ----------
    break_force_n : float or array-like
        Load at fracture F [N].
    span_mm : float or array-like
        Distance between the supports L [mm].
    width_mm : float or array-like
        Specimen width b [mm].
    thickness_mm : float or array-like
        Specimen thickness (depth) h [mm].

    Returns
    -------
    float or numpy.ndarray
        Flexural strength [MPa].

    Raises
    ------
    ValueError
        If the force is negative or a dimension is zero or negative.

    Notes
    -----
    Simple beam theory: the mid-span bending moment is F L / 4 and the
    section modulus b h^2 / 6. It assumes linear elasticity up to fracture
    and a span long against the thickness; ribbons of uneven thickness break
    at their thinnest section. The name says tensile strength because the
    value is the peak tensile stress at fracture; it is not comparable with a
    diametral tablet tensile strength, so compare ribbons with ribbons.

    References
    ----------
    ASTM D790. Standard test methods for flexural properties of unreinforced
    and reinforced plastics and electrical insulating materials (flexural
    stress equation for three-point loading; read in a secondary
    reproduction, not in the standard itself).
    ISO 178. Plastics - Determination of flexural properties (same equation;
    from memory).
    """
    f = _non_negative("break_force_n", break_force_n)
    span_ = _positive("span_mm", span_mm)
    b = _positive("width_mm", width_mm)
    h = _positive("thickness_mm", thickness_mm)
    return _out(3.0 * f * span_ / (2.0 * b * h**2))  # sigma_f = 3 F L / (2 b h^2), ASTM D790 three-point formula
