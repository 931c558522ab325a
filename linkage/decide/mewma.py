"""A drift watch designed to an in-control average run length: a
multivariate EWMA (MEWMA) on the vector of standardised prediction residuals
of every attribute (Lowry, Woodall, Champ & Rigdon 1992, Technometrics
34:46–53).

For the lots since training, in time order, with ``x_t`` the vector of the
lot's residuals, each centred on the training lots' mean residual and divided
by their SD (a missing attribute counts as 0, which can only lower the
statistic), and ``R`` the correlation matrix of the training lots'
standardised out-of-fold residuals::

    z_t  = λ·x_t + (1 − λ)·z_{t−1},   z_0 = 0
    T²_t = z_tᵀ (c_t·R)⁻¹ z_t,        c_t = λ/(2 − λ)·[1 − (1 − λ)^(2t)]

(Lowry et al. 1992, eq. 1–3, with the exact covariance of z_t). The scheme
signals when ``T²_t > h``. With R known, the in-control run length depends
only on the number of attributes p, λ and h, so ``h`` is chosen by
simulation (seeded, standard normal vectors, cached per p) for an in-control
ARL of :data:`ARL0` lots, counted from the first lot after training
(zero-state). The out-of-control ARL depends on the shift only through its
Mahalanobis size δ = √(μᵀR⁻¹μ); a shift of d SD in one attribute alone has
δ = d·√((R⁻¹)_jj) ≥ d, so the ARL stated for δ = 1 and δ = 2 bounds the run
length to detect a 1 or 2 SD shift in any single attribute.

One designed scheme replaces the union of per-attribute Shewhart, run-rule,
EWMA and CUSUM charts, whose overall false-alarm rate grows with every chart
and attribute added. The training lots' mean, SD and correlation are estimates: with 48 training
lots, limits designed as if they were known give an in-control ARL of about
35 lots, not 200. So h is chosen for the number of training lots: each
simulated run first estimates the mean and covariance from that many
in-control lots (the unconditional ARL; the estimation effect on EWMA charts:
Jones, Champ & Rigdon 2001, Technometrics 43:156–167, from memory).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

__all__ = ["LAMBDA", "ARL0", "Design", "design", "control_limit", "run_lengths", "mewma_statistic"]

#: smoothing constant (λ = 0.1 suits shifts of about 1 SD; Lowry et al. 1992 tabulate λ from 0.1 up; from memory)
LAMBDA = 0.1
#: designed in-control average run length, in lots, for all attributes together
ARL0 = 200.0
#: runs simulated to choose h and to state the run lengths (known parameters; estimated ones)
RUNS = 4000
RUNS_ESTIMATED = 2000
#: above this many training lots, the estimation of the reference is ignored (the tabulated design)
KNOWN_ABOVE = 5000
SEED = 20260


def mewma_statistic(x, corr, lam: float = LAMBDA) -> tuple[np.ndarray, np.ndarray]:
    """T²_t of the module docstring for the rows of ``x`` (lots × attributes,
    already standardised; NaN counts as 0; a leading axis of campaigns is
    allowed) and the EWMA vectors z_t / √c_t (each attribute's EWMA in units
    of its own in-control SD).

    Returns (t2, z_scaled) of shapes (..., lots) and (..., lots, attributes)."""
    x = np.nan_to_num(np.asarray(x, float), nan=0.0)
    inv = np.linalg.inv(np.asarray(corr, float))
    z = np.zeros(x.shape[:-2] + x.shape[-1:])
    t2, scaled = np.empty(x.shape[:-1]), np.empty_like(x)
    for t in range(1, x.shape[-2] + 1):
        z = lam * x[..., t - 1, :] + (1 - lam) * z  # Lowry et al. 1992, eq. 1
        c = lam / (2 - lam) * (1 - (1 - lam) ** (2 * t))  # Cov(z_t) = c_t·R (eq. 3, exact)
        t2[..., t - 1] = np.einsum("...i,ij,...j->...", z, inv, z) / c  # eq. 2
        scaled[..., t - 1, :] = z / math.sqrt(c)
    return t2, scaled


def _reference_estimates(rng, p: int, runs: int, n_ref: int):
    """Per run, the mean and the inverse covariance estimated from ``n_ref``
    in-control standard normal vectors: mean ~ N(0, I/n), covariance ~
    Wishart(n − 1, I)/(n − 1) by Bartlett's decomposition (Bartlett 1933, from memory)."""
    mu = rng.standard_normal((runs, p)) / math.sqrt(n_ref)
    low = np.tril(rng.standard_normal((runs, p, p)), -1)
    diag = np.sqrt(rng.chisquare(n_ref - 1 - np.arange(p), size=(runs, p)))
    low[:, np.arange(p), np.arange(p)] = diag
    cov = low @ np.swapaxes(low, 1, 2) / (n_ref - 1)
    return mu.astype(np.float32), np.linalg.inv(cov).astype(np.float32)


def _paths(p: int, lam: float, steps: int, runs: int, seed: int, shift: float = 0.0,
           exact: bool = True, n_ref: int | None = None) -> np.ndarray:
    """Running maximum of T²_t, runs × steps, for standard normal vectors with
    ``shift`` added to the first attribute from the first lot on (R = I: the
    run length depends on R only through the shift's Mahalanobis size).
    ``exact=False`` uses the asymptotic covariance λ/(2 − λ)·R throughout
    (the form most published tables use). With ``n_ref``, each run's mean
    and covariance are estimated from ``n_ref`` in-control vectors, as the
    watch estimates them from the training lots (T² is affine invariant, so
    R = I loses nothing); without, they are known."""
    rng = np.random.default_rng(seed)
    out = np.empty((steps, runs), dtype=np.float32)
    if n_ref:
        mu, inv = _reference_estimates(rng, p, runs, n_ref)
        z = np.zeros((runs, p), dtype=np.float32)
    else:
        z = np.zeros((p, runs), dtype=np.float32)
    for t in range(1, steps + 1):
        c = lam / (2 - lam) * (1 - (1 - lam) ** (2 * t)) if exact else lam / (2 - lam)
        z *= 1 - lam
        if n_ref:
            x = rng.standard_normal((runs, p), dtype=np.float32) - mu
            x[:, 0] += shift
            z += lam * x
            out[t - 1] = np.einsum("ri,rij,rj->r", z, inv, z) / c
        else:
            x = rng.standard_normal((p, runs), dtype=np.float32)
            x[0] += shift
            z += lam * x
            out[t - 1] = np.einsum("ij,ij->j", z, z) / c
    return np.maximum.accumulate(out, axis=0).T


def run_lengths(p: int, h: float, *, lam: float = LAMBDA, shift: float = 0.0, runs: int = RUNS,
                seed: int = SEED, steps: int | None = None, exact: bool = True,
                n_ref: int | None = None) -> np.ndarray:
    """Simulated zero-state run lengths (lots to the first T² > h) for a shift
    of Mahalanobis size ``shift`` from the first lot; a run that has not
    signalled after ``steps`` lots counts as ``steps + 1``. ``n_ref``: the
    in-control parameters estimated from that many lots (see :func:`_paths`)."""
    steps = steps or int(8 * ARL0)
    m = _paths(p, lam, steps, runs, seed, shift, exact, n_ref)
    return 1 + np.sum(m <= h, axis=1)


@lru_cache(maxsize=64)
def control_limit(p: int, lam: float = LAMBDA, arl0: float = ARL0, runs: int = RUNS, seed: int = SEED,
                  n_ref: int | None = None) -> float:
    """h giving an in-control zero-state ARL of ``arl0`` lots for p attributes
    (simulated, seeded; cached). The ARL is 1 + (number of (run, lot) pairs
    whose running maximum of T² stays ≤ h) / runs, so h is that order
    statistic of the simulated running maxima. With ``n_ref`` the ARL is
    averaged over the reference samples too (the unconditional ARL)."""
    if p < 1:
        raise ValueError("the MEWMA needs at least one attribute")
    steps = int(8 * arl0)  # P(no signal in 8·ARL0 lots) ≈ e^-8 with known parameters: truncation negligible
    m = _paths(p, lam, steps, runs, seed, n_ref=n_ref).ravel()
    k = int(round((arl0 - 1) * runs))
    return float(np.partition(m, k)[k])


def _simulate(p: int, lam: float, arl0: float, n_ref: int | None = None, runs: int = RUNS) -> tuple[float, dict]:
    """h, and the run lengths re-simulated with other seeds."""
    h = control_limit(p, lam, arl0, runs=runs, n_ref=n_ref)
    arl = {}
    for name, shift, seed in (("in_control", 0.0, SEED + 1), ("shift_1sd", 1.0, SEED + 2),
                              ("shift_2sd", 2.0, SEED + 3)):
        rl = run_lengths(p, h, lam=lam, shift=shift, seed=seed, runs=runs if shift else runs // 2,
                         steps=int(8 * arl0) if shift == 0 else 400, n_ref=n_ref)
        arl[name] = {"arl": float(rl.mean()), "mc_se": float(rl.std(ddof=1) / math.sqrt(len(rl)))}
    return h, arl


class Design(dict):
    """The design as stated in the watch output (a plain dict)."""


def design(p: int, lam: float = LAMBDA, arl0: float = ARL0, n_ref: int | None = None) -> Design:
    """h for p attributes and the simulated run lengths: in control, and for
    shifts of Mahalanobis size 1 and 2 (zero-state), each with its Monte Carlo
    standard error. ``n_ref``: the number of training lots the residuals'
    mean, SD and correlation are estimated from; the design then holds the
    in-control ARL averaged over such estimates (simulated each time, a few
    seconds, cached). None (or more than :data:`KNOWN_ABOVE`): as if known
    (the tabulated design)."""
    if n_ref is not None:
        n_ref = int(n_ref)
        n_ref = None if n_ref > KNOWN_ABOVE else max(n_ref, int(p) + 3)
    kept = _KEPT.get(_design_key(p, lam, arl0, n_ref))
    return Design(kept if kept is not None else _design(int(p), float(lam), float(arl0), n_ref))


#: the version of the simulation's code (:func:`_paths`, :func:`_simulate`, :data:`TABLE`, :data:`KNOWN_ABOVE`, the
#: run lengths' steps): raise it with any change to these that changes a design's numbers, so that a design kept
#: by an earlier linkage (in a model's training record, or beside the model) is simulated again, not read
DESIGN_VERSION = 1


def simulation_settings() -> dict:
    """The simulation's own settings, beside a design kept for a later process (:func:`remember`): a design
    simulated under other settings or another version of the simulation's code (an earlier linkage's) is
    simulated again rather than read."""
    return {"runs": RUNS, "runs_estimated": RUNS_ESTIMATED, "seed": SEED, "design_version": DESIGN_VERSION}


#: designs simulated by an earlier process and kept beside the model (:func:`remember`), by (p, λ, ARL0, n_ref)
_KEPT: dict[tuple, dict] = {}


def _design_key(p, lam, arl0, n_ref) -> tuple:
    return int(p), float(lam), float(arl0), None if n_ref is None else int(n_ref)


def remember(designs) -> None:
    """Take ``designs`` (as :func:`design` returned them, e.g. read back from
    where an earlier report kept them, :mod:`linkage.models.reuse`) as
    already simulated: :func:`design` returns them instead of simulating
    again. A design is the same numbers wherever it was simulated (seeded, a
    function of p, λ, ARL0 and n_ref alone); one that does not say these is
    ignored."""
    for d in designs or []:
        try:
            key = _design_key(d["attributes"], d["lambda"], d["arl0_target"], d["n_reference"])
        except (KeyError, TypeError, ValueError):
            continue
        _KEPT[key] = {**d, "parameters": parameters_text(key[3])}  # its numbers; the words of this version


def parameters_text(n_ref: int | None) -> str:
    """How the residuals' mean, SD and correlation are taken, as the design's words say it (in brackets there:
    no brackets of its own)."""
    return ("known" if n_ref is None else
            f"estimated from {n_ref} training lots, with the ARL averaged over such estimates")


def simulated(d) -> bool:
    """Whether design ``d`` came from a simulation this process (or its parent) ran, rather than
    from :data:`TABLE` or from :func:`remember`: what is worth keeping for the next process."""
    if d is None:
        return False
    try:
        key = _design_key(d["attributes"], d["lambda"], d["arl0_target"], d["n_reference"])
    except (KeyError, TypeError, ValueError):
        return False
    return key not in _KEPT and (key[3] is not None or key[1] != LAMBDA or key[2] != ARL0 or key[0] not in TABLE)


#: the cache of :func:`_simulate` at λ = 0.1 and ARL0 = 200 for 1 to 12 attributes: h, then ARL and its Monte
#: Carlo SE in control, at a shift of size 1 and of size 2 (tests/decide/test_mewma.py recomputes entries)
TABLE = {
    1: (6.142397403717041, 197.1415, 4.52108, 6.412, 0.067936, 2.25625, 0.019352),
    2: (8.789763450622559, 195.359, 4.509163, 7.7585, 0.081477, 2.6285, 0.021949),
    3: (10.967166900634766, 211.1395, 4.777058, 8.7955, 0.090231, 2.8845, 0.023802),
    4: (12.828020095825195, 195.9095, 4.412554, 9.44925, 0.097043, 3.0625, 0.02482),
    5: (14.740267753601074, 204.287, 4.620212, 10.35275, 0.106647, 3.2685, 0.026449),
    6: (16.44736099243164, 196.5805, 4.484192, 10.72, 0.109057, 3.39975, 0.027433),
    7: (18.18100357055664, 200.724, 4.639847, 11.355, 0.115805, 3.598, 0.029152),
    8: (19.734155654907227, 199.491, 4.354496, 11.731, 0.119601, 3.70675, 0.0299),
    9: (21.315330505371094, 196.351, 4.290009, 12.13375, 0.124954, 3.847, 0.030721),
    10: (23.001283645629883, 210.306, 4.911941, 12.81275, 0.129504, 4.00025, 0.032196),
    11: (24.427799224853516, 195.5185, 4.476699, 12.99925, 0.131329, 4.12525, 0.032414),
    12: (25.967235565185547, 201.3885, 4.539856, 13.58275, 0.14131, 4.235, 0.033693),
}


@lru_cache(maxsize=64)
def _design(p: int, lam: float, arl0: float, n_ref: int | None = None) -> dict:
    if n_ref is not None:
        h, arl = _simulate(p, lam, arl0, n_ref=n_ref, runs=RUNS_ESTIMATED)
    elif lam == LAMBDA and arl0 == ARL0 and p in TABLE:
        row = TABLE[p]
        h, arl = row[0], {name: {"arl": row[1 + 2 * i], "mc_se": row[2 + 2 * i]}
                          for i, name in enumerate(("in_control", "shift_1sd", "shift_2sd"))}
    else:
        h, arl = _simulate(p, lam, arl0)
    return {
        "chart": "multivariate EWMA of the standardised residual vector (Lowry, Woodall, Champ & Rigdon 1992, "
                 "Technometrics 34:46-53), exact time-varying covariance, zero-state from the first lot since "
                 "training",
        "attributes": p, "lambda": lam, "h": h, "arl0_target": arl0, "n_reference": n_ref,
        "parameters": parameters_text(n_ref),
        "false_alarm_rate_per_lot": 1.0 / arl0,
        "arl": arl,
        "method": (f"h chosen by simulation ({RUNS if n_ref is None else RUNS_ESTIMATED} seeded in-control runs of "
                   "standard normal vectors, seed "
                   f"{SEED}) for an in-control ARL of {arl0:g} lots over all {p} attributes together; run lengths "
                   "re-simulated with other seeds; a shift of d SD in one attribute alone has Mahalanobis size "
                   "at least d, so the ARL at size 1 (2) bounds the run length for a 1 (2) SD shift in any one "
                   "attribute. " + ("Mean, SD and correlation of the residuals taken as known" if n_ref is None
                                    else f"Each simulated run estimates the residuals' mean and covariance from "
                                         f"{n_ref} in-control lots, as the watch does from the training lots, "
                                         f"so h is larger than with known parameters")),
    }
