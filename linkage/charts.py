"""Control charts for drift watch: Shewhart individuals, EWMA, tabular CUSUM
and the run rules. Pure functions of arrays.

Limits come from a reference set (the training lots' residuals): centre
``mu0`` and standard deviation ``sigma``. The charts are then applied to
new points in time order.

References
----------
NIST/SEMATECH e-Handbook of Statistical Methods, §6.3.2 (Shewhart charts,
run rules), §6.3.2.3 (CUSUM), §6.3.2.4 (EWMA), https://www.itl.nist.gov/div898/handbook/.
Montgomery D.C. (2009) Introduction to Statistical Quality Control, 6th ed.,
Wiley: §9.1 (tabular CUSUM, k = σ/2 and h = 5σ), §9.2 (EWMA, λ and L).
Western Electric Co. (1956) Statistical Quality Control Handbook (the run
rules).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Reference:
    """Centre and spread of the reference (in-control) data."""

    mu0: float
    sigma: float
    n: int

    @classmethod
    def from_values(cls, values) -> "Reference":
        v = np.asarray(values, float)
        v = v[np.isfinite(v)]
        if len(v) < 3:
            raise ValueError(f"control limits need at least 3 reference values; got {len(v)}")
        sigma = float(np.std(v, ddof=1))
        if not sigma > 0:
            raise ValueError("control limits need reference values that vary; all are equal")
        return cls(mu0=float(np.mean(v)), sigma=sigma, n=len(v))


def shewhart_limits(ref: Reference, L: float = 3.0) -> tuple[float, float]:
    """Individuals chart limits mu0 ± L·sigma (NIST §6.3.2)."""
    return ref.mu0 - L * ref.sigma, ref.mu0 + L * ref.sigma


def ewma(x, ref: Reference, lam: float = 0.2, L: float = 3.0):
    """EWMA statistic and its time-varying limits.

    z_t = λ·x_t + (1 − λ)·z_{t−1}, z_0 = mu0;
    limits mu0 ± L·σ·sqrt(λ/(2 − λ)·[1 − (1 − λ)^(2t)]) (NIST §6.3.2.4;
    Montgomery 2009, eq. 9.22–9.23).

    Returns (z, lower, upper), arrays of the length of ``x``.
    """
    if not 0 < lam <= 1:
        raise ValueError(f"lam must lie in (0, 1]; got {lam}")
    x = np.asarray(x, float)
    z = np.empty_like(x)
    prev = ref.mu0
    for i, xi in enumerate(x):
        prev = lam * xi + (1 - lam) * prev
        z[i] = prev
    t = np.arange(1, len(x) + 1)
    half = L * ref.sigma * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * t)))
    return z, ref.mu0 - half, ref.mu0 + half


def cusum(x, ref: Reference, k: float = 0.5, h: float = 5.0):
    """Tabular CUSUM in units of sigma (Montgomery 2009, eq. 9.2–9.3; NIST §6.3.2.3).

    C+_t = max(0, x_t − (mu0 + k·σ) + C+_{t−1}),  C−_t = max(0, (mu0 − k·σ) − x_t + C−_{t−1}),
    starting at 0; a signal where either exceeds h·σ.

    Returns (c_plus, c_minus, decision interval h·σ).
    """
    x = np.asarray(x, float)
    cp = np.empty_like(x)
    cm = np.empty_like(x)
    up = down = 0.0
    for i, xi in enumerate(x):
        up = max(0.0, xi - (ref.mu0 + k * ref.sigma) + up)
        down = max(0.0, (ref.mu0 - k * ref.sigma) - xi + down)
        cp[i], cm[i] = up, down
    return cp, cm, h * ref.sigma


def run_rules(x, ref: Reference) -> list[list[str]]:
    """The four Western Electric run rules, per point: which fire there.

    1. one point beyond 3σ;
    2. two of three successive points beyond 2σ on the same side;
    3. four of five successive points beyond 1σ on the same side;
    4. eight successive points on the same side of the centre.
    A rule is reported at the point that completes the pattern.
    """
    z = (np.asarray(x, float) - ref.mu0) / ref.sigma
    out: list[list[str]] = [[] for _ in z]
    for i in range(len(z)):
        if abs(z[i]) > 3:
            out[i].append("beyond 3 sigma")
        for side in (1, -1):
            s = side * z
            if i >= 2 and (s[i - 2:i + 1] > 2).sum() >= 2 and s[i] > 2:
                out[i].append("2 of 3 beyond 2 sigma")
            if i >= 4 and (s[i - 4:i + 1] > 1).sum() >= 4 and s[i] > 1:
                out[i].append("4 of 5 beyond 1 sigma")
            if i >= 7 and (s[i - 7:i + 1] > 0).all():
                out[i].append("8 in a row on one side")
    return out
