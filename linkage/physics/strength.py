"""Porosity-strength relation of compacts (Ryshkewitch-Duckworth).

Strength may be in any unit (usually tensile strength in MPa); ``s0`` is in
the same unit. Porosity is a fraction [-], not a percent.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "ryshkewitch_duckworth",
    "fit_ryshkewitch_duckworth",
    "porosity_for_strength",
]

_METHODS = ("nls", "loglinear")


def _out(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def ryshkewitch_duckworth(porosity, s0, k):
    r"""Strength of a porous compact, Ryshkewitch-Duckworth equation.

    .. math:: \sigma = \sigma_0 \exp(-k \varepsilon)

    Parameters
    ----------
    porosity : float or array-like
        Porosity :math:`\varepsilon` [-], between 0 and 1.
    s0 : float or array-like
        Strength at zero porosity :math:`\sigma_0` [MPa, or the unit of the
        strength].
    k : float or array-like
        Bonding constant [-] (also written b or k_b).

    Returns
    -------
    float or numpy.ndarray
        Strength [unit of ``s0``].

    Raises
    ------
    ValueError
        If a porosity lies outside [0, 1] or s0 is zero or negative.

    References
    ----------
    Ryshkewitch E. (1953). Compression strength of porous sintered alumina and
    zirconia. J. Am. Ceram. Soc. 36:65-68 (citation details from memory).
    Duckworth W. (1953). Discussion of Ryshkewitch paper. J. Am. Ceram. Soc.
    36:68 (from memory).
    Vreeman G., Sun C.C. (2022). A powder tabletability equation. Powder
    Technol. 117709 (builds on the exponential form).
    """
    eps = np.asarray(porosity, dtype=float)
    s0_ = np.asarray(s0, dtype=float)
    k_ = np.asarray(k, dtype=float)
    if np.any((eps < 0) | (eps > 1)):
        raise ValueError("porosity must lie between 0 and 1 (a fraction, not a percent)")
    if np.any(s0_ <= 0):
        raise ValueError("s0 must be positive")
    return _out(s0_ * np.exp(-k_ * eps))  # sigma = sigma0 exp(-k eps)


def _loglinear(eps, strength):
    """OLS of ln(strength) on porosity: returns s0, k, s0_se, k_se."""
    y = np.log(strength)
    design = np.column_stack([np.ones_like(eps), eps])
    coef, *_ = np.linalg.lstsq(design, y, rcond=None)
    a, slope = coef  # ln sigma = ln sigma0 - k eps
    resid = y - design @ coef
    dof = eps.size - 2
    cov = (resid @ resid) / dof * np.linalg.inv(design.T @ design)
    s0 = float(np.exp(a))
    s0_se = s0 * float(np.sqrt(cov[0, 0]))  # delta method: d exp(a)/da = exp(a)
    return s0, float(-slope), s0_se, float(np.sqrt(cov[1, 1]))


def fit_ryshkewitch_duckworth(porosity, strength, method="nls"):
    r"""Fit :math:`\sigma = \sigma_0 \exp(-k \varepsilon)` to measured strengths.

    Parameters
    ----------
    porosity : array-like
        Porosity of each compact [-].
    strength : array-like
        Strength of each compact [MPa or any unit]. Pairs with a NaN in
        either are left out.
    method : {"nls", "loglinear"}
        ``"nls"`` (default): nonlinear least squares on the original strength
        scale (``scipy.optimize.curve_fit``), started from the log-linear
        estimate; standard errors from the covariance matrix (scaled by the
        residual variance). ``"loglinear"``: ordinary least squares of
        :math:`\ln\sigma` on :math:`\varepsilon`; the standard error of
        :math:`\sigma_0 = e^{a}` from that of the intercept a by the delta
        method, :math:`se(\sigma_0) = \sigma_0 \, se(a)`.

    Returns
    -------
    dict
        ``s0``, ``k``, ``s0_se``, ``k_se``, ``method``, ``n`` (pairs used) and
        ``rmse`` (root mean square residual on the original strength scale,
        for both methods, divided by n).

    Raises
    ------
    ValueError
        If fewer than 3 pairs remain, all porosities are equal, a strength is
        negative (or, for "loglinear", zero), a porosity lies outside [0, 1],
        the inputs differ in length or the method is unknown.

    Notes
    -----
    On noisy data the two methods give different estimates: the log-linear
    fit assumes errors proportional to strength, NLS constant errors. The
    method is returned with the result so that it is reported.

    References
    ----------
    Ryshkewitch E. (1953). J. Am. Ceram. Soc. 36:65-68; Duckworth W. (1953).
    J. Am. Ceram. Soc. 36:68 (from memory).
    """
    if method not in _METHODS:
        raise ValueError(f"method must be one of {_METHODS}; got {method!r}")
    eps = np.asarray(porosity, dtype=float).ravel()
    s = np.asarray(strength, dtype=float).ravel()
    if eps.shape != s.shape:
        raise ValueError(
            f"porosity and strength must have the same length (got {eps.size} and {s.size})"
        )
    keep = ~(np.isnan(eps) | np.isnan(s))
    eps, s = eps[keep], s[keep]
    if eps.size < 3:
        raise ValueError(f"need at least 3 (porosity, strength) pairs; got {eps.size}")
    if np.any((eps < 0) | (eps > 1)):
        raise ValueError("porosity must lie between 0 and 1 (a fraction, not a percent)")
    if np.any(s < 0):
        raise ValueError("strength cannot be negative")
    if np.ptp(eps) == 0:
        raise ValueError("porosity values are all equal; k cannot be estimated")
    if method == "loglinear":
        if np.any(s <= 0):
            raise ValueError("strength must be positive for the loglinear fit (log of zero)")
        s0, k, s0_se, k_se = _loglinear(eps, s)
    else:
        from scipy.optimize import curve_fit

        pos = s > 0
        if pos.sum() >= 3 and np.ptp(eps[pos]) > 0:
            p0 = _loglinear(eps[pos], s[pos])[:2]
        else:
            p0 = (float(s.max()) if s.max() > 0 else 1.0, 1.0)

        def model(e, s0_, k_):
            return s0_ * np.exp(-k_ * e)  # sigma = sigma0 exp(-k eps)

        popt, pcov = curve_fit(model, eps, s, p0=p0, maxfev=10_000)
        s0, k = float(popt[0]), float(popt[1])
        s0_se, k_se = (float(v) for v in np.sqrt(np.diag(pcov)))
    resid = s - s0 * np.exp(-k * eps)
    return {
        "s0": s0,
        "k": k,
        "s0_se": s0_se,
        "k_se": k_se,
        "method": method,
        "n": int(eps.size),
        "rmse": float(np.sqrt(np.mean(resid**2))),
    }


def porosity_for_strength(target_strength, s0, k):
    r"""Largest porosity at which the Ryshkewitch-Duckworth strength meets a target.

    .. math:: \varepsilon_{max} = \ln(\sigma_0 / \sigma_{target}) / k

    Parameters
    ----------
    target_strength : float or array-like
        Strength wanted [unit of ``s0``].
    s0 : float or array-like
        Strength at zero porosity [MPa or the unit of the strength].
    k : float or array-like
        Bonding constant [-].

    Returns
    -------
    float or numpy.ndarray
        Porosity [-] at which the strength equals the target; for k > 0 any
        lower porosity gives more. A negative result means the target exceeds
        s0 and is out of reach at any porosity.

    Raises
    ------
    ValueError
        If the target or s0 is zero or negative, or k is zero.

    References
    ----------
    Ryshkewitch E. (1953); Duckworth W. (1953), as for
    :func:`ryshkewitch_duckworth` (equation solved for porosity).
    """
    target = np.asarray(target_strength, dtype=float)
    s0_ = np.asarray(s0, dtype=float)
    k_ = np.asarray(k, dtype=float)
    if np.any(target <= 0):
        raise ValueError("target_strength must be positive")
    if np.any(s0_ <= 0):
        raise ValueError("s0 must be positive")
    if np.any(k_ == 0):
        raise ValueError("k cannot be zero (strength would not depend on porosity)")
    return _out(np.log(s0_ / target) / k_)  # eps = ln(sigma0 / sigma_target) / k
