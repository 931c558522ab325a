r"""Synthetic roller-compaction lots with a known truth.

Tests, benchmarks and the demo need lots whose true behaviour is known, so
that a fitted model, an interval or a porosity window can be compared with
the right answer. :class:`Truth` holds every parameter of an invented but
physically shaped product; :func:`make_lots` draws lots from it and returns
the raw input tables (the template of :mod:`linkage.schema`) together with
the true expected and realised value of every lot.

The chain the truth follows is the one linkage's models learn::

    roll_force_kn_per_cm, roll_gap_mm, roll_speed_rpm, screw_speed_rpm
        -> ribbon_porosity
    ribbon_porosity, mill_screen_mm
        -> granule_d50_um, fines_pct
    ribbon_porosity, granule_d50_um, fines_pct, compression_force_kn
        -> tensile_strength_mpa, weight_rsd_pct, friability_pct, dissolution_pct

Ribbon stage (lot porosity :math:`\varepsilon`)
    .. math::

        \varepsilon = 1 - [a + b \ln F] + g (S - S_0) + s (N - N_0)
                      - c \ln\frac{N_{screw}}{k N S} + \delta_{compactor}

    Solid fraction linear in the logarithm of the specific roll force F
    [kN/cm] (the logarithmic compressibility form, Walker 1923, from memory),
    gap S [mm] and roll speed N [rpm] effects and a feed-ratio effect:
    coefficients invented.

Granule stage (RRSB, Rosin & Rammler 1933, from memory)
    .. math::

        Q_3(x) = 1 - \exp[-(x/x')^n],\quad
        x' = x'_0 (w/w_0)^{\beta} e^{-\kappa(\varepsilon - \varepsilon_0)},\quad
        n = n_0 + n_1 (\varepsilon_0 - \varepsilon)

    so :math:`d_{50} = x' (\ln 2)^{1/n}` and
    fines = :math:`100\,Q_3(125\,\mu m)`. Mill screen w [mm]. Invented.

Tablet stage
    Tablet porosity from compaction pressure P [MPa] in the Heckel form
    (Heckel 1961, from memory) plus a ribbon work-hardening term,
    :math:`\varepsilon_t = e^{-(A + P/P_y)} + h(\varepsilon_0 - \varepsilon)`;
    tensile strength of Ryshkewitch-Duckworth form (Ryshkewitch 1953,
    Duckworth 1953), :math:`\sigma = \sigma_0 e^{-k \varepsilon_t}
    (d_{50}/d_{ref})^{-q}`; breaking force by the inverse of Fell & Newton
    (1970), :math:`F = \sigma \pi D t / 2`. Weight RSD exponential in fines,
    friability a power law in strength, dissolution at 30 min from a Weibull
    profile (Langenbucher 1972, from memory) whose time scale grows as the
    ribbon densifies. All coefficients invented.

See ``data_demo/README.md`` for the full list of equations, sources and the
noise model. Nothing here is a real product.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from types import SimpleNamespace
from typing import Mapping

import numpy as np
import pandas as pd

from linkage.exceptions import UsageError

__all__ = [
    "make_batch_lots",
    "ATTRIBUTES",
    "GRANULE_ATTRIBUTES",
    "TABLET_ATTRIBUTES",
    "ROLL_SETTINGS",
    "SIEVES_UM",
    "MILL_SCREENS_MM",
    "WINDOW_SPEC",
    "WINDOW_SETTINGS",
    "Truth",
    "SyntheticLots",
    "make_lots",
    "rrsb_from_d50_fines",
    "remeasure_ribbon",
    "spec_toml",
    "UnitScenario",
]

#: sieve stack of the granule analysis [um], coarsest first; 0 is the pan
SIEVES_UM: tuple[int, ...] = (1400, 1000, 710, 500, 355, 250, 180, 125, 90, 63, 0)
#: mill screens used in the campaign design [mm]
MILL_SCREENS_MM: tuple[float, ...] = (0.8, 1.0, 1.25)
#: attributes the truth predicts, with lot-level noise of known SD
ATTRIBUTES: tuple[str, ...] = (
    "ribbon_porosity",
    "granule_d50_um",
    "fines_pct",
    "tensile_strength_mpa",
    "weight_rsd_pct",
    "friability_pct",
    "dissolution_pct",
)
GRANULE_ATTRIBUTES = ("granule_d50_um", "fines_pct")
#: attributes a spec of the truth may limit: the stage attributes, and breaking force (from tensile strength and
#: the tablet's thickness, inverse Fell & Newton 1970)
SPEC_ATTRIBUTES: tuple[str, ...] = (*ATTRIBUTES, "breaking_force_n")
TABLET_ATTRIBUTES = ("tensile_strength_mpa", "weight_rsd_pct", "friability_pct", "dissolution_pct")
ROLL_SETTINGS = ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm")

#: the spec of the window scenario (and of the demo): attribute -> (min, max)
WINDOW_SPEC: dict[str, tuple[float | None, float | None]] = {
    "dissolution_pct": (80.0, None),
    "tensile_strength_mpa": (1.7, None),
    "weight_rsd_pct": (None, 2.0),
    "friability_pct": (None, 1.0),
}
#: the downstream settings at which the window scenario's window is stated
WINDOW_SETTINGS: dict[str, float] = {"mill_screen_mm": 1.0, "compression_force_kn": 14.0}


def _arr(x) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _out(x):
    """A float for scalar input, else a (writable) numpy array."""
    x = np.array(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def rrsb_from_d50_fines(granule_d50_um, fines_pct, cutoff_um=125.0):
    r"""RRSB parameters with a given median and fines content.

    From :math:`d_{50} = x' (\ln 2)^{1/n}` and
    :math:`-\ln(1 - f) = (x_c / x')^n` (f the fines fraction below the
    cut-off :math:`x_c`):

    .. math::

        n = \frac{\ln(\ln 2 / M)}{\ln(d_{50}/x_c)},\quad M = -\ln(1-f),\qquad
        x' = x_c M^{-1/n}

    Parameters
    ----------
    granule_d50_um : float or array-like
        Median size [um]; must exceed ``cutoff_um``.
    fines_pct : float or array-like
        Mass percent below the cut-off [%]; must lie in (0, 50).
    cutoff_um : float
        Fines cut-off [um].

    Returns
    -------
    x_prime_um, n : float or numpy.ndarray
        Characteristic size [um] and uniformity index [-].
    """
    d50 = _arr(granule_d50_um)
    f = _arr(fines_pct) / 100.0
    if np.any(d50 <= cutoff_um) or np.any((f <= 0) | (f >= 0.5)):
        raise ValueError("rrsb_from_d50_fines needs granule_d50_um > cutoff_um and 0 < fines_pct < 50 "
                         "(a median above the cut-off implies less than 50 % fines)")
    m = -np.log1p(-f)
    n = np.log(math.log(2.0) / m) / np.log(d50 / cutoff_um)
    x_prime = cutoff_um * m ** (-1.0 / n)
    return _out(x_prime), _out(n)


def _rrsb_undersize(size_um, x_prime_um, n):
    """RRSB cumulative undersize Q3 as a fraction (Rosin & Rammler 1933)."""
    return -np.expm1(-(size_um / x_prime_um) ** n)


def _parse_spec(spec) -> dict[str, tuple[float, float]]:
    """Spec mapping -> attribute: (low, high) with +-inf for an open side.

    Accepts ``{"dissolution_pct": (80, None)}`` or the spec-file form
    ``{"dissolution_pct": {"min": 80, "time_min": 30}}``.
    """
    limits: dict[str, tuple[float, float]] = {}
    for name, value in dict(spec).items():
        if name not in SPEC_ATTRIBUTES:
            raise UsageError(f"spec attribute {name!r} is not one the synthetic truth predicts; "
                             f"use one of {', '.join(SPEC_ATTRIBUTES)}")
        if isinstance(value, Mapping):
            low, high = value.get("min"), value.get("max")
        else:
            low, high = value
        lo = -np.inf if low is None else float(low)
        hi = np.inf if high is None else float(high)
        if lo > hi:
            raise UsageError(f"spec for {name}: min {lo} is above max {hi}")
        limits[name] = (lo, hi)
    if not limits:
        raise UsageError("the spec names no attribute")
    return limits


@dataclass(frozen=True)
class Truth:
    """Every parameter of the synthetic product, with defaults that give a
    sensible immediate-release tablet made by roller compaction.

    The defaults are also the window scenario (:meth:`window_scenario`).
    Porosities are fractions; ``*_pct`` are percent. Coefficients are
    invented for the demo unless a docstring says otherwise.
    """

    # --- ribbon: solid fraction = a + b ln(force), plus gap/speed/feed terms
    sf_intercept: float = 0.380
    sf_per_ln_force: float = 0.144
    porosity_per_mm_gap: float = 0.020
    porosity_per_rpm_roll: float = 0.003
    porosity_per_ln_feed_ratio: float = -0.05
    #: nominal screw speed per (roll speed x gap) [rpm / (rpm mm)]
    feed_screw_per_roll_gap: float = 2.2
    gap_ref_mm: float = 2.5
    roll_speed_ref_rpm: float = 5.0
    #: additive porosity offset of each compactor (pilot is the reference)
    compactor_offsets: Mapping[str, float] = field(default_factory=lambda: {"pilot": 0.0, "production": -0.006})
    #: lot-to-lot process scatter of the true lot porosity
    porosity_process_sd: float = 0.008
    #: porosity error of one replicate (envelope-density measurement)
    porosity_replicate_sd: float = 0.006
    skeletal_density_g_cm3: float = 1.530
    skeletal_lot_sd_g_cm3: float = 0.008
    pycnometer_sd_g_cm3: float = 0.0015
    #: replicate count at which ``noise_sd['ribbon_porosity']`` is stated
    nominal_replicates: int = 4

    # --- granules: RRSB x' and n
    porosity_ref: float = 0.30
    x_prime_ref_um: float = 420.0
    x_prime_per_porosity: float = 4.0
    screen_ref_mm: float = 1.0
    x_prime_screen_exponent: float = 0.7
    rrsb_n_ref: float = 1.30
    rrsb_n_per_porosity: float = 1.0
    fines_cutoff_um: float = 125.0
    granule_d50_sd_um: float = 10.0
    fines_sd_pct: float = 1.0
    granule_noise_corr: float = -0.5
    sieve_sample_g: float = 100.0
    sieve_sample_sd_g: float = 2.0
    weighing_sd_g: float = 0.02

    # --- tablets
    tablet_diameter_mm: float = 10.0
    tablet_weight_mg: float = 400.0
    heckel_a: float = 0.896
    apparent_yield_pressure_mpa: float = 208.0
    ribbon_hardening: float = 0.30
    min_tablet_porosity: float = 0.02
    rd_sigma0_mpa: float = 12.0
    rd_k: float = 8.0
    d50_ref_um: float = 300.0
    strength_d50_exponent: float = 0.25
    tensile_sd_mpa: float = 0.10
    thickness_sd_mm: float = 0.01
    weight_rsd_ref_pct: float = 1.33
    fines_ref_pct: float = 20.0
    weight_rsd_per_fines_pct: float = 0.052
    weight_rsd_sd_pct: float = 0.12
    min_weight_rsd_pct: float = 0.2
    unit_weight_lot_sd_rel: float = 0.005
    n_units: int = 10
    friability_floor_pct: float = 0.10
    friability_ref_pct: float = 0.30
    strength_ref_mpa: float = 2.0
    friability_strength_exponent: float = 1.5
    friability_sd_pct: float = 0.04
    dissolution_time_min: float = 30.0
    dissolution_max_pct: float = 100.0
    weibull_beta: float = 1.0
    tau_ref_min: float = 11.8
    tau_per_porosity: float = 4.5
    force_ref_kn: float = 14.0
    tau_force_exponent: float = 0.4
    tau_d50_exponent: float = 0.5
    dissolution_lot_sd_pct: float = 2.0
    dissolution_vessel_sd_pct: float = 3.0
    n_vessels: int = 6

    #: additive offsets on stage means (see :meth:`shifted`), attribute -> delta
    offsets: Mapping[str, float] = field(default_factory=dict)

    # ------------------------------------------------------------ scenarios
    @classmethod
    def window_scenario(cls) -> "Truth":
        """The truth with a two-sided porosity window under :data:`WINDOW_SPEC`
        at :data:`WINDOW_SETTINGS` (screen 1.0 mm, 14 kN): dissolution limits
        the dense side, weight RSD the porous side, and strength and
        friability do not bind inside the campaign's porosity range
        (0.20-0.45). True probability window at confidence 0.9: about
        0.25-0.36. These are the defaults."""
        return cls()

    def shifted(self, attribute: str, delta: float) -> "Truth":
        """A copy of the truth with ``delta`` added to the stage mean of
        ``attribute`` (a raw-material change, for drift tests)."""
        if attribute not in ATTRIBUTES:
            raise UsageError(f"cannot shift {attribute!r}; use one of {', '.join(ATTRIBUTES)}")
        offsets = dict(self.offsets)
        offsets[attribute] = offsets.get(attribute, 0.0) + float(delta)
        return replace(self, offsets=offsets)

    def _offset(self, attribute: str) -> float:
        return float(self.offsets.get(attribute, 0.0))

    # ------------------------------------------------------------ noise
    def porosity_noise_sd(self, n_samples) -> float | np.ndarray:
        """SD of a lot's measured porosity (the mean of ``n_samples``
        replicate porosities) around :meth:`porosity_mean`:
        sqrt(process_sd^2 + replicate_sd^2 / n_samples)."""
        n = _arr(n_samples)
        return _out(np.sqrt(self.porosity_process_sd ** 2 + self.porosity_replicate_sd ** 2 / n))

    @property
    def dissolution_noise_sd(self) -> float:
        """SD of a lot's mean dissolution (over the vessels) around its mean:
        sqrt(lot_sd^2 + vessel_sd^2 / n_vessels)."""
        return math.sqrt(self.dissolution_lot_sd_pct ** 2 + self.dissolution_vessel_sd_pct ** 2 / self.n_vessels)

    @property
    def noise_sd(self) -> dict[str, float]:
        """Attribute -> SD of the lot value the assembled table shows around
        the stage mean given the lot's true inputs.

        ``ribbon_porosity``: the lot mean over replicates, around
        :meth:`porosity_mean`, counting process scatter and replicate error
        at ``nominal_replicates`` samples (see :meth:`porosity_noise_sd` for
        another count). ``granule_d50_um`` and ``fines_pct``: of the lot's
        true RRSB distribution (the sieve-interpolated d50 adds a small
        interpolation error). Tablet attributes: additive Gaussian noise
        (dissolution: lot effect plus the mean of the vessel errors)."""
        return {
            "ribbon_porosity": float(self.porosity_noise_sd(self.nominal_replicates)),
            "granule_d50_um": self.granule_d50_sd_um,
            "fines_pct": self.fines_sd_pct,
            "tensile_strength_mpa": self.tensile_sd_mpa,
            "weight_rsd_pct": self.weight_rsd_sd_pct,
            "friability_pct": self.friability_sd_pct,
            "dissolution_pct": self.dissolution_noise_sd,
        }

    # ------------------------------------------------------------ means
    def porosity_mean(self, roll_force_kn_per_cm, roll_gap_mm, roll_speed_rpm, screw_speed_rpm,
                      compactor=None):
        """True expected ribbon porosity [-] of a lot at these settings.

        Parameters
        ----------
        roll_force_kn_per_cm : specific roll force [kN/cm]
        roll_gap_mm : roll gap [mm]
        roll_speed_rpm : roll speed [rpm]
        screw_speed_rpm : feed screw speed [rpm]
        compactor : optional compactor names (array of str); adds
            ``compactor_offsets`` (unknown names add 0). Without it, the
            pilot (reference) compactor.
        """
        f = _arr(roll_force_kn_per_cm)
        gap = _arr(roll_gap_mm)
        speed = _arr(roll_speed_rpm)
        screw = _arr(screw_speed_rpm)
        if np.any(f <= 0) or np.any(gap <= 0) or np.any(speed <= 0) or np.any(screw <= 0):
            raise ValueError("roll force, gap, roll speed and screw speed must be positive")
        solid_fraction = self.sf_intercept + self.sf_per_ln_force * np.log(f)
        feed_ratio = screw / (self.feed_screw_per_roll_gap * speed * gap)
        eps = (1.0 - solid_fraction
               + self.porosity_per_mm_gap * (gap - self.gap_ref_mm)
               + self.porosity_per_rpm_roll * (speed - self.roll_speed_ref_rpm)
               + self.porosity_per_ln_feed_ratio * np.log(feed_ratio)
               + self._offset("ribbon_porosity"))
        if compactor is not None:
            names = np.asarray(compactor, dtype=object)
            offsets = np.array([self.compactor_offsets.get(str(c), 0.0) for c in names.ravel()],
                               dtype=float).reshape(names.shape)
            eps = eps + offsets
        return _out(eps)

    def rrsb_mean(self, ribbon_porosity, mill_screen_mm):
        """Mean RRSB parameters (x' [um], n [-]) before any offset."""
        eps = _arr(ribbon_porosity)
        screen = _arr(mill_screen_mm)
        if np.any(screen <= 0):
            raise ValueError("mill_screen_mm must be positive")
        x_prime = (self.x_prime_ref_um * (screen / self.screen_ref_mm) ** self.x_prime_screen_exponent
                   * np.exp(-self.x_prime_per_porosity * (eps - self.porosity_ref)))
        n = self.rrsb_n_ref + self.rrsb_n_per_porosity * (self.porosity_ref - eps)
        return x_prime, n

    def granules_mean(self, ribbon_porosity, mill_screen_mm) -> dict[str, np.ndarray | float]:
        """True expected granule d50 [um] and fines [% below the cut-off] of
        ribbon at this porosity milled through this screen, from the RRSB
        parameters: d50 = x' (ln 2)^(1/n), fines = 100 (1 - exp(-(125/x')^n)).

        Returns a dict with ``granule_d50_um``, ``fines_pct``,
        ``rrsb_x_prime_um`` and ``rrsb_n`` (re-solved from d50 and fines when
        an offset shifts them)."""
        x_prime, n = self.rrsb_mean(ribbon_porosity, mill_screen_mm)
        d50 = x_prime * math.log(2.0) ** (1.0 / n)
        fines = 100.0 * _rrsb_undersize(self.fines_cutoff_um, x_prime, n)
        if self._offset("granule_d50_um") or self._offset("fines_pct"):
            d50 = d50 + self._offset("granule_d50_um")
            fines = fines + self._offset("fines_pct")
            x_prime, n = rrsb_from_d50_fines(d50, fines, self.fines_cutoff_um)
        return {
            "granule_d50_um": _out(d50),
            "fines_pct": _out(fines),
            "rrsb_x_prime_um": _out(x_prime),
            "rrsb_n": _out(n),
        }

    def tablet_porosity(self, ribbon_porosity, compression_force_kn):
        """Tablet porosity [-]: Heckel form in compaction pressure plus the
        ribbon work-hardening term, floored at ``min_tablet_porosity``."""
        eps = _arr(ribbon_porosity)
        force = _arr(compression_force_kn)
        if np.any(force <= 0):
            raise ValueError("compression_force_kn must be positive")
        area_mm2 = math.pi * self.tablet_diameter_mm ** 2 / 4.0
        pressure_mpa = force * 1000.0 / area_mm2
        eps_t = (np.exp(-(self.heckel_a + pressure_mpa / self.apparent_yield_pressure_mpa))
                 + self.ribbon_hardening * (self.porosity_ref - eps))
        return np.maximum(eps_t, self.min_tablet_porosity)

    def thickness_mm(self, ribbon_porosity, compression_force_kn, skeletal_density_g_cm3=None):
        """Flat tablet thickness [mm] of a tablet of ``tablet_weight_mg`` at
        the tablet porosity: t = m / (rho (1 - eps_t) pi D^2 / 4)."""
        rho = self.skeletal_density_g_cm3 if skeletal_density_g_cm3 is None else _arr(skeletal_density_g_cm3)
        eps_t = self.tablet_porosity(ribbon_porosity, compression_force_kn)
        area_mm2 = math.pi * self.tablet_diameter_mm ** 2 / 4.0
        return self.tablet_weight_mg / (rho * (1.0 - eps_t) * area_mm2)  # mg / (mg/mm3 * mm2) = mm

    def tablets_mean(self, ribbon_porosity, granule_d50_um, fines_pct, compression_force_kn) -> dict:
        """True expected tablet attributes of a lot with these inputs.

        Returns a dict with ``tensile_strength_mpa``, ``weight_rsd_pct``,
        ``friability_pct``, ``dissolution_pct`` (at ``dissolution_time_min``),
        and for reference ``tablet_porosity``, ``thickness_mm`` and
        ``breaking_force_n`` (inverse Fell-Newton at that thickness)."""
        eps = _arr(ribbon_porosity)
        d50 = _arr(granule_d50_um)
        fines = _arr(fines_pct)
        force = _arr(compression_force_kn)
        if np.any(d50 <= 0):
            raise ValueError("granule_d50_um must be positive")
        eps_t = self.tablet_porosity(eps, force)
        # Ryshkewitch-Duckworth in tablet porosity, granule-size factor
        strength = (self.rd_sigma0_mpa * np.exp(-self.rd_k * eps_t)
                    * (d50 / self.d50_ref_um) ** (-self.strength_d50_exponent)
                    + self._offset("tensile_strength_mpa"))
        weight_rsd = (self.weight_rsd_ref_pct * np.exp(self.weight_rsd_per_fines_pct * (fines - self.fines_ref_pct))
                      + self._offset("weight_rsd_pct"))
        friability = (self.friability_floor_pct
                      + self.friability_ref_pct * (np.maximum(strength, 1e-3) / self.strength_ref_mpa)
                      ** (-self.friability_strength_exponent)
                      + self._offset("friability_pct"))
        tau = (self.tau_ref_min * np.exp(-self.tau_per_porosity * (eps - self.porosity_ref))
               * (force / self.force_ref_kn) ** self.tau_force_exponent
               * (d50 / self.d50_ref_um) ** self.tau_d50_exponent)
        dissolution = (self.dissolution_max_pct
                       * -np.expm1(-(self.dissolution_time_min / tau) ** self.weibull_beta)
                       + self._offset("dissolution_pct"))
        thickness = self.thickness_mm(eps, force)
        shape = np.broadcast_shapes(eps.shape, d50.shape, fines.shape, force.shape)
        return {
            "tensile_strength_mpa": _out(np.broadcast_to(strength, shape)),
            "weight_rsd_pct": _out(np.broadcast_to(weight_rsd, shape)),
            "friability_pct": _out(np.broadcast_to(friability, shape)),
            "dissolution_pct": _out(np.broadcast_to(dissolution, shape)),
            "tablet_porosity": _out(np.broadcast_to(eps_t, shape)),
            "thickness_mm": _out(np.broadcast_to(thickness, shape)),
            # inverse of Fell & Newton (1970): F = sigma pi D t / 2
            "breaking_force_n": _out(np.broadcast_to(
                strength * math.pi * self.tablet_diameter_mm * thickness / 2.0, shape)),
        }

    def chain_mean(self, settings, ribbon_porosity=None) -> pd.DataFrame:
        """Every true expected attribute along the noise-free chain.

        ``settings``: a DataFrame or dict of arrays with ``mill_screen_mm``,
        ``compression_force_kn`` and, unless ``ribbon_porosity`` is given,
        the four roll settings (``compactor`` is used if present).
        ``ribbon_porosity`` overrides the ribbon stage. The chain plugs each
        stage's mean into the next (granule noise makes the lot average of a
        nonlinear tablet response differ from this by a second-order term).
        """
        frame = settings if isinstance(settings, pd.DataFrame) else None
        get = (lambda k: frame[k].to_numpy()) if frame is not None else (lambda k: settings[k])
        keys = set(frame.columns) if frame is not None else set(settings)
        needed = ["mill_screen_mm", "compression_force_kn"]
        if ribbon_porosity is None:
            needed = list(ROLL_SETTINGS) + needed
        missing = [k for k in needed if k not in keys]
        if missing:
            raise UsageError(f"chain_mean needs the settings {', '.join(missing)}")
        if ribbon_porosity is None:
            compactor = get("compactor") if "compactor" in keys else None
            eps = self.porosity_mean(*(get(k) for k in ROLL_SETTINGS), compactor=compactor)
        else:
            eps = ribbon_porosity
        screen = _arr(get("mill_screen_mm"))
        force = _arr(get("compression_force_kn"))
        eps, screen, force = np.broadcast_arrays(np.atleast_1d(_arr(eps)), np.atleast_1d(screen),
                                                 np.atleast_1d(force))
        g = self.granules_mean(eps, screen)
        t = self.tablets_mean(eps, g["granule_d50_um"], g["fines_pct"], force)
        out = {"ribbon_porosity": eps, **g, **t}
        index = frame.index if frame is not None and len(frame) == len(eps) else None
        return pd.DataFrame({k: np.asarray(v, dtype=float) for k, v in out.items()}, index=index)

    # ------------------------------------------------------------ realisation
    def _realise_granules(self, d50_mean, fines_mean, z_d50, z_fines):
        """Lot granule d50 and fines from correlated Gaussian noise, kept
        inside the RRSB-solvable range (d50 > 1.15 x cut-off, 0.5-45 %)."""
        rho = self.granule_noise_corr
        d50 = d50_mean + self.granule_d50_sd_um * z_d50
        fines = fines_mean + self.fines_sd_pct * (rho * z_d50 + math.sqrt(1.0 - rho * rho) * z_fines)
        return np.maximum(d50, 1.15 * self.fines_cutoff_um), np.clip(fines, 0.5, 45.0)

    def _realise_tablets(self, means: dict, z: np.ndarray) -> dict:
        """Lot tablet attributes: stage mean plus Gaussian noise; ``z`` holds
        standard normals for strength, weight RSD, friability, dissolution."""
        return {
            "tensile_strength_mpa": np.maximum(means["tensile_strength_mpa"] + self.tensile_sd_mpa * z[0], 0.01),
            "weight_rsd_pct": np.maximum(means["weight_rsd_pct"] + self.weight_rsd_sd_pct * z[1],
                                         self.min_weight_rsd_pct),
            "friability_pct": np.maximum(means["friability_pct"] + self.friability_sd_pct * z[2], 0.0),
            "dissolution_pct": means["dissolution_pct"] + self.dissolution_noise_sd * z[3],
        }

    # ------------------------------------------------------------ decisions
    def p_pass_all(self, ribbon_porosity, spec, mill_screen_mm, compression_force_kn, n_draws=20000,
                   seed=0) -> np.ndarray:
        """True probability that a new lot of this (true) ribbon porosity
        passes every limit of ``spec`` at once.

        Monte Carlo over the lot-level noise of the granule stage (which
        propagates into the tablet stage) and of the tablet stage, with the
        same draws at every porosity (common random numbers), so the result
        is monotone wherever the truth is. Limits are inclusive. A
        ``ribbon_porosity`` limit is checked on the given porosity itself.

        Parameters
        ----------
        ribbon_porosity : float or array-like, true lot porosity [-]
        spec : mapping attribute -> (min or None, max or None), or the
            spec-file form attribute -> {"min": ..., "max": ...}
        mill_screen_mm : mill screen [mm]
        compression_force_kn : main compression force [kN]
        n_draws : Monte Carlo draws per porosity
        seed : seed of the draws
        """
        limits = _parse_spec(spec)
        mill_screen_mm, compression_force_kn = float(mill_screen_mm), float(compression_force_kn)
        eps_all = np.atleast_1d(_arr(ribbon_porosity)).ravel()
        z = np.random.default_rng(seed).standard_normal((6, int(n_draws)))
        out = np.empty(eps_all.shape)
        chunk = max(1, 2_000_000 // int(n_draws))
        for start in range(0, eps_all.size, chunk):
            eps = eps_all[start:start + chunk, None]
            g = self.granules_mean(eps, mill_screen_mm)
            d50, fines = self._realise_granules(g["granule_d50_um"], g["fines_pct"], z[0], z[1])
            t = self._realise_tablets(self.tablets_mean(eps, d50, fines, compression_force_kn), z[2:])
            # breaking force by the inverse of Fell & Newton (1970), F = sigma pi D t / 2, at the mean thickness
            # (make_lots adds a thickness scatter of about 0.3 %, left out here)
            t["breaking_force_n"] = (t["tensile_strength_mpa"] * math.pi * self.tablet_diameter_mm
                                     * self.thickness_mm(eps, compression_force_kn) / 2.0)
            values = {"ribbon_porosity": np.broadcast_to(eps, d50.shape), "granule_d50_um": d50,
                      "fines_pct": fines, **t}
            ok = np.ones(d50.shape, dtype=bool)
            for name, (lo, hi) in limits.items():
                ok &= (values[name] >= lo) & (values[name] <= hi)
            out[start:start + chunk] = ok.mean(axis=1)
        return _out(out.reshape(np.shape(ribbon_porosity)))

    def _mean_passes(self, eps, limits, mill_screen_mm, compression_force_kn) -> dict[str, np.ndarray]:
        eps = np.atleast_1d(_arr(eps))
        g = self.granules_mean(eps, mill_screen_mm)
        t = self.tablets_mean(eps, g["granule_d50_um"], g["fines_pct"], compression_force_kn)
        values = {"ribbon_porosity": eps, **g, **t}
        return {name: (values[name] >= lo) & (values[name] <= hi) for name, (lo, hi) in limits.items()}

    def _window(self, passes, porosity_range, n_grid, tol):
        """Largest contiguous run of passing porosities on a grid, edges
        refined by bisection; an edge on the range bound stays there."""
        lo_b, hi_b = map(float, porosity_range)
        grid = np.linspace(lo_b, hi_b, int(n_grid))
        ok = passes(grid)
        if not ok.any():
            return (math.nan, math.nan)
        padded = np.concatenate([[False], ok, [False]]).astype(int)
        starts = np.flatnonzero(np.diff(padded) == 1)
        ends = np.flatnonzero(np.diff(padded) == -1) - 1
        best = int(np.argmax(ends - starts))
        i, j = int(starts[best]), int(ends[best])

        def refine(bad, good):
            while abs(good - bad) > tol:
                mid = 0.5 * (bad + good)
                if passes(np.array([mid]))[0]:
                    good = mid
                else:
                    bad = mid
            return good

        low = grid[i] if i == 0 else refine(grid[i - 1], grid[i])
        high = grid[j] if j == grid.size - 1 else refine(grid[j + 1], grid[j])
        return (float(low), float(high))

    def mean_window(self, spec, mill_screen_mm, compression_force_kn, porosity_range=(0.10, 0.55),
                    n_grid=451, tol=1e-5) -> tuple[float, float]:
        """True (low, high) ribbon porosity window where every mean response
        of the noise-free chain meets ``spec``. An edge equal to a bound of
        ``porosity_range`` means the window is open on that side there;
        (nan, nan) if no porosity passes."""
        limits = _parse_spec(spec)

        def passes(eps):
            return np.logical_and.reduce(list(self._mean_passes(eps, limits, mill_screen_mm,
                                                                 compression_force_kn).values()))

        return self._window(passes, porosity_range, n_grid, tol)

    def probability_window(self, spec, mill_screen_mm, compression_force_kn, confidence=0.9,
                           porosity_range=(0.10, 0.55), n_draws=20000, seed=0, n_grid=226,
                           tol=1e-4) -> tuple[float, float]:
        """True (low, high) ribbon porosity window where
        :meth:`p_pass_all` >= ``confidence``; conventions as
        :meth:`mean_window`."""
        def passes(eps):
            return self.p_pass_all(eps, spec, mill_screen_mm, compression_force_kn,
                                   n_draws=n_draws, seed=seed) >= confidence

        return self._window(passes, porosity_range, n_grid, tol)

    def limiting_attributes(self, spec, mill_screen_mm, compression_force_kn, confidence=None,
                            porosity_range=(0.10, 0.55), step=0.005, n_draws=20000, seed=0) -> dict:
        """Which attribute limits each edge of the true window.

        With ``confidence`` None, the mean window: the attribute whose mean
        fails just outside the edge (1e-4 beyond it; a tuple of names if
        several fail there together). With a confidence, the probability
        window: the attribute with the lowest single-attribute pass
        probability ``step`` beyond the edge. Returns
        ``{"low": (edge, name), "high": (edge, name)}``, name None where the
        window is open on that side (or empty)."""
        limits = _parse_spec(spec)
        if confidence is None:
            low, high = self.mean_window(spec, mill_screen_mm, compression_force_kn, porosity_range)
        else:
            low, high = self.probability_window(spec, mill_screen_mm, compression_force_kn, confidence,
                                                porosity_range, n_draws=n_draws, seed=seed)
        result = {}
        beyond = 1e-4 if confidence is None else step
        for side, edge, outside, bound in (("low", low, low - beyond, porosity_range[0]),
                                           ("high", high, high + beyond, porosity_range[1])):
            if math.isnan(edge) or abs(edge - bound) < 1e-12:
                result[side] = (edge, None)
                continue
            if confidence is None:
                passes = self._mean_passes(outside, limits, mill_screen_mm, compression_force_kn)
                failing = [name for name, ok in passes.items() if not ok[0]]
                result[side] = (edge, failing[0] if len(failing) == 1 else (tuple(failing) or None))
            else:
                p = {name: float(self.p_pass_all(outside, {name: limits[name]}, mill_screen_mm,
                                                 compression_force_kn, n_draws=n_draws, seed=seed))
                     for name in limits}
                result[side] = (edge, min(p, key=p.get))
        return result


@dataclass
class SyntheticLots:
    """What :func:`make_lots` returns.

    ``tables``: raw input tables keyed by table name (``process``,
    ``ribbon``, ``granules``, ``tablets`` and, when asked for,
    ``tablet_weights`` and ``dissolution``), in the template of
    :data:`linkage.schema.TABLES`. ``truth``: the :class:`Truth` used (before
    any raw-material shift). ``lot_truth``: one row per lot with the true
    expected and realised values (see :func:`make_lots`).
    """

    tables: dict[str, pd.DataFrame]
    truth: Truth
    lot_truth: pd.DataFrame

    def write_csv(self, folder, spec: Mapping | None = None) -> list[Path]:
        """Write every table as ``<name>.csv`` into ``folder`` (and
        ``spec.toml`` if a spec is given, attribute -> (min, max)); returns
        the paths written."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        written = []
        for name, frame in self.tables.items():
            path = folder / f"{name}.csv"
            frame.to_csv(path, index=False, lineterminator="\n")
            written.append(path)
        if spec is not None:
            path = folder / "spec.toml"
            path.write_text(spec_toml(spec, self.truth.dissolution_time_min), encoding="utf-8")
            written.append(path)
        return written


def spec_toml(spec: Mapping, dissolution_time_min: float = 30.0, *, dissolution_judge: str | None = None,
              acceptance_value_max: float | None = None) -> str:
    """A spec file in the template's TOML form from attribute -> (min, max); optionally dissolution judged by
    the compendial stages (``dissolution_judge="stages"``) and an ``[acceptance_value]`` limit."""
    lines = ["# acceptance limits, one table per quality attribute of the assembled table"]
    for name, (low, high) in _spec_items(spec):
        lines.append("")
        lines.append(f"[{name}]")
        if low is not None:
            lines.append(f"min = {_num(low)}")
        if high is not None:
            lines.append(f"max = {_num(high)}")
        if name == "dissolution_pct":
            lines.append(f"time_min = {_num(dissolution_time_min)}")
            if dissolution_judge is not None:
                lines.append(f'judge = "{dissolution_judge}"')
    if acceptance_value_max is not None:
        lines += ["", "[acceptance_value]", f"max = {_num(acceptance_value_max)}"]
    return "\n".join(lines) + "\n"


def _spec_items(spec):
    for name, value in dict(spec).items():
        if isinstance(value, Mapping):
            yield name, (value.get("min"), value.get("max"))
        else:
            yield name, tuple(value)


def _num(x) -> str:
    return repr(float(x))


# ---------------------------------------------------------------- make_lots
_DESIGNS = ("campaign", "routine")
_ROLLS = {"pilot": (40.0, 200.0), "production": (100.0, 250.0)}  # roll width, diameter [mm]


def _lot_ids(prefix: str, n: int) -> np.ndarray:
    width = max(3, len(str(n)))
    sep = "" if prefix.endswith(("-", "_")) or not prefix else "-"
    return np.array([f"{prefix}{sep}{i:0{width}d}" for i in range(1, n + 1)], dtype=object)


def _design(rng, n, design, pilot_fraction, truth):
    """Settings of each lot, rounded as the batch record reports them."""
    if design == "campaign":
        # roll force stratified over 4-14 kN/cm (one lot per stratum, random order), so even a
        # short campaign spans the porosity range
        force = 4.0 + 10.0 * (rng.permutation(n) + rng.uniform(size=n)) / n
        gap = rng.choice(np.array([1.5, 2.0, 2.5, 3.0, 3.5]), n) + rng.normal(0.0, 0.02, n)
        speed = rng.uniform(2.0, 8.0, n)
        screen = rng.choice(np.array(MILL_SCREENS_MM), n, p=[0.25, 0.5, 0.25])
        cforce = rng.uniform(8.0, 20.0, n)
    else:  # routine: close to one recipe
        force = np.clip(rng.normal(9.0, 0.6, n), 4.0, 14.0)
        gap = np.clip(rng.normal(2.5, 0.05, n), 1.5, 3.5)
        speed = np.clip(rng.normal(5.0, 0.3, n), 2.0, 8.0)
        screen = rng.choice(np.array(MILL_SCREENS_MM), n, p=[0.1, 0.8, 0.1])
        cforce = np.clip(rng.normal(14.0, 0.8, n), 8.0, 20.0)
    feed = np.exp(rng.normal(0.0, 0.08, n))
    pilot = rng.uniform(size=n) < pilot_fraction
    force = np.round(force, 2)
    gap = np.round(gap, 2)
    speed = np.round(speed, 1)
    screw = np.round(truth.feed_screw_per_roll_gap * speed * gap * feed, 1)
    return {
        "compactor": np.where(pilot, "pilot", "production").astype(object),
        "roll_force_kn_per_cm": force,
        "roll_gap_mm": gap,
        "roll_speed_rpm": speed,
        "screw_speed_rpm": screw,
        "mill_screen_mm": screen,
        "compression_force_kn": np.round(cforce, 1),
    }


def _pick(rng, n, share) -> np.ndarray:
    """Which lots get optional data: all (True), none (False) or a share."""
    if share is True:
        return np.ones(n, dtype=bool)
    if share is False or share is None or share == 0:
        return np.zeros(n, dtype=bool)
    share = float(share)
    if not 0.0 < share <= 1.0:
        raise UsageError(f"a share of lots must lie in (0, 1]; got {share}")
    return rng.uniform(size=n) < share


def _times(start, n, rng):
    """One lot per working day from ``start``; start of run 06:00-08:00."""
    try:
        day0 = np.datetime64(start, "D")
    except ValueError:
        raise UsageError(f"start must be an ISO date like 2026-01-05; got {start!r}") from None
    days = np.busday_offset(day0, np.arange(n), roll="forward")
    minutes = 360 + rng.integers(0, 121, n)
    return days.astype("datetime64[m]") + minutes.astype("timedelta64[m]")


def _iso(times) -> np.ndarray:
    return np.datetime_as_string(times.astype("datetime64[s]"), unit="s").astype(object)


def make_lots(n_lots: int, seed: int = 0, truth: Truth | None = None, *, design: str = "campaign",
              replicates: tuple[int, int] = (3, 5), with_units: bool | float = False,
              with_vessels: bool | float = False, start: str = "2026-01-05", product: str | None = None,
              lot_prefix: str = "LOT", pilot_fraction: float = 0.4, raw_materials: bool = False,
              raw_material_change_at: int | None = None, raw_material_delta: float = -6.0,
              raw_material_attribute: str = "dissolution_pct",
              settings: Mapping[str, object] | None = None,
              moisture_porosity_per_pct: float = 0.0) -> SyntheticLots:
    """Draw ``n_lots`` lots from ``truth`` (default :class:`Truth`).

    Parameters
    ----------
    n_lots : number of lots
    seed : seed; the same seed and arguments give the same tables. Each
        stage draws from its own stream, so switching optional data on or off
        leaves every other value unchanged.
    truth : the truth; default ``Truth()``
    design : ``"campaign"`` (roll force 4-14 kN/cm, gap 1.5-3.5 mm, roll
        speed 2-8 rpm, screens 0.8/1.0/1.25 mm, compression 8-20 kN) or
        ``"routine"`` (close to one recipe)
    replicates : (min, max) ribbon replicates per lot
    with_units, with_vessels : add ``tablet_weights`` (``n_units`` units) and
        ``dissolution`` (``n_vessels`` vessels at the spec time) for every lot
        (True) or a random share of lots (a float)
    start : first manufacturing day; one lot per working day
    product : product name for the ``process.product`` column (omitted if None)
    lot_prefix : lot ids are ``<prefix>-001`` ...
    pilot_fraction : share of lots made on the pilot compactor
    raw_materials : add ``blend_moisture_pct``, ``api_d50_um`` and
        ``lubricant_pct`` to ``process``. They have no effect in the truth
        (except that ``api_d50_um`` steps up at a raw-material change).
    raw_material_change_at, raw_material_delta, raw_material_attribute : from
        lot index ``raw_material_change_at`` on (0-based, in time order),
        lots follow ``truth.shifted(raw_material_attribute, raw_material_delta)``.
    settings : settings of each lot (name -> ``n_lots`` values) that replace
        the design's draws, e.g. lots planned by :mod:`linkage.decide.plan`:
        any of the roll settings, ``mill_screen_mm``, ``compression_force_kn``
        and ``compactor``. Every other draw is unchanged.
    moisture_porosity_per_pct : with ``raw_materials``, a real effect of the
        blend's moisture on the ribbon: the lot's mean porosity moves by this
        slope × (``blend_moisture_pct`` − 3.0 %) (0: none; the granule and
        tablet stages see the moved porosity; the ``_chain`` columns, from the
        settings alone, leave it out). For tests of material attributes
        (issue 19); the slope is invented.

    Returns
    -------
    SyntheticLots
        ``lot_truth`` columns: the settings; ``raw_material_changed``; for
        every attribute ``<a>_chain`` (noise-free chain from the settings),
        ``<a>_mean`` (stage mean given the lot's true inputs) and ``<a>``
        (realised lot value, as the assembled table will show it up to
        rounding); ``ribbon_porosity_lot`` (true lot porosity, the input of
        the granule and tablet stages), ``ribbon_samples``,
        ``skeletal_density_g_cm3``, ``rrsb_x_prime_um``, ``rrsb_n``,
        ``thickness_mm``, ``breaking_force_n``.
    """
    n, rmin, rmax = _checked_size(n_lots, design, replicates)
    truth = truth or Truth()
    changed = np.zeros(n, dtype=bool)
    shifted = truth
    if raw_material_change_at is not None:
        changed = np.arange(n) >= int(raw_material_change_at)
        shifted = truth.shifted(raw_material_attribute, raw_material_delta)

    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(9)]
    r_design, r_ribbon, r_gran, r_sieve, r_tab, r_units, r_vessels, r_pick, r_raw = streams

    lots = _lot_ids(lot_prefix, n)
    s = _with_given_settings(_design(r_design, n, design, pilot_fraction, truth), settings, n)
    started = _times(start, n, r_design)

    def staged(fn):
        """Evaluate a stage with the base truth and, for changed lots, the shifted one."""
        base = fn(truth)
        if not changed.any():
            return base
        moved = fn(shifted)
        return {k: np.where(changed, moved[k], base[k]) for k in base}

    raw = _draw_raw_materials(r_raw, n, changed, raw_materials, moisture_porosity_per_pct)
    ribbon = _draw_ribbon(r_ribbon, truth, staged, s, raw, moisture_porosity_per_pct, started, n, rmin, rmax)
    granules = _draw_granules(r_gran, r_sieve, truth, staged, s, ribbon.eps_lot, n)
    tablets = _draw_tablets(r_tab, r_units, r_vessels, truth, staged, s, ribbon, granules, n)
    chain = staged(lambda t: {k: v.to_numpy() for k, v in t.chain_mean(s).items()})  # noise-free, from settings
    tables = _lot_tables(lots, s, started, product, raw, ribbon, granules, tablets, truth)
    tables.update(_unit_tables(r_pick, lots, with_units, with_vessels, tablets, truth))
    lot_truth = _lot_truth(lots, s, changed, chain, ribbon, granules, tablets)
    return SyntheticLots(tables=tables, truth=truth, lot_truth=pd.DataFrame(lot_truth))


def _checked_size(n_lots, design, replicates) -> tuple[int, int, int]:
    """The number of lots and the (min, max) ribbon replicates, checked."""
    n = int(n_lots)
    if n < 1:
        raise UsageError(f"n_lots must be at least 1; got {n_lots}")
    if design not in _DESIGNS:
        raise UsageError(f"design must be one of {', '.join(_DESIGNS)}; got {design!r}")
    rmin, rmax = (int(r) for r in replicates)
    if not 1 <= rmin <= rmax:
        raise UsageError(f"replicates must be (min, max) with 1 <= min <= max; got {replicates}")
    return n, rmin, rmax


def _with_given_settings(s: dict, settings: Mapping[str, object] | None, n: int) -> dict:
    """The design's settings with those given (name -> ``n`` values) in place of the draws."""
    for k, v in (settings or {}).items():
        if k not in s:
            raise UsageError(f"settings: {k!r} is not a setting of the design; use {', '.join(s)}")
        v = np.asarray(v, dtype=object if k == "compactor" else float).reshape(-1)
        if v.size != n:
            raise UsageError(f"settings: {k} has {v.size} values for {n} lots")
        s[k] = v
    return s


def _draw_raw_materials(r_raw, n, changed, raw_materials, moisture_porosity_per_pct) -> dict[str, np.ndarray]:
    """The raw-material columns (none without ``raw_materials``)."""
    raw: dict[str, np.ndarray] = {}
    if raw_materials:  # drawn first, in this order, so that their values do not depend on the effect below
        raw["blend_moisture_pct"] = np.round(r_raw.normal(3.0, 0.4, n), 2)
        raw["api_d50_um"] = np.round(r_raw.normal(45.0, 4.0, n) + np.where(changed, 15.0, 0.0), 1)
        raw["lubricant_pct"] = np.round(r_raw.normal(1.0, 0.05, n), 2)
    elif moisture_porosity_per_pct:
        raise UsageError("moisture_porosity_per_pct needs raw_materials=True (the blend moisture column)")
    return raw


def _draw_ribbon(r_ribbon, truth, staged, s, raw, moisture_porosity_per_pct, started, n, rmin, rmax):
    """The ribbon: each lot's true mean and realised porosity, its replicate samples (envelope and
    skeletal density) and the measured lot porosity."""
    eps_mean = staged(lambda t: {"e": t.porosity_mean(*(s[k] for k in ROLL_SETTINGS),
                                                      compactor=s["compactor"])})["e"]
    if moisture_porosity_per_pct:
        eps_mean = eps_mean + float(moisture_porosity_per_pct) * (raw["blend_moisture_pct"] - 3.0)
    eps_lot = eps_mean + truth.porosity_process_sd * r_ribbon.standard_normal(n)
    n_rep = r_ribbon.integers(rmin, rmax + 1, n)
    rows = int(n_rep.sum())
    owner = np.repeat(np.arange(n), n_rep)
    first_row = np.concatenate([[0], np.cumsum(n_rep)[:-1]])
    sample_no = np.arange(rows) - first_row[owner] + 1
    skeletal_lot = np.clip(truth.skeletal_density_g_cm3 + truth.skeletal_lot_sd_g_cm3 * r_ribbon.standard_normal(n),
                           1.50, 1.56)
    skeletal = np.round(skeletal_lot[owner] + truth.pycnometer_sd_g_cm3 * r_ribbon.standard_normal(rows), 4)
    eps_rep = eps_lot[owner] + truth.porosity_replicate_sd * r_ribbon.standard_normal(rows)
    envelope = np.round((1.0 - eps_rep) * skeletal, 4)
    eps_measured = np.bincount(owner, weights=1.0 - envelope / skeletal, minlength=n) / n_rep
    sampled = started[owner] + (15 + 25 * (sample_no - 1)).astype("timedelta64[m]")
    return SimpleNamespace(eps_mean=eps_mean, eps_lot=eps_lot, n_rep=n_rep, owner=owner, sample_no=sample_no,
                           skeletal_lot=skeletal_lot, skeletal=skeletal, envelope=envelope,
                           eps_measured=eps_measured, sampled=sampled)


def _draw_granules(r_gran, r_sieve, truth, staged, s, eps_lot, n):
    """The granules: the true lot RRSB distribution, then a weighed sieve analysis."""
    g_mean = staged(lambda t: t.granules_mean(eps_lot, s["mill_screen_mm"]))
    z = r_gran.standard_normal((2, n))
    d50, fines = truth._realise_granules(g_mean["granule_d50_um"], g_mean["fines_pct"], z[0], z[1])
    x_prime, rrsb_n = rrsb_from_d50_fines(d50, fines, truth.fines_cutoff_um)
    apertures = np.array(SIEVES_UM, dtype=float)
    passing = _rrsb_undersize(apertures[:-1][None, :], x_prime[:, None], rrsb_n[:, None])  # Q3 at each sieve
    upper = np.concatenate([np.ones((n, 1)), passing], axis=1)
    lower = np.concatenate([passing, np.zeros((n, 1))], axis=1)
    share = upper - lower  # retained on each sieve; last column is the pan
    total_g = truth.sieve_sample_g + truth.sieve_sample_sd_g * r_sieve.standard_normal(n)
    retained = np.round(np.maximum(total_g[:, None] * share
                                   + truth.weighing_sd_g * r_sieve.standard_normal(share.shape), 0.0), 2)
    return SimpleNamespace(mean=g_mean, d50=d50, fines=fines, x_prime=x_prime, rrsb_n=rrsb_n, apertures=apertures,
                           retained=retained)


def _draw_tablets(r_tab, r_units, r_vessels, truth, staged, s, ribbon, granules, n):
    """The tablets: lot values, thickness and breaking force, unit weights and dissolution vessels."""
    eps_lot = ribbon.eps_lot
    t_mean = staged(lambda t: t.tablets_mean(eps_lot, granules.d50, granules.fines, s["compression_force_kn"]))
    zt = r_tab.standard_normal((4, n))
    real = truth._realise_tablets(t_mean, zt)
    thickness = np.round(truth.thickness_mm(eps_lot, s["compression_force_kn"], ribbon.skeletal_lot)
                         + truth.thickness_sd_mm * r_tab.standard_normal(n), 3)
    # breaking force by the inverse of Fell & Newton (1970) at the reported thickness
    breaking = np.round(real["tensile_strength_mpa"] * math.pi * truth.tablet_diameter_mm * thickness / 2.0, 1)
    # unit weights with exactly the lot's RSD (standardised draws), then weighed to 0.1 mg
    zu = r_units.standard_normal((n, truth.n_units))
    zu = (zu - zu.mean(axis=1, keepdims=True)) / zu.std(axis=1, ddof=1, keepdims=True)
    mean_weight = truth.tablet_weight_mg * (1.0 + truth.unit_weight_lot_sd_rel * r_units.standard_normal(n))
    weights = np.round(mean_weight[:, None] * (1.0 + real["weight_rsd_pct"][:, None] / 100.0 * zu), 1)
    weight_rsd = np.round(100.0 * weights.std(axis=1, ddof=1) / weights.mean(axis=1), 2)
    # vessels: lot effect + vessel error; the reported lot value is their mean
    lot_diss = t_mean["dissolution_pct"] + truth.dissolution_lot_sd_pct * zt[3]
    raw_v = lot_diss[:, None] + truth.dissolution_vessel_sd_pct * r_vessels.standard_normal((n, truth.n_vessels))
    tenths = np.rint(raw_v * 10.0).astype(np.int64)
    target = np.rint(raw_v.mean(axis=1) * 10.0).astype(np.int64)
    tenths[:, -1] = truth.n_vessels * target - tenths[:, :-1].sum(axis=1)  # mean of the vessels == target
    return SimpleNamespace(mean=t_mean, real=real, thickness=thickness, breaking=breaking, weights=weights,
                           weight_rsd=weight_rsd, tenths=tenths, dissolution=target / 10.0,
                           friability=np.round(real["friability_pct"], 2))


def _lot_tables(lots, s, started, product, raw, ribbon, granules, tablets, truth) -> dict[str, pd.DataFrame]:
    """The process, ribbon, granules and tablets tables, one row per lot or per sample or sieve."""
    n = lots.size
    process = {"lot": lots}
    if product is not None:
        process["product"] = np.full(n, str(product), dtype=object)
    process["compactor"] = s["compactor"]
    process["manufactured_at"] = _iso(started)
    for k in (*ROLL_SETTINGS, "mill_screen_mm"):
        process[k] = s[k]
    pilot = s["compactor"] == "pilot"
    process["roll_width_mm"] = np.where(pilot, _ROLLS["pilot"][0], _ROLLS["production"][0])
    process["roll_diameter_mm"] = np.where(pilot, _ROLLS["pilot"][1], _ROLLS["production"][1])
    process.update(raw)
    return {
        "process": pd.DataFrame(process),
        "ribbon": pd.DataFrame({
            "lot": lots[ribbon.owner],
            "sample": ribbon.sample_no.astype(str).astype(object),
            "envelope_density_g_cm3": ribbon.envelope,
            "skeletal_density_g_cm3": ribbon.skeletal,
            "sampled_at": _iso(ribbon.sampled),
        }),
        "granules": pd.DataFrame({
            "lot": np.repeat(lots, granules.apertures.size),
            "sieve_um": np.tile(np.array(SIEVES_UM, dtype=np.int64), n),
            "retained_g": granules.retained.ravel(),
        }),
        "tablets": pd.DataFrame({
            "lot": lots,
            "compression_force_kn": s["compression_force_kn"],
            "breaking_force_n": tablets.breaking,
            "thickness_mm": tablets.thickness,
            "diameter_mm": np.full(n, truth.tablet_diameter_mm),
            "weight_rsd_pct": tablets.weight_rsd,
            "friability_pct": tablets.friability,
            "dissolution_pct": tablets.dissolution,
        }),
    }


def _unit_tables(r_pick, lots, with_units, with_vessels, tablets, truth) -> dict[str, pd.DataFrame]:
    """The unit weights and dissolution vessels of the lots picked for them (``with_units``, ``with_vessels``)."""
    n = lots.size
    tables = {}
    units = _pick(r_pick, n, with_units)
    vessels = _pick(r_pick, n, with_vessels)
    if units.any():
        k = truth.n_units
        tables["tablet_weights"] = pd.DataFrame({
            "lot": np.repeat(lots[units], k),
            "unit": np.tile(np.arange(1, k + 1).astype(str).astype(object), int(units.sum())),
            "weight_mg": tablets.weights[units].ravel(),
        })
    if vessels.any():
        k = truth.n_vessels
        tables["dissolution"] = pd.DataFrame({
            "lot": np.repeat(lots[vessels], k),
            "vessel": np.tile(np.arange(1, k + 1).astype(str).astype(object), int(vessels.sum())),
            "time_min": np.full(int(vessels.sum()) * k, truth.dissolution_time_min),
            "released_pct": tablets.tenths[vessels].ravel() / 10.0,
        })
    return tables


def _lot_truth(lots, s, changed, chain, ribbon, granules, tablets) -> dict[str, np.ndarray]:
    """The ``lot_truth`` columns (see :func:`make_lots`)."""
    lot_truth = {"lot": lots, **{k: s[k] for k in ("compactor", *ROLL_SETTINGS, "mill_screen_mm",
                                                   "compression_force_kn")},
                 "raw_material_changed": changed}
    realised = {
        "ribbon_porosity": ribbon.eps_measured,
        "granule_d50_um": granules.d50,
        "fines_pct": granules.fines,
        "tensile_strength_mpa": tablets.real["tensile_strength_mpa"],
        "weight_rsd_pct": tablets.weight_rsd,
        "friability_pct": tablets.friability,
        "dissolution_pct": tablets.dissolution,
    }
    means = {"ribbon_porosity": ribbon.eps_mean, **granules.mean, **tablets.mean}
    for a in ATTRIBUTES:
        lot_truth[f"{a}_chain"] = chain[a]
        lot_truth[f"{a}_mean"] = means[a]
        lot_truth[a] = realised[a]
    lot_truth.update({
        "ribbon_porosity_lot": ribbon.eps_lot,
        "ribbon_samples": ribbon.n_rep,
        "skeletal_density_g_cm3": ribbon.skeletal_lot,
        "rrsb_x_prime_um": granules.x_prime,
        "rrsb_n": granules.rrsb_n,
        "thickness_mm": tablets.thickness,
        "breaking_force_n": tablets.breaking,
    })
    return lot_truth


def make_batch_lots(n_lots: int, seed: int = 0, *, lots_per_batch: int = 4, batch_sd_pct: float = 4.0,
                    batch_prefix: str = "API", truth: Truth | None = None, d50_effect_pct_per_um: float = 0.0,
                    **kwargs) -> SyntheticLots:
    """Lots that share raw-material batches with a batch effect (issue 19).

    :func:`make_lots` with ``raw_materials=True`` (``kwargs`` passed on), then
    consecutive runs of ``lots_per_batch`` lots share a drug-substance batch:
    ``process.api_batch`` names it (``<batch_prefix>-001`` ...), every lot of a
    batch carries the batch's certificate value of ``api_d50_um`` (drawn
    N(45, 4²) µm per batch), and the batch shifts ``dissolution_pct`` by an
    effect drawn N(0, ``batch_sd_pct``²) per batch that no measured column
    explains (``lot_truth``: ``api_batch``, ``batch_effect_pct``). The lots of
    one batch are therefore not independent: a model that can tell batches
    apart (by ``api_d50_um``) learns a seen batch's effect, which says nothing
    about a new batch. ``d50_effect_pct_per_um`` adds a real effect of the
    batch's d50 on dissolution, slope × (d50 − 45 µm) (0: none); the other
    raw-material columns have none. Seeded: the same arguments give the same
    tables.
    """
    if int(lots_per_batch) < 1:
        raise UsageError(f"lots_per_batch must be at least 1; got {lots_per_batch}")
    if not batch_sd_pct >= 0:
        raise UsageError(f"batch_sd_pct must be 0 or more; got {batch_sd_pct}")
    lots = make_lots(n_lots, seed, truth, raw_materials=True, **kwargs)
    n = len(lots.lot_truth)
    batch = np.arange(n) // int(lots_per_batch)
    n_batches = int(batch.max()) + 1
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 190319]))
    d50 = np.round(rng.uniform(30.0, 60.0, n_batches), 1)
    effect = rng.normal(0.0, float(batch_sd_pct), n_batches)
    names = np.array([f"{batch_prefix}-{i + 1:03d}" for i in range(n_batches)], dtype=object)
    tables = dict(lots.tables)
    process = tables["process"].copy()
    process["api_d50_um"] = d50[batch]
    process["api_batch"] = names[batch]
    tables["process"] = process
    tablets = tables["tablets"].copy()
    effect = effect + float(d50_effect_pct_per_um) * (d50 - 45.0)
    tablets["dissolution_pct"] = np.round(tablets["dissolution_pct"].to_numpy(float) + effect[batch], 2)
    tables["tablets"] = tablets
    if "dissolution" in tables:  # the vessels move with their lot
        shift = dict(zip(process["lot"], effect[batch]))
        diss = tables["dissolution"].copy()
        diss["released_pct"] = np.round(diss["released_pct"] + diss["lot"].map(shift), 1)
        tables["dissolution"] = diss
    lt = lots.lot_truth.assign(api_batch=names[batch], batch_effect_pct=effect[batch],
                               dissolution_pct=tablets["dissolution_pct"].to_numpy())
    return SyntheticLots(tables=tables, truth=lots.truth, lot_truth=lt)


def remeasure_ribbon(lots: SyntheticLots, lot: str, seed: int = 1, envelope_bias_g_cm3: float = 0.0) -> pd.DataFrame:
    """New ribbon rows for one lot: the same samples measured again (fresh
    replicate error on the lot's true porosity, fresh pycnometer noise, plus
    an optional envelope-density bias), as a lab re-issues a corrected result.
    """
    ribbon = lots.tables["ribbon"]
    old = ribbon[ribbon["lot"] == lot]
    if old.empty:
        raise UsageError(f"lot {lot!r} is not among the synthetic lots")
    row = lots.lot_truth.loc[lots.lot_truth["lot"] == lot].iloc[0]
    t = lots.truth
    rng = np.random.default_rng(seed)
    k = len(old)
    skeletal = np.round(row["skeletal_density_g_cm3"] + t.pycnometer_sd_g_cm3 * rng.standard_normal(k), 4)
    eps = row["ribbon_porosity_lot"] + t.porosity_replicate_sd * rng.standard_normal(k)
    envelope = np.round((1.0 - eps) * skeletal + envelope_bias_g_cm3, 4)
    new = old.copy()
    new["envelope_density_g_cm3"] = envelope
    new["skeletal_density_g_cm3"] = skeletal
    return new.reset_index(drop=True)


# ---------------------------------------------------------------- unit-level (compendial) scenario
@dataclass(frozen=True)
class UnitScenario:
    r"""Lots with unit-level data and a known truth for compendial judgement.

    The upstream chain is :class:`Truth` (``truth``); on top of it every lot
    has units:

    - Dissolution: each vessel follows a Weibull profile (Langenbucher 1972,
      from memory) :math:`R(t) = R_{max}(1 - e^{-(t/\tau)^\beta})` with its
      own time scale, :math:`\ln\tau_{ij} = \ln\tau(\varepsilon, d_{50}, F)
      + s_{lot} z_j + s_{vessel} z_{ij}`, where :math:`\tau(\cdot)` is the
      time scale of :meth:`Truth.tablets_mean`. The vessel SD of release then
      changes with the lot mean (largest on the steep part of the profile),
      and units are skewed near the plateau: not the normal units
      :mod:`linkage.decide.compendial` assumes. ``n_vessels`` vessels are
      measured at each of ``times_min``.
    - Unit weight: each lot has its own RSD, :math:`s_{lot} =` the truth's
      weight RSD mean (exponential in fines) plus Gaussian lot scatter
      (``truth.weight_rsd_sd_pct``), floored at ``truth.min_weight_rsd_pct``;
      units are normal around the lot's mean weight with that RSD,
      independent, weighed to 0.1 mg; ``n_units`` per lot.

    :meth:`true_probabilities` simulates many lots at a ribbon porosity from
    this process and judges them with the pure functions of
    :mod:`linkage.physics.pharmacopeia` (brute force). All coefficients are
    invented; the default weight RSD is three times that of
    :meth:`Truth.window_scenario`, so that the acceptance value of USP <905>
    binds inside the porosity range.
    """

    truth: Truth = field(default_factory=lambda: Truth(weight_rsd_ref_pct=6.0, weight_rsd_per_fines_pct=0.03,
                                                       weight_rsd_sd_pct=0.8))
    times_min: tuple[float, ...] = (15.0, 30.0, 45.0)
    n_vessels: int = 6
    n_units: int = 10
    tau_lot_sd_ln: float = 0.06
    tau_vessel_sd_ln: float = 0.12

    def tau_min(self, ribbon_porosity, granule_d50_um, compression_force_kn):
        """Median Weibull time scale of a lot [min], as in :meth:`Truth.tablets_mean`."""
        t = self.truth
        eps, d50, force = _arr(ribbon_porosity), _arr(granule_d50_um), _arr(compression_force_kn)
        return (t.tau_ref_min * np.exp(-t.tau_per_porosity * (eps - t.porosity_ref))
                * (force / t.force_ref_kn) ** t.tau_force_exponent
                * (d50 / t.d50_ref_um) ** t.tau_d50_exponent)

    def released_pct(self, tau_min, time_min):
        """Weibull release [% label claim] at ``time_min`` of units with time scale ``tau_min``."""
        t = self.truth
        return t.dissolution_max_pct * -np.expm1(-(float(time_min) / _arr(tau_min)) ** t.weibull_beta)

    def _lot_rsd(self, weight_rsd_mean, z):
        t = self.truth
        return np.maximum(weight_rsd_mean + t.weight_rsd_sd_pct * z, t.min_weight_rsd_pct)

    def make_lots(self, n_lots: int, seed: int = 0, **kwargs) -> SyntheticLots:
        """Lots from :func:`make_lots` (``kwargs`` passed on) whose ``dissolution``
        table holds ``n_vessels`` vessels at each of ``times_min`` and whose
        ``tablet_weights`` table holds ``n_units`` units, drawn as the class
        notes say; ``tablets.dissolution_pct`` is the vessel mean at
        ``truth.dissolution_time_min`` and ``tablets.weight_rsd_pct`` the
        sample RSD of the units. ``lot_truth`` gains ``tau_lot_min`` and
        ``weight_rsd_lot_pct`` (the lot's true time scale and unit RSD)."""
        lots = make_lots(n_lots, seed, self.truth, with_units=False, with_vessels=False, **kwargs)
        lt = lots.lot_truth
        n = len(lt)
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), 905711]))
        tau = (self.tau_min(lt["ribbon_porosity_lot"], lt["granule_d50_um"], lt["compression_force_kn"])
               * np.exp(self.tau_lot_sd_ln * rng.standard_normal(n)))
        tau_v = tau[:, None] * np.exp(self.tau_vessel_sd_ln * rng.standard_normal((n, self.n_vessels)))
        rsd = self._lot_rsd(lt["weight_rsd_pct_mean"].to_numpy(float), rng.standard_normal(n))
        mean_weight = self.truth.tablet_weight_mg * (1.0 + self.truth.unit_weight_lot_sd_rel * rng.standard_normal(n))
        weights = np.round(mean_weight[:, None] * (1.0 + rsd[:, None] / 100.0
                                                   * rng.standard_normal((n, self.n_units))), 1)
        lot_ids = lt["lot"].to_numpy(object)
        k, times = self.n_vessels, np.asarray(self.times_min, float)
        released = np.round(np.stack([self.released_pct(tau_v, t) for t in times], axis=2), 1)  # lot, vessel, time
        tables = dict(lots.tables)
        tables["dissolution"] = pd.DataFrame({
            "lot": np.repeat(lot_ids, k * len(times)),
            "vessel": np.tile(np.repeat(np.arange(1, k + 1).astype(str).astype(object), len(times)), n),
            "time_min": np.tile(times, n * k),
            "released_pct": released.ravel(),
        })
        tables["tablet_weights"] = pd.DataFrame({
            "lot": np.repeat(lot_ids, self.n_units),
            "unit": np.tile(np.arange(1, self.n_units + 1).astype(str).astype(object), n),
            "weight_mg": weights.ravel(),
        })
        at = self.truth.dissolution_time_min
        at_spec = np.array([np.interp(at, times, released[i, j]) for i in range(n) for j in range(k)]).reshape(n, k)
        tablets = tables["tablets"].copy()
        tablets["dissolution_pct"] = np.round(at_spec.mean(axis=1), 2)
        tablets["weight_rsd_pct"] = np.round(100.0 * weights.std(axis=1, ddof=1) / weights.mean(axis=1), 2)
        tables["tablets"] = tablets
        lt = lt.assign(tau_lot_min=tau, weight_rsd_lot_pct=rsd, dissolution_pct=tablets["dissolution_pct"].to_numpy(),
                       weight_rsd_pct=tablets["weight_rsd_pct"].to_numpy())
        return SyntheticLots(tables=tables, truth=self.truth, lot_truth=lt)

    def true_probabilities(self, ribbon_porosity: float, *, q_pct: float, time_min: float, mill_screen_mm: float,
                           compression_force_kn: float, l1_pct: float = 15.0, n_lots: int = 4000,
                           seed: int = 0) -> dict[str, float]:
        """True probabilities that a new lot of this (true) ribbon porosity
        passes the compendial tests, by brute force: ``n_lots`` lots drawn
        from the generating process (granule and tablet lot scatter, then
        units), each judged with :func:`linkage.physics.pharmacopeia.dissolution_stage`
        on 24 vessels and with the two-stage weight-variation acceptance value
        of USP <905> on 30 units (stage 1: the first 10).

        Returns ``S1`` (passes at S1), ``S2``, ``S3`` (passes by that stage),
        ``av_stage1`` (AV of 10 units <= L1) and ``av`` (passes USP <905>).
        """
        from linkage.physics import pharmacopeia as ph

        t = self.truth
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), 711905]))
        eps = np.full(n_lots, float(ribbon_porosity))
        g = t.granules_mean(eps, float(mill_screen_mm))
        z = rng.standard_normal((2, n_lots))
        d50, fines = t._realise_granules(g["granule_d50_um"], g["fines_pct"], z[0], z[1])
        means = t.tablets_mean(eps, d50, fines, float(compression_force_kn))
        tau = self.tau_min(eps, d50, float(compression_force_kn)) * np.exp(self.tau_lot_sd_ln
                                                                          * rng.standard_normal(n_lots))
        units = self.released_pct(tau[:, None] * np.exp(self.tau_vessel_sd_ln * rng.standard_normal((n_lots, 24))),
                                  time_min)
        rsd = self._lot_rsd(means["weight_rsd_pct"], rng.standard_normal(n_lots))
        weights = t.tablet_weight_mg * (1.0 + rsd[:, None] / 100.0 * rng.standard_normal((n_lots, 30)))
        s1 = s2 = s3 = av1 = av = 0
        for i in range(n_lots):
            v = ph.dissolution_stage(units[i], q_pct)  # USP <711> Table 1
            s1 += v["passed"] and v["stage"] == "S1"
            s2 += v["passed"] and v["stage"] in ("S1", "S2")
            s3 += v["passed"]
            w = np.maximum(weights[i], 1e-6)
            first = ph.acceptance_value(ph.weight_variation_contents_pct(w[:10]))["av"] <= l1_pct  # USP <905> stage 1
            av1 += first
            if first:
                av += 1
                continue
            c = ph.weight_variation_contents_pct(w)
            stage2 = ph.acceptance_value(c)
            low, high = ph.stage2_unit_range_pct(stage2["m"])
            av += stage2["av"] <= l1_pct and bool(np.all((c >= low) & (c <= high)))  # USP <905> stage 2
        return {"S1": s1 / n_lots, "S2": s2 / n_lots, "S3": s3 / n_lots, "av_stage1": av1 / n_lots,
                "av": av / n_lots}
