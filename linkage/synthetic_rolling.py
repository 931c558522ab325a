r"""A synthetic two-compactor campaign generated from Johanson's rolling theory, with a known truth.

The truth is the ribbon model of :mod:`linkage.physics.rolling` with a
stated compressibility K, pressure constant C and friction angles. Lots are
drawn on a pilot and a production compactor of different roll diameters
(and widths), at random specific roll forces and gaps, and their ribbon
porosity is the true one plus normal lot-to-lot noise of known SD. The test
of the transfer asks for the force that gives a target porosity on the
production rolls and compares it with :meth:`TransferTruth.force_kn_per_cm`.

All values are invented; nothing here is a real product or machine.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

from linkage.physics import rolling

__all__ = ["TransferTruth", "make_transfer_lots"]


@dataclass(frozen=True)
class TransferTruth:
    """Parameters of the synthetic ribbon stage (invented)."""

    compressibility: float = 5.5
    pressure_constant_mpa: float = 700.0
    internal_friction_deg: float = rolling.DEFAULT_INTERNAL_FRICTION_DEG
    wall_friction_deg: float = rolling.DEFAULT_WALL_FRICTION_DEG
    #: lot-to-lot SD of ribbon porosity around the theory [-]
    porosity_sd: float = 0.008
    #: compactor -> (roll width [mm], roll diameter [mm])
    rolls: Mapping[str, tuple[float, float]] = field(
        default_factory=lambda: {"pilot": (40.0, 200.0), "production": (100.0, 400.0)})
    #: range of the specific roll force drawn [kN/cm]
    force_range_kn_per_cm: tuple[float, float] = (4.0, 14.0)
    #: range of the gap drawn [mm]
    gap_range_mm: tuple[float, float] = (1.5, 3.5)

    def porosity(self, roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm):
        """True mean ribbon porosity [-]."""
        return rolling.johanson_ribbon_porosity(roll_force_kn_per_cm, roll_gap_mm, roll_diameter_mm,
                                                self.compressibility, self.pressure_constant_mpa,
                                                self.internal_friction_deg, self.wall_friction_deg)

    def force_kn_per_cm(self, ribbon_porosity, roll_gap_mm, roll_diameter_mm):
        """True specific roll force [kN/cm] that gives a mean ribbon porosity."""
        return rolling.johanson_roll_force_for_porosity_kn_per_cm(ribbon_porosity, roll_gap_mm, roll_diameter_mm,
                                                                  self.compressibility, self.pressure_constant_mpa,
                                                                  self.internal_friction_deg,
                                                                  self.wall_friction_deg)


def make_transfer_lots(truth: TransferTruth | None = None, *, lots: Mapping[str, int] | None = None,
                       seed: int = 0) -> pd.DataFrame:
    """Draw lots of the two-compactor campaign.

    Parameters
    ----------
    truth : TransferTruth, optional
        The truth (defaults when omitted).
    lots : mapping, optional
        compactor -> number of lots (default 30 pilot, 6 production).
    seed : int
        Seed of every random draw.

    Returns
    -------
    pandas.DataFrame
        One row per lot: ``lot``, ``compactor``, ``roll_force_kn_per_cm``,
        ``roll_gap_mm``, ``roll_width_mm``, ``roll_diameter_mm``,
        ``ribbon_porosity`` (measured) and ``true_porosity``.
    """
    truth = truth or TransferTruth()
    lots = dict(lots or {"pilot": 30, "production": 6})
    rng = np.random.default_rng(seed)
    frames = []
    for name, n in lots.items():
        width, diameter = truth.rolls[name]
        force = np.round(rng.uniform(*truth.force_range_kn_per_cm, size=n), 2)
        gap = np.round(rng.uniform(*truth.gap_range_mm, size=n), 2)
        true = np.asarray(truth.porosity(force, gap, diameter), dtype=float)
        frames.append(pd.DataFrame({
            "compactor": name, "roll_force_kn_per_cm": force, "roll_gap_mm": gap, "roll_width_mm": width,
            "roll_diameter_mm": diameter, "ribbon_porosity": true + rng.normal(0, truth.porosity_sd, size=n),
            "true_porosity": true}))
    out = pd.concat(frames, ignore_index=True)
    out.insert(0, "lot", [f"T{i + 1:03d}" for i in range(len(out))])
    return out
