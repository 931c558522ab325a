"""Pharmacopeial tablet tests: uniformity, dissolution, friability, flow, f2.

The acceptance rules are described here in our own words; the chapters
named in each function are the authority. Contents and amounts released are
in percent of label claim [% LC].

These functions evaluate data against the rules; they are decision support
and do not replace the official procedure, its rounding conventions or the
site's release decision.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "L1_PCT",
    "L2_PCT",
    "FRIABILITY_LIMIT_PCT",
    "reference_value_pct",
    "acceptance_value_from_summary",
    "acceptance_value",
    "stage2_unit_range_pct",
    "weight_variation_contents_pct",
    "uniformity_stage",
    "relative_sd_pct",
    "dissolution_stage",
    "dissolution_s1_pass",
    "friability_pct",
    "f2_similarity",
    "f1_difference",
    "carr_index_pct",
    "hausner_ratio",
    "flow_character",
]

#: Maximum allowed acceptance value, USP <905> / Ph. Eur. 2.9.40 [%].
L1_PCT = 15.0
#: Maximum allowed deviation of a unit from M at stage 2, same chapters [%].
L2_PCT = 25.0
#: Usual maximum mean weight loss in the friability test, USP <1216> [%].
FRIABILITY_LIMIT_PCT = 1.0

#: Acceptability constant k by number of units, USP <905> Table 2.
_K_BY_N = {10: 2.4, 30: 2.0}

# Comparisons with a limit allow for floating-point error only; the
# pharmacopeial rounding of results to the limit's decimals is not applied.
_TOL = 1e-9


def _values(name, values, allow_empty=False):
    x = np.asarray(values, dtype=float).ravel()
    if x.size == 0 and not allow_empty:
        raise ValueError(f"{name} is empty")
    if np.any(np.isnan(x)):
        raise ValueError(f"{name} cannot hold missing values (NaN)")
    return x


def _k_for(n):
    if n not in _K_BY_N:
        raise ValueError(
            f"contents_pct must hold 10 or 30 units (the acceptability constant k is "
            f"defined for those only); got {n}"
        )
    return _K_BY_N[n]


def reference_value_pct(mean_pct, target_pct=100.0):
    r"""Reference value M of the acceptance value, USP <905>.

    With the target content T (100 % unless another target is approved):

    - T <= 101.5: M is the mean clipped to [98.5, 101.5].
    - T > 101.5: M is the mean clipped to [98.5, T].

    Parameters
    ----------
    mean_pct : float or array-like
        Mean content of the units [% LC].
    target_pct : float
        Target content T [% LC].

    Returns
    -------
    float or numpy.ndarray
        M [% LC].

    Raises
    ------
    ValueError
        If the target is zero or negative.

    References
    ----------
    USP <905> Uniformity of Dosage Units, Table 2 (harmonised with Ph. Eur.
    2.9.40; JP 6.02 from memory).
    """
    if not target_pct > 0:
        raise ValueError("target_pct must be positive")
    mean = np.asarray(mean_pct, dtype=float)
    upper = 101.5 if target_pct <= 101.5 else float(target_pct)  # case 1 / case 2 of Table 2
    m = np.clip(mean, 98.5, upper)
    return float(m) if m.ndim == 0 else m


def acceptance_value_from_summary(mean_pct, sd_pct, n, target_pct=100.0):
    r"""Acceptance value from the mean and SD of n units, USP <905>.

    .. math:: AV = |M - \bar X| + k s

    with k = 2.4 for 10 units and 2.0 for 30 units.

    Parameters
    ----------
    mean_pct : float
        Mean content :math:`\bar X` [% LC].
    sd_pct : float
        Sample standard deviation s (n - 1 denominator) [% LC].
    n : int
        Number of units, 10 or 30.
    target_pct : float
        Target content T [% LC].

    Returns
    -------
    float
        AV [%].

    Raises
    ------
    ValueError
        If n is not 10 or 30, the SD is negative or the target not positive.

    References
    ----------
    USP <905> Uniformity of Dosage Units, Table 2; USP FAQ on uniformity of
    dosage units (worked example: mean 105.9, s 5.0, n 10 gives AV 16.4).
    """
    k = _k_for(int(n))
    if sd_pct < 0:
        raise ValueError("sd_pct cannot be negative")
    m = reference_value_pct(mean_pct, target_pct)
    return float(abs(m - mean_pct) + k * sd_pct)  # AV = |M - Xbar| + k s


def acceptance_value(contents_pct, target_pct=100.0):
    r"""Acceptance value of 10 or 30 individual contents, USP <905>.

    .. math:: AV = |M - \bar X| + k s

    Parameters
    ----------
    contents_pct : array-like
        Individual contents [% LC], 10 or 30 units.
    target_pct : float
        Target content T [% LC].

    Returns
    -------
    dict
        ``mean``, ``sd`` (n - 1), ``k``, ``m`` (reference value), ``av`` and
        ``n``.

    Raises
    ------
    ValueError
        If the number of units is not 10 or 30, a content is missing or
        negative, or the target is not positive.

    References
    ----------
    USP <905> Uniformity of Dosage Units (harmonised with Ph. Eur. 2.9.40).
    """
    x = _values("contents_pct", contents_pct)
    if np.any(x < 0):
        raise ValueError("contents_pct cannot be negative")
    n = int(x.size)
    k = _k_for(n)
    mean = float(x.mean())
    sd = float(x.std(ddof=1))
    m = reference_value_pct(mean, target_pct)
    av = abs(m - mean) + k * sd  # AV = |M - Xbar| + k s
    return {"mean": mean, "sd": sd, "k": k, "m": float(m), "av": float(av), "n": n}


def stage2_unit_range_pct(m_pct, l2_pct=L2_PCT):
    r"""Range every unit must lie in at stage 2 of USP <905>.

    .. math:: [(1 - 0.01 L_2) M,\; (1 + 0.01 L_2) M]

    Parameters
    ----------
    m_pct : float
        Reference value M [% LC].
    l2_pct : float
        Maximum allowed deviation L2 [%], 25.0 unless the monograph says
        otherwise.

    Returns
    -------
    tuple of float
        (low, high) [% LC].

    References
    ----------
    USP <905>; USP FAQ (M = 101.5 gives 76.125 % to 126.875 %).
    """
    if l2_pct < 0:
        raise ValueError("l2_pct cannot be negative")
    return (1.0 - 0.01 * l2_pct) * m_pct, (1.0 + 0.01 * l2_pct) * m_pct


def weight_variation_contents_pct(weights_mg, assay_pct=100.0):
    r"""Estimated content of each unit from its weight (weight variation).

    .. math:: x_i = w_i A / \bar W

    Parameters
    ----------
    weights_mg : array-like
        Individual unit weights [mg].
    assay_pct : float
        Content of the batch by assay, A [% LC].

    Returns
    -------
    numpy.ndarray
        Estimated contents [% LC], to be judged with :func:`acceptance_value`.

    Raises
    ------
    ValueError
        If a weight is missing, zero or negative, or the assay is negative.

    Notes
    -----
    The chapter allows weight variation in place of content uniformity only
    in the cases it lists (e.g. uncoated or film-coated tablets with at least
    25 mg of drug making up at least 25 % of the tablet weight); the drug is
    assumed evenly spread through the blend.

    References
    ----------
    USP <905> Uniformity of Dosage Units, Weight Variation and Table 1.
    """
    w = _values("weights_mg", weights_mg)
    if np.any(w <= 0):
        raise ValueError("weights_mg must be positive")
    if assay_pct < 0:
        raise ValueError("assay_pct cannot be negative")
    return w * assay_pct / w.mean()  # x_i = w_i A / W_bar


def uniformity_stage(contents_pct, target_pct=100.0):
    r"""Verdict of the two-stage uniformity test of USP <905>.

    In our words: stage 1 takes 10 units and passes if their acceptance
    value is at most L1 = 15.0. If it does not, 20 more units are tested;
    stage 2 passes if the acceptance value of all 30 is at most L1 and no
    unit lies outside (1 -/+ 0.01 L2) M with L2 = 25.0, M being the
    reference value of the 30 units.

    Parameters
    ----------
    contents_pct : array-like
        Individual contents [% LC] in the order tested: 10 units (stage 1
        only) or 30 units (the first 10 are the stage-1 units).
    target_pct : float
        Target content T [% LC].

    Returns
    -------
    dict
        ``stage`` (1 or 2, the last stage judged), ``passed`` (bool),
        ``needs_stage_2`` (stage 1 failed and only 10 units were given),
        ``av_stage1``, ``av_stage2`` (NaN if not judged), ``m_stage2``,
        ``unit_range_pct`` (stage-2 range, or None) and ``reason``.

    Raises
    ------
    ValueError
        As :func:`acceptance_value`.

    References
    ----------
    USP <905> Uniformity of Dosage Units (harmonised with Ph. Eur. 2.9.40);
    USP FAQ on uniformity of dosage units (L1 applies at both stages, L2 only
    to individual units).
    """
    x = _values("contents_pct", contents_pct)
    _k_for(int(x.size))
    stage1 = acceptance_value(x[:10], target_pct)
    result = {
        "stage": 1,
        "passed": False,
        "needs_stage_2": False,
        "av_stage1": stage1["av"],
        "av_stage2": float("nan"),
        "m_stage2": float("nan"),
        "unit_range_pct": None,
        "reason": "",
    }
    if stage1["av"] <= L1_PCT + _TOL:
        result.update(passed=True, reason=f"stage 1: AV {stage1['av']:.2f} <= L1 {L1_PCT}")
        return result
    if x.size == 10:
        result.update(
            needs_stage_2=True,
            reason=f"stage 1: AV {stage1['av']:.2f} > L1 {L1_PCT}; test 20 more units (stage 2)",
        )
        return result
    stage2 = acceptance_value(x, target_pct)
    low, high = stage2_unit_range_pct(stage2["m"])
    outside = x[(x < low - _TOL) | (x > high + _TOL)]
    result.update(stage=2, av_stage2=stage2["av"], m_stage2=stage2["m"], unit_range_pct=(low, high))
    if stage2["av"] > L1_PCT + _TOL:
        result["reason"] = f"stage 2: AV of 30 units {stage2['av']:.2f} > L1 {L1_PCT}"
    elif outside.size:
        result["reason"] = (
            f"stage 2: {outside.size} unit(s) outside {low:.3f}-{high:.3f} % (L2 {L2_PCT} % of M)"
        )
    else:
        result.update(
            passed=True,
            reason=f"stage 2: AV {stage2['av']:.2f} <= L1 {L1_PCT} and all units within "
                   f"{low:.3f}-{high:.3f} %",
        )
    return result


def relative_sd_pct(values):
    r"""Relative standard deviation (coefficient of variation) in percent.

    .. math:: RSD = 100 \, s / \bar x, \quad s = \sqrt{\sum (x_i - \bar x)^2 / (n - 1)}

    Parameters
    ----------
    values : array-like
        Measurements (weights, contents ...), any unit.

    Returns
    -------
    float
        RSD [%].

    Raises
    ------
    ValueError
        If fewer than 2 values are given, a value is missing, or the mean is
        zero.

    References
    ----------
    USP <1010> Analytical data - interpretation and treatment (sample
    standard deviation and RSD; from memory).
    """
    x = _values("values", values)
    if x.size < 2:
        raise ValueError("values must hold at least 2 numbers for a standard deviation")
    mean = x.mean()
    if mean == 0:
        raise ValueError("values have mean zero; the relative SD is undefined")
    return float(100.0 * x.std(ddof=1) / mean)  # RSD = 100 s / mean


def dissolution_stage(released_pct, q_pct):
    r"""Verdict of the immediate-release dissolution test, USP <711> Table 1.

    In our words, with Q the monograph's amount dissolved [% LC]:

    - S1 (6 units): passes if every unit releases at least Q + 5.
    - S2 (6 more, 12 in all): passes if the mean of 12 is at least Q and no
      unit releases less than Q - 15.
    - S3 (12 more, 24 in all): passes if the mean of 24 is at least Q, at
      most 2 units release less than Q - 15 and none less than Q - 25.

    Testing goes to the next stage only when the current one is not met.

    Parameters
    ----------
    released_pct : array-like
        Amount released by each unit [% LC] in the order tested: 6, 12 or 24
        units (the first 6 are S1, the first 12 are S2).
    q_pct : float
        Q [% LC].

    Returns
    -------
    dict
        ``stage`` ("S1", "S2" or "S3", the last stage judged), ``passed``
        (bool), ``next_stage`` (the stage to run when the data stop before
        the verdict is final, else None) and ``reason``.

    Raises
    ------
    ValueError
        If the number of units is not 6, 12 or 24, a value is missing or
        negative, or Q lies outside 0-100.

    References
    ----------
    USP <711> Dissolution, Acceptance Table 1 (immediate-release dosage
    forms; harmonisation with Ph. Eur. 2.9.3 from memory).
    """
    x = _values("released_pct", released_pct)
    if x.size not in (6, 12, 24):
        raise ValueError(f"released_pct must hold 6, 12 or 24 units (S1, S2, S3); got {x.size}")
    if np.any(x < 0):
        raise ValueError("released_pct cannot be negative")
    if not 0 <= q_pct <= 100:
        raise ValueError("q_pct must lie between 0 and 100")
    s1 = x[:6]
    if np.all(s1 >= q_pct + 5 - _TOL):  # S1: each unit >= Q + 5
        return {"stage": "S1", "passed": True, "next_stage": None,
                "reason": f"S1: all 6 units >= Q + 5 = {q_pct + 5:g} %"}
    if x.size == 6:
        return {"stage": "S1", "passed": False, "next_stage": "S2",
                "reason": f"S1: a unit released {s1.min():g} % < Q + 5 = {q_pct + 5:g} %; test 6 more (S2)"}
    s2 = x[:12]
    mean12 = float(s2.mean())
    if mean12 >= q_pct - _TOL and np.all(s2 >= q_pct - 15 - _TOL):  # S2: mean >= Q, none < Q - 15
        return {"stage": "S2", "passed": True, "next_stage": None,
                "reason": f"S2: mean of 12 = {mean12:.2f} % >= Q and no unit < Q - 15 = {q_pct - 15:g} %"}
    if x.size == 12:
        return {"stage": "S2", "passed": False, "next_stage": "S3",
                "reason": f"S2 not met (mean of 12 = {mean12:.2f} %, lowest {s2.min():g} %); test 12 more (S3)"}
    mean24 = float(x.mean())
    below15 = int(np.sum(x < q_pct - 15 - _TOL))
    below25 = int(np.sum(x < q_pct - 25 - _TOL))
    if mean24 >= q_pct - _TOL and below15 <= 2 and below25 == 0:  # S3 rules
        return {"stage": "S3", "passed": True, "next_stage": None,
                "reason": f"S3: mean of 24 = {mean24:.2f} % >= Q, {below15} unit(s) < Q - 15, none < Q - 25"}
    return {"stage": "S3", "passed": False, "next_stage": None,
            "reason": f"S3 not met: mean of 24 = {mean24:.2f} %, {below15} unit(s) < Q - 15, "
                      f"{below25} unit(s) < Q - 25"}


def dissolution_s1_pass(released_pct, q_pct):
    """Whether 6 units meet stage S1 of USP <711> Table 1 (each >= Q + 5 %).

    Parameters
    ----------
    released_pct : array-like
        Amount released by each of 6 units [% LC].
    q_pct : float
        Q [% LC].

    Returns
    -------
    bool

    Raises
    ------
    ValueError
        If there are not exactly 6 units, or as :func:`dissolution_stage`.

    References
    ----------
    USP <711> Dissolution, Acceptance Table 1.
    """
    x = _values("released_pct", released_pct)
    if x.size != 6:
        raise ValueError(f"released_pct must hold 6 units for S1; got {x.size}")
    return bool(dissolution_stage(x, q_pct)["passed"])


def friability_pct(initial_mass_g, final_mass_g):
    r"""Friability: percent mass lost by tumbling, USP <1216>.

    .. math:: F = 100 (W_0 - W_1) / W_0

    Parameters
    ----------
    initial_mass_g : float or array-like
        Dedusted sample mass before tumbling W0 [g].
    final_mass_g : float or array-like
        Dedusted mass after 100 rotations W1 [g].

    Returns
    -------
    float or numpy.ndarray
        Mass loss [%]. A negative value (mass gained) points to a weighing or
        humidity problem. A mean loss of not more than 1.0 % is acceptable
        for most products (:data:`FRIABILITY_LIMIT_PCT`); a cracked or broken
        tablet fails the sample whatever the loss.

    Raises
    ------
    ValueError
        If the initial mass is zero or negative or the final mass negative.

    References
    ----------
    USP <1216> Tablet Friability (Ph. Eur. 2.9.7 counterpart from memory).
    """
    w0 = np.asarray(initial_mass_g, dtype=float)
    w1 = np.asarray(final_mass_g, dtype=float)
    if np.any(w0 <= 0):
        raise ValueError("initial_mass_g must be positive")
    if np.any(w1 < 0):
        raise ValueError("final_mass_g cannot be negative")
    out = 100.0 * (w0 - w1) / w0  # loss = 100 (W0 - W1) / W0
    return float(out) if np.ndim(out) == 0 else out


def _profiles(reference_pct, test_pct):
    r = _values("reference_pct", reference_pct)
    t = _values("test_pct", test_pct)
    if r.shape != t.shape:
        raise ValueError(
            f"reference_pct and test_pct must have the same time points (got {r.size} and {t.size})"
        )
    return r, t


def f2_similarity(reference_pct, test_pct):
    r"""Similarity factor f2 of two mean dissolution profiles.

    .. math::

        f_2 = 50 \log_{10}\left\{\left[1 + \frac{1}{n}\sum_t (R_t - T_t)^2
        \right]^{-1/2} \cdot 100\right\}

    Parameters
    ----------
    reference_pct, test_pct : array-like
        Mean % dissolved at the same n time points.

    Returns
    -------
    float
        f2 [-]; 100 for identical profiles, 50 to 100 means similar.

    Raises
    ------
    ValueError
        If the profiles differ in length, are empty or hold NaN.

    Notes
    -----
    The conditions of use are not checked here: 12 units per product, the
    same time points, at most one point above 85 % dissolved for both
    products, %CV limits on the means, and no f2 needed when both exceed
    85 % within 15 min.

    References
    ----------
    FDA (1997). Guidance for Industry: Dissolution testing of immediate
    release solid oral dosage forms.
    Diaz D.A. et al. (2016). Dissolution similarity requirements: how
    similar or dissimilar are the global regulatory expectations? AAPS J.
    18(1):15-22, Table VIII (title from memory).
    """
    r, t = _profiles(reference_pct, test_pct)
    msd = np.mean((r - t) ** 2)
    return float(50.0 * np.log10(100.0 / np.sqrt(1.0 + msd)))  # FDA 1997 f2


def f1_difference(reference_pct, test_pct):
    r"""Difference factor f1 of two mean dissolution profiles.

    .. math:: f_1 = 100 \sum_t |R_t - T_t| / \sum_t R_t

    Parameters
    ----------
    reference_pct, test_pct : array-like
        Mean % dissolved at the same time points.

    Returns
    -------
    float
        f1 [%]; 0 to 15 is read as similar.

    Raises
    ------
    ValueError
        If the profiles differ in length, are empty or hold NaN, or the
        reference sums to zero.

    References
    ----------
    FDA (1997). Guidance for Industry: Dissolution testing of immediate
    release solid oral dosage forms.
    """
    r, t = _profiles(reference_pct, test_pct)
    total = r.sum()
    if total == 0:
        raise ValueError("reference_pct sums to zero; f1 is undefined")
    return float(100.0 * np.abs(r - t).sum() / total)  # FDA 1997 f1


def _bulk_tapped(bulk_density_g_ml, tapped_density_g_ml):
    bulk = np.asarray(bulk_density_g_ml, dtype=float)
    tapped = np.asarray(tapped_density_g_ml, dtype=float)
    if np.any(bulk <= 0):
        raise ValueError("bulk_density_g_ml must be positive")
    if np.any(tapped <= 0):
        raise ValueError("tapped_density_g_ml must be positive")
    if np.any(np.broadcast_to(bulk > tapped, np.broadcast(bulk, tapped).shape)):
        raise ValueError("bulk_density_g_ml cannot exceed tapped_density_g_ml (tapping cannot expand a powder)")
    return bulk, tapped


def carr_index_pct(bulk_density_g_ml, tapped_density_g_ml):
    r"""Compressibility (Carr) index, USP <1174>.

    .. math:: CI = 100 (\rho_{tapped} - \rho_{bulk}) / \rho_{tapped}

    Parameters
    ----------
    bulk_density_g_ml, tapped_density_g_ml : float or array-like
        Bulk and tapped density [g/mL].

    Returns
    -------
    float or numpy.ndarray
        CI [%].

    Raises
    ------
    ValueError
        If a density is zero or negative or bulk exceeds tapped.

    References
    ----------
    USP <1174> Powder Flow (Ph. Eur. 2.9.36 counterpart from memory).
    Carr R.L. (1965). Evaluating flow properties of solids. Chem. Eng.
    72:163-168 (from memory).
    """
    bulk, tapped = _bulk_tapped(bulk_density_g_ml, tapped_density_g_ml)
    out = 100.0 * (tapped - bulk) / tapped  # CI = 100 (rho_t - rho_b) / rho_t
    return float(out) if np.ndim(out) == 0 else out


def hausner_ratio(bulk_density_g_ml, tapped_density_g_ml):
    r"""Hausner ratio, USP <1174>.

    .. math:: HR = \rho_{tapped} / \rho_{bulk} = 100 / (100 - CI)

    Parameters
    ----------
    bulk_density_g_ml, tapped_density_g_ml : float or array-like
        Bulk and tapped density [g/mL].

    Returns
    -------
    float or numpy.ndarray
        HR [-], at least 1.

    Raises
    ------
    ValueError
        As :func:`carr_index_pct`.

    References
    ----------
    USP <1174> Powder Flow.
    Hausner H.H. (1967). Friction conditions in a mass of metal powder. Int.
    J. Powder Metall. 3:7-13 (from memory).
    """
    bulk, tapped = _bulk_tapped(bulk_density_g_ml, tapped_density_g_ml)
    out = tapped / bulk  # HR = rho_t / rho_b
    return float(out) if np.ndim(out) == 0 else out


#: Upper bound of each flow class on the compressibility index [%], USP <1174>
#: scale of flowability (table read in secondary reproductions).
_FLOW_CLASSES = (
    (10.0, "excellent"),
    (15.0, "good"),
    (20.0, "fair"),
    (25.0, "passable"),
    (31.0, "poor"),
    (37.0, "very poor"),
    (float("inf"), "very, very poor"),
)


def flow_character(carr_index_pct):
    """Flow character from the compressibility index, USP <1174> scale.

    The published table gives integer ranges with gaps (10 | 11-15 | ...);
    here every class runs up to and including its upper bound, so
    CI <= 10 excellent, 10 < CI <= 15 good, 15 < CI <= 20 fair,
    20 < CI <= 25 passable, 25 < CI <= 31 poor, 31 < CI <= 37 very poor,
    above 37 very, very poor. This closing of the gaps is our rule.

    Parameters
    ----------
    carr_index_pct : float
        Compressibility index [%].

    Returns
    -------
    str
        Flow class; "" for NaN.

    Raises
    ------
    ValueError
        If the index is negative or 100 or more.

    References
    ----------
    USP <1174> Powder Flow, Table 2 (scale of flowability; reproduced in
    several secondary sources).
    """
    ci = float(carr_index_pct)
    if np.isnan(ci):
        return ""
    if ci < 0 or ci >= 100:
        raise ValueError("carr_index_pct must lie in [0, 100)")
    return next(name for upper, name in _FLOW_CLASSES if ci <= upper)
