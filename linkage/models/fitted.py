"""Fitted chain objects: one :class:`FittedTarget` per attribute, grouped in
:class:`FittedStage` objects, held by a :class:`FittedChain`.

These are what the registry stores (joblib) and what ``decide`` and
``report`` use. Predictions are decision support, not release testing.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from linkage import CAUTION
from linkage.exceptions import InputError, Problem
from linkage.models.chain import ChainSpec
from linkage.models.conformal import cv_plus_interval, lw_cv_plus_interval
from linkage.models.lean import leverage_scale, project, spread_scale
from linkage.jsonable import jsonable

__all__ = ["FittedTarget", "FittedStage", "FittedChain", "jsonable", "INTERVAL_METHOD", "LW_INTERVAL_METHOD",
           "STUDENTIZED_INTERVAL_METHOD", "INTERVAL_CHOICE_RULE", "COVERAGE_METHOD"]

INTERVAL_METHOD = (
    "CV+ (Barber, Candès, Ramdas & Tibshirani 2021, Ann. Statist. 49:486-507) with lots as the "
    "exchangeable unit: the fold models of the lot-grouped outer cross-validation and their "
    "out-of-fold residuals; lower end the ⌊α(n+1)⌋-th smallest of μ̂₋ₖ₍ᵢ₎(x) − Rᵢ, "
    "upper end the "
    "⌈(1−α)(n+1)⌉-th smallest of μ̂₋ₖ₍ᵢ₎(x) + Rᵢ; an end is ±inf where its rank falls "
    "outside 1..n "
    "(too few lots for the level)"
)

LW_INTERVAL_METHOD = (
    "locally weighted CV+ (Lei, G'Sell, Rinaldo, Tibshirani & Wasserman 2018, JASA 113:1094-1111, §5.2, "
    "with the CV+ ranks of Barber et al. 2021): the out-of-fold residuals are divided by a spread model "
    "ρ̂(level) = exp(a + b·level) fitted to their absolute values (gamma GLM, log link), the CV+ order "
    "statistics are taken on those scores and the fold models' predictions divided by ρ̂(x), and the ends "
    "are multiplied back by ρ̂(x); so the interval widens where the model's errors are larger"
)

STUDENTIZED_INTERVAL_METHOD = (
    "studentized CV+ of the whole procedure (Barber, Candès, Ramdas & Tibshirani 2021, Ann. Statist. 49:486-507, "
    "§3, for the procedure as the algorithm; normalised scores: Papadopoulos, Gammerman & Vovk 2008, Proc. IASTED "
    "AIA, and Lei et al. 2018, JASA 113:1094, §5.2): in each outer fold the candidate is chosen by the one-SE rule "
    "on that fold's inner CV, and its fold model and held-out residuals enter CV+; each residual is divided by "
    "ρ(xᵢ) = √(1 + c·h(xᵢ)), h the delta-method leverage of the full-data link-linear model "
    "at the lot's inputs "
    "(1 for other model kinds; c = K/(K − 1)), the fold models' predictions at x by ρ(x), the CV+ order "
    "statistics taken on those, and the ends multiplied back by ρ(x): the classical prediction-interval shape "
    "σ̂√(1 + h), wider where the mean is estimated from few lots. The Monte Carlo through the chain keeps the "
    "selected model's out-of-fold residuals"
)

INTERVAL_CHOICE_RULE = (
    "CV+ unless locally weighted CV+ brings the worst porosity region closer to the nominal coverage under "
    "the nested CV (the largest |coverage − nominal| over the thirds of the training range, strictly smaller) "
    "and the absolute out-of-fold residuals trend with the level (Glejser 1969, JASA 64:316, slope test at "
    "p < 0.05), so that no spread model is fitted to noise; the same spread model then scales the residuals in "
    "the Monte Carlo through the chain"
)

COVERAGE_METHOD = (
    "nested CV+: for each outer fold, a CV+ interval at the nominal level is built from the outer "
    "training lots alone (their inner grouped-CV models and residuals at the hyperparameters tuned "
    "there), and each held-out lot is checked against it; nothing of a held-out lot enters its own "
    "interval. The choice among candidates used every lot (a small optimism). It is the coverage of "
    "plain CV+ on the selected candidate: where the intervals given are studentized CV+ of the whole "
    "procedure (interval_method), their own coverage is not checked here (that needs a third level of "
    "cross-validation); against a known truth, on seeded synthetic campaigns, it is in the project's "
    "reports/calibration.md."
)


def _basis_summary(basis: dict | None) -> dict | None:
    """What ``train --json`` says of the studentized CV+ basis (None where it is not used)."""
    if basis is None:
        return None
    lev = basis["leverage"]
    return {"fold_candidates": list(basis["fold_candidates"]), "summary": basis["summary"],
            "leverage": None if lev is None else {"columns": [int(c) for c in lev["columns"]],
                                                  "factor": float(lev["factor"])}}


def _as_matrix(X, inputs: list[str], what: str) -> np.ndarray:
    """The inputs of X as a float matrix; every missing column or value is
    refused at once with its row and column."""
    if not isinstance(X, pd.DataFrame):
        raise TypeError(f"{what} takes a pandas DataFrame with one column per input: {', '.join(inputs)}")
    problems = [Problem(file=what, column=c, rule="column missing; the model needs every input")
                for c in inputs if c not in X.columns]
    if problems:
        raise InputError(problems)
    sub = X[inputs]
    bad = [c for c in inputs if not (pd.api.types.is_numeric_dtype(sub[c]) and not pd.api.types.is_bool_dtype(sub[c]))]
    if bad:
        raise InputError([Problem(file=what, column=c, rule="values must be numbers") for c in bad])
    values = sub.to_numpy(dtype=float, na_value=np.nan)
    bad = ~np.isfinite(values)
    if bad.any():
        rows, cols = np.nonzero(bad)
        problems = [Problem(file=what, column=inputs[j], value=None if np.isnan(values[i, j]) else values[i, j],
                            rule=f"row {X.index[i]!r}: no finite value; a prediction needs every input")
                    for i, j in list(zip(rows, cols))[:50]]
        raise InputError(problems)
    return values


@dataclass
class FittedTarget:
    """One attribute's candidates, the selected model and its intervals.

    ``coverage`` is the empirical coverage of CV+ intervals at
    ``nominal_coverage`` over the lots, computed by *nested* CV+ (see
    :data:`COVERAGE_METHOD`): for each outer fold the interval is built from
    the outer training lots only, so a lot never helps build the interval it
    is checked against. ``interval`` serves the deployed CV+ interval (all
    lots); ``candidates`` holds per candidate ``rmse, mae, q2, bias,
    rmse_se, rmse_over_noise, coverage``.
    """

    target: str
    stage: str
    inputs: list[str]
    selected: str
    selection_rule: str
    selection: dict
    candidates: dict[str, dict]
    unavailable: dict[str, str]
    noise_floor: float | None
    noise_floor_method: str
    n_lots: int
    lots: list[str]
    cv: dict
    oof: pd.DataFrame
    residuals: pd.Series
    nominal_coverage: float
    coverage: float
    coverage_method: str
    infinite_intervals: int
    vip: dict[str, float] | None
    rd_params: dict | None
    hyperparameters: dict[str, dict]
    notes: list[str]
    model_: object = field(repr=False)
    fold_models_: list = field(repr=False)
    fold_of_: np.ndarray = field(repr=False)
    full_models_: dict = field(repr=False, default_factory=dict)
    #: nested-CV coverage of the deployed interval method by region (thirds of
    #: the training range of ``coverage_region_variable``), each with its
    #: Clopper–Pearson interval; None on models trained before it existed
    coverage_by_region: list | None = None
    coverage_region_variable: str | None = None
    #: what CV+ promises (:func:`linkage.models.conformal.cv_plus_guarantee`)
    coverage_guarantee: dict | None = None
    #: the choice between CV+ and locally weighted CV+ (method, rule, reason, by_method)
    interval_choice: dict | None = None
    #: the spread model of locally weighted CV+ (None: plain CV+ and pooled residuals)
    spread: dict | None = None
    #: studentized CV+ of the whole procedure (:func:`linkage.models.train._procedure_basis`): fold models,
    #: fold_candidates, residuals, leverage (or None), lot_scale; None where locally weighted CV+ is deployed
    #: and on models trained before it existed (then plain CV+ on the selected candidate's folds)
    interval_basis: dict | None = None
    #: the forward-in-time check (:func:`linkage.models.forward.forward_check`); None without manufactured_at
    forward: dict | None = None

    # -- predictions -------------------------------------------------------
    def predict(self, X: pd.DataFrame, *, raw: bool = False) -> np.ndarray:
        """Prediction of the selected candidate fitted on every training lot,
        projected onto the attribute's physical range
        (:func:`linkage.models.lean.project`) unless ``raw``."""
        out = np.asarray(self.model_.predict(_as_matrix(X, self.inputs, f"{self.target} prediction")), float)
        return out if raw else project(self.target, out)[0]

    def predict_candidate(self, X: pd.DataFrame, name: str) -> np.ndarray:
        """Prediction of another candidate's full-data fit (e.g. ``rd_baseline``)."""
        if name not in self.full_models_:
            raise KeyError(f"{name} was not fitted for {self.target}; fitted: {', '.join(self.full_models_)}")
        return np.asarray(self.full_models_[name].predict(_as_matrix(X, self.inputs, f"{self.target} prediction")))

    def interval(self, X: pd.DataFrame, level: float | None = None, *,
                 raw: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """CV+ prediction interval (see :data:`INTERVAL_METHOD`) at ``level``
        (default: the nominal coverage), each end projected onto the
        attribute's physical range (:func:`linkage.models.lean.project`)
        unless ``raw``. A raw end is ``-inf``/``inf`` when the rank rule needs
        more lots than were trained on, e.g. a 90 % interval from fewer than 9
        lots: no finite interval carries the guarantee, and the projected end
        is then the physical bound (``±inf`` where the quantity has none)."""
        level = self.nominal_coverage if level is None else float(level)
        if not 0 < level < 1:
            raise ValueError(f"level must lie strictly between 0 and 1; got {level}")
        Xa = _as_matrix(X, self.inputs, f"{self.target} interval")
        spread = getattr(self, "spread", None)
        basis = None if spread is not None else getattr(self, "interval_basis", None)
        # the fold models and residuals of the interval given: the procedure's (studentized CV+) or the
        # selected candidate's (CV+, locally weighted CV+); each fold model predicts once
        models, residuals = ((basis["fold_models"], basis["residuals"]) if basis is not None
                             else (self.fold_models_, self.residuals.to_numpy(float)))
        preds = np.vstack([np.asarray(m.predict(Xa), float) for m in models])
        if spread is not None:
            x_scale = spread_scale(spread, np.asarray(self.model_.predict(Xa), float))
            low, high = lw_cv_plus_interval(preds, self.fold_of_, residuals, self.lot_scale(), x_scale, 1 - level)
        elif basis is not None and basis["leverage"] is not None:
            x_scale = leverage_scale(Xa, self.model_.lean_spec(), basis["leverage"])
            low, high = lw_cv_plus_interval(preds, self.fold_of_, residuals, basis["lot_scale"], x_scale, 1 - level)
        else:
            low, high = cv_plus_interval(preds, self.fold_of_, residuals, 1 - level)
        return (low, high) if raw else (project(self.target, low)[0], project(self.target, high)[0])

    @property
    def interval_method(self) -> str:
        """The deployed interval method, in words."""
        if getattr(self, "spread", None) is not None:
            return LW_INTERVAL_METHOD
        return STUDENTIZED_INTERVAL_METHOD if getattr(self, "interval_basis", None) is not None else INTERVAL_METHOD

    def lot_scale(self) -> np.ndarray:
        """ρ̂ at each training lot's out-of-fold level (order of ``residuals``);
        ones without a spread model."""
        spread = getattr(self, "spread", None)
        if spread is None:
            return np.ones(len(self.residuals))
        return spread_scale(spread, self.oof[self.selected].to_numpy(float))

    def contributions(self, X: pd.DataFrame) -> pd.DataFrame:
        """Per-input contributions to each prediction of the selected model.

        Rows add up to ``prediction − base_value`` (``base_value`` is in
        ``.attrs`` and as an attribute): exact coefficient × (x − training
        mean) for PLS, exact interventional Shapley values for the quadratic
        ridge, SHAP TreeExplainer values for boosting, the whole of
        (prediction − mean training prediction) on ribbon_porosity for the
        Ryshkewitch–Duckworth baseline, zeros for the mean.
        """
        Xa = _as_matrix(X, self.inputs, f"{self.target} contributions")
        values, base = self.model_.contributions(Xa)
        out = pd.DataFrame(values, index=X.index, columns=list(self.inputs))
        out.attrs["base_value"] = float(base)
        out.attrs["model"] = self.selected
        object.__setattr__(out, "base_value", float(base))
        return out

    # -- reporting ----------------------------------------------------------
    def summary(self) -> dict:
        """JSON-safe summary (what ``train --json`` prints per attribute)."""
        return jsonable({
            "target": self.target,
            "stage": self.stage,
            "inputs": list(self.inputs),
            "n_lots": self.n_lots,
            "cv": self.cv,
            "candidates": self.candidates,
            "unavailable": self.unavailable,
            "noise_floor": self.noise_floor,
            "noise_floor_method": self.noise_floor_method,
            "selected": self.selected,
            "selection_rule": self.selection_rule,
            "selection": self.selection,
            "hyperparameters": self.hyperparameters,
            "nominal_coverage": self.nominal_coverage,
            "coverage": self.coverage,
            "coverage_method": self.coverage_method,
            "infinite_intervals": self.infinite_intervals,
            "interval_method": self.interval_method,
            "coverage_by_region": getattr(self, "coverage_by_region", None),
            "coverage_region_variable": getattr(self, "coverage_region_variable", None),
            "coverage_guarantee": getattr(self, "coverage_guarantee", None),
            "interval_choice": getattr(self, "interval_choice", None),
            "spread": getattr(self, "spread", None),
            "interval_basis": _basis_summary(getattr(self, "interval_basis", None)),
            "forward": getattr(self, "forward", None),
            "vip": self.vip,
            "rd_params": self.rd_params,
            "notes": self.notes,
        })


@dataclass
class FittedStage:
    """The fitted targets of one stage and its applicability domain."""

    name: str
    inputs: list[str]
    targets: dict[str, FittedTarget]
    domain: object  # DomainModel, or None when no target of the stage could be fitted
    skipped: dict[str, str] = field(default_factory=dict)

    def residual_table(self) -> pd.DataFrame:
        """Lots × targets of out-of-fold residuals (observed − prediction of
        the selected candidate); NaN where a lot lacks that target. Rows are
        whole lots, so draws by row keep the residuals of one lot together."""
        cols = {name: t.residuals for name, t in self.targets.items()}
        if not cols:
            return pd.DataFrame(index=pd.Index([], name="lot"))
        table = pd.DataFrame(cols)
        table.index.name = "lot"
        return table.sort_index()


def bootstrap_summary(bs: dict | None) -> dict:
    """What the model record says of its bootstrap replicates."""
    if not bs:
        return {"n_replicates": 0, "reason": "the model was trained before bootstrap replicates existed; "
                                             "no probability has a lower bound (retrain to get one)"}
    return {k: bs.get(k) for k in ("method", "n_replicates", "requested", "failed", "seed", "reason")}


def trained_mask(lots, training_lots) -> np.ndarray:
    """Which of ``lots`` are among ``training_lots`` (a training record's lots), one boolean each, compared as
    text (the record keeps them as text): :meth:`FittedChain.trained_on`'s rule, for a caller that holds only
    the list."""
    used = set(map(str, training_lots or []))
    return np.array([str(lot) in used for lot in lots], dtype=bool)


@dataclass
class FittedChain:
    """A trained chain: stages in order, every fitted target, the training
    record. ``model_id`` is set by the registry on save."""

    chain: ChainSpec
    stages: list[FittedStage]
    targets: dict[str, FittedTarget]
    skipped: dict[str, str]
    training: dict
    library_versions: dict[str, str]
    seed: int
    nominal_coverage: float
    created_at: str
    model_id: str | None = None
    interval_method: str = INTERVAL_METHOD
    #: lot-level bootstrap replicates of the selected models (linkage.models.bootstrap); None in a model
    #: trained before they existed (then no probability has a lower bound; read it with getattr)
    bootstrap: dict | None = None

    @property
    def trained_product(self) -> str | None:
        """The one product the chain was trained on; None when it was trained on several, or on lots without
        a product name (the report, the plan and its lots are then of no single product)."""
        from linkage.products import one_product

        return one_product(self.training)

    @property
    def training_lots(self) -> list | None:
        """The lots of its training record (None in a record without them); a lean chain loaded from the registry
        carries the same list (:attr:`linkage.models.lean.LeanChain.training_lots`)."""
        return self.training.get("lots")

    def trained_on(self, lots) -> np.ndarray:
        """Which of ``lots`` (lot ids, in their order) the chain was trained on, one boolean each: the lots of
        its training record, compared as text (the record keeps them as text). The report's lots, map and
        transfer sections all judge a training lot by it."""
        return trained_mask(lots, self.training.get("lots"))

    def stage(self, name: str) -> FittedStage:
        for st in self.stages:
            if st.name == name:
                return st
        raise KeyError(name)

    def metadata(self) -> dict:
        """JSON-safe record of the model: everything ``train --json`` prints
        and more (chain, training record, library versions, domain limits)."""
        return jsonable({
            "model_id": self.model_id,
            "created_at": self.created_at,
            "caution": CAUTION,
            "seed": self.seed,
            "nominal_coverage": self.nominal_coverage,
            "interval_method": self.interval_method,
            "coverage_method": COVERAGE_METHOD,
            "chain": {"source": self.chain.source, "toml": self.chain.to_toml(), **self.chain.to_dict()},
            "training": self.training,
            "library_versions": self.library_versions,
            "targets": {name: t.summary() for name, t in self.targets.items()},
            "skipped": self.skipped,
            "bootstrap": bootstrap_summary(getattr(self, "bootstrap", None)),
            "stages": [
                {"name": st.name, "inputs": st.inputs, "targets": list(st.targets), "skipped": st.skipped,
                 "domain": st.domain.to_dict() if st.domain is not None else None}
                for st in self.stages
            ],
        })
