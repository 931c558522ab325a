"""Train the chain: every target of every stage, every candidate, nested
grouped cross-validation by lot, the one-SE selection, CV+ intervals and the
applicability domain.

A stage trains on every lot that has its inputs and the target; a lot missing
one target still counts for the others. Stage inputs that an earlier stage
predicts are taken as *measured* for training.

Fallbacks (documented, never silent):

* a target with fewer than :data:`MIN_LOTS` usable lots, or whose column (or
  an input column) is absent or entirely missing, is skipped with its reason
  in ``FittedChain.skipped``; a later stage that needs it then has no lots and
  is skipped too. If no target can be trained, :class:`InsufficientDataError`
  lists every reason.
* a constant target (every lot the same value) gets the ``mean`` candidate
  only; its Q² is undefined and reported as null with a note.
* a candidate that does not apply (no ribbon_porosity input, fewer than three
  distinct porosities, no varying input) or fails in any fold is left out for
  that target with its reason in ``unavailable``.
"""

from __future__ import annotations

import contextlib
import hashlib
import math
import platform
from dataclasses import dataclass
from datetime import datetime, timezone
from importlib import metadata as importlib_metadata
from typing import Callable

import numpy as np
import pandas as pd

from linkage.exceptions import InputError, InsufficientDataError, Problem, UsageError, toml_problem
from linkage.models.candidates import CANDIDATES, CandidateError, tune
from linkage.models.bootstrap import DEFAULT_REPLICATES, bootstrap_chain
from linkage.models.chain import ChainSpec
from linkage.models.conformal import (SPREAD_TEST_LEVEL, coverage_by_region, cv_plus_guarantee, cv_plus_interval,
                                      fit_spread, lw_cv_plus_interval, region_edges, spread_trend_test,
                                      worst_region_gap)
from linkage.models.cv import SIMPLICITY_ORDER, inner_splits, metrics, outer_splits, select_candidate
from linkage.models.domain import DomainModel
from linkage.models.forward import forward_check, lot_times
from linkage.models.grouping import lot_groups
from linkage.models.fitted import (COVERAGE_METHOD, INTERVAL_CHOICE_RULE, FittedChain, FittedStage,
                                   FittedTarget)
from linkage.models.lean import spread_scale
from linkage.numbers import points_text
from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN, NOISE_COLUMNS

# re-exported: others import the fitted classes from here
__all__ = ["train_chain", "MIN_LOTS", "FittedChain", "FittedStage", "FittedTarget", "table_sha256",
           "noise_floor"]

#: fewest lots with every input and the target for a target to be trained
#: (outer leave-one-lot-out leaves 4 for the inner CV; common practice, no source)
MIN_LOTS = 5

#: significance level of the applicability-domain limits (95 % limits)
DOMAIN_ALPHA = 0.05


# ---------------------------------------------------------------------------
# the table
# ---------------------------------------------------------------------------
def table_sha256(table: pd.DataFrame) -> str:
    """SHA-256 of the assembled table in a canonical form: rows sorted by
    lot, columns as given, written as CSV (floats at full repr precision,
    ``\\n`` line ends, UTF-8)."""
    t = table
    if "lot" in table.columns:
        order = np.argsort(table["lot"].astype(str).to_numpy(), kind="stable")
        t = table.iloc[order].reset_index(drop=True)
    text = t.to_csv(index=False, lineterminator="\n")
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _unknown_targets(table: pd.DataFrame, chain: ChainSpec) -> list[Problem]:
    """A target that is no attribute at all: neither a column of the assembled
    table's contract (:data:`linkage.schema.ASSEMBLED`) nor a column of this
    table. Refused with the nearest name (a misspelt target such as
    ``dissolution_pcx`` would otherwise train, register and serve a model
    without dissolution, only listed as not trained). A known attribute
    without enough lots is still skipped with its reason."""
    from linkage.schema import ASSEMBLED
    from linkage.spec import _suggest

    known = list(dict.fromkeys([*ASSEMBLED, *map(str, table.columns)]))
    source = chain.source or "chain specification"
    return [toml_problem(source, key="targets", value=t, column="targets",
                         rule=f"stage '{st.name}': '{t}' is not an attribute of the assembled table"
                              f"{_suggest(t, known)}; a target must be one of its columns (linkage.schema.ASSEMBLED, "
                              "or a column of the table)")
            for st in chain.stages for t in st.targets if t not in known]


def _prepare(table, chain: ChainSpec) -> tuple[pd.DataFrame, list[str]]:
    """Validated numeric copy, one row per lot, sorted by lot; notes."""
    if not isinstance(table, pd.DataFrame):
        raise TypeError("train_chain takes the assembled table as a pandas DataFrame")
    src = "assembled table"
    if "lot" not in table.columns:
        raise InputError(Problem(file=src, column="lot", rule="column missing; every row needs its lot"))
    if table.empty:
        raise InsufficientDataError("the assembled table has no lots")
    problems: list[Problem] = []
    lots = table["lot"]
    empty = lots.isna() | (lots.astype(str).str.strip() == "")
    for i in np.flatnonzero(empty.to_numpy()):
        problems.append(Problem(file=src, row=int(i) + 2, column="lot", rule="empty lot identifier"))
    lot_str = lots.astype(str).str.strip()
    dup = lot_str[lot_str.duplicated(keep=False) & ~empty]
    for lot in sorted(set(dup)):
        rows = [int(i) + 2 for i in np.flatnonzero((lot_str == lot).to_numpy())]
        problems.append(Problem(file=src, column="lot", value=lot,
                                rule=f"lot appears on rows {rows}; the assembled table has one row per lot"))
    problems += _unknown_targets(table, chain)
    needed = list(dict.fromkeys(chain.root_inputs() + chain.targets()))
    noise = [c for t in chain.targets() if t in NOISE_COLUMNS for c in NOISE_COLUMNS[t]]
    notes = []
    out = pd.DataFrame({"lot": lot_str})
    for c in needed + [c for c in noise if c not in needed]:
        if c not in table.columns:
            if c in needed:
                notes.append(f"column {c} is absent from the assembled table")
            out[c] = np.nan
            continue
        col = table[c]
        if pd.api.types.is_bool_dtype(col) or not pd.api.types.is_numeric_dtype(col):
            num = pd.to_numeric(col, errors="coerce")
            bad = num.isna() & col.notna()
            for i in np.flatnonzero(bad.to_numpy())[:20]:
                problems.append(Problem(file=src, row=int(i) + 2, column=c, value=col.iloc[i],
                                        rule="not a number"))
            col = num
        values = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        for i in np.flatnonzero(np.isinf(values))[:20]:
            problems.append(Problem(file=src, row=int(i) + 2, column=c, value=float(values[i]),
                                    rule="infinite value"))
        out[c] = values
    if problems:
        raise InputError(problems)
    out = out.sort_values("lot", kind="mergesort").reset_index(drop=True)
    if len(out) < MIN_LOTS:
        raise InsufficientDataError(
            f"training needs at least {MIN_LOTS} lots with every input and a target; the table has {len(out)} "
            f"lot{'s' if len(out) != 1 else ''}"
        )
    return out, notes


def noise_floor(table: pd.DataFrame, target: str) -> tuple[float | None, str]:
    """Measurement noise floor of a lot-mean target, from its replicates.

    σ_w² = Σ(mᵢ − 1)sᵢ² / Σ(mᵢ − 1) pooled over the lots with m ≥ 2
    replicates (sᵢ the within-lot SD, mᵢ the count); the floor is the
    repeatability of the lot mean, σ_w·√(mean of 1/mᵢ). ``None`` (with the
    reason) where no replicate SD exists.
    """
    cols = NOISE_COLUMNS.get(target)
    if cols is None:
        return None, "none estimated: the assembled table keeps no replicate measurements of this attribute"
    sd_col, n_col = cols
    if sd_col not in table.columns or n_col not in table.columns:
        return None, f"none estimated: {sd_col} or {n_col} is absent from the assembled table"
    s = table[sd_col].to_numpy(float)
    m = table[n_col].to_numpy(float)
    ok = np.isfinite(s) & np.isfinite(m) & (m >= 2) & (s >= 0)
    if not ok.any():
        return None, f"none estimated: no lot has {sd_col} from at least 2 replicates"
    s, m = s[ok], m[ok]
    dof = float(np.sum(m - 1))
    sw = float(np.sqrt(np.sum((m - 1) * s**2) / dof))
    floor = sw * float(np.sqrt(np.mean(1.0 / m)))
    return floor, (f"pooled within-lot SD of the replicates ({sd_col}) over {int(ok.sum())} lots "
                   f"({dof:g} degrees of freedom), σ_w = {sw:.4g}, times √(mean 1/m) with m = {n_col}: "
                   "the repeatability of the lot mean")


# ---------------------------------------------------------------------------
# jobs
# ---------------------------------------------------------------------------
@dataclass
class _Plan:
    stage: str
    target: str
    inputs: list[str]
    monotone: dict[str, int]
    lots: np.ndarray
    X: np.ndarray
    y: np.ndarray
    splits: list
    scheme: str
    candidates: list[str]
    unavailable: dict[str, str]
    notes: list[str]
    #: the label each lot is grouped by in the outer and inner folds (the lot itself by default)
    groups: np.ndarray | None = None
    group_by: str = "lot"


@dataclass
class _Job:
    plan: int
    fold: int | None  # None: the full-data fit
    X_train: np.ndarray
    y_train: np.ndarray
    lots_train: np.ndarray
    X_test: np.ndarray | None
    candidates: list[str]
    inputs: list[str]
    monotone: dict[str, int]
    seed: int
    alpha: float


def _run_job(job: _Job) -> dict:
    """Tune, fit and (for an outer fold) predict every candidate; nested CV+
    bounds for the held-out lots. Returns name -> result or error text."""
    from threadpoolctl import threadpool_limits

    out: dict[str, dict] = {}
    splits = inner_splits(job.lots_train)
    with threadpool_limits(limits=1):
        for name in job.candidates:
            spec = CANDIDATES[name]
            try:
                tr = tune(spec, job.X_train, job.y_train, job.lots_train, job.X_test,
                          inputs=job.inputs, monotone=job.monotone, seed=job.seed, splits=splits)
                est = spec.build(tr.params, job.inputs, n=len(job.y_train), monotone=job.monotone,
                                 seed=job.seed).fit(job.X_train, job.y_train)
                # the fold's inner grouped-CV error at the tuned grid point: the one-SE choice of the
                # candidate inside the fold (studentized CV+ of the whole procedure, _procedure_basis)
                res = {"params": tr.params, "model": est, "inner": metrics(job.y_train, tr.inner_pred)}
                if job.X_test is not None:
                    pred = np.asarray(est.predict(job.X_test), float)
                    if not np.all(np.isfinite(pred)):
                        raise CandidateError("non-finite out-of-fold prediction")
                    lo, hi = cv_plus_interval(tr.extra_pred, tr.inner_fold, job.y_train - tr.inner_pred,
                                              job.alpha)
                    # copies: the bounds are rows of an (n_train × n_test) work array, which a view
                    # would keep alive until training ends (tens of GB at 10,000 lots)
                    res.update(pred=pred, low=np.array(lo), high=np.array(hi))
                    res.update(zip(("lw_low", "lw_high"), _nested_lw(tr, job.y_train, pred, job.alpha, lo, hi)))
                out[name] = res
            except (CandidateError, InsufficientDataError, np.linalg.LinAlgError) as exc:
                where = "the full-data fit" if job.fold is None else f"outer fold {job.fold + 1}"
                out[name] = {"error": f"{exc} (in {where})"}
    return out


def _nested_lw(tr, y_train, pred, alpha, lo, hi):
    """Nested locally weighted CV+ bounds for the held-out lots: the spread
    model fitted on the outer training lots' inner out-of-fold residuals
    against their inner out-of-fold level, the scores normalised by it
    (:func:`linkage.models.conformal.lw_cv_plus_interval`). Where no spread
    can be fitted (every residual zero), the plain CV+ bounds."""
    res = y_train - tr.inner_pred
    try:
        spread = fit_spread(tr.inner_pred, res)
    except ValueError:
        return np.array(lo), np.array(hi)
    lw_lo, lw_hi = lw_cv_plus_interval(tr.extra_pred, tr.inner_fold, res, spread_scale(spread, tr.inner_pred),
                                       spread_scale(spread, pred), alpha)
    return np.array(lw_lo), np.array(lw_hi)


#: the attribute whose training range is cut into the regions of ``coverage_by_region``
REGION_VARIABLE = "ribbon_porosity"


def _region_values(plan: _Plan, oof_selected: np.ndarray) -> tuple[np.ndarray, str]:
    """Per lot, the value that places it in a coverage region, and its name:
    the lot's measured ribbon porosity where it is a stage input, else the
    attribute's out-of-fold prediction (its level; for the ribbon stage the
    predicted porosity). Never the observed target itself: regions by the
    observed value would sort lots by their own errors (a lot lands in the
    top third partly because its error is positive), and the edge regions
    would under-cover by construction."""
    if REGION_VARIABLE in plan.inputs:
        return plan.X[:, plan.inputs.index(REGION_VARIABLE)], REGION_VARIABLE
    return oof_selected, f"predicted {plan.target}"


def _library_versions() -> dict[str, str]:
    out = {"python": platform.python_version()}
    for dist in ("linkage", "numpy", "pandas", "scipy", "scikit-learn", "joblib", "shap"):
        try:
            out[dist] = importlib_metadata.version(dist)
        except importlib_metadata.PackageNotFoundError:
            out[dist] = "not installed"
    return out


def _candidate_names(candidates) -> list[str]:
    if candidates is None:
        return list(SIMPLICITY_ORDER)
    unknown = [c for c in candidates if c not in CANDIDATES]
    if unknown:
        raise UsageError(f"unknown candidate(s) {', '.join(map(str, unknown))}; "
                         f"known: {', '.join(SIMPLICITY_ORDER)}")
    chosen = set(candidates) | {"mean"}  # the floor is always there
    return [c for c in SIMPLICITY_ORDER if c in chosen]


def _plan_target(table: pd.DataFrame, stage, target: str, names: list[str], seed: int,
                 groups: dict[str, str] | None = None, group_by: str = "lot"):
    """A _Plan, or the reason the target is skipped."""
    cols = list(stage.inputs) + [target]
    values = table[cols].to_numpy(float)
    have = np.all(np.isfinite(values), axis=1)
    n = int(have.sum())
    if n < MIN_LOTS:
        gaps = [f"{c} missing on {int(np.sum(~np.isfinite(values[:, j])))} of {len(table)} lots"
                for j, c in enumerate(cols) if np.any(~np.isfinite(values[:, j]))]
        detail = f" ({'; '.join(gaps)})" if gaps else ""
        return (f"needs at least {MIN_LOTS} lots with every input ({', '.join(stage.inputs)}) and {target}; "
                f"{n} have them{detail}")
    X, y = values[have, :-1], values[have, -1]
    lots = table["lot"].to_numpy(dtype=object)[have]
    labels = lots if groups is None else np.array([groups[str(v)] for v in lots], dtype=object)
    splits, scheme = outer_splits(labels, seed)
    if groups is not None:
        scheme = ("leave-one-group-out" if scheme == "leave-one-lot-out" else scheme) + f" by {group_by}"
    notes: list[str] = []
    unavailable: dict[str, str] = {}
    cands = []
    if not np.ptp(y) > 1e-12 * max(1.0, float(np.max(np.abs(y)))):
        notes.append(f"constant target: every training lot has {target} = {y[0]:.6g}; only the mean is fitted "
                     "and Q² is undefined")
        unavailable = {c: "constant target" for c in names if c != "mean"}
        cands = ["mean"]
    else:
        for c in names:
            why = CANDIDATES[c].not_applicable(list(stage.inputs), X, y)
            if why is None:
                cands.append(c)
            else:
                unavailable[c] = why
    return _Plan(stage=stage.name, target=target, inputs=list(stage.inputs),
                 monotone=dict(stage.monotone.get(target, {})), lots=lots, X=X, y=y, splits=splits,
                 scheme=scheme, candidates=cands, unavailable=unavailable, notes=notes, groups=labels,
                 group_by=group_by)


def _jobs(plans: list[_Plan], seed: int, alpha: float) -> list[_Job]:
    jobs = []
    for i, p in enumerate(plans):
        g = p.lots if p.groups is None else p.groups  # the inner folds group by the same labels
        for f, (tr, te) in enumerate(p.splits):
            jobs.append(_Job(i, f, p.X[tr], p.y[tr], g[tr], p.X[te], p.candidates, p.inputs, p.monotone,
                             seed, alpha))
        jobs.append(_Job(i, None, p.X, p.y, g, None, p.candidates, p.inputs, p.monotone, seed, alpha))
    return jobs


def _run_all(jobs: list[_Job], n_jobs: int, progress, backend: str | None = None, run=None) -> list[dict]:
    """Every job through ``run`` (default :func:`_run_job`), in job order."""
    run = _run_job if run is None else run
    total = len(jobs)
    if progress is not None:
        progress("cross-validating", 0, total)
    results = []
    if n_jobs == 1 and backend is None:
        for done, res in enumerate(map(run, jobs), start=1):
            results.append(res)
            if progress is not None:
                progress("cross-validating", done, total)
        return results
    from joblib import Parallel, delayed, parallel_config
    from threadpoolctl import threadpool_limits

    # Each job limits BLAS to one thread (_run_job), but the limit is process-wide: with threads, one job leaving
    # its limit would restore BLAS threads under another one still running, and the floats would depend on the
    # timing. Held once around every threaded job, the inner limits nest and nothing is restored mid-run.
    threads = backend == "threading"
    with (parallel_config(backend=backend) if backend is not None else contextlib.nullcontext(),
          threadpool_limits(limits=1) if threads else contextlib.nullcontext()):
        stream = Parallel(n_jobs=n_jobs, return_as="generator")(delayed(run)(j) for j in jobs)
        for done, res in enumerate(stream, start=1):  # in job order, whatever the order they finish in
            results.append(res)
            if progress is not None:
                progress("cross-validating", done, total)
    return results


def _check_backend(backend: str | None) -> None:
    """Refuse a joblib backend name that is not registered (the Dask one is
    registered by joblib itself and needs dask.distributed and a client)."""
    if backend is None:
        return
    from joblib.parallel import BACKENDS, EXTERNAL_BACKENDS

    known = sorted(set(BACKENDS) | set(EXTERNAL_BACKENDS))
    if not isinstance(backend, str) or backend not in known:
        raise UsageError(f"unknown parallel backend {backend!r}; joblib knows: {', '.join(known)}")
    if backend == "dask":
        try:
            from distributed import get_client
        except ImportError:
            raise UsageError("the dask backend needs Dask's distributed scheduler: install the 'distributed' "
                             "extra (pip install 'linkage[distributed]')") from None
        try:
            get_client()
        except ValueError:
            raise UsageError("the dask backend needs a running Dask client: create one with "
                             "dask.distributed.Client(<scheduler address>) before training") from None


def _finish_target(plan: _Plan, fold_results: list[dict], full: dict, table: pd.DataFrame, seed: int,
                   nominal: float) -> FittedTarget:
    y, lots = plan.y, [str(v) for v in plan.lots]
    n = len(y)
    usable, unavailable = _usable_candidates(plan, fold_results, full)
    fold_of = np.empty(n, dtype=int)
    for f, (_, te) in enumerate(plan.splits):
        fold_of[te] = f
    floor, floor_method = noise_floor(table[table["lot"].isin(lots)], plan.target)
    oof, results, nested, infinite = _out_of_fold(plan, fold_results, usable, floor)
    notes = list(plan.notes)
    selected, details = select_candidate(results)
    if results[selected]["q2"] is None and not any("Q²" in s for s in notes):
        notes.append("Q² is undefined: the observed values have no variance")
    if infinite[selected]:
        notes.append(f"{infinite[selected]} of {n} nested CV+ intervals were unbounded (too few lots for the "
                     f"{nominal:.0%} level); they count as covering")
    residuals = pd.Series(y - oof[selected].to_numpy(), index=oof.index, name=plan.target)
    interval = _choose_interval(plan, oof[selected].to_numpy(), residuals.to_numpy(), nested[selected], nominal)
    if interval["method"] == "locally weighted CV+":
        notes.append("intervals are locally weighted CV+: " + interval["reason"])
    basis = None
    if interval["method"] == "CV+":
        basis = _procedure_basis(plan, fold_results, usable, full[selected]["model"])
    vip = None
    if "pls" in usable:
        vip = {c: float(v) for c, v in zip(plan.inputs, full["pls"]["model"].vip_)}
    rd = full["rd_baseline"]["model"].params_ if "rd_baseline" in usable else None
    folds = {lot: int(f) for lot, f in zip(lots, fold_of)}
    return FittedTarget(
        target=plan.target, stage=plan.stage, inputs=list(plan.inputs), selected=selected,
        selection_rule=details["rule"], selection={k: v for k, v in details.items() if k != "rule"},
        candidates=results, unavailable=unavailable, noise_floor=floor, noise_floor_method=floor_method,
        n_lots=n, lots=lots,
        cv={"scheme": plan.scheme, "n_splits": len(plan.splits), "seed": seed, "folds": folds,
            "inner": "grouped 5-fold (scikit-learn GroupKFold, fewer folds when fewer lots)",
            "group_by": plan.group_by,
            "n_groups": len(set(map(str, plan.lots if plan.groups is None else plan.groups)))},
        oof=oof, residuals=residuals, nominal_coverage=nominal, coverage=interval["coverage"],
        coverage_method=COVERAGE_METHOD, infinite_intervals=infinite[selected], vip=vip, rd_params=rd,
        hyperparameters={
            "full_data": {name: full[name]["params"] for name in usable},
            "selected_by_fold": [fold_results[f][selected]["params"] for f in range(len(plan.splits))],
        },
        notes=notes,
        model_=full[selected]["model"],
        fold_models_=[fold_results[f][selected]["model"] for f in range(len(plan.splits))],
        fold_of_=fold_of,
        full_models_={name: full[name]["model"] for name in usable},
        coverage_by_region=interval["regions"], coverage_region_variable=interval["variable"],
        coverage_guarantee=cv_plus_guarantee(n, len(plan.splits), nominal),
        interval_choice={k: interval[k] for k in ("method", "rule", "reason", "by_method", "spread_test")},
        spread=interval["spread"],
        interval_basis=basis,
    )


def _usable_candidates(plan: _Plan, fold_results: list[dict], full: dict) -> tuple[list[str], dict[str, str]]:
    """The candidates that fitted in every fold and on all lots, and the others with their first error."""
    unavailable = dict(plan.unavailable)
    usable = []
    for name in plan.candidates:
        errors = [r[name]["error"] for r in fold_results + [full] if "error" in r[name]]
        if errors:
            unavailable[name] = errors[0]
        else:
            usable.append(name)
    return usable, unavailable


def _out_of_fold(plan: _Plan, fold_results: list[dict], usable: list[str], floor):
    """Per usable candidate its out-of-fold predictions (a column of ``oof``), metrics with the nested
    CV+ coverage, the nested coverage of CV+ and locally weighted CV+, and the unbounded intervals."""
    y, lots = plan.y, [str(v) for v in plan.lots]
    n = len(y)
    nested: dict[str, dict[str, np.ndarray]] = {}
    oof = pd.DataFrame({"observed": y}, index=pd.Index(lots, name="lot"))
    results: dict[str, dict] = {}
    infinite: dict[str, int] = {}
    for name in usable:
        pred, low, high = np.empty(n), np.empty(n), np.empty(n)
        for f, (_, te) in enumerate(plan.splits):
            r = fold_results[f][name]
            pred[te], low[te], high[te] = r["pred"], r["low"], r["high"]
        oof[name] = pred
        m = metrics(y, pred)
        m["rmse_over_noise"] = (m["rmse"] / floor) if floor else None
        covered = (low <= y) & (y <= high)
        lw_low, lw_high = np.empty(n), np.empty(n)
        for f, (_, te) in enumerate(plan.splits):
            lw_low[te], lw_high[te] = fold_results[f][name]["lw_low"], fold_results[f][name]["lw_high"]
        nested[name] = {"cv+": covered, "lw": (lw_low <= y) & (y <= lw_high)}
        infinite[name] = int(np.sum(~np.isfinite(low) | ~np.isfinite(high)))
        m["coverage"] = float(np.mean(covered))
        results[name] = m
    return oof, results, nested, infinite


def _procedure_basis(plan: _Plan, fold_results: list[dict], usable: list[str], full_model) -> dict:
    """The fold models, residuals and normaliser of studentized CV+ (see
    :data:`linkage.models.fitted.STUDENTIZED_INTERVAL_METHOD`).

    CV+ (Barber, Candès, Ramdas & Tibshirani 2021, Ann. Statist. 49:486, §3)
    holds for any algorithm that treats its training lots symmetrically,
    when the fold models and residuals are those of that algorithm. The
    algorithm deployed here chooses among the candidates by the one-SE rule
    on the CV errors; the candidate's own out-of-fold residuals, on which it
    was chosen, are optimistic. So in each outer fold the candidate is
    chosen by the same rule on that fold's inner grouped CV (every
    candidate's inner out-of-fold error at its tuned grid point, the
    fold's training lots only), and the fold model and the held-out
    residuals are that candidate's.

    The scores are studentized by ρ(x) = √(1 + c·h(x)), h the delta-method
    leverage of the full-data model where it is link-linear
    (:func:`linkage.models.lean.link_leverage`; c = K/(K − 1), the leverage of
    a model fitted on (K − 1)/K of the lots), 1 otherwise: the shape of the
    classical prediction interval σ̂√(1 + h), which widens where the mean is
    estimated from few lots (normalised nonconformity scores: Papadopoulos,
    Gammerman & Vovk 2008, "Normalized nonconformity measures for regression
    conformal prediction", Proc. IASTED AIA; Lei et al. 2018, JASA 113:1094,
    §5.2)."""
    from linkage.models.candidates import _LinkLinear
    from linkage.models.cv import select_candidate
    from linkage.models.lean import leverage_scale

    n, K = len(plan.y), len(plan.splits)
    pred = np.empty(n)
    chosen, models = [], []
    for f, (_, te) in enumerate(plan.splits):
        sel, _ = select_candidate({c: fold_results[f][c]["inner"] for c in usable})
        chosen.append(sel)
        models.append(fold_results[f][sel]["model"])
        pred[te] = fold_results[f][sel]["pred"]
    leverage, lot_scale = None, np.ones(n)
    if isinstance(full_model, _LinkLinear) and K > 1:
        leverage = full_model.leverage_basis(plan.X, K / (K - 1))
        lot_scale = leverage_scale(plan.X, full_model.lean_spec(), leverage)
    counts = {c: chosen.count(c) for c in dict.fromkeys(chosen)}
    summary = ("candidate chosen inside each outer fold by the one-SE rule on its inner CV ("
               + ", ".join(f"{c} in {k}" for c, k in counts.items()) + f" of {K} folds)"
               + (f"; scores studentized by √(1 + c·h(x)), c = {K / (K - 1):.3g}" if leverage else ""))
    return {"fold_models": models, "fold_candidates": chosen, "residuals": plan.y - pred,
            "leverage": leverage, "lot_scale": lot_scale, "summary": summary}


def _choose_interval(plan: _Plan, oof_sel: np.ndarray, residuals: np.ndarray, covered: dict, nominal: float) -> dict:
    """CV+ or locally weighted CV+ for the selected model, by
    :data:`linkage.models.fitted.INTERVAL_CHOICE_RULE`, with the nested-CV
    coverage of each by region."""
    values, variable = _region_values(plan, oof_sel)
    edges = region_edges(values)
    by = {}
    for key, label in (("cv+", "CV+"), ("lw", "locally weighted CV+")):
        regions = coverage_by_region(covered[key], values, edges)
        by[label] = {"coverage": float(np.mean(covered[key])), "regions": regions,
                     "worst_region_gap": worst_region_gap(regions, nominal)}
    plain, lw = by["CV+"], by["locally weighted CV+"]
    spread = None
    trend = spread_trend_test(oof_sel, residuals)
    closer = lw["worst_region_gap"] < plain["worst_region_gap"] - 1e-12
    use_lw = closer and trend["p_value"] < SPREAD_TEST_LEVEL
    if use_lw:
        try:
            spread = fit_spread(oof_sel, residuals)
        except ValueError:
            use_lw = False
    method = "locally weighted CV+" if use_lw else "CV+"
    test = f"Glejser test of a trend of |residual| with the level: p = {trend['p_value']:.3g}"
    if use_lw:
        reason = (f"under nested CV its worst region misses the nominal {nominal:.0%} by "
                  f"{points_text(lw['worst_region_gap'])} against {points_text(plain['worst_region_gap'])} for CV+, "
                  f"and the spread changes with the level ({test})")
    elif closer:
        reason = (f"CV+ kept: the spread does not change detectably with the level ({test} ≥ "
                  f"{SPREAD_TEST_LEVEL:g}), so a spread model would follow noise (under nested CV the worst region "
                  f"misses the nominal {nominal:.0%} by {points_text(plain['worst_region_gap'])}, locally weighted "
                  f"{points_text(lw['worst_region_gap'])})")
    else:
        reason = (f"CV+ kept: under nested CV the worst region misses the nominal {nominal:.0%} by "
                  f"{points_text(plain['worst_region_gap'])} (locally weighted: "
                  f"{points_text(lw['worst_region_gap'])})")
    return {"method": method, "rule": INTERVAL_CHOICE_RULE, "reason": reason, "by_method": by,
            "spread_test": {"method": "Glejser 1969", **trend, "level": SPREAD_TEST_LEVEL},
            "regions": by[method]["regions"], "coverage": by[method]["coverage"], "variable": variable,
            "spread": spread}


def _training_record(table: pd.DataFrame, chain: ChainSpec, raw: pd.DataFrame, notes: list[str]) -> dict:
    cols = list(dict.fromkeys(chain.root_inputs() + chain.targets()))
    medians, ranges = {}, {}
    for c in cols:
        v = table[c].to_numpy(float)
        v = v[np.isfinite(v)]
        medians[c] = float(np.median(v)) if v.size else None
        ranges[c] = (float(v.min()), float(v.max())) if v.size else None
    rec = {
        "lots": [str(v) for v in table["lot"]],
        "n_lots": int(len(table)),
        "table_sha256": table_sha256(raw),
        "medians": medians,
        "ranges": ranges,
        "notes": notes,
    }
    rec["within_lot"] = _within_lot(raw)
    rec.update(_settings_record(table, chain))
    if "product" in raw.columns:
        rec["products"] = sorted({str(v) for v in raw["product"].dropna()})
    # lots per product, and lots without a product name (linkage.products: a model of several is said to be)
    named = raw["product"].dropna().astype(str) if "product" in raw.columns else pd.Series([], dtype=str)
    rec["product_lots"] = {str(p): int(n) for p, n in sorted(named.value_counts().items())}
    rec["lots_without_product"] = int(len(raw) - len(named))
    rec["compactor_lots"] = _compactor_lots(raw)
    if "manufactured_at" in raw.columns:
        t = pd.to_datetime(raw["manufactured_at"], errors="coerce", utc=True).dropna()
        if len(t):
            rec["manufactured"] = [t.min().isoformat(), t.max().isoformat()]
    return rec


def _compactor_lots(raw: pd.DataFrame) -> dict[str, int]:
    """Training lots per compactor: by the ``compactor`` column where it names one, else by the roll geometry
    the lot gives ("roll 250 mm × 100 mm"); lots that give neither are not counted. {} when no lot does (the
    window then says nothing of compactors, :func:`linkage.decide.window.pooled_compactors`)."""
    names = pd.Series([None] * len(raw), index=raw.index, dtype=object)
    if "compactor" in raw.columns:
        named = raw["compactor"].astype("string").str.strip()
        names = names.mask(named.notna() & (named != ""), named)
    if {"roll_diameter_mm", "roll_width_mm"} <= set(raw.columns):
        d = pd.to_numeric(raw["roll_diameter_mm"], errors="coerce")
        w = pd.to_numeric(raw["roll_width_mm"], errors="coerce")
        geometry = "roll " + d.map("{:g}".format) + " mm × " + w.map("{:g}".format) + " mm"
        names = names.mask(names.isna() & d.notna() & w.notna(), geometry)
    return {str(k): int(n) for k, n in sorted(names.dropna().value_counts().items())}


def _settings_record(table: pd.DataFrame, chain: ChainSpec) -> dict:
    """{"settings": mean, covariance and range of the chain's settings over the training
    lots} for coherent held settings (:mod:`linkage.decide.held`); {} with fewer than 2
    lots that have every setting."""
    from linkage.decide.held import fit_settings

    names = [c for c in chain.root_inputs() if c in table.columns]
    rec = fit_settings(table[names].to_numpy(float), names) if names else None
    if rec is None:
        return {}
    return {"settings": {k: (v if k in ("settings_names", "settings_levels") else np.asarray(v, float).tolist())
                         for k, v in rec.items()}}


def _within_lot(raw: pd.DataFrame) -> dict:
    """Within-lot spread of the training lots (vessel SD, unit weight RSD) for
    unit-level compendial judgement (:func:`linkage.decide.compendial.fit_within_lot`)."""
    from linkage.decide.compendial import fit_within_lot

    cols = ("dissolution_pct", "dissolution_sd_pct", "dissolution_vessels", "weight_rsd_pct", "weight_units")
    return fit_within_lot(**{c: pd.to_numeric(raw[c], errors="coerce").to_numpy(float) if c in raw.columns else None
                             for c in cols}, time_min=raw.attrs.get("dissolution_time_min"))


def _time_point(table: pd.DataFrame, given: float | None) -> float:
    """The dissolution time point of an assembled table: ``given``, else what
    :func:`linkage.assemble.assemble` recorded, else the default; a given one
    that contradicts the recorded one is refused."""
    recorded = table.attrs.get("dissolution_time_min") if hasattr(table, "attrs") else None
    if given is not None and recorded is not None and abs(float(given) - float(recorded)) > 1e-9:
        raise UsageError(f"the table was assembled with dissolution at {float(recorded):g} min; it cannot be "
                         f"trained as dissolution at {float(given):g} min")
    value = given if given is not None else recorded if recorded is not None else DEFAULT_DISSOLUTION_TIME_MIN
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise UsageError(f"dissolution time point must be a positive number of minutes; got {value}")
    return value


def train_chain(table: pd.DataFrame, chain: ChainSpec | None = None, *, seed: int = 0,
                nominal_coverage: float = 0.9, progress: Callable[[str, int, int], None] | None = None,
                n_jobs: int = 1, candidates: list[str] | None = None, backend: str | None = None,
                dissolution_time_min: float | None = None, n_bootstrap: int = DEFAULT_REPLICATES,
                group_by: str | None = None) -> FittedChain:
    """Train every target of the chain on the assembled table.

    Parameters
    ----------
    table : the assembled table, one row per lot (column ``lot`` plus the
        numeric columns the chain names; NaN = missing).
    chain : the stages (default :meth:`ChainSpec.default`).
    seed : seed of the outer fold permutation (and of the boosting
        estimator); the same table, chain and seed give byte-identical
        CV results and predictions.
    nominal_coverage : level of the CV+ intervals whose empirical coverage
        is reported.
    progress : called as ``progress(label, done, total)`` after each fold
        job (and once with ``done = 0`` before the first).
    n_jobs : parallel jobs (joblib); 1 runs in this process (unless a
        ``backend`` is named); -1 uses every worker of the backend.
    candidates : candidate names to try (default all); ``mean`` is always
        included as the floor.
    backend : joblib backend for the fold jobs (one job per outer fold and
        target, with its inner grid fits): ``None`` for joblib's default
        (worker processes), ``"threading"``, or ``"dask"`` to hand them to a
        Dask cluster through the client already created in this process
        (install the ``distributed`` extra). The jobs are seeded and
        independent and come back in order, so every backend gives the same
        chain.
    dissolution_time_min : the time point [min] of the table's
        ``dissolution_pct``, recorded in the model (``training``) so that a
        spec at another time point is refused later
        (:mod:`linkage.timepoint`); default: the one :func:`linkage.assemble.assemble`
        wrote in ``table.attrs``, else 30 min.
    n_bootstrap : lot-level bootstrap replicates of the selected models
        (:mod:`linkage.models.bootstrap`), from which every probability of
        passing gets its lower bound; 0 stores none (no bound).
    group_by : a column of the table (a raw-material batch, a campaign) or
        ``month`` (of ``manufactured_at``): lots sharing its value stay on
        one side of every outer and inner fold, so the CV errors and the CV+
        intervals are those of a new group (:mod:`linkage.models.grouping`);
        default: each lot its own group. Recorded in ``training`` and each
        target's ``cv``. Where the table has ``manufactured_at``, each target
        also gets the forward-in-time check (:mod:`linkage.models.forward`).

    Raises
    ------
    InputError
        The table breaks a rule (duplicate or empty lot, a value that is not a
        number); every problem at once.
    InsufficientDataError
        No target has enough lots (every reason listed).
    """
    chain, nominal = _checked_arguments(chain, nominal_coverage, n_bootstrap, n_jobs, backend)
    names = _candidate_names(candidates)
    created_at = datetime.now(timezone.utc).isoformat(timespec="microseconds")
    time_min = _time_point(table, dissolution_time_min)
    data, notes = _prepare(table, chain)
    groups = lot_groups(table, group_by)
    group_by = "lot" if groups is None else group_by

    plans, skipped = _plan_targets(data, chain, names, seed, groups, group_by)
    fitted = _fit_targets(plans, data, table, seed, nominal, n_jobs, progress, backend)
    out = FittedChain(
        chain=chain, stages=_fitted_stages(chain, data, fitted, skipped), targets=fitted, skipped=skipped,
        training={**_training_record(data, chain, table, notes), "dissolution_time_min": time_min,
                  "group_by": group_by, **({"groups": groups} if groups is not None else {})},
        library_versions=_library_versions(),
        seed=int(seed), nominal_coverage=nominal, created_at=created_at,
    )
    out.bootstrap = bootstrap_chain(out, data, n_replicates=n_bootstrap, seed=seed)
    return out


def _checked_arguments(chain: ChainSpec | None, nominal_coverage: float, n_bootstrap, n_jobs,
                       backend: str | None) -> tuple[ChainSpec, float]:
    """The chain (default :meth:`ChainSpec.default`) and the nominal coverage as a number, once
    :func:`train_chain`'s arguments have passed their checks (each refusal names the argument)."""
    chain = chain if chain is not None else ChainSpec.default()
    if not isinstance(chain, ChainSpec):
        raise TypeError("chain must be a ChainSpec")
    nominal = float(nominal_coverage)
    if not 0 < nominal < 1:
        raise UsageError(f"nominal coverage must lie strictly between 0 and 1; got {nominal_coverage}")
    if isinstance(n_bootstrap, bool) or not isinstance(n_bootstrap, (int, np.integer)) or n_bootstrap < 0:
        raise UsageError(f"n_bootstrap must be a whole number of replicates, 0 or more; got {n_bootstrap!r}")
    if not isinstance(n_jobs, int) or n_jobs == 0:
        raise UsageError(f"n_jobs must be a non-zero integer; got {n_jobs}")
    _check_backend(backend)
    return chain, nominal


def _plan_targets(data: pd.DataFrame, chain: ChainSpec, names: list[str], seed: int, groups,
                  group_by: str) -> tuple[list[_Plan], dict[str, str]]:
    """The plan of every target that has enough lots, in chain order, and why each other one is skipped;
    refused (every reason listed) when no target can be trained."""
    plans: list[_Plan] = []
    skipped: dict[str, str] = {}
    for st in chain.stages:
        for target in st.targets:
            p = _plan_target(data, st, target, names, seed, groups, group_by)
            if isinstance(p, str):
                skipped[target] = p
            else:
                plans.append(p)
    if not plans:
        raise InsufficientDataError(
            "no attribute can be trained:\n" + "\n".join(f"  - {t}: {why}" for t, why in skipped.items()))
    return plans, skipped


def _fit_targets(plans: list[_Plan], data: pd.DataFrame, table: pd.DataFrame, seed: int, nominal: float,
                 n_jobs: int, progress, backend: str | None) -> dict[str, FittedTarget]:
    """Run every plan's fold jobs and full fit, finish each target from them and add its
    forward-in-time check; by target, in plan order."""
    alpha = 1 - nominal
    jobs = _jobs(plans, seed, alpha)
    results = _run_all(jobs, n_jobs, progress, backend)
    folds: dict[int, list] = {i: [] for i in range(len(plans))}
    full: dict[int, dict] = {}
    for job, res in zip(jobs, results):
        if job.fold is None:
            full[job.plan] = res
        else:
            folds[job.plan].append(res)
    fitted = {p.target: _finish_target(p, folds[i], full[i], data, seed, nominal) for i, p in enumerate(plans)}
    times = lot_times(table)
    for p in plans:
        t = fitted[p.target]
        t.forward = forward_check(p, t.selected, t.candidates[t.selected]["rmse"], times, seed=seed, alpha=alpha,
                                  min_train=MIN_LOTS)
    return fitted


def _fitted_stages(chain: ChainSpec, data: pd.DataFrame, fitted: dict[str, FittedTarget],
                   skipped: dict[str, str]) -> list[FittedStage]:
    """Each stage of the chain with its fitted and skipped targets and, where it has a fitted target, the
    applicability domain of its inputs (fitted on the lots with every input)."""
    stages = []
    for st in chain.stages:
        targets = {t: fitted[t] for t in st.targets if t in fitted}
        domain = None
        if targets:
            X = data[list(st.inputs)]
            have = np.all(np.isfinite(X.to_numpy(float)), axis=1)
            Y = data.loc[have, list(targets)].to_numpy(float)
            domain = DomainModel.fit(X[have].reset_index(drop=True), y=Y, alpha=DOMAIN_ALPHA)
        stages.append(FittedStage(name=st.name, inputs=list(st.inputs), targets=targets, domain=domain,
                                  skipped={t: skipped[t] for t in st.targets if t in skipped}))
    return stages
