"""The forward-in-time check (issue 19 item 3): fit on the earlier lots,
score the later ones, beside the grouped cross-validation.

Cross-validation, even grouped, mixes past and future: every fold model has
seen lots made after the ones it predicts. A model in service only ever
predicts lots made after its training lots. Where the lots carry
``manufactured_at``, each attribute's selected candidate is tuned (inner
grouped CV) and fitted on the first :data:`TRAIN_FRACTION` of its lots in
time order and scores the rest: RMSE, bias and the coverage of CV+
intervals at the nominal level built from the earlier lots alone (Barber
et al. 2021). An RMSE well above the CV RMSE says the process drifts, or
that the grouped folds are still optimistic.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["TRAIN_FRACTION", "MIN_TEST_LOTS", "METHOD", "lot_times", "forward_check"]

#: share of the lots (earliest first) the forward model is fitted on (common practice, no source)
TRAIN_FRACTION = 2 / 3
#: fewest later lots worth scoring
MIN_TEST_LOTS = 3

METHOD = ("the selected candidate tuned by inner grouped CV and fitted on the earliest two thirds of the lots "
          "(by manufactured_at), scored on the later third; intervals are CV+ from the earlier lots' inner "
          "folds at the nominal level")


def lot_times(table: pd.DataFrame) -> dict[str, pd.Timestamp] | None:
    """Lot -> manufactured_at (UTC) for the lots that have one; None without the column."""
    if "manufactured_at" not in table.columns:
        return None
    t = pd.to_datetime(table["manufactured_at"], errors="coerce", utc=True)
    return {str(lot).strip(): v for lot, v in zip(table["lot"], t) if pd.notna(v)}


def forward_check(plan, selected: str, cv_rmse: float, times: dict | None, *, seed: int, alpha: float,
                  min_train: int) -> dict | None:
    """The check for one attribute's plan (see :mod:`linkage.models.train`),
    or None without times; a dict with ``reason`` when too few lots."""
    from linkage.models.cv import metrics
    from linkage.models.train import _Job, _run_job

    if times is None:
        return None
    lots = np.array([str(v) for v in plan.lots], dtype=object)
    dated = np.array([lot in times for lot in lots])
    if dated.sum() < min_train + MIN_TEST_LOTS:
        return {"reason": f"{int(dated.sum())} lots have manufactured_at; the forward check needs at least "
                          f"{min_train + MIN_TEST_LOTS}"}
    idx = np.flatnonzero(dated)
    order = idx[np.argsort([times[lots[i]] for i in idx], kind="stable")]
    n_train = max(min_train, int(np.floor(TRAIN_FRACTION * len(order))))
    early, late = order[:n_train], order[n_train:]
    groups = plan.lots if plan.groups is None else plan.groups
    if len(set(map(str, groups[early]))) < 2:
        return {"reason": f"the earlier lots fall in one {plan.group_by}; nothing to cross-validate"}
    job = _Job(plan=0, fold=-1, X_train=plan.X[early], y_train=plan.y[early], lots_train=groups[early],
               X_test=plan.X[late], candidates=[selected], inputs=plan.inputs, monotone=plan.monotone, seed=seed,
               alpha=alpha)
    res = _run_job(job)[selected]
    if "error" in res:
        return {"reason": f"the forward fit failed: {res['error']}"}
    y = plan.y[late]
    m = metrics(y, res["pred"])
    covered = (res["low"] <= y) & (y <= res["high"])
    return {
        "method": METHOD, "model": selected, "n_train": int(len(early)), "n_test": int(len(late)),
        "train_until": times[lots[early[-1]]].isoformat(), "test_from": times[lots[late[0]]].isoformat(),
        "rmse": m["rmse"], "bias": m["bias"], "q2": m["q2"], "coverage": float(np.mean(covered)),
        "nominal_coverage": 1 - alpha, "cv_rmse": float(cv_rmse),
        "rmse_over_cv": (m["rmse"] / cv_rmse) if cv_rmse > 0 else None,
    }
