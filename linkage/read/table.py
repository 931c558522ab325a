"""A raw sheet checked against the template: the typed table, or every problem at once."""

from __future__ import annotations

import datetime as dt
import difflib
import gc
import itertools
import math
import re
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from linkage.exceptions import InputError, Problem
from linkage.read import MAPPING_FILE, UNSUPPORTED_SUFFIXES, WORKBOOK_SUFFIXES
from linkage.read.cells import (_as_list, _column_clean, _decimal_mark, _extra_non_finite, _extra_values,
                                _fast_cells, _in_bounds, _parse_datetime, _parse_number, _shown, _text, bound_slip,
                                total_force_slip)
from linkage.read.lots import _lot_id_problems, _visible, _without_invisible
from linkage.read.mapping import ROLL_WIDTH_COLUMN, TOTAL_FORCE_COLUMN, ColumnMap, Mapping, _suggest, _without_unit
from linkage.read.raw import _is_missing, _letters, _norm_header, _Raw
from linkage.read.rules import _key_problems, _rule_problems, _sorted
from linkage.read.sniff import _read_csv
from linkage.read.workbook import _percent_cells, _read_workbook_table
from linkage.schema import DATETIME, NUMBER, TABLES, TEXT, Column, Table


def frame_from_columns(table: str, columns: dict[str, list], extra: dict[str, list] | None = None,
                       n_rows: int | None = None) -> pd.DataFrame:
    """A DataFrame of a table with the template's dtypes.

    ``columns`` holds template columns (missing ones are filled with missing
    values), ``extra`` the extra columns in order; values are Python values
    with ``None`` for missing. TEXT -> ``str``, NUMBER -> ``float64``,
    DATETIME -> ``datetime64[us]``; an extra column is ``float64`` when every
    value is a number, else ``str``.
    """
    tdef = TABLES[table]
    if n_rows is None:
        lengths = [len(v) for v in (*columns.values(), *(extra or {}).values())]
        n_rows = lengths[0] if lengths else 0
    data: dict[str, pd.Series] = {}
    for col in tdef.columns:
        data[col.name] = _series(col.kind, columns[col.name]) if col.name in columns else _empty(col.kind, n_rows)
    for name, values in (extra or {}).items():
        numeric = all(v is None or (isinstance(v, float) and not isinstance(v, bool)) for v in values)
        data[name] = _series(NUMBER, values) if numeric else _series(
            TEXT, [None if v is None else (repr(v) if isinstance(v, float) else str(v)) for v in values])
    return pd.DataFrame(data, index=pd.RangeIndex(n_rows))


def _series(kind: str, values) -> pd.Series:
    if kind == NUMBER:
        if isinstance(values, np.ndarray):
            return pd.Series(values, dtype="float64")
        return pd.Series([math.nan if v is None else float(v) for v in values], dtype="float64")
    if kind == DATETIME:
        if isinstance(values, np.ndarray):
            return pd.Series(values, dtype="datetime64[us]")
        if all(v is None or (type(v) is dt.datetime and v.tzinfo is None) for v in values):
            return pd.Series(values, dtype="datetime64[us]")  # the same as through pd.Timestamp, 20 times faster
        return pd.Series([None if v is None else pd.Timestamp(v) for v in values], dtype="datetime64[us]")
    if set(map(type, values)) <= {str, type(None)}:
        return pd.Series(values, dtype="str")  # text as read (the common case): no copy to make
    return pd.Series([None if v is None else str(v) for v in values], dtype="str")


def _empty(kind: str, n_rows: int) -> pd.Series:
    """A template column the file does not have: every value missing."""
    if kind == NUMBER:
        return pd.Series(np.full(n_rows, np.nan), dtype="float64")
    if kind == DATETIME:
        return pd.Series(np.full(n_rows, np.datetime64("NaT", "us")), dtype="datetime64[us]")
    return pd.Series([None] * n_rows, dtype="str")


#: one column of a file that is read: (column index, target column, header as written, its mapping or None)
Target = tuple[int, str, str, ColumnMap | None]


def _build(raw: _Raw, tdef: Table, cmaps: dict[str, ColumnMap]) -> pd.DataFrame:
    """Apply the template to a raw sheet; raise InputError with every problem."""
    check = _Check(raw, tdef, list(raw.problems))
    title = _title_rows(raw, tdef, cmaps)
    if title is not None:
        raise InputError(title)
    check.targets, unit_headers = _match_header(raw, tdef, cmaps, check.problems)
    check.read_ragged()
    hinted = _require_columns(raw.label, tdef, check.targets, unit_headers, check.problems)
    _near_template_names(raw.label, tdef, check.targets, unit_headers, hinted, check.problems)
    # the decimal mark from the number cells of the file (module notes, rule 4)
    number_idx = [j for j, t, _, _ in check.targets if t not in tdef.names or tdef.column(t).kind == NUMBER]
    decimal = _decimal_mark(itertools.chain.from_iterable(raw.columns[j] for j in number_idx), raw.separator)
    for target in check.targets:
        check.read_column(target, decimal)
    force_map = next((m for _, t, _, m in check.targets if m is not None and m.total_force), None)
    if force_map is not None:
        check.per_cm_of_roll_width(force_map)
    for col in tdef.columns:
        if col.name in check.values:
            check.bounds_and_presence(col)
    df = check.frame()
    extras = extra_columns(tdef, check.targets)
    if extras:
        df.attrs["extra_columns"] = extras
    return df


def _match_header(raw: _Raw, tdef: Table, cmaps: dict[str, ColumnMap],
                  problems: list[Problem]) -> tuple[list[Target], set[str]]:
    """The columns read, and the template columns written with a unit added.

    Each header is renamed by the mapping, matched to the template in any
    case, or kept as an extra column. A column with values but no header, a
    template name with a unit added and two headers that become one column
    are refused.
    """
    label = raw.label
    targets: list[Target] = []
    seen: dict[str, str] = {}
    names_lower = {n.lower(): n for n in tdef.names}
    unit_headers: set[str] = set()  # template columns written with a unit in the header (reported once)
    for j, head in enumerate(raw.header):
        shown = _norm_header(head)
        if not shown:
            if any(not _is_missing(c) for c in raw.columns[j]):
                problems.append(Problem(label, f"column {_letters(j)} has values but no header", row=1,
                                        column=_letters(j), cell=None if raw.separator else f"{_letters(j)}1"))
            continue
        cmap = cmaps.get(shown.lower())
        target = cmap.target if cmap else names_lower.get(shown.lower(), shown)
        decorated = None if cmap or target in tdef.names else names_lower.get(_without_unit(shown).lower())
        if decorated is not None:
            unit = tdef.column(decorated).unit
            problems.append(Problem(label, f"header '{shown}' is the template column '{decorated}' with a unit "
                                           f"added; the template name carries its unit ({unit}): name the column "
                                           f"'{decorated}', or map the header in {MAPPING_FILE} (with unit = ... "
                                           "where the file uses another unit)", row=1, column=shown))
            unit_headers.add(decorated)
            continue
        if target.lower() in seen:
            problems.append(Problem(label, f"two columns become '{target}': '{seen[target.lower()]}' and '{shown}'",
                                    row=1, column=shown))
            continue
        seen[target.lower()] = shown
        targets.append((j, target, shown, cmap))
    return targets, unit_headers


def _require_columns(label: str, tdef: Table, targets: list[Target], unit_headers: set[str],
                     problems: list[Problem]) -> set[str]:
    """A required template column that is not in the file, with the nearest header as a hint; the headers
    given as hints.

    Only a header that is not itself a template column (an extra column) is offered: a template column present
    in the file is that column, never a misspelling of another one."""
    present = {t for _, t, _, _ in targets}
    extras = [h for _, t, h, _ in targets if t not in tdef.names]
    hinted: set[str] = set()
    for col in tdef.columns:
        if col.required and col.name not in present and col.name not in unit_headers:
            near = difflib.get_close_matches(col.name, extras, n=1, cutoff=0.6)
            hint = f"; found '{near[0]}': rename it or map it in {MAPPING_FILE}" if near else ""
            hinted.update(near)
            problems.append(Problem(label, f"required column '{col.name}' is missing{hint}", row=1, column=col.name))
    return hinted


#: how close (difflib's ratio, of the header in lower case) an extra column's header must be to a template column
#: the file lacks to be taken for a misspelling of it and refused. Every one-character slip (a letter left out,
#: doubled, swapped or replaced) of a template name of six or more characters scores at least 0.83; headers of
#: real extra columns score below: 'operator' against 'compactor' 0.71, 'sampled_by' against 'sampled_at' 0.80,
#: 'ribbon_tensile_mpa' against 'ribbon_thickness_mm' 0.65 (common practice, no source). Stricter than the 0.6
#: of the did-you-mean hints, which only suggest: this one refuses a file. Closeness alone is not enough: see
#: ``_misspelling_of``.
MISSPELLING_CUTOFF = 0.81

#: how close (difflib's ratio) a word of the header must be to the word of the template name in its place to be
#: a slip of it: 'friabilty'/'friability' 0.95, 'diamter'/'diameter' 0.93, 'pc'/'pct' 0.80; 'by'/'at' 0
#: (common practice, no source).
WORD_CUTOFF = 0.75

#: names of a statistic: a word of the header and the template word in its place that are both in this set name
#: two quantities ('weight_sd_pct' is not 'weight_rsd_pct', 'd50_max' not 'd50_min'), never a slip of one another,
#: however close they are spelt ('sd'/'rsd' 0.80, as close as the slip 'pc'/'pct').
STATISTIC_WORDS = frozenset({"sd", "rsd", "cv", "se", "sem", "var", "mean", "avg", "median", "min", "max", "iqr",
                             "range"})


def _words(name: str) -> list[str]:
    return [w for w in re.split(r"[_\s]+", name.lower()) if w]


def _misspelling_of(header: str, template: str) -> bool:
    """Whether ``header`` (an extra column's) is taken for a misspelling of the template name ``template``.

    A misspelling is a change *inside* the name's underscore-separated words, never a word added: a header with
    a word more than the template name ('compactor_id', 'breaking_force_sd_n', 'dissolution_pct_15') names
    another quantity and is kept as an extra column. Refused are headers whose whole name is close (difflib's
    ratio at least ``MISSPELLING_CUTOFF``) and that either

    - have as many words as the template name, each word equal to the template's word in its place or a slip of
      it (ratio at least ``WORD_CUTOFF``, and not two names of a statistic such as 'sd' and 'rsd'):
      'friabilty_pct', 'roll_diamter_mm', 'dissolution_pc'; or
    - are the template name with words left out, in order (the unit dropped: 'Friability' for
      'friability_pct'), which says the same quantity with less; or
    - are the template name with its underscores moved or dropped ('friabilitypct').
    """
    h, t = header.lower(), template.lower()
    close = difflib.SequenceMatcher(None, h, t)
    # real_quick_ratio and quick_ratio are upper bounds of ratio (as difflib.get_close_matches uses them): the
    # same answer, without the full comparison for the many headers that are far from every template name
    if (close.real_quick_ratio() < MISSPELLING_CUTOFF or close.quick_ratio() < MISSPELLING_CUTOFF
            or close.ratio() < MISSPELLING_CUTOFF):
        return False
    hw, tw = _words(h), _words(t)
    if "".join(hw) == "".join(tw):
        return True
    if len(hw) == len(tw):
        return all(a == b or (difflib.SequenceMatcher(None, a, b).ratio() >= WORD_CUTOFF
                              and not (a in STATISTIC_WORDS and b in STATISTIC_WORDS))
                   for a, b in zip(hw, tw))
    if len(hw) < len(tw):
        rest = iter(tw)
        return all(w in rest for w in hw)  # hw a subsequence of tw
    return False


def _near_template_names(label: str, tdef: Table, targets: list[Target], unit_headers: set[str], hinted: set[str],
                         problems: list[Problem]) -> None:
    """An extra column whose header is a misspelling (``_misspelling_of``) of a template column the file does
    not have: refused (else the attribute would be read as empty and the header kept as a new column). A header
    mapped in columns.toml (``extra = true``) is kept as it is, and one already named as the hint of a missing
    required column is not reported twice."""
    present = {t for _, t, _, _ in targets}
    lacking = [n for n in tdef.names if n not in present and n not in unit_headers]
    if not lacking:
        return
    for _, target, shown, cmap in targets:
        if target in tdef.names or cmap is not None or shown in hinted:
            continue
        meant = [n for n in lacking if _misspelling_of(shown, n)]
        if meant:
            near = max(meant, key=lambda n: difflib.SequenceMatcher(None, shown.lower(), n).ratio())
            problems.append(Problem(label, f"header '{shown}' is not a template column of {tdef.name} but nearly "
                                           f"the name of one the file lacks (did you mean '{near}'?); name the "
                                           f"column as the template does, or to keep it as an extra column map "
                                           f"it in {MAPPING_FILE} (\"{shown}\" = {{ extra = true }})",
                                    row=1, column=shown))


def extra_columns(tdef: Table, targets: list[Target]) -> list[dict]:
    """The extra columns a file keeps (not in the template), in file order: ``{"column", "near", "declared"}``.

    ``column`` is the name kept (the header, or its mapping's target); ``declared`` whether ``columns.toml``
    maps it (``{ extra = true }``: kept on purpose); ``near`` the template column the file *also has* of which
    the header would be taken for a misspelling (the rule that refuses a misspelling of a column the file lacks,
    ``_misspelling_of``), or None: a second copy typed by mistake, or a column half renamed. A declared column is
    never given a ``near`` (it was named on purpose)."""
    present = [t for _, t, _, _ in targets if t in tdef.names]
    out = []
    for _, target, shown, cmap in targets:
        if target in tdef.names:
            continue
        twins = [] if cmap is not None else [n for n in present if _misspelling_of(shown, n)]
        near = max(twins, key=lambda n: difflib.SequenceMatcher(None, shown.lower(), n).ratio()) if twins else None
        out.append({"column": target, "near": near, "declared": cmap is not None})
    return out


@dataclass
class _Check:
    """The cells of one raw sheet as they are read and checked, column by column."""

    raw: _Raw
    tdef: Table
    problems: list[Problem]
    targets: list[Target] = field(default_factory=list)
    #: template column -> values (a float array where the fast path read it, else a list with None for missing)
    values: dict[str, list | np.ndarray] = field(default_factory=dict)
    extra: dict[str, list] = field(default_factory=dict)
    headers: dict[str, str] = field(default_factory=dict)  # target -> header as written
    bad: set[tuple[int, str]] = field(default_factory=set)  # (row index, target) of cells already refused
    #: rows refused for their number of fields: (sheet row, the lot its lot field reads or None, its fields)
    ragged: list[tuple[int, str | None, list[str]]] = field(default_factory=list)

    def refuse(self, k: int, target: str, rule: str, value: object = None, column: str | None = None) -> None:
        """Report the cell of row index ``k`` in ``target``'s column and mark it refused."""
        self.problems.append(Problem(self.raw.label, rule, row=self.raw.row_numbers[k],
                                     column=column or self.headers[target], value=value))
        self.bad.add((k, target))

    def shown(self, k: int, target: str) -> object:
        """The cell as written in the file, trimmed, for a message."""
        j = next((j for j, t, _, _ in self.targets if t == target), None)
        return None if j is None else _shown(self.raw.cell(k, j))

    def read_ragged(self) -> None:
        """The lot field of each row refused for its number of fields (``_Raw.ragged``), read where the lot is
        the first column: no extra or missing field (an unquoted decimal comma, a lost separator) can come
        before it, so it is right unless the lot id itself holds the separator. A process row's problem then
        names that lot, and the checks across files do not call the lot's rows in the other files unknown (its
        process record is that row; ``_Check.lots_read``). Where the lot column comes later a stray field may
        have shifted it: the row's fields are kept, and a result whose lot is one of them is reported as
        following from the row (``linkage.read.folder.cross_check``)."""
        first = bool(self.targets) and self.targets[0][0] == 0 and self.targets[0][1] == "lot"
        for row, fields, problem in self.raw.ragged:
            cells = [_text(c) for c in fields]
            lot = cells[0] if first and cells and not _is_missing(fields[0]) else None
            self.ragged.append((row, lot, cells))
            if lot is not None and self.tdef.name == "process" and problem in self.problems:
                at = self.problems.index(problem)
                self.problems[at] = replace(problem, rule=(
                    f"{problem.rule}; its lot field reads {_visible(lot)!r}: that lot's rows in the other files "
                    "are not checked against a process record until this row is read"))

    def read_column(self, target_item: Target, decimal: str) -> None:
        """Parse one column: formulas and percentages of a workbook, then each cell by its kind."""
        j, target, shown, cmap = target_item
        raw, tdef = self.raw, self.tdef
        self.headers[target] = shown
        cells = list(raw.columns[j]) if raw.percent else raw.columns[j]
        if raw.formulas:
            for k, r in enumerate(raw.row_numbers):
                if (r, j) in raw.formulas:
                    self.refuse(k, target, f"formula without a stored result (the cell holds "
                                           f"{raw.formula_text.get((r, j), 'a formula')}); open and save the file "
                                           "in a spreadsheet program, or paste values")
        if raw.percent:
            _percent_cells(raw, j, target, shown, tdef, cmap, cells, self.problems, self.bad)
        if target not in tdef.names:
            self.extra[target] = _extra_values(cells, decimal, raw.separator)
            self.problems += _extra_non_finite(cells, self.extra[target], decimal, raw.separator, raw.label,
                                               raw.row_numbers, shown)
            return
        col = tdef.column(target)
        factor = cmap.factor if cmap and col.kind == NUMBER else None
        fast = _fast_cells(col, cells, decimal, raw.separator, self.bad, target)
        if fast is not None:
            self.values[target] = fast * factor if factor is not None else fast
            return
        out: list = []
        for k, cell in enumerate(cells):
            if (k, target) in self.bad or _is_missing(cell):
                out.append(None)
                continue
            if col.kind == TEXT:
                out.append(_text(cell))
                continue
            parsed = _parse_number(cell, decimal, raw.separator) if col.kind == NUMBER else _parse_datetime(cell)
            if isinstance(parsed, str):
                self.refuse(k, target, parsed, value=_shown(cell))
                out.append(None)
            else:
                out.append(parsed * factor if factor is not None else parsed)
        self.values[target] = out

    def per_cm_of_roll_width(self, force_map: ColumnMap) -> None:
        """A total roll force (kN or N) divided by the roll width in cm: the mapping's, or else the row's."""
        values = self.values
        for name in (TOTAL_FORCE_COLUMN, ROLL_WIDTH_COLUMN):
            if isinstance(values.get(name), np.ndarray):
                values[name] = _as_list(values[name])
        n = len(self.raw.row_numbers)
        widths = values.get(ROLL_WIDTH_COLUMN, [None] * n)
        forces = values[TOTAL_FORCE_COLUMN]
        for k in range(n):
            if forces[k] is None:
                continue
            width, row_width = force_map.roll_width_mm, widths[k]
            if width is not None and row_width is not None and not math.isclose(width, row_width, rel_tol=1e-9):
                self.refuse(k, TOTAL_FORCE_COLUMN, f"roll width {row_width:g} mm in this row differs from "
                                                   f"{width:g} mm in {MAPPING_FILE}", value=row_width,
                            column=self.headers.get(ROLL_WIDTH_COLUMN, ROLL_WIDTH_COLUMN))
                forces[k] = None
                continue
            width = width if width is not None else row_width
            if width is None or not width > 0:
                self.refuse(k, TOTAL_FORCE_COLUMN, f"a total roll force needs the roll width: give "
                                                   f"{ROLL_WIDTH_COLUMN} in the row or roll_width_mm in "
                                                   f"{MAPPING_FILE}", value=self.shown(k, TOTAL_FORCE_COLUMN))
                forces[k] = None
                continue
            forces[k] = forces[k] / (width / 10.0)

    def bounds_and_presence(self, col: Column) -> None:
        """Every value of a template column within its bounds, and present where the column must be filled."""
        values = self.values
        cmap = next((m for _, t, _, m in self.targets if t == col.name), None)
        required = col.nonempty or col.name in self.tdef.key
        if isinstance(values[col.name], np.ndarray):
            if _column_clean(col, values[col.name], required):
                return
            values[col.name] = _as_list(values[col.name])  # something to report: the loop below says what
        elif col.kind != NUMBER and (not required or None not in values[col.name]):
            return  # no bounds, and nothing missing that must be there
        for k, v in enumerate(values[col.name]):
            if (k, col.name) in self.bad:
                continue
            if v is None:
                if required:
                    self.refuse(k, col.name, f"'{col.name}' must have a value in every row",
                                value=self.shown(k, col.name))
                continue
            if col.kind == NUMBER and not _in_bounds(col, v):
                if cmap is not None and cmap.unit is not None:
                    note = f" (read as {cmap.unit}, converted to {v:g} {col.unit})"
                else:
                    note = bound_slip(col, v) or self.total_force_slip(k, col, v)
                self.refuse(k, col.name, f"outside the range {col.bound_text()}{note}", value=self.shown(k, col.name))

    def total_force_slip(self, k: int, col: Column, v: float) -> str:
        """:func:`linkage.read.cells.total_force_slip` of the roll force of row index ``k``, with its roll width."""
        if col.name != TOTAL_FORCE_COLUMN or ROLL_WIDTH_COLUMN not in self.values:
            return ""
        width = self.values[ROLL_WIDTH_COLUMN][k]
        if (k, ROLL_WIDTH_COLUMN) in self.bad or not isinstance(width, float) or math.isnan(width) \
                or not _in_bounds(self.tdef.column(ROLL_WIDTH_COLUMN), width):
            return ""
        return total_force_slip(col, v, float(width))

    def lots_read(self, df: pd.DataFrame) -> pd.DataFrame:
        """The lot column of the rows whose lot cell was read and not refused, with their sheet rows (what the
        checks across files of a folder can still use when the file is refused for other cells)."""
        keep = [k for k, lot in enumerate(df["lot"].tolist())
                if isinstance(lot, str) and (k, "lot") not in self.bad]
        lots = df.loc[keep, ["lot"]].reset_index(drop=True)
        lots.attrs["source_rows"] = SourceRows([self.raw.row_numbers[k] for k in keep])
        # the refused lot cells, with invisible characters taken out: the lots they were probably meant to be
        refused = {lot for k, lot in enumerate(df["lot"].tolist()) if isinstance(lot, str) and (k, "lot") in self.bad}
        lots.attrs["refused_lots"] = sorted(map(_without_invisible, refused))
        # rows refused for their number of fields (sheet row, lot field or None, fields): a process record unread
        lots.attrs["unread_rows"] = [(row, None if lot is None else _without_invisible(lot), cells)
                                     for row, lot, cells in self.ragged]
        return lots

    def values_read(self, df: pd.DataFrame) -> pd.DataFrame | None:
        """The columns judged without history (:data:`linkage.plausible.JUDGED_WITHOUT_HISTORY`) of a refused
        sheet, with the lot, its refused cells as missing and the sheet rows; None for a table without such
        columns. So the folder still judges them (a sieve stack in mm) beside the sheet's other problems."""
        from linkage.plausible import JUDGED_WITHOUT_HISTORY

        columns = [c for c in JUDGED_WITHOUT_HISTORY.get(self.tdef.name, ()) if c in self.values]
        if "lot" not in self.values or not columns:
            return None
        out = df[["lot", *columns]].copy()
        for name in out.columns:
            refused = sorted(k for k, target in self.bad if target == name)
            if refused:  # set at once: a file may have a whole column refused
                out.loc[refused, name] = None if name == "lot" else np.nan
        out.attrs["source_rows"] = SourceRows(self.raw.row_numbers)
        return out

    def frame(self) -> pd.DataFrame:
        """The typed table, after the lot-id, key and row rules; InputError with every problem of the sheet."""
        raw, tdef, problems = self.raw, self.tdef, self.problems
        sheet_rows = raw.row_numbers
        if isinstance(self.values.get("lot"), list):
            problems += _lot_id_problems(self.values["lot"], raw.label, sheet_rows, self.headers.get("lot", "lot"),
                                         self.bad)
        df = frame_from_columns(tdef.name, self.values, self.extra, n_rows=len(sheet_rows))
        problems += _key_problems(df, tdef, raw.label, sheet_rows, self.headers, self.bad)
        problems += _rule_problems(df, tdef, raw.label, sheet_rows, self.headers, self.bad)
        letters = _cell_letters(raw, self.targets)
        if problems:
            exc = InputError(_sorted(with_cells(problems, {raw.label: letters}, raw) if letters else problems))
            exc.lots_read = self.lots_read(df) if "lot" in self.values else None
            exc.values_read = self.values_read(df)
            for read in (exc.lots_read, exc.values_read):
                if read is not None and letters:
                    read.attrs["cell_letters"] = letters
            raise exc
        if letters:
            df.attrs["cell_letters"] = letters
        df.attrs["table"] = tdef.name
        df.attrs["file"] = raw.label
        df.attrs["source_rows"] = SourceRows(sheet_rows)
        return df


def _cell_letters(raw: _Raw, targets: list[Target]) -> dict[str, str]:
    """The column letter of each column of a workbook sheet, by its header as written and by the template (or
    extra) column it is read as, both in lower case; a name two columns share is left out. Empty for a CSV
    file (it has no cell references)."""
    if raw.separator is not None:
        return {}
    letters: dict[str, str | None] = {}
    for j, head in enumerate(raw.header):
        shown = _norm_header(head).lower()
        if shown:
            letters[shown] = None if shown in letters else _letters(j)
    for j, target, _, _ in targets:
        if letters.get(target.lower(), _letters(j)) == _letters(j):
            letters[target.lower()] = _letters(j)
        else:
            letters[target.lower()] = None
    return {name: letter for name, letter in letters.items() if letter is not None}


def with_cells(problems: list[Problem], letters: dict[str, dict[str, str]], raw: _Raw | None = None
               ) -> list[Problem]:
    """The problems of workbook sheets with the A1 reference of their cell (``cell C4``), where they name a row
    and a column of a sheet in ``letters`` (label -> column name in lower case -> column letter, from
    :func:`_cell_letters`); and, given the sheet's ``raw``, a problem in a formula cell with the formula whose
    stored result was read."""
    out = []
    for p in problems:
        sheet = letters.get(p.file)
        if p.cell is None and sheet and p.row is not None and p.column is not None:
            letter = sheet.get(_norm_header(p.column).lower())
            if letter is not None:
                p = replace(p, cell=f"{letter}{p.row}")
                formula = raw.formula_text.get((p.row, _column_index(letter))) if raw is not None else None
                if formula is not None and formula not in p.rule:
                    p = replace(p, rule=f"{p.rule} (the cell holds the formula {formula}; its stored result "
                                        f"{'is empty' if p.value is None else 'is the value shown'})")
        out.append(p)
    return out


def _column_index(letters: str) -> int:
    """The column index (0 for A) of column letters: the inverse of :func:`_letters`."""
    j = 0
    for ch in letters:
        j = j * 26 + ord(ch) - 64
    return j - 1


#: how far down a header is looked for below a title row (common practice, no source: a title, a subtitle and a
#: blank row or two are what a person puts above a table)
TITLE_ROWS = 10


def _title_rows(raw: _Raw, tdef: Table, cmaps: dict[str, ColumnMap]) -> Problem | None:
    """A title above the header, said once: row 1 holds no column of the table (not even ``lot``) and a row
    below it, within :data:`TITLE_ROWS`, holds ``lot`` and another column of the table (a template name in any
    case, or a header ``columns.toml`` maps). Then every column would be reported as missing and every filled
    column as one without a header; the one problem says which row holds the header."""
    names = {n.lower() for n in tdef.names} | set(cmaps)

    def columns_of(cells) -> list[str]:
        found = []
        for c in cells:
            head = _norm_header(c).lower() if isinstance(c, str) else ""
            target = cmaps[head].target if head in cmaps else head
            if head in names and target not in found:
                found.append(target)
        return found

    if columns_of(raw.header):
        return None
    candidates = [(r, [col[k] for col in raw.columns]) for k, r in enumerate(raw.row_numbers[:TITLE_ROWS])]
    candidates += [(r, fields) for r, fields, _ in raw.ragged if r <= TITLE_ROWS]
    for row, cells in sorted(candidates, key=lambda rc: rc[0]):
        if row > TITLE_ROWS:
            break
        found = columns_of(cells)
        if "lot" in found and len(found) >= 2:
            above = "row 1 looks like a title" if row == 2 else f"rows 1-{row - 1} look like a title"
            shown = ", ".join(found[:4]) + (", ..." if len(found) > 4 else "")
            first = next((_shown(c) for c in raw.header if not _is_missing(c)), None)
            return Problem(raw.label, f"{above} above the header (row {row} holds the template's column names: "
                                      f"{shown}): delete {'it' if row == 2 else 'them'} so that the header is on "
                                      "row 1", row=1, value=first)
    return None


@contextmanager
def bulk():
    """Pause Python's cyclic garbage collector while a large table is parsed
    or written. Building millions of small lists and tuples otherwise sets
    off full collections that walk every live object again and again (a
    third of the time of reading 100,000 lots). Nothing of ours makes
    reference cycles there; the collector is switched back on afterwards
    (if it was on) and catches up then."""
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


class SourceRows(list):
    """The spreadsheet row of each row of a table (``attrs["source_rows"]``).

    A plain list of ints, except that its deep copy is a shallow one (the
    same ints, a new list): pandas deep-copies ``attrs`` on every operation
    that derives a frame or a column, and element-by-element deep copies of a
    long list made selecting one column of a large table cost seconds.
    """

    def __deepcopy__(self, memo):
        return SourceRows(self)


def read_table(path: Path, table: str | None = None, mapping: Mapping | None = None, *,
               definition: Table | None = None) -> pd.DataFrame:
    """Read one CSV or XLSX file as a checked table of the template.

    ``table`` defaults to the file's stem. Returns typed columns (see
    :func:`frame_from_columns`): every template column of the table in template
    order, then the extra columns in file order. ``attrs["source_rows"]`` gives
    each row's spreadsheet row. Raises :class:`InputError` with every problem
    of the file. ``definition`` checks the file against a stricter variant of
    the table (the same columns, some of them required; default the
    template's).
    """
    path = Path(path)
    name = table if table is not None else _norm_header(path.stem).lower()
    if name not in TABLES:
        raise InputError(Problem(path.name, f"unknown table '{name}'{_suggest(name, TABLES)}; "
                                            f"tables: {', '.join(TABLES)}"))
    if not path.is_file():
        raise InputError(Problem(str(path), "no such file"))
    cmaps = (mapping or Mapping()).for_table(name)
    if path.suffix.lower() in WORKBOOK_SUFFIXES:
        raw = _read_workbook_table(path, name)
    elif path.suffix.lower() in UNSUPPORTED_SUFFIXES:
        raise InputError(Problem(path.name, "this spreadsheet format is not read; save as .xlsx or CSV UTF-8"))
    else:
        raw = _read_csv(path.read_bytes(), path.name)
    return _build(raw, definition or TABLES[name], cmaps)
