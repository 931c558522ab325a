r"""Transfer between compactors: the roll force that gives a ribbon porosity on other rolls.

The ribbon stage's physics (:mod:`linkage.physics.rolling`, Johanson 1965)
says that the same peak pressure at the gap gives the same ribbon on any
rolls, and fixes the specific roll force that makes that pressure from the
roll diameter, the gap and the material's compressibility K. K and the
pressure constant C are fitted from the lots of every compactor at once
(:func:`fit_ribbon_physics`); :func:`transfer` then answers, for a compactor
with given rolls and gap, which specific roll force gives a target porosity
(or the two ends of a porosity window), with an interval.

The interval is a Monte Carlo prediction interval: the log parameters are
drawn from their least-squares covariance (normal approximation) and one
lot's deviation from the fitted curve from a t distribution with the
residual SD and n - 2 degrees of freedom; each draw gives the force at which
that lot would land on the target. The interval of the parameters alone is
reported beside it as ``force_confidence_kn_per_cm``.

What the model leaves out (say so wherever the answer is shown): roll
speed and dwell time, powder leaking past the roll edges and the side
seals, the feed screw and feed pressure, elastic recovery of the ribbon
after the gap, roll-surface texture, the density gradient across the
ribbon width, and any difference between compactors that the theory does
not carry (the lots of every compactor are pooled with one K and one C).
The friction angles are held at stated values, not fitted.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from linkage import CAUTION
from linkage.physics import rolling

__all__ = ["LEAVES_OUT", "RibbonPhysics", "Transfer", "fit_ribbon_physics", "transfer", "REQUIRED_COLUMNS"]

#: what the transfer model does not describe, shown with every answer
LEAVES_OUT = (
    "The physical model (Johanson 1965 rolling theory) leaves out roll speed and dwell time, powder leaking "
    "past the roll edges and the side seals, the feed screw and feed pressure, elastic recovery of the ribbon "
    "after the gap, roll-surface texture and the density gradient across the ribbon width; the friction angles "
    "are held, not fitted, and every compactor shares one compressibility and one pressure constant. Confirm "
    "the transferred force with a few lots on the new rolls."
)

REQUIRED_COLUMNS = ("roll_force_kn_per_cm", "roll_gap_mm", "roll_diameter_mm", "ribbon_porosity")


@dataclass(frozen=True)
class RibbonPhysics:
    """Johanson ribbon model fitted to lots (see :func:`fit_ribbon_physics`)."""

    compressibility: float
    pressure_constant_mpa: float
    log_params: np.ndarray
    log_covariance: np.ndarray
    residual_sd: float
    n_lots: int
    internal_friction_deg: float
    wall_friction_deg: float
    #: compactor -> {"roll_diameter_mm", "roll_width_mm", "lots"} of the lots fitted
    compactors: dict = field(default_factory=dict)
    #: lots left out for a missing roll force, gap, diameter or porosity
    n_dropped: int = 0
    #: (lowest, highest) peak pressure of the fitted lots under the fit [MPa]: the ribbons the lots have seen
    peak_pressure_range_mpa: tuple = (float("nan"), float("nan"))
    #: product -> lots fitted ("" for lots without a product name); {} where the lots name no product
    products: dict = field(default_factory=dict)

    def porosity(self, roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm):
        """Fitted ribbon porosity [-] (:func:`linkage.physics.rolling.johanson_ribbon_porosity`)."""
        return rolling.johanson_ribbon_porosity(roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm,
                                                self.compressibility, self.pressure_constant_mpa,
                                                self.internal_friction_deg, self.wall_friction_deg)

    def to_dict(self) -> dict:
        sd_log = np.sqrt(np.diag(self.log_covariance))
        return {"compressibility": self.compressibility, "compressibility_log_sd": float(sd_log[0]),
                "pressure_constant_mpa": self.pressure_constant_mpa, "pressure_constant_log_sd": float(sd_log[1]),
                "residual_sd": self.residual_sd, "n_lots": self.n_lots, "n_dropped": self.n_dropped,
                "internal_friction_deg": self.internal_friction_deg, "wall_friction_deg": self.wall_friction_deg,
                "compactors": self.compactors, "peak_pressure_range_mpa": list(self.peak_pressure_range_mpa),
                "products": self.products}


def fit_ribbon_physics(lots, *, internal_friction_deg=rolling.DEFAULT_INTERNAL_FRICTION_DEG,
                       wall_friction_deg=rolling.DEFAULT_WALL_FRICTION_DEG, source: str = "lots") -> RibbonPhysics:
    """Fit K and C (:func:`linkage.physics.rolling.fit_johanson_ribbon`) to a lot table.

    Parameters
    ----------
    lots : pandas.DataFrame
        One row per lot with ``roll_force_kn_per_cm``, ``roll_gap_mm``,
        ``roll_diameter_mm`` and ``ribbon_porosity`` (``compactor`` and
        ``roll_width_mm`` optional). Rows missing any of the four are left out
        and counted.
    internal_friction_deg, wall_friction_deg : float
        Friction angles [deg] held in the nip angle.
    source : str
        Name of the table in error messages.

    Raises
    ------
    linkage.exceptions.InputError
        A required column missing, or a value out of its physical range
        (every problem at once).
    linkage.exceptions.InsufficientDataError
        Fewer than 3 complete lots.
    """
    from linkage.exceptions import InputError, InsufficientDataError, Problem

    missing = [c for c in REQUIRED_COLUMNS if c not in lots.columns]
    if missing:
        raise InputError([Problem(source, f"the transfer model needs column '{c}'", column=c) for c in missing])
    table = lots.reset_index(drop=True)
    complete = table[list(REQUIRED_COLUMNS)].notna().all(axis=1).to_numpy()
    problems = []
    for col, ok in (("roll_force_kn_per_cm", lambda x: x > 0), ("roll_gap_mm", lambda x: x > 0),
                    ("roll_diameter_mm", lambda x: x > 0), ("ribbon_porosity", lambda x: (x > 0) & (x < 1))):
        values = table[col].to_numpy(dtype=float)
        bad = complete & ~ok(values)
        rule = "must lie in (0, 1)" if col == "ribbon_porosity" else "must be positive"
        for i in np.flatnonzero(bad):
            lot = table["lot"].iloc[i] if "lot" in table.columns else i
            problems.append(Problem(source, f"{rule} (lot {lot})", row=int(i) + 2, column=col, value=values[i]))
    if problems:
        raise InputError(problems)
    used = table[complete]
    if len(used) < 3:
        raise InsufficientDataError(f"the transfer model needs at least 3 lots with roll force, gap, roll diameter "
                                    f"and ribbon porosity; {len(used)} have all four")
    fit = rolling.fit_johanson_ribbon(used["roll_force_kn_per_cm"], used["roll_gap_mm"], used["roll_diameter_mm"],
                                      used["ribbon_porosity"], internal_friction_deg, wall_friction_deg)
    pressures = rolling.johanson_peak_pressure_mpa(used["roll_force_kn_per_cm"].to_numpy(float),
                                                   used["roll_gap_mm"].to_numpy(float),
                                                   used["roll_diameter_mm"].to_numpy(float), fit["compressibility"],
                                                   internal_friction_deg, wall_friction_deg)
    compactors = {}
    if "compactor" in used.columns:
        for name, group in used.groupby(used["compactor"].fillna("(none)").astype(str), sort=True):
            width = group["roll_width_mm"].median() if "roll_width_mm" in group.columns else float("nan")
            compactors[name] = {"roll_diameter_mm": float(group["roll_diameter_mm"].median()),
                                "roll_width_mm": None if not np.isfinite(width) else float(width),
                                "lots": int(len(group))}
    counted = used["product"].fillna("").astype(str).value_counts() if "product" in used.columns else {}
    products = {str(k): int(counted[k]) for k in sorted(counted.keys(), key=lambda k: (k == "", k))}
    return RibbonPhysics(fit["compressibility"], fit["pressure_constant_mpa"], fit["log_params"],
                         fit["log_covariance"], fit["residual_sd"], fit["n_lots"], internal_friction_deg,
                         wall_friction_deg, compactors, int((~complete).sum()),
                         (float(np.min(pressures)), float(np.max(pressures))), products)


@dataclass(frozen=True)
class Transfer:
    """The answer of :func:`transfer` (``linkage transfer``)."""

    physics: RibbonPhysics
    roll_diameter_mm: float
    roll_width_mm: float
    roll_gap_mm: float
    level: float
    #: one row per target porosity: porosity, force, intervals, peak pressure, nip angle, total force
    targets: list
    #: "porosity" or "window"
    kind: str
    #: the store's lots set aside (``linkage set-aside``) left out of the fit
    set_aside_lots: tuple = ()

    @property
    def edges_overlap(self) -> list[float] | None:
        """For a window: where the two edges' one-lot intervals overlap (low, high kN/cm), or None (apart, or a
        single target). Overlapping, one lot's roll force cannot tell the two edges apart at this uncertainty."""
        if self.kind != "window" or len(self.targets) < 2:
            return None
        low_edge, high_edge = self.targets[0], self.targets[-1]  # low porosity: the higher force
        start = low_edge["force_interval_kn_per_cm"][0]
        end = high_edge["force_interval_kn_per_cm"][1]
        return [float(start), float(end)] if start <= end else None

    def to_dict(self) -> dict:
        """What ``linkage transfer --json`` prints."""
        return {"rolls": {"roll_diameter_mm": self.roll_diameter_mm, "roll_width_mm": self.roll_width_mm,
                          "roll_gap_mm": self.roll_gap_mm},
                "kind": self.kind, "level": self.level, "targets": self.targets,
                "edges_overlap_kn_per_cm": self.edges_overlap,
                "model": self.physics.to_dict(), "leaves_out": LEAVES_OUT,
                "set_aside_lots": list(self.set_aside_lots), "caution": CAUTION}

    def summary(self):
        import pandas as pd

        return pd.DataFrame(self.targets).set_index("ribbon_porosity")

    def text(self) -> str:
        p = self.physics
        lines = [f"Transfer to rolls of diameter {self.roll_diameter_mm:g} mm, width {self.roll_width_mm:g} mm, "
                 f"gap {self.roll_gap_mm:g} mm",
                 f"  ribbon model (Johanson 1965): K = {p.compressibility:.3g}, pressure constant "
                 f"{p.pressure_constant_mpa:.4g} MPa, residual SD {p.residual_sd:.4f}, from {p.n_lots} lots"
                 + (" of " + ", ".join(f"{k} ({v['lots']})" for k, v in p.compactors.items()) if p.compactors
                    else "")]
        if len(p.products) > 1:  # one K and one C for every product's lots: said, as train says it of a model
            from linkage.products import counts_text

            named = counts_text([(k or None, n) for k, n in p.products.items()])
            lines.append(f"  !! fitted to the lots of several products together ({named}); for one product's "
                         "powder, give --product NAME")
        if self.set_aside_lots:
            from linkage.store import set_aside_note

            lines.append(f"  Note: {set_aside_note(self.set_aside_lots, 'left out of the fit')}")
        if self.kind == "window":
            lo, hi = self.targets[0], self.targets[-1]
            lines.append(f"  porosity window {lo['ribbon_porosity']:.3f}-{hi['ribbon_porosity']:.3f}: specific roll "
                         f"force {hi['roll_force_kn_per_cm']:.2f}-{lo['roll_force_kn_per_cm']:.2f} kN/cm")
        pct = f"{100 * self.level:g}%"
        for t in self.targets:
            lo, hi = t["force_interval_kn_per_cm"]
            clo, chi = t["force_confidence_kn_per_cm"]
            lines.append(f"  porosity {t['ribbon_porosity']:.3f}: {t['roll_force_kn_per_cm']:.2f} kN/cm "
                         f"({t['roll_force_kn']:.1f} kN over the width), {pct} interval for one lot "
                         f"{lo:.2f}-{hi:.2f} kN/cm (parameters alone {clo:.2f}-{chi:.2f}); peak pressure "
                         f"{t['peak_pressure_mpa']:.0f} MPa, nip angle {t['nip_angle_deg']:.1f}°"
                         + ("" if t["inside_lots_pressure_range"] else
                            f"; OUTSIDE the peak pressures the lots reached ({p.peak_pressure_range_mpa[0]:.0f}-"
                            f"{p.peak_pressure_range_mpa[1]:.0f} MPa): extrapolated"))
            beyond = t.get("interval_ends_outside_lots_pressure_range") or []
            if beyond:
                ends = " and ".join(f"{'lower' if e == 'low' else 'upper'} end "
                                    f"{t['force_interval_kn_per_cm'][0 if e == 'low' else 1]:.2f} kN/cm"
                                    for e in beyond)
                lines.append(f"    the interval's {ends}: OUTSIDE the peak pressures the lots reached "
                             f"({p.peak_pressure_range_mpa[0]:.0f}-{p.peak_pressure_range_mpa[1]:.0f} MPa): "
                             "extrapolated")
        overlap = self.edges_overlap
        if overlap is not None:
            lines.append(f"  Note: the two edges' {pct} intervals for one lot overlap ({overlap[0]:.2f}-"
                         f"{overlap[1]:.2f} kN/cm): at this uncertainty the window's roll force range cannot be told "
                         "apart on one lot; a force in the overlap may give a ribbon at either edge or beyond it")
        lines += ["", "Leaves out: " + LEAVES_OUT, CAUTION]
        return "\n".join(lines)


def _no_nip(physics: RibbonPhysics, roll_gap_mm: float, roll_diameter_mm: float) -> str:
    """Why Johanson's theory gives no roll force on these rolls (no nip angle), and the largest gap that has one."""
    ratio = roll_gap_mm / roll_diameter_mm
    largest = rolling.johanson_largest_gap_ratio(physics.compressibility, physics.internal_friction_deg,
                                                 physics.wall_friction_deg)
    positive = (f"positive only below arccos((1 + S/D)/2) = {np.degrees(np.arccos((1 + ratio) / 2)):.1f}°"
                if ratio < 1 else "negative at every angle, since S/D >= 1")
    return (f"no roll force on these rolls: a gap of {roll_gap_mm:g} mm on rolls of {roll_diameter_mm:g} mm "
            f"(S/D = {ratio:.3g}) gives no nip angle in Johanson's rolling theory (the nip-region pressure gradient, "
            f"{positive}, stays below the slip-region gradient at every angle for the fitted compressibility "
            f"K = {physics.compressibility:.3g} and friction angles {physics.internal_friction_deg:g}/"
            f"{physics.wall_friction_deg:g} deg), so the rolls do not draw the powder in and compress it. On these "
            f"rolls the gap must be below {largest * roll_diameter_mm:.3g} mm (S/D < {largest:.3g})")


def _edge_of_nip(physics: RibbonPhysics, roll_gap_mm: float, roll_diameter_mm: float, k_draw: np.ndarray,
                 per_mpa_draw: np.ndarray) -> str:
    """Why no interval is given when the fitted K nips at this gap but some of its draws do not."""
    share = float(np.mean(~np.isfinite(per_mpa_draw)))
    friction = (physics.internal_friction_deg, physics.wall_friction_deg)
    safe = min(rolling.johanson_largest_gap_ratio(float(k), *friction) for k in (k_draw.min(), k_draw.max()))
    return (f"no interval on these rolls: a gap of {roll_gap_mm:g} mm on rolls of {roll_diameter_mm:g} mm "
            f"(S/D = {roll_gap_mm / roll_diameter_mm:.3g}) is at the edge of the gaps Johanson's rolling theory "
            f"can nip: {share:.1%} of the draws of the compressibility K give no nip angle (hence no roll force), so "
            f"the interval cannot be computed. Choose a gap below about {safe * roll_diameter_mm:.3g} mm "
            f"(S/D < {safe:.3g})")


def _checked_targets(roll_diameter_mm: float, roll_width_mm: float, roll_gap_mm: float, porosity: float | None,
                     window: tuple[float, float] | None, level: float) -> tuple[list[float], str]:
    """The target porosities of :func:`transfer` (the one porosity, or the window's two ends) and which kind
    they are (``porosity``, ``window``), once its arguments have passed their checks (each refusal says which)."""
    from linkage.exceptions import UsageError

    if (porosity is None) == (window is None):
        raise UsageError("give either a target porosity or a porosity window, not both and not neither")
    for name, value in (("roll diameter", roll_diameter_mm), ("roll width", roll_width_mm), ("gap", roll_gap_mm)):
        if not (np.isfinite(value) and value > 0):
            raise UsageError(f"the {name} must be a positive number of mm; got {value!r}")
    if window is not None:
        lo, hi = window
        if not 0 < lo < hi < 1:
            raise UsageError(f"the porosity window needs 0 < LOW < HIGH < 1; got {lo!r}:{hi!r}")
        targets, kind = [float(lo), float(hi)], "window"
    else:
        if not 0 < porosity < 1:
            raise UsageError(f"the target porosity must lie in (0, 1); got {porosity!r}")
        targets, kind = [float(porosity)], "porosity"
    if not 0 < level < 1:
        raise UsageError(f"the interval level must lie in (0, 1); got {level!r}")
    return targets, kind


def transfer(physics: RibbonPhysics, *, roll_diameter_mm: float, roll_width_mm: float, roll_gap_mm: float,
             porosity: float | None = None, window: tuple[float, float] | None = None, level: float = 0.95,
             n_draws: int = 4000, seed: int = 0) -> Transfer:
    """Specific roll force for a target ribbon porosity (or window) on other rolls.

    Parameters
    ----------
    physics : RibbonPhysics
        From :func:`fit_ribbon_physics`.
    roll_diameter_mm, roll_width_mm, roll_gap_mm : float
        The target compactor's roll diameter and width and the gap [mm].
    porosity : float, optional
        Target ribbon porosity [-]; give this or ``window``.
    window : (float, float), optional
        Porosity window (low, high) [-]; the answer gives each end.
    level : float
        Coverage of the intervals.
    n_draws : int
        Monte Carlo draws of the interval.
    seed : int
        Seed of the draws (same inputs and seed give the same answer).

    Returns
    -------
    Transfer
        Force per target, with a prediction interval for one lot (parameter
        uncertainty plus lot-to-lot scatter) and the parameters' interval.
    """
    from linkage.exceptions import UsageError

    targets, kind = _checked_targets(roll_diameter_mm, roll_width_mm, roll_gap_mm, porosity, window, level)
    rng = np.random.default_rng(seed)
    draws = rng.multivariate_normal(physics.log_params, physics.log_covariance, size=n_draws, method="svd")
    k_draw, c_draw = np.exp(draws[:, 0]), np.exp(draws[:, 1])
    dof = max(physics.n_lots - 2, 1)
    scatter = physics.residual_sd * rng.standard_t(dof, size=n_draws)  # one lot's deviation from the curve
    tails = 100 * np.array([(1 - level) / 2, (1 + level) / 2])
    geometry = (roll_gap_mm, roll_diameter_mm)
    friction = (physics.internal_friction_deg, physics.wall_friction_deg)
    # specific force per MPa of peak pressure on the target rolls, for the fit and for each draw of K
    per_mpa = float(rolling.johanson_specific_roll_force_kn_per_cm(1.0, *geometry, physics.compressibility,
                                                                   *friction))
    if not np.isfinite(per_mpa):
        raise UsageError(_no_nip(physics, roll_gap_mm, roll_diameter_mm))
    per_mpa_draw = np.asarray(rolling.johanson_specific_roll_force_kn_per_cm(1.0, *geometry, k_draw, *friction))
    if not np.all(np.isfinite(per_mpa_draw)):  # near the largest gap: some draws of K give no nip
        raise UsageError(_edge_of_nip(physics, roll_gap_mm, roll_diameter_mm, k_draw, per_mpa_draw))
    rows = []
    for eps in targets:
        k, c = physics.compressibility, physics.pressure_constant_mpa
        force = float(rolling.peak_pressure_for_solid_fraction_mpa(1 - eps, k, c)) * per_mpa
        mean_curve = np.asarray(rolling.peak_pressure_for_solid_fraction_mpa(1 - eps, k_draw, c_draw)) * per_mpa_draw
        one_lot = np.asarray(rolling.peak_pressure_for_solid_fraction_mpa(
            1 - np.clip(eps - scatter, 1e-3, 1 - 1e-3), k_draw, c_draw)) * per_mpa_draw
        rows.append({
            "ribbon_porosity": eps,
            "roll_force_kn_per_cm": force,
            "roll_force_kn": force * roll_width_mm / 10.0,  # kN/cm x width [cm]
            "force_interval_kn_per_cm": [float(v) for v in np.nanpercentile(one_lot, tails)],
            "force_confidence_kn_per_cm": [float(v) for v in np.nanpercentile(mean_curve, tails)],
            "peak_pressure_mpa": float(rolling.peak_pressure_for_solid_fraction_mpa(1 - eps, k, c)),
            "nip_angle_deg": float(rolling.johanson_nip_angles_deg(*geometry, k, *friction)),
            # the lots have made ribbons at this peak pressure (interpolation in the material's law), or not
            "inside_lots_pressure_range": bool(physics.peak_pressure_range_mpa[0]
                                               <= rolling.peak_pressure_for_solid_fraction_mpa(1 - eps, k, c)
                                               <= physics.peak_pressure_range_mpa[1]),
        })
        # an end of the one-lot interval is a peak pressure too (force / force per MPa on these rolls, fitted K):
        # outside the lots' peak pressures it is extrapolated, as the force itself would be
        rows[-1]["interval_ends_outside_lots_pressure_range"] = [
            name for name, f in zip(("low", "high"), rows[-1]["force_interval_kn_per_cm"])
            if not physics.peak_pressure_range_mpa[0] <= f / per_mpa <= physics.peak_pressure_range_mpa[1]]
    return Transfer(physics, float(roll_diameter_mm), float(roll_width_mm), float(roll_gap_mm), float(level), rows,
                    kind)
