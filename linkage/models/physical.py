"""The ribbon stage's physical baseline: Johanson's rolling theory as a candidate.

``johanson_baseline`` predicts ribbon porosity from the specific roll force,
the gap and the roll diameter of each lot
(:func:`linkage.physics.rolling.johanson_ribbon_porosity`), with the
material's compressibility K and pressure constant C fitted by least squares
(:func:`linkage.physics.rolling.fit_johanson_ribbon`). It applies where the
stage's inputs include ``roll_force_kn_per_cm``, ``roll_gap_mm`` and
``roll_diameter_mm`` and the target is a porosity fraction; the default
chain's ribbon stage has no ``roll_diameter_mm``, so there it is listed as
not applicable (add the column to the stage's inputs in a chain file to let
it compete). Other inputs of the stage (roll speed, screw speed) are ignored:
the theory has no place for them.

Contributions are exact Shapley values of the three physical inputs against
the training means as the reference point (2^3 evaluations per row; Shapley
1953, the interventional form of Lundberg & Lee 2017, from memory); the
other inputs get zero.
"""

from __future__ import annotations

import warnings

import numpy as np

from linkage.models.candidates import Candidate, CandidateError, register
from linkage.models.lean import johanson_contributions, johanson_predict

__all__ = ["JohansonRibbonRegressor", "PHYSICAL_INPUTS"]

#: the inputs the theory uses, in the order of the estimator's indices
PHYSICAL_INPUTS = ("roll_force_kn_per_cm", "roll_gap_mm", "roll_diameter_mm")


@register
class JohansonRibbonRegressor(Candidate):
    """Ribbon porosity = 1 − (P_max / C)^(1/K), P_max from the specific roll force by Johanson's force integral."""

    name = "johanson_baseline"
    description = ("Johanson rolling theory: porosity from specific roll force, gap and roll diameter "
                   "(K and pressure constant by least squares)")

    def __init__(self, force_index: int = 0, gap_index: int = 1, diameter_index: int = 2,
                 internal_friction_deg: float = 40.0, wall_friction_deg: float = 25.0):
        self.force_index = force_index
        self.gap_index = gap_index
        self.diameter_index = diameter_index
        self.internal_friction_deg = internal_friction_deg
        self.wall_friction_deg = wall_friction_deg

    @classmethod
    def not_applicable(cls, inputs, X, y):
        missing = [c for c in PHYSICAL_INPUTS if c not in inputs]
        if missing:
            return (f"{', '.join(missing)} {'is' if len(missing) == 1 else 'are'} not an input of this stage "
                    "(the rolling theory needs the specific roll force, the gap and the roll diameter)")
        idx = [inputs.index(c) for c in PHYSICAL_INPUTS]
        if np.any(X[:, idx] <= 0):
            return "a roll force, gap or roll diameter is zero or negative"
        if np.any((y <= 0) | (y >= 1)):
            return "the target is not a porosity fraction between 0 and 1"
        if len(np.unique(X[:, idx[0]])) < 3:
            return "the training lots have fewer than 3 distinct roll forces; K cannot be estimated"
        return None

    @classmethod
    def build(cls, params, inputs, *, n, monotone=None, seed=0):
        return cls(*(inputs.index(c) for c in PHYSICAL_INPUTS), **params)

    def _columns(self, X):
        idx = (self.force_index, self.gap_index, self.diameter_index)
        if X.shape[1] <= max(idx):
            raise CandidateError(f"{type(self).__name__} reads the columns {idx} (force, gap, roll diameter); X has "
                                 f"{X.shape[1]} column(s)")
        return idx

    def _fit(self, X, y):
        from linkage.physics.rolling import fit_johanson_ribbon

        i_f, i_s, i_d = self._columns(X)
        if X.shape[0] < 3:
            raise CandidateError(f"the Johanson fit needs at least 3 lots; got n_samples = {X.shape[0]}")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # RuntimeWarning of trial steps far from the optimum
            try:
                fit = fit_johanson_ribbon(X[:, i_f], X[:, i_s], X[:, i_d], y, self.internal_friction_deg,
                                          self.wall_friction_deg)
            except ValueError as exc:
                raise CandidateError(f"Johanson fit refused the data: {exc}") from None
        if not (np.isfinite(fit["compressibility"]) and np.isfinite(fit["pressure_constant_mpa"])):
            raise CandidateError("Johanson fit did not converge to finite parameters")
        self.compressibility_ = fit["compressibility"]
        self.pressure_constant_mpa_ = fit["pressure_constant_mpa"]
        self.log_covariance_ = np.asarray(fit["log_covariance"], dtype=float)
        self.residual_sd_ = fit["residual_sd"]
        self.reference_ = [float(np.mean(X[:, i])) for i in (i_f, i_s, i_d)]
        return self

    def lean_spec(self):
        return {"kind": "johanson", "force_index": int(self.force_index), "gap_index": int(self.gap_index),
                "diameter_index": int(self.diameter_index), "compressibility": float(self.compressibility_),
                "pressure_constant_mpa": float(self.pressure_constant_mpa_),
                "internal_friction_deg": float(self.internal_friction_deg),
                "wall_friction_deg": float(self.wall_friction_deg), "reference": list(self.reference_)}

    def _predict(self, X):
        self._columns(X)
        return johanson_predict(X, **self._numbers())

    def _contributions(self, X):
        self._columns(X)
        return johanson_contributions(X, **self._numbers())

    def _numbers(self) -> dict:
        return {k: v for k, v in self.lean_spec().items() if k != "kind"}

    @property
    def params_(self) -> dict:
        sd = np.sqrt(np.diag(self.log_covariance_))
        return {"compressibility": self.compressibility_, "pressure_constant_mpa": self.pressure_constant_mpa_,
                "compressibility_log_sd": float(sd[0]), "pressure_constant_log_sd": float(sd[1]),
                "residual_sd": self.residual_sd_}

