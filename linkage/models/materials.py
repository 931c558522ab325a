"""Material attributes as inputs, kept only where grouped CV says they help
(issue 19 item 4; on by default in ``train``, ``--no-materials`` to opt out).

The process table may carry extra numeric columns the template does not
name: raw-material attributes such as blend moisture or the drug
substance's particle size. They are stored but no stage uses them unless a
chain file names them, or this comparison keeps them.

**Where they are tried** (:data:`WHERE`): every attribute of every stage. A
property of the blend goes through the whole process, so each can plausibly
act on compaction (moisture plasticises the powder), on milling (a
harder or wetter ribbon breaks differently) and on tableting and release
(the drug substance's particle size, the lubricant); which ones do is left
to the data.

**How it stays cheap.** The chain is fitted once without them, as usual.
Then, per attribute and per column, at most two candidates are refitted
with the column added to the stage's inputs, inside the *same* outer folds
(the lots' fold numbers of the fit without), tuned by the same inner grouped
CV: the attribute's selected candidate where it takes inputs (not ``mean``
or the fixed-input physics forms), and ``linear_select``, whose inner
best-subset selection lets the column in only where it helps (the selected
candidate alone can miss a column: on a campaign where blend moisture moved
ribbon porosity, ``log_linear`` had been selected without it and gained
little from it, while ``linear_select`` with it cut the CV RMSE by a third).
So each lot has an out-of-fold error without the column and one with it,
from the same splits, and the comparison is paired (:data:`RULE`). A column
missing on some lots is compared on the lots that have it, and there the
errors without it come from the same candidates refitted without it on those
lots and folds, not from the chain (trained on every lot): the pair must
differ by the column alone (:data:`PARTIAL`). Only when some
attribute keeps a column is the chain fitted again, with the kept columns as
inputs of the attributes that keep them (:func:`with_columns_by_target`);
otherwise the fit without is the model, its bootstrap drawn once after the
comparison (the CV results, fitted models and replicates ``train`` gives
without the comparison).
The comparison is recorded in the model (``training.materials``) and shown
by ``train``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from linkage.models.chain import ChainSpec, StageSpec
from linkage.schema import ASSEMBLED, TABLES

__all__ = ["RULE", "WHERE", "ALPHA", "PARTIAL", "extra_columns", "missing_lots", "with_columns",
           "with_columns_by_target", "paired_test", "compare_columns", "train_with_materials"]

#: family-wise level of the paired test, per attribute (over the columns tried for it)
ALPHA = 0.05

WHERE = ("every attribute of every stage: a raw-material property of the blend goes through the whole process and "
         "can act on compaction, milling, tableting and release; which ones it acts on is left to the data")

RULE = ("each column is tried alone for each attribute: the attribute's selected candidate (where it takes inputs; "
        "not mean or the fixed-input physics forms) and linear_select (least squares on inputs selected by inner "
        "CV) are refitted with the column added to the stage's inputs, in the same outer grouped folds, and the "
        "lots' out-of-fold squared errors with and without it are compared pair by pair. A refit keeps the column "
        "for the attribute when the one-sided paired t-test on the differences of squared errors (the "
        "Diebold–Mariano test with the small-sample correction of Harvey, Leybourne & Newbold 1997, Int. J. "
        "Forecasting 13:281, which for one-step errors is the paired t-test with n − 1 degrees of freedom; "
        "Diebold & Mariano 1995, J. Bus. Econ. Stat. 13:253) rejects 'no better' at level "
        f"{ALPHA:g} divided by the number of refits tried for the attribute (Bonferroni), both against the "
        "selected model without the column and against the same candidate without it. Caveat: out-of-fold errors "
        "share training lots, so they are not independent and the variance of their mean has no unbiased "
        "estimate (Bengio & Grandvalet 2004, J. Mach. Learn. Res. 5:1089); the test is approximate. The chain is "
        "then refitted with each attribute's kept columns as inputs; attributes of a stage that keep other "
        "columns than the rest get a stage of their own, '<stage>_materials' (then '_2', ...), right after it")


PARTIAL = ("a column missing on some of an attribute's lots is compared on the lots that have it only: the "
           "candidates are refitted both with and without it on those lots, in the chain's outer folds restricted "
           "to them, so both errors of each lot come from the same training lots and the paired test measures the "
           "column, not the leaving out of the other lots. A kept column is an input of the attribute's stage: "
           "the lots without it are left out of that attribute's final fit (named in its notes); they stay in "
           "the fits of the other attributes")

#: relative size (to the mean squared error without) below which a difference of squared errors is round-off:
#: a refit whose inner selection leaves the column out differs by about 1e-9 of it (the numerical ridge of the
#: link fits scales with the number of inputs); no real effect is that small
ROUNDING = 1e-6

#: candidates that use fixed inputs (or none): the comparison refits linear_select for them
_FIXED_INPUTS = ("mean", "rd_baseline", "johanson_baseline")
_STAND_IN = "linear_select"


def extra_columns(table: pd.DataFrame, chain: ChainSpec) -> list[str]:
    """Numeric columns of the process table that neither the template nor
    the chain names and that vary between lots, in table order (from what
    :func:`linkage.assemble.assemble` records in ``table.attrs``; for a table
    without it, every column no template table or assembled column names)."""
    known = set(ASSEMBLED) | {c for t in TABLES.values() for c in t.names}
    known |= set(chain.root_inputs()) | set(chain.targets())
    recorded = table.attrs.get("process_extra_columns") if hasattr(table, "attrs") else None
    out = []
    for c in table.columns:
        if (c in known or (recorded is not None and c not in recorded) or not pd.api.types.is_numeric_dtype(table[c])
                or pd.api.types.is_bool_dtype(table[c])):
            continue
        v = pd.to_numeric(table[c], errors="coerce").to_numpy(float)
        v = v[np.isfinite(v)]
        if v.size >= 3 and np.ptp(v) > 0:
            out.append(str(c))
    return out


def with_columns(chain: ChainSpec, columns: list[str], stages: list[str] | None = None) -> ChainSpec:
    """The chain with ``columns`` added to the inputs of ``stages`` (default: every stage)."""
    out = []
    for st in chain.stages:
        extra = [c for c in columns if c not in st.inputs] if stages is None or st.name in stages else []
        out.append(StageSpec(st.name, list(st.inputs) + extra, list(st.targets),
                             {t: dict(d) for t, d in st.monotone.items()}))
    return ChainSpec(out, source=chain.source)


def with_columns_by_target(chain: ChainSpec, kept: dict[str, list[str]]) -> ChainSpec:
    """The chain in which each attribute of ``kept`` also takes its columns
    as inputs. A stage whose every attribute takes the same columns gains
    them; otherwise the attributes that take none stay in the stage, and each
    other set of columns gets a stage of its own right after it,
    ``<stage>_materials`` (then ``<stage>_materials_2``, ...), with the
    stage's inputs and those columns."""
    out = []
    for st in chain.stages:
        mono = {t: dict(d) for t, d in st.monotone.items()}
        sets: dict[tuple[str, ...], list[str]] = {}
        for t in st.targets:
            extra = tuple(c for c in kept.get(t, []) if c not in st.inputs)
            sets.setdefault(extra, []).append(t)
        order = sorted(sets, key=lambda k: (k != (), list(sets).index(k)))  # the stage's own inputs first
        for i, extra in enumerate(order):
            targets = sets[extra]
            name = st.name if i == 0 else f"{st.name}_materials" + (f"_{i}" if i > 1 else "")
            out.append(StageSpec(name, list(st.inputs) + list(extra), targets,
                                 {t: mono[t] for t in targets if t in mono}))
    return ChainSpec(out, source=chain.source)


def paired_test(sq_without, sq_with) -> dict:
    """One-sided paired test that the squared errors with the column are
    smaller on average than without: d = e²(without) − e²(with) per lot,
    t = mean(d) / (sd(d)/√n) with sd of n − 1 degrees of freedom, p =
    P(T > t) for T ~ t(n − 1) (:data:`RULE`; scipy.stats.ttest_rel with
    ``alternative="greater"`` gives the same; ``t`` is None where every
    difference is the same non-zero number). Differences within
    :data:`ROUNDING` of the mean squared error without are round-off (a
    refit that leaves the column out gives the same model up to the last
    digits) and count as 0; ``p`` is 1 where every difference is 0."""
    from scipy import stats

    a, b = np.asarray(sq_without, float), np.asarray(sq_with, float)
    d = a - b
    d[np.abs(d) <= ROUNDING * max(float(np.mean(a)) if a.size else 0.0, np.finfo(float).tiny)] = 0.0
    n = int(d.size)
    mean = float(np.mean(d)) if n else 0.0
    sd = float(np.std(d, ddof=1)) if n > 1 else 0.0
    if n < 2 or (sd == 0.0 and mean == 0.0):
        t, p = 0.0, 1.0
    elif sd == 0.0:  # every lot's difference the same, not 0: no spread to scale by (JSON has no infinity)
        t, p = None, (0.0 if mean > 0 else 1.0)
    else:
        t = mean / (sd / math.sqrt(n))
        p = float(stats.t.sf(t, n - 1))
    return {"n": n, "mean_difference": mean, "se": sd / math.sqrt(n) if n else None, "t": t, "p": p}


def _final_record(row: dict, t, before) -> dict:
    """What the chain refitted with an attribute's kept columns gives for it (``final``), and the lots it
    leaves out: a kept column is an input of the attribute's stage, so a lot without it cannot be fitted
    there (its other attributes and stages keep it). The lots left out are named in ``final`` and in the
    attribute's notes, not passed over."""
    out = {"selected": t.selected, "rmse": float(t.candidates[t.selected]["rmse"]),
           "rmse_se": float(t.candidates[t.selected]["rmse_se"]), "stage": t.stage, "inputs": list(t.inputs),
           "n_lots": int(t.n_lots)}
    now = {str(v) for v in t.lots}
    left = [str(v) for v in before.lots if str(v) not in now]
    if left:
        out["lots_left_out"] = left
        needed = [c for c in row["kept_columns"] if c in t.inputs]
        lack = (f"they lack {needed[0]}, now an input of it" if len(needed) == 1 else
                f"each lacks one or more of {', '.join(needed)}, now inputs of it")  # a review: not every one
        out["note"] = (f"fitted on {t.n_lots} of the {before.n_lots} lots: {', '.join(left)} left out of stage "
                       f"{t.stage} because {lack}; kept by the paired comparison on the lots that have it")
        t.notes.append(out["note"])
    return out


def missing_lots(data: pd.DataFrame, columns: list[str]) -> dict[str, list[str]]:
    """Per column missing on some lots of ``data``, those lots (columns every lot has are not listed)."""
    out = {}
    for c in columns:
        gap = ~np.isfinite(pd.to_numeric(data[c], errors="coerce").to_numpy(float))
        if gap.any():
            out[c] = [str(v) for v in data["lot"].to_numpy(dtype=object)[gap]]
    return out


def _rmse(e) -> float:
    return float(np.sqrt(np.mean(np.square(e))))


def compare_columns(fitted, data: pd.DataFrame, columns: list[str], *, seed: int = 0, nominal_coverage: float = 0.9,
                    n_jobs: int = 1, backend: str | None = None, progress=None) -> dict:
    """The paired comparison of :data:`RULE` for every attribute of the chain
    ``fitted`` without the columns. ``data``: the prepared training table
    with the columns. Returns the record stored as ``training.materials``
    (``columns``, ``where``, ``rule``, ``alpha``, ``targets``, ``kept_for``,
    ``kept``, ``refits``)."""
    from linkage.models.train import _run_all

    rows, jobs, work, references = _planned_refits(fitted, data, columns, seed, nominal_coverage)
    results = _run_all(jobs, n_jobs, progress, backend, run=_refit) if jobs else []
    _judge_refits(fitted, rows, jobs, results, work, references)
    kept = _best_columns(rows, columns)
    return {"columns": list(columns), "where": WHERE, "rule": RULE, "alpha": ALPHA, "targets": rows,
            "kept_for": list(kept), "kept": kept, "refits": len(jobs), "missing_on": missing_lots(data, columns),
            "partial": PARTIAL}


def _planned_refits(fitted, data: pd.DataFrame, columns: list[str], seed: int, nominal_coverage: float):
    """Per attribute its record (the chain without the columns), and the refits to run: one job per
    (attribute, column, candidate, outer fold) on the lots that have the column, and, where some of the
    attribute's lots lack the column, the reference refits without it on the same lots and folds
    (:func:`_reference_refits`). Returns (records, jobs, work, references); ``work`` holds (target, column,
    candidate, lots with the column, test rows per fold, reference key or None)."""
    from linkage.models.train import _Job

    groups = fitted.training.get("groups")
    monotone = {t: dict(st.monotone.get(t, {})) for st in fitted.chain.stages for t in st.targets}
    by_lot = data.set_index("lot")
    jobs: list[_Job] = []
    work = []  # (target, column, candidate, lots with the column, test rows per fold, reference key)
    references: dict[tuple, dict] = {}  # (target, lots with the column) -> the refits without it on those lots
    rows: dict[str, dict] = {}
    for name, t in fitted.targets.items():
        sel = t.selected
        r0 = t.candidates[sel]
        row = {"stage": t.stage, "kept": False, "kept_columns": [],
               "without": {"selected": sel, "rmse": float(r0["rmse"]), "rmse_se": float(r0["rmse_se"]),
                           "n_lots": int(t.n_lots)},
               "with": None, "columns": {}}
        rows[name] = row
        lots = np.array([str(v) for v in t.lots], dtype=object)
        y = t.oof["observed"].to_numpy(float)
        fold = np.array([int(t.cv["folds"][lot]) for lot in lots])
        base = by_lot.loc[lots, t.inputs].to_numpy(float)
        for c in columns:
            if c in t.inputs:
                row["columns"][c] = {"kept": False, "reason": "already an input of the stage"}
                continue
            rec = row["columns"][c] = {"kept": False, "by_candidate": {}}
            x = by_lot.loc[lots, c].to_numpy(float)
            have = np.isfinite(x)
            X = np.column_stack([base, x])[have]
            yy, ll, ff = y[have], lots[have], fold[have]
            g = ll if groups is None else np.array([groups[v] for v in ll], dtype=object)
            folds = sorted(set(ff.tolist()))
            tests = [np.flatnonzero(ff == f) for f in folds]
            cands = [cand for cand in _with_candidates(sel)
                     if not _skipped(rec, _cannot_pair(t, cand, list(t.inputs) + [c], X, yy), cand)]
            key = None
            if not have.all():
                rec.update(_partial_record(c, lots, have))
                key = (name, have.tobytes())
                if cands and key not in references:
                    references[key] = {"plan": ("without", len(references)), "tests": tests}
                    _reference_refits(references[key], t, base[have], yy, g, ff, folds, monotone[name], seed,
                                      1 - nominal_coverage, jobs)
            for cand in cands:
                for f, te in zip(folds, tests):
                    tr = np.flatnonzero(ff != f)
                    jobs.append(_Job(("with", len(work)), f, X[tr], yy[tr], g[tr], X[te], [cand],
                                     list(t.inputs) + [c], monotone[name], seed, 1 - nominal_coverage))
                work.append((name, c, cand, have, tests, key))
    return rows, jobs, work, references


def _skipped(rec: dict, why: str | None, cand: str) -> bool:
    """Record why ``cand`` cannot be compared (and say True), or say False."""
    if why is not None:
        rec["by_candidate"][cand] = {"reason": why}
    return why is not None


def _partial_record(column: str, lots: np.ndarray, have: np.ndarray) -> dict:
    """What the record of a column missing on some of the attribute's lots says: on how many lots it was
    compared, which lots lack it, and what becomes of them."""
    missing = [str(v) for v in lots[~have]]
    n, k = int(len(lots)), int(have.sum())
    return {"n_lots_compared": k, "n_lots_attribute": n, "lots_without_column": missing,
            "partial_note": (f"{column} is missing on {len(missing)} of the attribute's {n} lots "
                             f"({', '.join(missing)}): compared on the {k} lots that have it, the attribute "
                             "refitted without the column on the same lots and outer folds (a paired comparison "
                             "of the same lots); if kept, the attribute is fitted on those lots only")}


def _reference_refits(ref: dict, t, X: np.ndarray, y: np.ndarray, g: np.ndarray, ff: np.ndarray,
                      folds: list[int], monotone: dict, seed: int, alpha: float, jobs: list) -> None:
    """The refits *without* the column that a column missing on some lots is paired with: the attribute's
    selected candidate and the candidates that may be refitted with the column (those the chain fitted
    without it, whatever the column: two columns missing on the same lots share them), on the lots that have
    it, in the same outer folds restricted to them, by the same tuning (:func:`_refit`). Without them the
    errors with the column (trained on those lots) would be paired with the chain's (trained on every lot),
    and the test would measure the effect of leaving the other lots out, not of the column."""
    from linkage.models.train import _Job

    need = list(dict.fromkeys([t.selected] + [c for c in _with_candidates(t.selected) if c in t.oof.columns]))
    for f in folds:
        tr, te = np.flatnonzero(ff != f), np.flatnonzero(ff == f)
        jobs.append(_Job(ref["plan"], f, X[tr], y[tr], g[tr], X[te], need, list(t.inputs), monotone, seed, alpha))


def _errors_without(t, cand: str, have: np.ndarray, key, references: dict, by_plan: dict):
    """The out-of-fold errors without the column of ``cand`` on the lots of ``have``: the chain's where every
    lot has the column, else the reference refit's on the same lots and folds. Returns (errors, None) or
    (None, why)."""
    y = t.oof["observed"].to_numpy(float)[have]
    if key is None:
        return t.oof[cand].to_numpy(float)[have] - y, None
    ref = references[key]
    pred, failed = _out_of_fold(by_plan[ref["plan"]], cand, ref["tests"], len(y))
    if failed is not None:
        return None, f"{cand} without the column failed on the lots that have it: {failed}"
    return pred - y, None


def _out_of_fold(results: list, cand: str, tests: list, n: int):
    """``cand``'s out-of-fold predictions from its per-fold ``results`` (test rows per fold ``tests``, ``n``
    lots): (predictions, None), or (None, the first fold's error)."""
    res = [r[cand] for r in results]
    failed = next((r["error"] for r in res if "error" in r), None)
    if failed is not None:
        return None, failed
    pred = np.empty(n)
    for te, r in zip(tests, res):
        pred[te] = r["pred"]
    return pred, None


def _judge_refits(fitted, rows: dict, jobs: list, results: list, work: list, references: dict | None = None) -> None:
    """Each (attribute, column, candidate) refit's out-of-fold errors against those without the column on the
    same lots (the chain's, or the reference refit's where some lots lack the column), by the paired tests of
    :data:`RULE` (Bonferroni over the attribute's pairs); written into ``rows``."""
    from linkage.models.cv import metrics

    references = references or {}
    by_plan: dict = {}
    for job, res in zip(jobs, results):
        by_plan.setdefault(job.plan, []).append(res)
    for i, (name, c, cand, have, tests, key) in enumerate(work):
        t, rec = fitted.targets[name], rows[name]["columns"][c]
        y = t.oof["observed"].to_numpy(float)[have]
        pred, failed = _out_of_fold(by_plan[("with", i)], cand, tests, len(y))
        if failed is not None:
            rec["by_candidate"][cand] = {"reason": f"{cand} with {c} failed: {failed}"}
            continue
        e_sel, why = _errors_without(t, t.selected, have, key, references, by_plan)
        e_c, why_c = (None, None) if cand == t.selected else _errors_without(t, cand, have, key, references, by_plan)
        if why or why_c:
            rec["by_candidate"][cand] = {"reason": why or why_c}
            continue
        level = ALPHA / sum(1 for w in work if w[0] == name)  # Bonferroni over the (column, candidate) pairs
        e_with = pred - y
        m = metrics(y, pred)
        one = {"n_lots": int(len(y)), "rmse_with": m["rmse"], "rmse_se_with": float(m["rmse_se"]),
               "rmse_without": _rmse(e_sel), "level": level, "vs_selected": paired_test(e_sel**2, e_with**2),
               "without_from": "the chain's out-of-fold errors" if key is None else
               "refitted without the column on the same lots and outer folds"}
        tests_ = [one["vs_selected"]]
        if e_c is not None:
            one["vs_candidate_without"] = {**paired_test(e_c**2, e_with**2), "rmse_without": _rmse(e_c)}
            tests_.append(one["vs_candidate_without"])
        one["kept"] = all(v["mean_difference"] > 0 and v["p"] < level for v in tests_)
        rec["by_candidate"][cand] = one


def _best_columns(rows: dict, columns: list[str]) -> dict[str, list[str]]:
    """Per column its best candidate (a kept one first), per attribute its best column and the columns
    kept (written into ``rows``); returns attribute -> kept columns."""
    kept: dict[str, list[str]] = {}
    for name, row in rows.items():
        best_of = {}
        for c, rec in row["columns"].items():
            tried = {k: v for k, v in rec.get("by_candidate", {}).items() if "rmse_with" in v}
            if not tried:
                if "reason" not in rec:
                    rec["reason"] = "; ".join(f"{k}: {v['reason']}" for k, v in rec["by_candidate"].items())
                continue
            passing = [k for k in tried if tried[k]["kept"]]
            best = min(passing or tried, key=lambda k: tried[k]["rmse_with"])
            b = tried[best]
            rec.update(candidate=best, n_lots=b["n_lots"], rmse_with=b["rmse_with"], rmse_se_with=b["rmse_se_with"],
                       rmse_without=b["rmse_without"], p=b["vs_selected"]["p"], kept=bool(passing), level=b["level"])
            same = b.get("vs_candidate_without")  # the second test: the same candidate without the column
            if same is not None:
                rec.update(rmse_same_candidate_without=same["rmse_without"], p_same_candidate=same["p"])
            best_of[c] = rec
        if best_of:
            c = min(best_of, key=lambda k: best_of[k]["rmse_with"])
            b = best_of[c]
            row["with"] = {"selected": b["candidate"], "rmse": b["rmse_with"], "rmse_se": b["rmse_se_with"],
                           "n_lots": b["n_lots"], "column": c}
        row["kept_columns"] = [c for c in columns if row["columns"].get(c, {}).get("kept")]
        row["kept"] = bool(row["kept_columns"])
        if row["kept"]:
            kept[name] = row["kept_columns"]
    return kept


def _refit(job) -> dict:
    """One outer fold of one refit: the candidate tuned by the inner grouped
    CV of :func:`linkage.models.train._run_job`, fitted on the fold's
    training lots and its predictions for the held-out lots (no intervals:
    the comparison needs the errors only)."""
    from threadpoolctl import threadpool_limits

    from linkage.exceptions import InsufficientDataError
    from linkage.models.candidates import CANDIDATES, CandidateError, tune
    from linkage.models.cv import inner_splits

    out = {}
    with threadpool_limits(limits=1):
        for name in job.candidates:
            spec = CANDIDATES[name]
            try:
                tr = tune(spec, job.X_train, job.y_train, job.lots_train, inputs=job.inputs, monotone=job.monotone,
                          seed=job.seed, splits=inner_splits(job.lots_train))
                est = spec.build(tr.params, job.inputs, n=len(job.y_train), monotone=job.monotone,
                                 seed=job.seed).fit(job.X_train, job.y_train)
                pred = np.asarray(est.predict(job.X_test), float)
                if not np.all(np.isfinite(pred)):
                    raise CandidateError("non-finite out-of-fold prediction")
                out[name] = {"pred": pred, "params": tr.params}
            except (CandidateError, InsufficientDataError, np.linalg.LinAlgError) as exc:
                out[name] = {"error": f"{exc} (in outer fold {job.fold + 1})"}
    return out


def _with_candidates(selected: str) -> list[str]:
    """The candidates refitted with a column: the selected one where it takes
    any inputs, and :data:`_STAND_IN` (the input-selecting least squares)."""
    return ([] if selected in _FIXED_INPUTS else [selected]) + ([_STAND_IN] if selected != _STAND_IN else [])


def _cannot_pair(t, cand: str, inputs: list[str], X: np.ndarray, y: np.ndarray) -> str | None:
    """Why ``cand`` cannot be compared with and without the column (None when it can)."""
    from linkage.models.candidates import CANDIDATES

    if cand != t.selected and cand not in t.oof.columns:
        return (f"{cand} was not fitted without the column ({t.unavailable.get(cand, 'not tried')}), so there is "
                "nothing to pair with")
    if not len(y):
        return "no lot has the column"
    return CANDIDATES[cand].not_applicable(inputs, X, y)


def train_with_materials(table: pd.DataFrame, chain: ChainSpec | None = None, **kwargs):
    """:func:`linkage.models.train.train_chain` with the comparison of the
    module docstring; ``kwargs`` go to ``train_chain``. The returned chain's
    ``training["materials"]`` holds the comparison (``columns`` empty, with
    ``reason``, when the table has none)."""
    from linkage.models.bootstrap import DEFAULT_REPLICATES, bootstrap_chain
    from linkage.models.train import _prepare, train_chain

    chain = chain if chain is not None else ChainSpec.default()
    columns = extra_columns(table, chain)
    if not columns:
        fitted = train_chain(table, chain, **kwargs)
        fitted.training["materials"] = {"columns": [], "reason": "the table has no extra numeric column",
                                        "where": WHERE, "rule": RULE}
        return fitted
    n_bootstrap = kwargs.pop("n_bootstrap", DEFAULT_REPLICATES)
    without = train_chain(table, chain, n_bootstrap=0, **kwargs)
    data, _ = _prepare(table, with_columns(chain, columns))
    comparison = compare_columns(
        without, data, columns, seed=kwargs.get("seed", 0), nominal_coverage=kwargs.get("nominal_coverage", 0.9),
        n_jobs=kwargs.get("n_jobs", 1), backend=kwargs.get("backend"), progress=kwargs.get("progress"))
    if comparison["kept"]:
        fitted = train_chain(table, with_columns_by_target(chain, comparison["kept"]), n_bootstrap=n_bootstrap,
                             **kwargs)
        for name, row in comparison["targets"].items():
            t = fitted.targets.get(name)
            if row["kept"] and t is not None:
                row["final"] = _final_record(row, t, without.targets[name])
    else:
        fitted = without
        base, _ = _prepare(table, chain)
        fitted.bootstrap = bootstrap_chain(fitted, base, n_replicates=n_bootstrap, seed=kwargs.get("seed", 0))
    fitted.training["materials"] = comparison
    return fitted
