"""What lots are grouped by in validation (issue 19 item 3).

Lots made from one raw-material batch, in one campaign or one month are not
independent: a model cross-validated with a lot's batch-mates in training is
judged on batches it has already seen, and its errors (and the conformal
intervals built from them) are too small for a new batch. ``train
--group-by COLUMN`` keeps every lot sharing the column's value on the same
side of every outer and inner fold, so the errors and the CV+ intervals are
those of a new group.
"""

from __future__ import annotations

import pandas as pd

from linkage.exceptions import InputError, Problem, UsageError

__all__ = ["MONTH", "lot_groups"]

#: the derived grouping: the calendar month (UTC) of ``manufactured_at``
MONTH = "month"


def lot_groups(table: pd.DataFrame, group_by: str | None) -> dict[str, str] | None:
    """Lot -> group label from ``table``'s column ``group_by`` (or the month of
    ``manufactured_at`` for ``month`` when no column of that name exists);
    None when grouping by lot.

    Raises
    ------
    UsageError
        No such column.
    InputError
        Lots without a value, or one lot with two values; every one at once.
    """
    if group_by is None or group_by == "lot":
        return None
    src = "assembled table"
    lots = table["lot"].astype(str).str.strip()
    if group_by in table.columns:
        values = table[group_by]
        column = group_by
    elif group_by == MONTH and "manufactured_at" in table.columns:
        t = pd.to_datetime(table["manufactured_at"], errors="coerce", utc=True)
        values = t.dt.strftime("%Y-%m").where(t.notna())
        column = "manufactured_at"
    else:
        have = ", ".join(c for c in table.columns if c != "lot")
        extra = " ('month' needs manufactured_at)" if group_by == MONTH else ""
        raise UsageError(f"--group-by {group_by}: the assembled table has no column {group_by!r}{extra}; "
                         f"columns: {have}")
    problems, out = [], {}
    for i, (lot, v) in enumerate(zip(lots, values)):
        if pd.isna(v) or str(v).strip() == "":
            problems.append(Problem(file=src, row=i + 2, column=column, value=None,
                                    rule=f"lot {lot} has no {group_by}; every lot needs one to be grouped by it"))
            continue
        label = str(v).strip()
        if out.setdefault(lot, label) != label:
            problems.append(Problem(file=src, row=i + 2, column=column, value=label,
                                    rule=f"lot {lot} has two values of {group_by} ({out[lot]!r} and {label!r})"))
    if problems:
        raise InputError(problems)
    return out
