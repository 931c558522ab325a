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
training mean μ_m.

A setting run at a few levels only (a mill screen of 1.0 or 1.25 mm) is held
at the training level nearest its conditional mean, never between levels: a
setting is taken as discrete when the training lots show at most
:data:`DISCRETE_MAX_LEVELS` distinct values and at least two lots per value
on average (common practice, no source). The settings still missing that are
not discrete are then held at their conditional mean given the given
settings and the discrete ones at their levels, so they follow the level
actually held; with no setting given they stay at the training mean. The
conditional mean is also the population form of the
least-squares regression of the missing settings on the given ones, so a
screw speed that follows roll speed × gap in the lots follows it here too,
where independent medians make a combination no lot ran.

A model saved before these numbers were kept (no ``settings_*`` fields in
``whatif.npz``, no ``training["settings"]``) keeps the old rule: every
setting not given at its training median, and the source says so.

Storage (the lean model, :mod:`linkage.models.lean`, for a port to another
language): ``settings_names`` (list), ``settings_mean`` (vector),
``settings_cov`` (matrix, rows and columns in the order of the names),
``settings_low``/``settings_high`` (training min/max), ``settings_levels``
(per setting, the sorted training levels of a discrete setting, an empty
list for a continuous one; absent in a model saved before it was kept, whose
settings are all held continuous).

Everything here is numpy only: ``linkage predict`` runs it.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

# The sources are shown in brackets beside a value ("13.84 (held at ...)"): no brackets of their own, so that the
# texts never nest one bracket in another (a user test read "(held at the training mean (no setting ...))").
#: source of a setting held at its conditional mean given the given settings
COHERENT = "held coherently, at the conditional mean of training lots"
#: source of a setting held at the training mean (nothing given to condition on)
MEAN = "held at the training mean, with no setting given to condition on"
#: source of a few-level setting held at the training level nearest its conditional mean
COHERENT_LEVEL = "held coherently, at the training level nearest the conditional mean of training lots"
#: source of a few-level setting held at the training level nearest the training mean (nothing given)
MEAN_LEVEL = "held at the training level nearest the training mean, with no setting given to condition on"
#: source of a setting held at its median (a model saved before coherent held settings)
MEDIAN = "training median"

RULE_COHERENT = ("settings not given are held at their conditional mean given the given settings, under a "
                 "multivariate normal fitted to the training lots' settings (Anderson 2003, Thm 2.5.1), "
                 "clipped to each setting's training range")
#: a setting with at most this many distinct training values (and >= 2 lots per value) is discrete
DISCRETE_MAX_LEVELS = 6
RULE_LEVELS = ("; a setting run at few levels (at most 6 distinct training values, at least 2 lots per value "
               "on average; common practice, no source) is held at the training level nearest its conditional "
               "mean, and the other settings at their conditional mean given that level")
RULE_MEDIAN = ("settings not given are held at their training medians (model saved before coherent held "
               "settings; retrain to hold them coherently)")


def settings_model(mean, cov, names, low, high, levels=None) -> SimpleNamespace:
    """The settings model; ``levels`` per setting (an empty list: continuous), None for none discrete."""
    levels = [np.asarray(v, float).reshape(-1) for v in levels] if levels is not None else None
    if levels is not None and len(levels) != len(names):
        raise ValueError(f"settings_levels has {len(levels)} entries for {len(names)} settings")
    return SimpleNamespace(names=[str(n) for n in names], mean=np.asarray(mean, float).reshape(-1),
                           cov=np.asarray(cov, float).reshape(len(names), len(names)),
                           low=np.asarray(low, float).reshape(-1), high=np.asarray(high, float).reshape(-1),
                           levels=levels)


def discrete_levels(column) -> list[float]:
    """The sorted distinct training values of one setting when it counts as
    discrete (at most :data:`DISCRETE_MAX_LEVELS` of them and at least two
    lots per value on average; common practice, no source), else []."""
    x = np.asarray(column, float)
    x = x[np.isfinite(x)]
    values = np.unique(x)
    if 2 <= len(values) <= DISCRETE_MAX_LEVELS and len(x) >= 2 * len(values):
        return [float(v) for v in values]
    return []


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
            "settings_low": np.nanmin(X, axis=0), "settings_high": np.nanmax(X, axis=0),
            "settings_levels": [discrete_levels(X[:, j]) for j in range(X.shape[1])]}


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
                          rec["settings_high"], rec.get("settings_levels"))


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
    settings of ``given`` the model knows, clipped to the training range; a
    discrete setting at the training level nearest it (the lower on a tie),
    and then the continuous ones given the given settings and those levels
    (see the module notes)."""
    idx = {n: i for i, n in enumerate(model.names)}
    cond = [n for n in given if n in idx]
    rows = max([np.size(given[n]) for n in given] or [1])
    columns = {n: np.broadcast_to(np.asarray(given[n], float).reshape(-1), (rows,)) for n in cond}
    todo = [n for n in missing if n in idx]
    out = _held_at_mean(model, columns, todo, idx, rows)
    levels = getattr(model, "levels", None) or []
    discrete = [n for n in todo if levels and len(levels[idx[n]])]
    if discrete:
        for n in discrete:
            out[n] = nearest_level(out[n], levels[idx[n]])
        rest = [n for n in todo if n not in discrete]
        if rest and cond:  # with nothing given the others stay at the training mean
            out.update(_held_at_mean(model, {**columns, **{n: out[n] for n in discrete}}, rest, idx, rows))
    return {n: out[n] for n in todo}, (COHERENT if cond else MEAN)


def sources(model: SimpleNamespace, names, label: str) -> dict[str, str]:
    """Per setting of ``names`` held by :func:`hold` with source ``label``,
    its source as it was held: ``label`` for a continuous setting; for a
    discrete one the level it was moved to (:data:`COHERENT_LEVEL` or
    :data:`MEAN_LEVEL`), never a mean it is not at."""
    idx = {n: i for i, n in enumerate(model.names)}
    levels = getattr(model, "levels", None) or []
    at_level = {COHERENT: COHERENT_LEVEL, MEAN: MEAN_LEVEL}
    return {n: at_level.get(label, label) if levels and n in idx and len(levels[idx[n]]) else label
            for n in names}


def hold_with_sources(model: SimpleNamespace, given: dict[str, np.ndarray],
                      missing: list[str]) -> tuple[dict[str, np.ndarray], dict[str, str]]:
    """:func:`hold`, with each held setting's source as :func:`sources` words it (the two belong together:
    a discrete setting's source names the level it was moved to)."""
    values, label = hold(model, given, missing)
    return values, sources(model, values, label)


def _held_at_mean(model, columns: dict, todo: list[str], idx: dict, rows: int) -> dict[str, np.ndarray]:
    """The conditional mean of ``todo`` given ``columns``, clipped to the training range."""
    names = list(columns)
    xg = np.column_stack([columns[n] for n in names]) if names else np.zeros((rows, 0))
    out = conditional_mean(model.mean, model.cov, [idx[n] for n in names], xg, [idx[n] for n in todo])
    lo = np.array([model.low[idx[n]] for n in todo])
    hi = np.array([model.high[idx[n]] for n in todo])
    out = np.clip(out, lo[None, :], hi[None, :])
    return {n: out[:, j] for j, n in enumerate(todo)}


def nearest_level(values, levels) -> np.ndarray:
    """Each value replaced by the nearest of ``levels`` (sorted; the lower one on a tie)."""
    lv = np.asarray(levels, float)
    v = np.asarray(values, float)
    return lv[np.argmin(np.abs(v[..., None] - lv), axis=-1)]


def rule_of(chain) -> str:
    """In words, how this model holds the settings not given."""
    model = of_chain(chain)
    if model is None:
        return RULE_MEDIAN
    return RULE_COHERENT + (RULE_LEVELS if any(len(v) for v in (model.levels or [])) else "")


def held_point(chain, values: dict[str, float], *, rule: str | None = None) -> dict:
    """Applicability-domain verdict of one held point: every stage the chain
    of mean predictions runs through from ``values`` (settings, given or
    held, and any given stage target), checked with its domain model
    (training ranges, Hotelling T², Q; :func:`linkage.models.lean.domain_verdicts`).

    Returns ``{"rule", "in_domain", "reasons", "point"}`` (JSON-safe)."""
    from linkage.decide.propagate import simulate
    from linkage.models.lean import as_lean, given_inputs_verdict

    lean = as_lean(chain)
    draws = simulate(lean, {k: [float(v)] for k, v in values.items()}, n_draws=1, seed=0)
    reasons: list[str] = []
    for stage in lean.stages:
        if stage.domain is None:
            continue
        if all(t in draws.fixed for t in stage.targets):  # not run: the values given to it, against their ranges
            verdict = given_inputs_verdict(stage.domain, {c: draws.means[c] for c in stage.inputs
                                                          if c in draws.fixed})
        else:
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
