"""The sheets of a workbook (.xlsx, .xlsm) as raw sheets; percentage-formatted cells."""

from __future__ import annotations

import decimal
import itertools
from pathlib import Path

from linkage import read as package
from linkage.exceptions import InputError, Problem
from linkage.read.raw import _is_missing, _norm_header, _Raw, _too_many_columns, _too_many_rows
from linkage.schema import TABLES, Table


def _open_workbook(path: Path, label: str):
    import openpyxl  # only workbooks need it

    try:
        values = openpyxl.load_workbook(path, read_only=True, data_only=True)
        formulas = openpyxl.load_workbook(path, read_only=True, data_only=False)
    except Exception as exc:  # openpyxl raises many kinds for a broken file
        raise InputError(Problem(label, f"cannot open as a workbook: {exc}")) from None
    return values, formulas


def _read_workbook_table(path: Path, table: str) -> _Raw:
    """The sheet of a workbook that holds ``table``: the sheet of that name, or the only sheet."""
    values, formulas = _open_workbook(path, path.name)
    try:
        sheet, label = _table_sheet(values, path.name, table)
        return _read_sheet(values, formulas, sheet, label)
    finally:
        values.close()
        formulas.close()


def _table_sheet(values_wb, file: str, table: str) -> tuple[str, str]:
    """The sheet of a workbook named after ``table`` that holds it, and its label in messages: the sheet of
    that name (in any case), or the only sheet."""
    sheets = values_wb.sheetnames
    named = [s for s in sheets if _norm_header(s).lower() == table]
    if len(named) > 1:  # 'Ribbon' and 'ribbon': which one is meant is not guessed
        raise InputError(Problem(file, f"sheets {' and '.join(repr(s) for s in named)} are both named after the table "
                                       f"'{table}' (sheet names are matched in any case): keep one"))
    by_name = {_norm_header(s).lower(): s for s in sheets}
    if table in by_name and _hidden(values_wb, by_name[table]):
        raise InputError(_hidden_sheet(file, by_name[table]))
    if table in by_name:
        sheet = by_name[table]
    elif (other := _only_sheet_table(sheets, table)) is not None:
        raise InputError(_only_sheet_of_another_table(file, sheets[0], other, table))
    elif len(sheets) == 1:
        sheet = sheets[0]
    else:
        raise InputError(Problem(file, f"no sheet named '{table}' and more than one sheet ({', '.join(sheets)})"))
    return sheet, file if len(sheets) == 1 else f"{file} (sheet {sheet})"


def _only_sheet_table(sheets: list[str], table: str) -> str | None:
    """The other table the only sheet of a workbook read as ``table`` is named after (``Process`` in
    ``ribbon.xlsx``), or None (several sheets, or one named after ``table`` or after no table)."""
    other = _norm_header(sheets[0]).lower() if len(sheets) == 1 else None
    return other if other in TABLES and other != table else None


def _only_sheet_of_another_table(file: str, sheet: str, other: str, table: str) -> Problem:
    """A workbook read as ``table`` (named after it) whose only sheet is named after the table ``other``
    (``Process`` in ``ribbon.xlsx``): the sheet's name says one table, the file's another; which one its rows
    are is not guessed."""
    return Problem(file, f"its only sheet '{sheet}' is named after the table '{other}', but the workbook is read "
                         f"as the table '{table}': which table its rows are is not guessed; rename the sheet "
                         f"'{table}' (or Sheet1) if it holds {table} rows, or save it as {other}.xlsx if it holds "
                         f"{other} rows")


def _read_sheet(values_wb, formulas_wb, sheet: str, label: str) -> _Raw:
    ws = values_wb[sheet]
    # the size the sheet records for itself (None when it records none): refuse a huge one before reading
    size: list[Problem] = []
    if isinstance(ws.max_row, int) and ws.max_row - 1 > package.MAX_ROWS:
        size.append(_too_many_rows(label, ws.max_row - 1))
    if isinstance(ws.max_column, int) and ws.max_column > package.MAX_COLUMNS:
        size.append(_too_many_columns(label, ws.max_column))
    if size:
        raise InputError(size)
    percent: set[tuple[int, int]] = set()
    rows_v = _sheet_rows(ws, sheet, label, percent)
    rows_f = _sheet_rows(formulas_wb[sheet], sheet, label)
    if not any(not _is_missing(c) for r in rows_v for c in r):  # nothing in it: said so, not as a row 1 problem
        raise InputError(Problem(label, "the sheet is empty: no header and no rows"))
    if not any(not _is_missing(c) for c in rows_v[0]):
        raise InputError(Problem(label, "the header must be on row 1 (row 1 is empty)", row=1))
    if len(rows_v[0]) > package.MAX_COLUMNS:
        raise InputError(_too_many_columns(label, len(rows_v[0])))
    header = [_norm_header(c) for c in rows_v[0]]
    n = len(header)
    rows: list[tuple[int, list]] = []
    formulas: set[tuple[int, int]] = set()
    formula_text: dict[tuple[int, int], str] = {}
    for i, rec in enumerate(rows_v[1:], start=2):
        rec = list(rec) + [None] * (n - len(rec))
        if all(_is_missing(c) for c in rec):
            continue
        frec = rows_f[i - 1] if i - 1 < len(rows_f) else ()
        for j, (v, f) in enumerate(zip(rec, frec)):
            if f is None or f == v:
                continue  # a value cell reads the same in both (a text cell starting with '=' too): no formula
            text = _formula(f)
            if text is not None:
                formula_text[(i, j)] = text
                if v is None:
                    formulas.add((i, j))
        rows.append((i, rec))
    return _Raw.from_rows(label, header, rows, None, formulas=formulas, percent=percent, formula_text=formula_text)


def _formula(cell: object) -> str | None:
    """The formula of a cell of the workbook opened with its formulas (``=B2/C2``), or None. An array formula
    is an object carrying its text (openpyxl's ``ArrayFormula.text``)."""
    text = getattr(cell, "text", cell)
    return text if isinstance(text, str) and text.startswith("=") else None


def _sheet_rows(ws, sheet: str, label: str, percent: set | None = None) -> list[tuple]:
    """The rows of a sheet as values, header first; at most MAX_ROWS below the
    header (the sheet's recorded size may be missing or wrong, so the rows
    are counted too). openpyxl parses cells lazily while the rows are
    iterated, so a damaged cell (``<v>NaN</v>`` in a number cell) raises
    here, not when the workbook is opened.

    With ``percent`` given, the (sheet row, column index) of every number
    cell whose number format shows it as a percentage (a ``%`` outside quotes
    in the format code, ECMA-376 Part 1 §18.8.31) is added to it: such a cell
    stores 0.0176 and shows 1.76 %."""
    rows: list[tuple] = []
    try:
        if percent is None:
            rows.extend(itertools.islice(ws.iter_rows(min_row=1, values_only=True), package.MAX_ROWS + 2))
        else:
            for i, cells in enumerate(itertools.islice(ws.iter_rows(min_row=1), package.MAX_ROWS + 2), start=1):
                rows.append(tuple(getattr(c, "value", None) for c in cells))
                for j, c in enumerate(cells):
                    fmt = getattr(c, "number_format", None)
                    if (fmt and "%" in fmt and isinstance(c.value, (int, float)) and not isinstance(c.value, bool)
                            and _shows_percent(fmt)):
                        percent.add((i, j))
    except Exception as exc:  # openpyxl raises many kinds for a damaged sheet, as in _open_workbook
        after = f" after row {len(rows)}" if rows else ""
        raise InputError(Problem(label, f"cannot read sheet '{sheet}': a cell{after} is damaged ({exc}); "
                                        "open and save the file in a spreadsheet program")) from None
    if len(rows) - 1 > package.MAX_ROWS:
        raise InputError(_too_many_rows(label, None))
    return rows


def _percent_cells(raw: _Raw, j: int, target: str, shown: str, tdef: Table, cmap, cells: list,
                   problems: list[Problem], bad: set) -> None:
    """Read the percentage-formatted cells of column ``j`` as a person sees them.

    A workbook cell formatted as a percentage stores 0.0176 and shows 1.76 %.
    In a column whose unit is % (a template column in %, or an extra column
    whose name ends in ``_pct`` or whose header holds ``%``) the cell is read
    as shown, 1.76, the decimal point moved exactly (no binary rounding). In
    any other column the cell is refused with the value stored and shown.
    """
    col = tdef.column(target) if target in tdef.names else None
    in_percent = (col.unit == "%" and (cmap is None or cmap.unit is None)) if col is not None else (
        target.lower().endswith("_pct") or "%" in shown)
    for k, r in enumerate(raw.row_numbers):
        if (r, j) not in raw.percent:
            continue
        stored = cells[k]
        as_shown = float(decimal.Decimal(repr(float(stored))).scaleb(2))
        if in_percent:
            cells[k] = as_shown
            continue
        unit = f"in {col.unit}" if col is not None else "not a percentage column"
        problems.append(Problem(raw.label, f"cell formatted as a percentage: it stores {float(stored)!r} and shows "
                                           f"{as_shown!r}%, but the column is {unit}; format the cell as a number "
                                           "showing the value meant", row=r, column=shown, value=stored))
        bad.add((k, target))


def _shows_percent(number_format: str) -> bool:
    """Does a number format code multiply by 100 and show '%': a '%' outside
    double quotes and not escaped with a backslash (ECMA-376 Part 1, §18.8.31
    numFmts: a literal is quoted or escaped; a bare '%' scales by 100)."""
    quoted = escaped = False
    for ch in number_format:
        if escaped:
            escaped = False
        elif ch == "\\":
            escaped = True
        elif ch == '"':
            quoted = not quoted
        elif ch == "%" and not quoted:
            return True
    return False


def _hidden(workbook, sheet: str) -> bool:
    """A sheet a person does not see: state 'hidden' or 'veryHidden' (ECMA-376 Part 1, §18.18.68)."""
    return getattr(workbook[sheet], "sheet_state", "visible") != "visible"


def _hidden_sheet(file: str, sheet: str) -> Problem:
    return Problem(file, f"sheet '{sheet}' is named after a table but hidden: what a person sees and what would be "
                         "read differ; unhide it if it holds the data, or delete or rename it")
