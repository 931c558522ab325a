"""Particle size of milled granules from a sieve analysis.

A sieve analysis is given in long form: the mass retained on each aperture
``sieve_um`` [um], with aperture 0 for the pan. The cumulative undersize
Q3(x) [% by mass] at aperture x is the share of the sample that passed x.
Percentile sizes (d10, d50, d90) are read off that curve by interpolation;
the Rosin-Rammler-Sperling-Bennett (RRSB) distribution is the usual
two-parameter model fitted to it.

All functions take scalars or array-likes and return a float for scalar
input, a numpy array otherwise.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "cumulative_undersize_pct",
    "percentile_size_um",
    "undersize_at_size_pct",
    "span",
    "fines_pct",
    "rrsb_undersize",
    "rrsb_size_um",
    "fit_rrsb",
]

_METHODS = ("log", "linear")
#: floating-point slack allowed on a percentage computed elsewhere (e.g. 100.00000000000001)
_ROUNDING = 1e-9


def _out(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def cumulative_undersize_pct(sieve_um, retained_g):
    r"""Cumulative undersize curve Q3 from the masses retained on each sieve.

    .. math::

        Q_3(x) = 100 \cdot \frac{M - \sum_{x_j \ge x} m_j}{M}

    where :math:`m_j` is the mass retained on aperture :math:`x_j` and
    :math:`M` the total mass, pan included.

    Parameters
    ----------
    sieve_um : array-like
        Aperture each mass was retained on [um]; 0 is the pan. Any order.
    retained_g : array-like
        Mass retained on each aperture [g] (any mass unit, or % retained).

    Returns
    -------
    aperture_um : numpy.ndarray
        Apertures in ascending order, pan left out [um].
    undersize_pct : numpy.ndarray
        Mass percent passing each aperture [%].

    Raises
    ------
    ValueError
        If a mass is negative or missing, the total is zero, an aperture is
        negative or repeated, the two inputs differ in length, or there is no
        sieve above the pan.

    References
    ----------
    ISO 9276-1. Representation of results of particle size analysis -
    Part 1: Graphical representation (cumulative distribution Q3; year and
    clause from memory).
    NPTEL (IIT) soil-mechanics laboratory, sieve analysis procedure: percent
    finer = 100 - cumulative percent retained.
    USP <786> Particle size distribution estimation by analytical sieving
    (harmonised with Ph. Eur. 2.9.38) (from memory).
    """
    x = np.asarray(sieve_um, dtype=float).ravel()
    m = np.asarray(retained_g, dtype=float).ravel()
    if x.shape != m.shape:
        raise ValueError(
            f"sieve_um and retained_g must have the same length (got {x.size} and {m.size})"
        )
    if np.any(np.isnan(x)):
        raise ValueError("sieve_um cannot be missing (NaN)")
    if np.any(np.isnan(m)):
        raise ValueError("retained_g cannot be missing (NaN)")
    if np.any(x < 0):
        raise ValueError(f"sieve_um cannot be negative; got {x[x < 0][0]!r}")
    if np.any(m < 0):
        raise ValueError(f"retained_g cannot be negative; got {m[m < 0][0]!r}")
    uniq, counts = np.unique(x, return_counts=True)
    if np.any(counts > 1):
        raise ValueError(f"sieve_um has a duplicate aperture: {uniq[counts > 1][0]!r}")
    total = m.sum()
    if not total > 0:
        raise ValueError("retained_g sums to zero; there is no sample")
    if not np.any(x > 0):
        raise ValueError("sieve_um holds only the pan (0); at least one sieve is needed")
    order = np.argsort(x)[::-1]  # coarsest first
    x_desc, m_desc = x[order], m[order]
    retained_on_or_above = np.cumsum(m_desc)
    undersize = 100.0 * (total - retained_on_or_above) / total  # Q3(x) = 100 (M - sum_{x_j >= x} m_j) / M
    undersize = np.clip(undersize, 0.0, 100.0)
    keep = x_desc > 0
    return x_desc[keep][::-1], undersize[keep][::-1]


def _check_curve(aperture_um, undersize_pct):
    x = np.asarray(aperture_um, dtype=float).ravel()
    q = np.asarray(undersize_pct, dtype=float).ravel()
    if x.shape != q.shape:
        raise ValueError(
            f"aperture_um and undersize_pct must have the same length (got {x.size} and {q.size})"
        )
    if x.size == 0:
        raise ValueError("aperture_um is empty")
    if np.any(np.isnan(x)) or np.any(np.isnan(q)):
        raise ValueError("aperture_um and undersize_pct cannot be missing (NaN)")
    if np.any(x <= 0):
        raise ValueError(f"aperture_um must be positive (leave the pan out); got {x[x <= 0][0]!r}")
    if np.any(np.diff(x) <= 0):
        raise ValueError("aperture_um must be strictly increasing")
    if np.any((q < -_ROUNDING) | (q > 100 + _ROUNDING)):
        raise ValueError("undersize_pct must lie between 0 and 100")
    if np.any(np.diff(q) < 0):
        raise ValueError("undersize_pct cannot decrease with aperture (a cumulative curve)")
    return x, np.clip(q, 0.0, 100.0)


def _check_method(method):
    if method not in _METHODS:
        raise ValueError(f"method must be one of {_METHODS}; got {method!r}")


def percentile_size_um(aperture_um, undersize_pct, q_pct, method="log"):
    r"""Size d_q at which the cumulative undersize reaches q percent.

    Between the two apertures that bracket q, with
    :math:`Q_3(x_a) < q \le Q_3(x_b)`:

    - ``method="log"`` (default), linear in :math:`\ln x`:

      .. math:: d_q = \exp\left[\ln x_a + \frac{q - Q_a}{Q_b - Q_a}
                (\ln x_b - \ln x_a)\right]

    - ``method="linear"``, linear in :math:`x`:

      .. math:: d_q = x_a + \frac{q - Q_a}{Q_b - Q_a} (x_b - x_a)

    Parameters
    ----------
    aperture_um : array-like
        Apertures in ascending order, pan left out [um].
    undersize_pct : array-like
        Cumulative undersize at each aperture [%], non-decreasing.
    q_pct : float or array-like
        Percentile(s) wanted [%], e.g. 10, 50, 90.
    method : {"log", "linear"}
        Interpolation between apertures.

    Returns
    -------
    float or numpy.ndarray
        d_q [um]. NaN where q lies below the undersize at the finest aperture
        (the pan holds more than q percent, and sizes below the finest sieve
        are unknown) or above the undersize at the coarsest aperture (the top
        sieve retained material). NaN for NaN q.

    Raises
    ------
    ValueError
        If q is outside 0-100, the curve is not a valid cumulative curve, or
        the method is unknown.

    Notes
    -----
    Log interpolation is the default because sieve nests are built as a
    geometric series of apertures (each about sqrt(2) or 2^(1/4) times the
    next; ISO 565 / ISO 3310-1 R 20/3 and R 40/3 series, from memory), so the
    apertures are evenly spaced in ln x, and because the percent finer is
    customarily plotted against size on a logarithmic axis and percentiles
    are read off that plot (NPTEL sieve-analysis procedure); straight lines
    between points on that plot are linear in ln x. The two conventions can
    differ by a few percent (3 % for d10 in the project's worked example), so
    the method is part of the result.

    Where the curve is flat (an empty sieve) and q equals its level, the
    smallest aperture at which the curve reaches q is returned.

    References
    ----------
    ISO 9276-1. Representation of results of particle size analysis -
    Part 1: Graphical representation (logarithmic size axis; from memory).
    NPTEL (IIT) soil-mechanics laboratory, sieve analysis: percent finer
    plotted against size on a log scale, d10/d30/d60 read off the curve.
    ISO 9276-2 (2014). Part 2: Calculation of average particle
    sizes/diameters and moments from particle size distributions.
    """
    _check_method(method)
    x, q_curve = _check_curve(aperture_um, undersize_pct)
    q = np.asarray(q_pct, dtype=float)
    bad = (q < 0) | (q > 100)
    if np.any(bad):
        raise ValueError(f"q_pct must lie between 0 and 100; got {q[bad].ravel()[0]!r}")
    flat_q = q.ravel()
    result = np.full(flat_q.shape, np.nan)
    idx = np.searchsorted(q_curve, flat_q, side="left")  # first i with Q[i] >= q
    t = x if method == "linear" else np.log(x)
    for j, (qq, i) in enumerate(zip(flat_q, idx)):
        if np.isnan(qq) or i >= x.size:
            continue  # above the coarsest aperture's undersize: not determinable
        if i == 0:
            if q_curve[0] == qq:
                result[j] = x[0]
            continue  # below the finest aperture's undersize: not determinable
        qa, qb = q_curve[i - 1], q_curve[i]  # qa < qq <= qb, so qb > qa
        if qq == qb:
            result[j] = x[i]  # exactly on an aperture: no round-off from exp(log(x))
            continue
        ti = t[i - 1] + (qq - qa) / (qb - qa) * (t[i] - t[i - 1])
        xi = ti if method == "linear" else np.exp(ti)
        result[j] = min(max(xi, x[i - 1]), x[i])  # keep exp(log(x)) round-off inside the bracket
    return _out(result.reshape(q.shape))


def undersize_at_size_pct(aperture_um, undersize_pct, size_um, method="log"):
    r"""Cumulative undersize Q3 at any size, interpolated between apertures.

    The inverse of :func:`percentile_size_um`: with the bracketing
    apertures :math:`x_a < x \le x_b`, ``method="log"``:

    .. math:: Q_3(x) = Q_a + (Q_b - Q_a) \frac{\ln x - \ln x_a}{\ln x_b - \ln x_a}

    and ``method="linear"`` the same in x.

    Parameters
    ----------
    aperture_um : array-like
        Apertures in ascending order, pan left out [um].
    undersize_pct : array-like
        Cumulative undersize at each aperture [%].
    size_um : float or array-like
        Size(s) at which Q3 is wanted [um].
    method : {"log", "linear"}
        Interpolation between apertures.

    Returns
    -------
    float or numpy.ndarray
        Q3 [%] at ``size_um``. Exact at an aperture. NaN below the finest
        aperture (unless its undersize is 0, then 0), and NaN above the
        coarsest aperture unless its undersize is 100 (then 100).

    Raises
    ------
    ValueError
        If a size is negative, the curve is invalid, or the method unknown.

    References
    ----------
    ISO 9276-1, as for :func:`percentile_size_um`.
    """
    _check_method(method)
    x, q_curve = _check_curve(aperture_um, undersize_pct)
    s = np.asarray(size_um, dtype=float)
    if np.any(s < 0):
        raise ValueError(f"size_um cannot be negative; got {s[s < 0].ravel()[0]!r}")
    flat = s.ravel()
    result = np.full(flat.shape, np.nan)
    t = x if method == "linear" else np.log(x)
    for j, size in enumerate(flat):
        if np.isnan(size):
            continue
        if size < x[0]:
            if q_curve[0] == 0.0:
                result[j] = 0.0
            continue
        if size > x[-1]:
            if q_curve[-1] == 100.0:
                result[j] = 100.0
            continue
        i = int(np.searchsorted(x, size, side="left"))  # x[i-1] < size <= x[i]
        if x[i] == size:
            result[j] = q_curve[i]
            continue
        ts = size if method == "linear" else np.log(size)
        result[j] = q_curve[i - 1] + (q_curve[i] - q_curve[i - 1]) * (ts - t[i - 1]) / (t[i] - t[i - 1])
    return _out(result.reshape(s.shape))


def span(d10_um, d50_um, d90_um):
    r"""Relative width of a size distribution.

    .. math:: \mathrm{span} = (d_{90} - d_{10}) / d_{50}

    Parameters
    ----------
    d10_um, d50_um, d90_um : float or array-like
        Percentile sizes [um].

    Returns
    -------
    float or numpy.ndarray
        Span [-]. NaN where an input is NaN.

    Raises
    ------
    ValueError
        If d50 is zero or negative, a size is negative, or the percentiles
        are out of order (d10 > d50 or d50 > d90), which no distribution can
        give.

    References
    ----------
    Common definition for laser-diffraction and sieve results; ISO 9276-2
    defines the percentiles it uses (span itself: common practice, no source).
    """
    d10 = np.asarray(d10_um, dtype=float)
    d50 = np.asarray(d50_um, dtype=float)
    d90 = np.asarray(d90_um, dtype=float)
    if np.any(d50 <= 0):
        raise ValueError("d50_um must be positive")
    if np.any(d10 < 0):
        raise ValueError("d10_um cannot be negative")
    if np.any(d10 > d50) or np.any(d50 > d90):
        raise ValueError("percentiles out of order: need d10_um <= d50_um <= d90_um")
    return _out((d90 - d10) / d50)  # span = (d90 - d10) / d50


def fines_pct(sieve_um, retained_g, cutoff_um=125.0):
    r"""Mass percent of the sample finer than a cutoff size.

    .. math:: \mathrm{fines} = Q_3(x_{cut})

    Parameters
    ----------
    sieve_um : array-like
        Aperture each mass was retained on [um]; 0 is the pan.
    retained_g : array-like
        Mass retained on each aperture [g].
    cutoff_um : float
        Cutoff size [um]; 125 um is the default of the project (see
        ``linkage.schema.DEFAULT_FINES_CUTOFF_UM``).

    Returns
    -------
    float
        Fines [%]. When the cutoff is one of the apertures this is exactly
        the undersize there (the mass that passed that sieve, pan included).
        Otherwise it is interpolated linearly in ln x between the two
        apertures that bracket the cutoff (see :func:`undersize_at_size_pct`),
        and NaN if the cutoff lies below the finest sieve (the pan's size
        range is unknown), unless nothing passed the finest sieve.

    Raises
    ------
    ValueError
        As :func:`cumulative_undersize_pct`; also if the cutoff is not
        positive.
    """
    if not np.all(np.asarray(cutoff_um, dtype=float) > 0):
        raise ValueError("cutoff_um must be positive")
    x, q = cumulative_undersize_pct(sieve_um, retained_g)
    return undersize_at_size_pct(x, q, cutoff_um, method="log")


def rrsb_undersize(size_um, x_prime_um, n):
    r"""Cumulative undersize of the Rosin-Rammler-Sperling-Bennett model.

    .. math:: Q_3(x) = 1 - \exp[-(x/x')^n]

    Parameters
    ----------
    size_um : float or array-like
        Particle size x [um].
    x_prime_um : float or array-like
        Characteristic size x' [um], the size at which Q3 = 1 - 1/e = 63.2 %.
    n : float or array-like
        Uniformity (spread) index [-]; larger means narrower.

    Returns
    -------
    float or numpy.ndarray
        Q3 as a fraction [0-1].

    Raises
    ------
    ValueError
        If a size is negative or x' or n is zero or negative.

    References
    ----------
    Rosin P., Rammler E. (1933). The laws governing the fineness of powdered
    coal. J. Inst. Fuel 7:29-36 (from memory).
    Bennett J.G. (1936). Broken coal. J. Inst. Fuel 10:22-39 (from memory).
    DIN 66145 (RRSB grid; from memory).
    """
    x = np.asarray(size_um, dtype=float)
    xp = np.asarray(x_prime_um, dtype=float)
    nn = np.asarray(n, dtype=float)
    if np.any(x < 0):
        raise ValueError("size_um cannot be negative")
    if np.any(xp <= 0):
        raise ValueError("x_prime_um must be positive")
    if np.any(nn <= 0):
        raise ValueError("n must be positive")
    return _out(1.0 - np.exp(-((x / xp) ** nn)))  # Q3 = 1 - exp(-(x/x')^n)


def rrsb_size_um(q_fraction, x_prime_um, n):
    r"""Size at which the RRSB undersize reaches q (inverse of the model).

    .. math:: d_q = x' \, [-\ln(1 - q)]^{1/n}

    Parameters
    ----------
    q_fraction : float or array-like
        Cumulative undersize as a fraction, 0 <= q <= 1 (q = 1 gives inf).
    x_prime_um : float or array-like
        Characteristic size x' [um].
    n : float or array-like
        Uniformity index [-].

    Returns
    -------
    float or numpy.ndarray
        d_q [um].

    Raises
    ------
    ValueError
        If q is outside [0, 1] or x' or n is zero or negative.

    References
    ----------
    Rosin & Rammler (1933); Bennett (1936), as for :func:`rrsb_undersize`.
    """
    q = np.asarray(q_fraction, dtype=float)
    xp = np.asarray(x_prime_um, dtype=float)
    nn = np.asarray(n, dtype=float)
    if np.any((q < 0) | (q > 1)):
        raise ValueError("q_fraction must lie between 0 and 1 (a fraction, not a percent)")
    if np.any(xp <= 0):
        raise ValueError("x_prime_um must be positive")
    if np.any(nn <= 0):
        raise ValueError("n must be positive")
    with np.errstate(divide="ignore"):
        return _out(xp * (-np.log1p(-q)) ** (1.0 / nn))  # d_q = x' (-ln(1-q))^(1/n)


def fit_rrsb(aperture_um, undersize_pct):
    r"""Fit the RRSB model to a cumulative undersize curve.

    Least squares on the linearised form (the RRSB grid):

    .. math:: \ln[-\ln(1 - Q_3)] = n \ln x - n \ln x'

    using only points with 0 < Q3 < 100 % (the transform is infinite at the
    ends).

    Parameters
    ----------
    aperture_um : array-like
        Apertures [um], positive.
    undersize_pct : array-like
        Cumulative undersize at each aperture [%].

    Returns
    -------
    dict
        ``x_prime_um`` [um], ``n`` [-], their standard errors
        ``x_prime_um_se`` and ``n_se`` (from the OLS covariance; the SE of x'
        by the delta method, :math:`x' = \exp(-b/n)`), ``r2`` of the
        linearised fit and ``n_points`` used. Standard errors are NaN with
        only two usable points.

    Raises
    ------
    ValueError
        If fewer than two points have 0 < Q3 < 100, or they share one
        aperture.

    Notes
    -----
    Fitting on the linearised scale weights the tails more heavily than a
    fit on the Q3 scale would; it is the classical graphical method of the
    RRSB grid and needs no start values.

    References
    ----------
    Rosin & Rammler (1933); Bennett (1936); DIN 66145 (from memory).
    ISO 9276-3. Adjustment of an experimental curve to a reference
    model (scope from memory).
    """
    x = np.asarray(aperture_um, dtype=float).ravel()
    q = np.asarray(undersize_pct, dtype=float).ravel()
    if x.shape != q.shape:
        raise ValueError(
            f"aperture_um and undersize_pct must have the same length (got {x.size} and {q.size})"
        )
    use = (q > 0) & (q < 100) & (x > 0) & np.isfinite(x)
    x, q = x[use], q[use] / 100.0
    if x.size < 2:
        raise ValueError("fit_rrsb needs at least two points with 0 < undersize_pct < 100")
    u = np.log(x)
    v = np.log(-np.log1p(-q))  # ln(-ln(1 - Q3))
    if np.ptp(u) == 0:
        raise ValueError("fit_rrsb needs at least two different apertures")
    design = np.column_stack([u, np.ones_like(u)])
    coef, *_ = np.linalg.lstsq(design, v, rcond=None)
    slope, intercept = coef  # v = n u - n ln x'
    n_fit = slope
    x_prime = np.exp(-intercept / slope)  # ln x' = -b / n
    resid = v - design @ coef
    ss_res = float(resid @ resid)
    ss_tot = float(((v - v.mean()) ** 2).sum())
    r2 = 1.0 - ss_res / ss_tot if ss_tot > 0 else np.nan
    dof = x.size - 2
    if dof > 0:
        sigma2 = ss_res / dof
        cov = sigma2 * np.linalg.inv(design.T @ design)
        n_se = float(np.sqrt(cov[0, 0]))
        grad = np.array([x_prime * intercept / slope**2, -x_prime / slope])  # d x'/d(n, b)
        x_prime_se = float(np.sqrt(grad @ cov @ grad))
    else:
        n_se = x_prime_se = float("nan")
    return {
        "x_prime_um": float(x_prime),
        "n": float(n_fit),
        "x_prime_um_se": x_prime_se,
        "n_se": n_se,
        "r2": float(r2),
        "n_points": int(x.size),
    }
