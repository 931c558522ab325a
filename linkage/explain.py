"""Explanations of the fitted chain: contributions, importance, VIP, and
each attribute against ribbon porosity through the chain.

Contributions split a prediction into one term per input on top of a base
value, so that ``base_value + sum of contributions = prediction`` for every
lot:

- boosting: SHAP values from the tree explainer (Lundberg & Lee 2017,
  NeurIPS 30; Lundberg et al. 2020, Nat. Mach. Intell. 2:56-67); the base
  value is the explainer's expected value;
- PLS (a linear model): coefficient × (input − training mean), the base value
  the intercept at the training mean: exact, the Shapley values of a linear
  model with independent inputs;
- quadratic ridge: exact interventional Shapley values (see
  :class:`linkage.models.candidates.QuadraticRidge`);
- Ryshkewitch–Duckworth baseline: the whole departure from the base goes to
  ribbon porosity, its only input; the mean: no input contributes.

VIP (variable importance in projection; Wold, Johansson & Cocchi 1993;
Chong & Jun 2005) comes from the PLS candidate.

The curves against ribbon porosity are partial-dependence style: porosity
is set on a grid over the training range, every other root setting is held
(given or training median) and lots are simulated downstream through the
chain with each stage's out-of-fold residuals
(:func:`linkage.decide.propagate.simulate`), which gives a mean curve and a
band that holds the stated share of lots.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from linkage.exceptions import UsageError

__all__ = [
    "METHODS",
    "contributions",
    "shap_values",
    "linear_contributions",
    "global_importance",
    "lot_contributions",
    "vip",
    "PorosityCurves",
    "porosity_curves",
]

POROSITY = "ribbon_porosity"

#: how the contributions of each kind of selected model are computed
METHODS = {
    "boosting": "SHAP values, tree explainer",
    "pls": "exact linear terms, coefficient × centred input",
    "quadratic_ridge": "exact interventional Shapley values",
    "rd_baseline": "all to ribbon_porosity, the baseline's only input",
    "linear_select": "exact linear terms, coefficient × centred input or log-input",
    "log_linear": "link-scale terms, the change split in proportion to them",
    "weibull_release": "link-scale terms, the change split in proportion to them",
    "mean": "none: the model predicts the mean",
}


def _frame(target, X) -> pd.DataFrame:
    if not isinstance(X, pd.DataFrame):
        raise UsageError("X must be a DataFrame with one column per input")
    missing = [c for c in target.inputs if c not in X.columns]
    if missing:
        raise UsageError(f"{target.target}: X lacks the input(s) {', '.join(missing)}")
    return X[list(target.inputs)].astype(float)


def contributions(target, X: pd.DataFrame) -> pd.DataFrame:
    """Per-lot contributions of each input to ``target``'s selected model.

    Returns a DataFrame indexed like ``X``, one column per input;
    ``attrs["base_value"]`` holds the base value and ``attrs["method"]`` says
    how the terms were computed (:data:`METHODS`). Rows add up to prediction
    minus base value.
    """
    X = _frame(target, X)
    raw = target.contributions(X)
    out = raw.astype(float)
    out.attrs["base_value"] = float(raw.attrs["base_value"])
    out.attrs["method"] = METHODS.get(target.selected, f"from the {target.selected} model")
    return out


def _candidate(target, candidate: str | None):
    """(name, fitted estimator) of a candidate fitted on every training lot;
    ``None`` is the selected one."""
    name = target.selected if candidate is None else str(candidate)
    if name == target.selected:
        est = getattr(target, "model_", None)
    else:
        est = (getattr(target, "full_models_", None) or {}).get(name)
    if est is None:
        fitted = ", ".join(getattr(target, "full_models_", None) or [target.selected])
        raise UsageError(f"{target.target}: no fitted {name} model (fitted: {fitted})")
    return name, est


def shap_values(target, X: pd.DataFrame, candidate: str | None = None) -> pd.DataFrame:
    """SHAP values of a boosting model, computed here with ``shap.TreeExplainer``
    on its fitted trees (independently of the target's own ``contributions``).

    ``candidate`` names the candidate to explain (default: the selected
    model), which must be ``"boosting"``. ``attrs["base_value"]`` is the
    explainer's expected value; rows add up to the prediction minus it
    (local accuracy, Lundberg & Lee 2017).
    """
    name, est = _candidate(target, candidate)
    if name != "boosting":
        raise UsageError(f"{target.target}: SHAP tree values need the boosting model; {name} is not one "
                         "(pass candidate='boosting' to explain the boosting candidate)")
    import shap  # heavy: only when asked

    X = _frame(target, X)
    explainer = shap.TreeExplainer(est.model_)
    values = np.asarray(explainer.shap_values(X.to_numpy(float)), float).reshape(X.shape)
    out = pd.DataFrame(values, index=X.index, columns=list(target.inputs))
    out.attrs["base_value"] = float(np.asarray(explainer.expected_value, float).reshape(-1)[0])
    out.attrs["method"] = METHODS["boosting"]
    return out


def linear_contributions(target, X: pd.DataFrame, candidate: str | None = None) -> pd.DataFrame:
    """Exact contributions of a PLS model: coefficient × (input − training
    mean); ``attrs["base_value"]`` is the prediction at the training mean
    (the intercept of the centred model), so rows add up to the prediction
    minus it. ``candidate`` as in :func:`shap_values`, here ``"pls"``."""
    name, est = _candidate(target, candidate)
    if name != "pls":
        raise UsageError(f"{target.target}: linear contributions need the PLS model; {name} is not one "
                         "(pass candidate='pls' to explain the PLS candidate)")
    X = _frame(target, X)
    coef = np.asarray(est.coef_, float)
    centre = np.asarray(est.x_mean_, float)
    out = pd.DataFrame((X.to_numpy(float) - centre) * coef, index=X.index, columns=list(target.inputs))
    out.attrs["base_value"] = float(est.intercept_)
    out.attrs["method"] = METHODS["pls"]
    return out


def global_importance(target, X: pd.DataFrame, *, contributions: pd.DataFrame | None = None) -> pd.Series:
    """Mean absolute contribution of each input over the rows of ``X``
    (usually the training lots), largest first, in the target's unit."""
    c = contributions if contributions is not None else globals()["contributions"](target, X)
    return c.abs().mean().sort_values(ascending=False).rename(f"mean |contribution| to {target.target}")


def lot_contributions(target, table: pd.DataFrame, lots=None) -> pd.DataFrame:
    """Per-lot explanation from the assembled table: one row per lot (the
    given ``lots``, default every lot with all inputs), the base value, each
    input's contribution and the prediction."""
    t = table.copy()
    t["lot"] = t["lot"].astype(str)
    t = t.drop_duplicates("lot", keep="last").set_index("lot")
    missing = [c for c in target.inputs if c not in t.columns]
    if missing:
        raise UsageError(f"{target.target}: the table lacks the input(s) {', '.join(missing)}")
    if lots is not None:
        lots = [str(v) for v in lots]
        unknown = [v for v in lots if v not in t.index]
        if unknown:
            raise UsageError(f"lot(s) not in the table: {', '.join(unknown)}")
        t = t.loc[lots]
    X = t[list(target.inputs)].astype(float)
    incomplete = X.isna().any(axis=1)
    if lots is not None and incomplete.any():
        raise UsageError(f"{target.target}: lot(s) {', '.join(X.index[incomplete])} lack an input "
                         f"({', '.join(target.inputs)})")
    X = X[~incomplete]
    c = contributions(target, X)
    out = c.copy()
    out.insert(0, "base_value", c.attrs["base_value"])
    out["prediction"] = np.asarray(target.predict(X), float)
    out.attrs.update(c.attrs)
    return out


def vip(target) -> pd.Series | None:
    """VIP per input from the PLS candidate, or None when there is none."""
    v = getattr(target, "vip", None)
    if not v:
        return None
    s = pd.Series({str(k): float(x) for k, x in dict(v).items()})
    return s.reindex([c for c in target.inputs if c in s.index]).rename(f"VIP for {target.target}")


@dataclass
class PorosityCurves:
    """Attributes against ribbon porosity through the chain.

    ``curves[name]`` holds ``mean`` (the chain of mean predictions),
    ``low`` and ``high`` (central ``level`` quantiles of simulated lots),
    arrays over ``grid``; ``settings`` the values held, with their source.
    """

    grid: np.ndarray
    curves: dict[str, dict[str, np.ndarray]]
    level: float
    n_draws: int
    seed: int
    settings: dict[str, dict]


def porosity_curves(chain, settings: dict[str, float] | None = None, *, n_grid: int = 41, n_draws: int = 500,
                    level: float = 0.9, seed: int = 0) -> PorosityCurves:
    """Every attribute downstream of ribbon porosity, against porosity over
    the training range, with the central ``level`` band of simulated lots.

    ``settings`` holds root settings (the rest at their training medians);
    ribbon porosity itself is what the curve scans.
    """
    from linkage.decide.propagate import fill_settings, simulate
    from linkage.decide.window import downstream_targets

    if not 0 < level < 1:
        raise UsageError(f"level must lie between 0 and 1; got {level}")
    settings = dict(settings or {})
    if POROSITY in settings:
        raise UsageError("ribbon_porosity is what the curves scan; do not set it")
    produced = set(chain.targets)
    unknown = [k for k in settings if k in produced]
    if unknown:
        raise UsageError(f"{', '.join(unknown)} are predicted by the chain; the curves hold settings only")
    lo, hi = (float(v) for v in chain.training["ranges"][POROSITY])
    grid = np.linspace(lo, hi, int(n_grid))
    values, source = fill_settings(chain, {**settings, POROSITY: 0.0})
    values.pop(POROSITY)
    source.pop(POROSITY)
    frame = pd.DataFrame({**{k: np.full(len(grid), v) for k, v in values.items()}, POROSITY: grid})
    draws = simulate(chain, frame, n_draws=n_draws, seed=seed)
    q = (1 - level) / 2
    downstream = downstream_targets(chain)
    curves = {}
    for name in chain.targets:  # chain order
        if name not in downstream:
            continue
        v = draws.values[name]
        curves[name] = {"mean": np.asarray(draws.means[name], float), "low": np.quantile(v, q, axis=1),
                        "high": np.quantile(v, 1 - q, axis=1)}
    held = {k: {"value": float(v), "source": source[k]} for k, v in sorted(values.items())}
    return PorosityCurves(grid=grid, curves=curves, level=float(level), n_draws=int(n_draws), seed=int(seed),
                          settings=held)
