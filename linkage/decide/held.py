"""Coherent held settings: a setting not given is held at a value consistent
with the given ones, and the held point is checked against the domain.

Rule
----
The process settings the chain uses (its root inputs) are modelled, across
the training lots, as a multivariate normal with the lots' mean vector μ and
covariance Σ (ddof = 1, lots with every setting). A setting not given is held
at its conditional expectation given the given ones,

    E[x_m | x_g] = μ_m + Σ_mg Σ_gg⁻¹ (x_g − μ_g)

(Anderson 2003, An Introduction to Multivariate Statistical Analysis, 3rd
ed., Thm 2.5.1), with Σ_gg⁻¹ the Moore–Penrose pseudo-inverse where Σ_gg is
singular (a constant or collinear given setting), then clipped to that
setting's training range. With nothing given to condition on it is the
training mean μ_m. The conditional mean is also the population form of the
least-squares regression of the missing settings on the given ones, so a
screw speed that follows roll speed × gap in the lots follows it here too,
where independent medians make a combination no lot ran.

A model saved before these numbers were kept (no ``settings_*`` fields in
``whatif.npz``, no ``training["settings"]``) keeps the old rule: every
setting not given at its training median, and the source says so.

Storage (the lean model, :mod:`linkage.models.lean`, for a port to another
language): ``settings_names`` (list), ``settings_mean`` (vector),
``settings_cov`` (matrix, rows and columns in the order of the names),
``settings_low``/``settings_high`` (training min/max).

Everything here is numpy only: ``linkage predict`` runs it.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

#: source of a setting held at its conditional mean given the given settings
COHERENT = "held coherently (conditional mean of training lots)"
#: source of a setting held at the training mean (nothing given to condition on)
MEAN = "held at the training mean (no setting given to condition on)"
#: source of a setting held at its median (a model saved before coherent held settings)
MEDIAN = "training median"

RULE_COHERENT = ("settings not given are held at their conditional mean given the given settings, under a "
                 "multivariate normal fitted to the training lots' settings (Anderson 2003, Thm 2.5.1), "
                 "clipped to each setting's training range")
RULE_MEDIAN = ("settings not given are held at their training medians (model saved before coherent held "
               "settings; retrain to hold them coherently)")


def settings_model(mean, cov, names, low, high) -> SimpleNamespace:
    return SimpleNamespace(names=[str(n) for n in names], mean=np.asarray(mean, float).reshape(-1),
                           cov=np.asarray(cov, float).reshape(len(names), len(names)),
                           low=np.asarray(low, float).reshape(-1), high=np.asarray(high, float).reshape(-1))


def fit_settings(values: np.ndarray, names: list[str]) -> dict | None:
    """Mean, covariance (ddof = 1) and min/max of the settings ``values``
    (lots × settings), on the lots with every setting; None with fewer than
    2 such lots. The dict keys are the lean storage names."""
    X = np.asarray(values, dtype=float)
    complete = np.all(np.isfinite(X), axis=1)
    if complete.sum() < 2 or not names:
        return None
    Xc = X[complete]
    return {"settings_names": [str(n) for n in names], "settings_mean": Xc.mean(axis=0),
            "settings_cov": np.atleast_2d(np.cov(Xc, rowvar=False, ddof=1)),
            "settings_low": np.nanmin(X, axis=0), "settings_high": np.nanmax(X, axis=0)}


def of_chain(chain) -> SimpleNamespace | None:
    """The settings model of a lean or fitted chain, or None for a model
    saved before it was kept."""
    spec = getattr(chain, "spec", None)
    rec = spec if isinstance(spec, dict) and spec.get("settings_names") else None
    if rec is None:
        training = getattr(chain, "training", None)
        rec = (training or {}).get("settings") if isinstance(training, dict) else None
    if not rec or not rec.get("settings_names"):
        return None
    return settings_model(rec["settings_mean"], rec["settings_cov"], rec["settings_names"], rec["settings_low"],
                          rec["settings_high"])


def conditional_mean(mean, cov, given_index, given_values, missing_index) -> np.ndarray:
    """E[x_m | x_g] = μ_m + Σ_mg Σ_gg⁺ (x_g − μ_g) for each row of
    ``given_values`` (rows × given); rows × missing (Anderson 2003, Thm 2.5.1;
    Σ_gg⁺ the pseudo-inverse)."""
    mean, cov = np.asarray(mean, float), np.asarray(cov, float)
    g, m = list(given_index), list(missing_index)
    xg = np.asarray(given_values, float)
    xg = xg.reshape(-1, len(g)) if g else np.zeros((xg.shape[0] if xg.ndim == 2 else 1, 0))
    if not g:
        return np.repeat(mean[m][None, :], xg.shape[0], axis=0)
    s_gg = cov[np.ix_(g, g)]
    s_mg = cov[np.ix_(m, g)]
    weights = s_mg @ np.linalg.pinv(s_gg, rcond=1e-10, hermitian=True)
    return mean[m][None, :] + (xg - mean[g][None, :]) @ weights.T


def hold(model: SimpleNamespace, given: dict[str, np.ndarray], missing: list[str]) -> tuple[dict, str]:
    """Values of the ``missing`` settings (arrays, one per row of the
    ``given`` columns) and their source: the conditional mean given the
    settings of ``given`` the model knows, clipped to the training range."""
    idx = {n: i for i, n in enumerate(model.names)}
    cond = [n for n in given if n in idx]
    rows = max([np.size(given[n]) for n in given] or [1])
    if cond:
        xg = np.column_stack([np.broadcast_to(np.asarray(given[n], float).reshape(-1), (rows,)) for n in cond])
    else:
        xg = np.zeros((rows, 0))
    todo = [n for n in missing if n in idx]
    out = conditional_mean(model.mean, model.cov, [idx[n] for n in cond], xg, [idx[n] for n in todo])
    lo = np.array([model.low[idx[n]] for n in todo])
    hi = np.array([model.high[idx[n]] for n in todo])
    out = np.clip(out, lo[None, :], hi[None, :])
    return {n: out[:, j] for j, n in enumerate(todo)}, (COHERENT if cond else MEAN)


def rule_of(chain) -> str:
    """In words, how this model holds the settings not given."""
    return RULE_COHERENT if of_chain(chain) is not None else RULE_MEDIAN


def held_point(chain, values: dict[str, float], *, rule: str | None = None) -> dict:
    """Applicability-domain verdict of one held point: every stage the chain
    of mean predictions runs through from ``values`` (settings, given or
    held, and any given stage target), checked with its domain model
    (training ranges, Hotelling T², Q; :func:`linkage.models.lean.domain_verdicts`).

    Returns ``{"rule", "in_domain", "reasons", "point"}`` (JSON-safe)."""
    from linkage.decide.propagate import simulate
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    draws = simulate(lean, {k: [float(v)] for k, v in values.items()}, n_draws=1, seed=0)
    reasons: list[str] = []
    for stage in lean.stages:
        if stage.domain is None or all(t in draws.fixed for t in stage.targets):
            continue
        verdict = stage.domain.check({c: draws.means[c] for c in stage.inputs})[0]
        reasons += [f"{stage.name} stage: {r}" for r in verdict["reasons"]]
    return {"rule": rule or rule_of(lean), "in_domain": not reasons, "reasons": reasons,
            "point": {k: float(v) for k, v in values.items()}}


def held_text(held: dict | None, what: str = "held point") -> str:
    """One line for text and sheets: inside or outside the domain, and why."""
    if not held:
        return ""
    if held["in_domain"]:
        return f"The {what} is inside the applicability domain (T²/Q and training ranges)."
    return (f"The {what} is OUTSIDE the applicability domain: " + "; ".join(held["reasons"]))
