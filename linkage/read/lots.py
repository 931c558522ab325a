"""Lot identity: one lot, one spelling; invisible characters refused.

The rule itself (:func:`lot_key`, :func:`lot_id_rule`) lives in
:mod:`linkage.lotid`, free of pandas, so that a what-if (``linkage predict
--lot``) and the store's look-ups apply the very rule the reader applies."""

from __future__ import annotations

from linkage.exceptions import Problem
from linkage.lotid import _DASHES, _INVISIBLE, _visible, _without_invisible, lot_id_rule, lot_key

__all__ = ["_DASHES", "_INVISIBLE", "_visible", "_without_invisible", "lot_id_rule", "lot_key"]


def _lot_id_problems(lots: list, label: str, sheet_rows: list[int], header: str, bad: set) -> list[Problem]:
    """Invisible characters in a lot id, and two spellings of one lot in a file (same :func:`lot_key`).

    Of the spellings of one lot, the one on the most rows is taken as the lot's (on a tie, the first in the
    file) and the rows of every other spelling are refused: one row spelt apart from the rest is the odd one
    out, whichever comes first."""
    distinct = set(lots) - {None}
    joined = "".join(distinct)
    if joined.isascii() and joined.isprintable() and len({lot.lower() for lot in distinct}) == len(distinct):
        return []  # the common case, decided on the distinct ids: for printable ASCII the key is lower()
    problems: list[Problem] = []
    spelled: dict[str, dict[str, list[int]]] = {}  # key -> spelling -> row indices, in file order
    for k, lot in enumerate(lots):
        if lot is None or (k, "lot") in bad:
            continue
        rule = lot_id_rule(lot)
        if rule is not None:
            problems.append(Problem(label, rule, row=sheet_rows[k], column=header, value=_visible(lot)))
            bad.add((k, "lot"))
            continue
        spelled.setdefault(lot_key(lot), {}).setdefault(lot, []).append(k)
    for spellings in spelled.values():
        if len(spellings) < 2:
            continue
        usual = max(spellings, key=lambda lot: len(spellings[lot]))  # max keeps the first of equals
        where = _span([sheet_rows[k] for k in spellings[usual]])
        for lot, ks in spellings.items():
            if lot == usual:
                continue
            for k in ks:
                problems.append(Problem(label, f"lot {_visible(lot)!r} is lot {_visible(usual)!r} written another "
                                               f"way (case, dash or compatibility form); this file spells it "
                                               f"{_visible(usual)!r} on {where}, and one lot has one spelling: "
                                               f"write it {_visible(usual)!r}", row=sheet_rows[k], column=header,
                                        value=_visible(lot)))
                bad.add((k, "lot"))
    return problems


def _span(rows: list[int]) -> str:
    """Sheet rows for a message, as runs of consecutive rows: ``row 7``, ``rows 7-10 (4 rows)``, ``rows 6, 8-10
    (4 rows)``; with more than 4 runs, first to last: ``rows 7-40 (12 rows, not all between)``. A range never
    hides a row left out of it (a row spelt apart from the rest of its lot sits between the others)."""
    rows = sorted(set(rows))
    if len(rows) == 1:
        return f"row {rows[0]}"
    runs: list[list[int]] = []
    for r in rows:
        if runs and r == runs[-1][-1] + 1:
            runs[-1].append(r)
        else:
            runs.append([r])
    if len(runs) > 4:
        return f"rows {rows[0]}-{rows[-1]} ({len(rows)} rows, not all between)"
    return "rows " + ", ".join(f"{run[0]}" if len(run) == 1 else f"{run[0]}-{run[-1]}" for run in runs) + \
        f" ({len(rows)} rows)"
