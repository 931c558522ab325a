"""A sheet as read, before any template rule, and the helpers every reader shares."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from linkage import read as package
from linkage.exceptions import Problem
from linkage.schema import MISSING_TOKENS



@dataclass
class _Raw:
    """A sheet as read, before any template rule: the header, and the kept
    rows' cells column by column (``columns[j][k]`` is column ``j`` of the
    ``k``-th kept row, which is sheet row ``row_numbers[k]``; blank rows and
    refused rows are left out)."""

    label: str
    header: list[str]
    row_numbers: list[int]
    columns: list[list]
    separator: str | None  # None for a workbook
    problems: list[Problem] = field(default_factory=list)
    formulas: set[tuple[int, int]] = field(default_factory=set)
    #: (sheet row, column index) of workbook number cells formatted as a percentage: stored 0.0176, shown 1.76 %
    percent: set[tuple[int, int]] = field(default_factory=set)
    #: (sheet row, column index) -> formula text (``=B2/C2``) of every formula cell of a workbook sheet, with a
    #: stored result or not: named in the cell's messages
    formula_text: dict[tuple[int, int], str] = field(default_factory=dict)
    #: rows of a CSV file refused for their number of fields: (sheet row, its fields, its problem); their lot
    #: field may still be read (``linkage.read.table._Check.read_ragged``)
    ragged: list[tuple[int, list[str], Problem]] = field(default_factory=list)

    @classmethod
    def from_rows(cls, label: str, header: list[str], rows: list[tuple[int, list]], separator: str | None,
                  **more) -> _Raw:
        """From (sheet row, cells) pairs, every one as long as the header."""
        columns = [list(cells) for cells in zip(*(rec for _, rec in rows))] if rows else [[] for _ in header]
        return cls(label, header, [r for r, _ in rows], columns, separator, **more)

    def cell(self, k: int, j: int) -> object:
        return self.columns[j][k]


def _norm_header(text: object) -> str:
    s = "" if text is None else str(text)
    return " ".join(s.replace("\ufeff", "").replace("\xa0", " ").split())


def _is_missing(cell: object) -> bool:
    if cell is None:
        return True
    if isinstance(cell, float) and math.isnan(cell):
        return True
    return isinstance(cell, str) and cell.strip().lower() in MISSING_TOKENS


def _too_many_rows(label: str, n_rows: int | None) -> Problem:
    shown = f"{n_rows:,} rows" if n_rows is not None else f"more than {package.MAX_ROWS:,} rows"
    return Problem(label, f"{shown} below the header; at most {package.MAX_ROWS:,} data rows per file: split the "
                          "export into several ingests")


def _too_many_columns(label: str, n_columns: int) -> Problem:
    return Problem(label, f"{n_columns:,} columns; at most {package.MAX_COLUMNS:,} columns per file (the most a "
                          "workbook sheet holds): leave out the columns that are not needed", row=1)


def _letters(j: int) -> str:
    s = ""
    j += 1
    while j:
        j, rem = divmod(j - 1, 26)
        s = chr(65 + rem) + s
    return s
