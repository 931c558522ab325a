"""Read and check the lab's input files: one table a file, CSV or XLSX.

The column names, kinds, units, bounds, keys and required flags come from
:mod:`linkage.schema` (``TABLES``); this module only applies them. Every
problem of a file is collected and raised at once as an
:class:`~linkage.exceptions.InputError`, each naming the file, the
spreadsheet row (the header is row 1), the column as written in the file, the
value and the rule.

Files
-----
A folder holds one file a table, named after the table: ``process``,
``ribbon``, ``granules``, ``granules_laser``, ``tablets``, ``tablet_weights``,
``dissolution`` with the suffix ``.csv``, ``.tsv``, ``.xlsx`` or ``.xlsm``
(case and stray spaces in the name are ignored). A workbook named after a
table holds it on the sheet of that name or on its only sheet; a workbook with
any other name is read sheet by sheet, and each sheet named after a table is
that table (its other sheets are listed in the warnings). Beside them the
folder may hold ``spec.toml`` (see :mod:`linkage.spec`) and ``columns.toml``
(below). README files are skipped. Any other file is listed in
``Ingest.warnings``, except a data file (``.csv``, ``.xlsx`` ...) whose name
is not a table, or an ``.xls``/``.ods`` file: those are refused, since their
rows would otherwise be lost without a word.

Text and cells
--------------
- CSV files are UTF-8, with or without a byte-order mark; CRLF, LF and CR
  line ends are all read. Another encoding is refused with the byte's place.
- Headers are trimmed, runs of spaces become one, and a header that matches a
  template name in another case (``Lot``) is that column. Columns not in the
  template are kept as extra columns: numeric where every value is a number,
  text otherwise.
- A cell that is empty or one of ``schema.MISSING_TOKENS`` (``NA``, ``n/a``,
  ``-`` ..., any case) is missing.
- Dates are ISO 8601 (``2024-03-05`` or ``2024-03-05 14:30``), or date cells
  of a workbook. ``05.03.2024`` or ``3/5/2024`` are refused, never guessed.
  Time-zone offsets are refused: give local time.
- Text cells are trimmed and runs of spaces become one (``" EX-001 "`` is
  ``EX-001``).
- Blank rows are skipped; row numbers still count them, as a spreadsheet does.

Separator and decimal mark (the rule that keeps numbers from being misread)
--------------------------------------------------------------------------
1. The separator is read from the header line (row 1): the one of ``,``,
   ``;`` and tab that occurs there outside double quotes. If none occurs the
   file has one column. If more than one occurs, the one that splits every row
   into as many fields as the header is taken; if that is not exactly one of
   them, the file is refused.
2. A row with more non-empty fields than the header, or fewer fields, is
   refused (this is what an unquoted decimal comma in a ``,`` file causes).
3. In a ``,``- or tab-separated file, and in a text cell of a workbook, the
   decimal mark is ``.``; a number written with a ``,`` (``"1,234"`` in
   quotes) is refused as ambiguous: thousands separator or decimal comma.
4. In a ``;``-separated file the decimal mark is decided for the whole file
   from its number cells: if any is written with a ``,`` (``1,5``), ``,`` is
   the decimal mark and any number with a ``.`` is refused (a thousands
   separator, or a mix of both marks). Otherwise ``.`` is the decimal mark
   when some number shows it unambiguously (``0.5``, ``1.0617``); if the only
   numbers with a ``.`` look like thousands groups (``1.234``, ``12.500``),
   they are refused as ambiguous.
5. Numbers may carry an exponent (``1.5e-3``); spaces, ``%`` signs and units
   inside a cell are refused. Infinite values are refused.

Mapping file ``columns.toml``
-----------------------------
Lets a lab keep its own headers and some common other units. One TOML table
per input table, ``[<table>.columns]``, maps a header as written in the file
(matched trimmed and case-insensitively) to a template column::

    [process.columns]
    "Batch" = "lot"                                        # rename only
    "Gap (mm)" = "roll_gap_mm"
    "Roll force (kN)" = { column = "roll_force_kn_per_cm", unit = "kN", roll_width_mm = 40 }
    "Roll width (cm)" = { column = "roll_width_mm", unit = "cm" }
    "Blend moisture (%)" = { column = "blend_moisture_pct", extra = true }

    [ribbon.columns]
    "Envelope density (kg/m3)" = { column = "envelope_density_g_cm3", unit = "kg/m3" }

- A string value renames; an inline table takes ``column`` (the template
  column; defaults to the key), ``unit`` (the unit the file uses, converted
  on read to the template unit, see ``UNITS``), ``roll_width_mm`` or
  ``roll_width_cm`` (only for a total roll force) and ``extra = true`` (the
  target is a new extra column, not a template one; no unit then).
- Total roll force: ``roll_force_kn_per_cm`` with ``unit = "kN"`` or ``"N"``
  is divided by the roll width in cm, taken from the mapping's
  ``roll_width_mm``/``roll_width_cm`` or else from each row's
  ``roll_width_mm``. A row with neither is refused, and so is a row whose
  ``roll_width_mm`` disagrees with the mapping's.
- An unknown table, target column, key or unit, or two headers mapped to one
  column, is an error naming ``columns.toml``.
- Bounds are checked after conversion, in the template unit.

Limits
------
A file larger than any real export is refused at once, before any cell is
checked (a guard against a wrong or damaged file, and against a read that
would take minutes); the rows of a CSV file are counted before it is even
decoded, and those of a workbook sheet from the size it records:

- at most ``MAX_ROWS`` (500,000) rows below the header per file or sheet.
  Blank rows between data rows count, as they do in the row numbers; line
  ends at the end of a CSV file do not. In a CSV file the rows are counted
  as lines, so a line break inside a quoted cell counts as a row; in a
  workbook they are the rows the sheet records (its used range). Split a
  larger export into several ingests.
- at most ``MAX_COLUMNS`` (16,384, the most a workbook sheet can hold)
  columns in the header.
- a CSV cell of at most ``csv.field_size_limit()`` characters (131,072 by
  default); a longer one is a damaged or binary file.
- ``columns.toml`` of at most ``MAX_MAPPING_BYTES`` (1,000,000 bytes).
"""

from __future__ import annotations

import csv
import datetime as dt
import decimal
import difflib
import gc
import hashlib
import io
import itertools
import math
import re
import tomllib
import unicodedata
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

import numpy as np
import pandas as pd

from linkage.exceptions import InputError, Problem
from linkage.numbers import COMMA_NUMBER, PLAIN_NUMBER
from linkage.schema import DATETIME, MISSING_TOKENS, NUMBER, TABLES, TEXT, Column, Table
from linkage.spec import Spec, read_spec

MAPPING_FILE = "columns.toml"
SPEC_FILE = "spec.toml"
DATA_SUFFIXES = (".csv", ".tsv", ".xlsx", ".xlsm")
WORKBOOK_SUFFIXES = (".xlsx", ".xlsm")
UNSUPPORTED_SUFFIXES = (".xls", ".ods", ".numbers", ".xlsb")

#: most rows below the header in one file or sheet (see the module notes,
#: Limits). A real export is far smaller: 1000 lots x 30 tablets is 30,000
#: rows (common practice, no source); a million-row file took about 19 s and
#: 720 MB to read (tests/reliability/FINDINGS.md #7).
MAX_ROWS = 500_000
#: most columns in a header: the most columns a spreadsheet program's .xlsx
#: sheet holds (A to XFD, 16,384; from memory). A wider CSV is no export of a
#: sheet; 100,000 columns took about a minute to read and ingest (FINDINGS.md #8).
MAX_COLUMNS = 16_384
#: largest columns.toml read; a real one is a few kB (common practice, no source)
MAX_MAPPING_BYTES = 1_000_000

#: template unit -> {unit a file may use: factor to the template unit}.
#: SI prefixes and derived units (BIPM, The International System of Units,
#: 9th ed. 2019); 1 kgf = 1 kp = 9.80665 N (standard acceleration of gravity,
#: 3rd CGPM 1901); 1 in = 25.4 mm (international inch, 1959).
UNITS: dict[str, dict[str, float]] = {
    "g/cm3": {"g/cm3": 1.0, "g/ml": 1.0, "g/mL": 1.0, "kg/L": 1.0, "kg/l": 1.0, "kg/m3": 1e-3},
    "g": {"g": 1.0, "mg": 1e-3, "kg": 1e3},
    "mg": {"mg": 1.0, "g": 1e3},
    "mm": {"mm": 1.0, "cm": 10.0, "m": 1e3, "um": 1e-3, "in": 25.4},
    "um": {"um": 1.0, "mm": 1e3},
    "N": {"N": 1.0, "kN": 1e3, "kp": 9.80665, "kgf": 9.80665},
    "kN": {"kN": 1.0, "N": 1e-3},
    "kN/cm": {"kN/cm": 1.0, "kN/mm": 10.0, "N/mm": 1e-2},
    "%": {"%": 1.0, "fraction": 100.0},
    "min": {"min": 1.0, "s": 1.0 / 60.0, "h": 60.0},
    "rpm": {"rpm": 1.0, "1/min": 1.0, "min-1": 1.0},
}
#: A total roll force in these units becomes kN/cm by dividing by the roll width.
TOTAL_FORCE_UNITS: dict[str, float] = {"kN": 1.0, "N": 1e-3}
TOTAL_FORCE_COLUMN = "roll_force_kn_per_cm"
ROLL_WIDTH_COLUMN = "roll_width_mm"

_NUMBER = PLAIN_NUMBER  # one rule for the ingest and the what-if (linkage.numbers)
_COMMA_NUMBER = COMMA_NUMBER
_THOUSANDS_DOT = re.compile(r"[+-]?[1-9]\d{0,2}(?:\.\d{3})+", re.ASCII)


# --------------------------------------------------------------------------- results


@dataclass
class Ingest:
    """What :func:`read_folder` found: checked tables and where they came from.

    ``sources[table]`` is ``{"file", "sha256", "rows"}``; ``other_sources``
    holds the same for ``spec.toml`` and ``columns.toml`` when present.
    Each table keeps ``attrs["file"]`` and ``attrs["source_rows"]``
    (spreadsheet row of each data row).
    """

    tables: dict[str, pd.DataFrame]
    sources: dict[str, dict]
    spec: Spec | None = None
    warnings: list[str] = field(default_factory=list)
    folder: Path | None = None
    other_sources: dict[str, dict] = field(default_factory=dict)

    def lots(self) -> list[str]:
        """Every lot named in any table, process lots first, in file order."""
        seen: dict[str, None] = {}
        for name in TABLES:
            if name in self.tables:
                seen.update(dict.fromkeys(self.tables[name]["lot"].tolist()))
        return list(seen)


# --------------------------------------------------------------------------- mapping


@dataclass(frozen=True)
class ColumnMap:
    """One header of the lab's files and what it becomes."""

    source: str
    target: str
    unit: str | None = None
    factor: float = 1.0
    total_force: bool = False
    roll_width_mm: float | None = None
    extra: bool = False


@dataclass(frozen=True)
class Mapping:
    """The lab's headers and units (``columns.toml``), see the module notes."""

    tables: dict[str, dict[str, ColumnMap]] = field(default_factory=dict)
    file: str = MAPPING_FILE
    sha256: str | None = None

    def for_table(self, table: str) -> dict[str, ColumnMap]:
        """Header key (trimmed, lower case) -> ColumnMap for one table."""
        return self.tables.get(table, {})

    @classmethod
    def from_dict(cls, data: dict, file: str = MAPPING_FILE, sha256: str | None = None) -> Mapping:
        problems: list[Problem] = []
        tables: dict[str, dict[str, ColumnMap]] = {}
        for tname, section in data.items():
            if tname not in TABLES:
                problems.append(Problem(file, f"unknown table [{tname}]{_suggest(tname, TABLES)}; "
                                              f"tables: {', '.join(TABLES)}"))
                continue
            if not isinstance(section, dict) or set(section) - {"columns"}:
                found = (", ".join(map(repr, sorted(set(section) - {"columns"}))) if isinstance(section, dict)
                         else f"{tname} = {section!r}")
                problems.append(Problem(file, f"[{tname}] may only hold a [{tname}.columns] table; found {found}"))
                continue
            columns = section.get("columns", {})
            if not isinstance(columns, dict):
                problems.append(Problem(file, f"[{tname}.columns] must be a table of header = column"))
                continue
            tables[tname] = _mapping_columns(TABLES[tname], columns, file, problems)
        if problems:
            raise InputError(problems)
        return cls(tables, file, sha256)


def _mapping_columns(tdef: Table, columns: dict, file: str, problems: list[Problem]) -> dict[str, ColumnMap]:
    out: dict[str, ColumnMap] = {}
    targets: dict[str, str] = {}
    for source, value in columns.items():
        where = f"[{tdef.name}.columns] \"{source}\""
        key = _norm_header(source).lower()
        if isinstance(value, str):
            value = {"column": value}
        if not isinstance(value, dict):
            problems.append(Problem(file, f"{where}: must be a column name or an inline table "
                                          "{ column = ..., unit = ... }", column=source, value=value))
            continue
        unknown = sorted(set(value) - {"column", "unit", "roll_width_mm", "roll_width_cm", "extra"})
        if unknown:
            problems.append(Problem(file, f"{where}: unknown key(s) {', '.join(unknown)}; allowed: column, unit, "
                                          "roll_width_mm, roll_width_cm, extra", column=source))
            continue
        target = value.get("column", _norm_header(source))
        extra = value.get("extra", False)
        if not isinstance(target, str) or not target.strip() or not isinstance(extra, bool):
            problems.append(Problem(file, f"{where}: column must be a name and extra true or false",
                                    column=source, value=target))
            continue
        target = _norm_header(target)
        if extra:
            if target.lower() in tdef.names or set(value) - {"column", "extra"}:
                problems.append(Problem(file, f"{where}: an extra column takes only a new name, not a template "
                                              "name or a unit", column=source, value=target))
                continue
            cmap = ColumnMap(source, target, extra=True)
        else:
            if target not in tdef.names:
                problems.append(Problem(file, f"{where}: unknown target column '{target}' in table {tdef.name}"
                                              f"{_suggest(target, tdef.names)}; columns: {', '.join(tdef.names)} "
                                              "(or add extra = true for a new column)", column=source, value=target))
                continue
            cmap = _unit_map(tdef.column(target), source, value, where, file, problems)
            if cmap is None:
                continue
        if target.lower() in targets:
            problems.append(Problem(file, f"{where}: column '{target}' is already the target of "
                                          f"\"{targets[target.lower()]}\"", column=source, value=target))
            continue
        targets[target.lower()] = source
        out[key] = cmap
    return out


def _unit_map(col: Column, source: str, value: dict, where: str, file: str,
              problems: list[Problem]) -> ColumnMap | None:
    width_keys = [k for k in ("roll_width_mm", "roll_width_cm") if k in value]
    unit = value.get("unit")
    if unit is None:
        if width_keys:
            problems.append(Problem(file, f"{where}: {width_keys[0]} only goes with a total roll force unit",
                                    column=source))
            return None
        return ColumnMap(source, col.name)
    if not isinstance(unit, str):
        problems.append(Problem(file, f"{where}: unit must be text", column=source, value=unit))
        return None
    norm = _norm_unit(unit)
    accepted = dict(UNITS.get(col.unit, {})) if col.kind == NUMBER else {}
    total = col.name == TOTAL_FORCE_COLUMN and norm in TOTAL_FORCE_UNITS
    if not total and norm not in accepted:
        names = sorted(accepted) + (sorted(f"{u} (total force)" for u in TOTAL_FORCE_UNITS)
                                    if col.name == TOTAL_FORCE_COLUMN else [])
        choice = f"accepted: {', '.join(names)}" if names else "this column takes no unit conversion"
        problems.append(Problem(file, f"{where}: unknown unit '{unit}' for {col.name} [{col.unit}]; {choice}",
                                column=source, value=unit))
        return None
    if width_keys and not total:
        problems.append(Problem(file, f"{where}: {width_keys[0]} only goes with a total roll force unit "
                                      f"({', '.join(TOTAL_FORCE_UNITS)})", column=source))
        return None
    width = None
    if width_keys:
        if len(width_keys) > 1:
            problems.append(Problem(file, f"{where}: give roll_width_mm or roll_width_cm, not both", column=source))
            return None
        raw = value[width_keys[0]]
        number = _finite_float(raw)
        if number is None or not number > 0:
            problems.append(Problem(file, f"{where}: {width_keys[0]} must be a number > 0", column=source,
                                    value=raw))
            return None
        width = number * (10.0 if width_keys[0] == "roll_width_cm" else 1.0)
    if total:
        return ColumnMap(source, col.name, norm, TOTAL_FORCE_UNITS[norm], total_force=True, roll_width_mm=width)
    return ColumnMap(source, col.name, norm, accepted[norm])


def _finite_float(value: object) -> float | None:
    """A TOML number as a finite float, or None (not a number, NaN, infinite,
    or an integer beyond float range, where float() raises OverflowError)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    try:
        number = float(value)
    except OverflowError:
        return None
    return number if math.isfinite(number) else None


def read_mapping(path: Path) -> Mapping:
    """Read and check a ``columns.toml`` mapping file."""
    path = Path(path)
    size = path.stat().st_size
    if size > MAX_MAPPING_BYTES:
        raise InputError(Problem(path.name, f"{size:,} bytes; a mapping file may hold at most "
                                            f"{MAX_MAPPING_BYTES:,} bytes (a real one is a few kB)"))
    data = path.read_bytes()
    try:
        parsed = tomllib.loads(data.decode("utf-8-sig"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(Problem(path.name, f"not valid TOML: {exc}", row=_toml_line(exc))) from None
    except RecursionError:  # tomllib is recursive: arrays or tables nested thousands deep
        raise InputError(Problem(path.name, "not valid TOML: nested too deeply")) from None
    return Mapping.from_dict(parsed, path.name, hashlib.sha256(data).hexdigest())


def _toml_line(exc: Exception) -> int | None:
    m = re.search(r"line (\d+)", str(exc))
    return int(m.group(1)) if m else None


# --------------------------------------------------------------------------- raw reading


@dataclass
class _Raw:
    """A sheet as read, before any template rule: header and rows of cells."""

    label: str
    header: list[str]
    rows: list[tuple[int, list]]
    separator: str | None  # None for a workbook
    problems: list[Problem] = field(default_factory=list)
    formulas: set[tuple[int, int]] = field(default_factory=set)
    #: (sheet row, column index) of workbook number cells formatted as a percentage: stored 0.0176, shown 1.76 %
    percent: set[tuple[int, int]] = field(default_factory=set)


def _norm_header(text: object) -> str:
    s = "" if text is None else str(text)
    return " ".join(s.replace("\ufeff", "").replace("\xa0", " ").split())


#: a unit written after a column name: "name [%]", "name (%)", "name {mm}", "name, %", "name / mm", "name in mm"
_UNIT_SUFFIX = re.compile(r"^(.*?)\s*(?:[\[({][^\])}]*[\])}]|(?:,|/|\s+in\s+)\s*\S+|\s+%)\s*$", re.IGNORECASE)


def _without_unit(header: str) -> str:
    """A header with a trailing unit taken off (``dissolution_pct [%]`` -> ``dissolution_pct``); else as it is."""
    m = _UNIT_SUFFIX.match(header)
    return m.group(1) if m else header


def _norm_unit(text: str) -> str:
    s = text.replace("³", "3").replace("^3", "3").replace("µ", "u").replace("μ", "u")
    return "".join(s.split())


def _is_missing(cell: object) -> bool:
    if cell is None:
        return True
    if isinstance(cell, float) and math.isnan(cell):
        return True
    return isinstance(cell, str) and cell.strip().lower() in MISSING_TOKENS


def _read_csv(data: bytes, label: str) -> _Raw:
    if data.startswith(b"PK\x03\x04"):
        raise InputError(Problem(label, "this is a zipped workbook (.xlsx), not a CSV text file; "
                                        "give it the .xlsx suffix"))
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(Problem(label, "UTF-16 text; save the file as 'CSV UTF-8'"))
    n_rows = _line_count(data) - 1
    if n_rows > MAX_ROWS:
        raise InputError(_too_many_rows(label, n_rows))
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InputError(Problem(label, f"not UTF-8 text (byte 0x{data[exc.start]:02x} at offset {exc.start}); "
                                        "save the file as 'CSV UTF-8'", row=line)) from None
    if "\x00" in text:
        raise InputError(Problem(label, "contains NUL bytes: not a text CSV file"))
    found = _header_separators(text)
    if len(found) <= 1:
        sep = found[0] if found else ","
    else:
        fits = [s for s in found if _fits(_records(text, s, label))]
        if len(fits) != 1:
            shown = " and ".join("tab" if s == "\t" else repr(s) for s in found)
            raise InputError(Problem(label, f"cannot tell the separator: the header holds {shown} outside quotes "
                                            "and the rows do not settle it; quote header names that hold a "
                                            "separator", row=1))
        sep = fits[0]
    records = _records(text, sep, label)
    if not records or not any(c.strip() for c in records[0]):
        raise InputError(Problem(label, "the header must be on row 1 (row 1 is empty)", row=1))
    if len(records[0]) > MAX_COLUMNS:
        raise InputError(_too_many_columns(label, len(records[0])))
    header = list(records[0])
    raw = _Raw(label, header, [], sep)
    n = len(header)
    body = records[1:]
    if set(map(len, body)) <= {n} and all(map(str.strip, map("".join, body))):
        raw.rows = list(zip(range(2, len(body) + 2), body))  # every row complete, none blank
        return raw
    join = "".join
    for i, rec in enumerate(body, start=2):
        if not join(rec).strip():  # every cell blank
            continue
        if len(rec) > n and not any(c.strip() for c in rec[n:]):
            rec = rec[:n]
        if len(rec) != n:
            shown = ("tab" if sep == "\t" else sep).join(rec)
            hint = (" (an unquoted decimal comma or a stray separator?)" if len(rec) > n
                    else " (a missing separator?)")
            raw.problems.append(Problem(label, f"row has {len(rec)} fields but the header has {n}{hint}",
                                        row=i, value=shown[:120]))
            continue
        raw.rows.append((i, rec))
    return raw


def _header_separators(text: str) -> list[str]:
    counts = dict.fromkeys([",", ";", "\t"], 0)
    quoted = False
    for ch in text:
        if ch == '"':
            quoted = not quoted
        elif not quoted:
            if ch in "\r\n":
                break
            if ch in counts:
                counts[ch] += 1
    return [s for s, k in counts.items() if k]


def _records(text: str, sep: str, label: str) -> list[list[str]]:
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep, quotechar='"', skipinitialspace=True)
    records: list[list[str]] = []
    try:
        records.extend(reader)  # the records before a failing one stay in the list
    except csv.Error as exc:  # a cell longer than csv.field_size_limit(); NUL bytes are refused before
        limit = csv.field_size_limit()
        rule = (f"a cell is longer than {limit:,} characters (a damaged or binary file?)"
                if "field limit" in str(exc) else f"cannot be read as CSV: {exc}")
        raise InputError(Problem(label, rule, row=len(records) + 1)) from None
    return records


def _line_count(data: bytes) -> int:
    """Lines of a text file from its bytes, without decoding: CRLF, LF and CR
    each end a line; line ends at the very end of the file are not counted."""
    body = data.rstrip(b"\r\n")
    if not body:
        return 0
    return body.count(b"\n") + body.count(b"\r") - body.count(b"\r\n") + 1


def _too_many_rows(label: str, n_rows: int | None) -> Problem:
    shown = f"{n_rows:,} rows" if n_rows is not None else f"more than {MAX_ROWS:,} rows"
    return Problem(label, f"{shown} below the header; at most {MAX_ROWS:,} data rows per file: split the export "
                          "into several ingests")


def _too_many_columns(label: str, n_columns: int) -> Problem:
    return Problem(label, f"{n_columns:,} columns; at most {MAX_COLUMNS:,} columns per file (the most a workbook "
                          "sheet holds): leave out the columns that are not needed", row=1)


def _fits(records: list[list[str]]) -> bool:
    if not records or len(records[0]) < 2:
        return False
    n = len(records[0])
    return all(len(r) == n or (len(r) > n and not any(c.strip() for c in r[n:])) or not any(c.strip() for c in r)
               for r in records[1:])


def _open_workbook(path: Path, label: str):
    import openpyxl  # only workbooks need it

    try:
        values = openpyxl.load_workbook(path, read_only=True, data_only=True)
        formulas = openpyxl.load_workbook(path, read_only=True, data_only=False)
    except Exception as exc:  # openpyxl raises many kinds for a broken file
        raise InputError(Problem(label, f"cannot open as a workbook: {exc}")) from None
    return values, formulas


def _read_sheet(values_wb, formulas_wb, sheet: str, label: str) -> _Raw:
    ws = values_wb[sheet]
    # the size the sheet records for itself (None when it records none): refuse a huge one before reading
    size: list[Problem] = []
    if isinstance(ws.max_row, int) and ws.max_row - 1 > MAX_ROWS:
        size.append(_too_many_rows(label, ws.max_row - 1))
    if isinstance(ws.max_column, int) and ws.max_column > MAX_COLUMNS:
        size.append(_too_many_columns(label, ws.max_column))
    if size:
        raise InputError(size)
    percent: set[tuple[int, int]] = set()
    rows_v = _sheet_rows(ws, sheet, label, percent)
    rows_f = _sheet_rows(formulas_wb[sheet], sheet, label)
    if not rows_v or not any(not _is_missing(c) for c in rows_v[0]):
        raise InputError(Problem(label, "the header must be on row 1 (row 1 is empty)", row=1))
    if len(rows_v[0]) > MAX_COLUMNS:
        raise InputError(_too_many_columns(label, len(rows_v[0])))
    header = [_norm_header(c) for c in rows_v[0]]
    raw = _Raw(label, header, [], None, percent=percent)
    n = len(header)
    for i, rec in enumerate(rows_v[1:], start=2):
        rec = list(rec) + [None] * (n - len(rec))
        if all(_is_missing(c) for c in rec):
            continue
        frec = rows_f[i - 1] if i - 1 < len(rows_f) else ()
        for j, (v, f) in enumerate(zip(rec, frec)):
            if v is None and isinstance(f, str) and f.startswith("="):
                raw.formulas.add((i, j))
        raw.rows.append((i, rec))
    return raw


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
            rows.extend(itertools.islice(ws.iter_rows(min_row=1, values_only=True), MAX_ROWS + 2))
        else:
            for i, cells in enumerate(itertools.islice(ws.iter_rows(min_row=1), MAX_ROWS + 2), start=1):
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
    if len(rows) - 1 > MAX_ROWS:
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
    for k, (r, _) in enumerate(raw.rows):
        if (r, j) not in raw.percent:
            continue
        stored = cells[k]
        as_shown = float(decimal.Decimal(repr(float(stored))).scaleb(2))
        if in_percent:
            cells[k] = as_shown
            continue
        unit = f"in {col.unit}" if col is not None else "not a percentage column"
        problems.append(Problem(raw.label, f"cell formatted as a percentage: it stores {float(stored)!r} and shows "
                                           f"{as_shown!r} %, but the column is {unit}; format the cell as a number "
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


# --------------------------------------------------------------------------- cells


def _parse_number(cell: object, decimal: str, separator: str | None) -> float | str:
    """A float, or the rule the cell breaks (a str)."""
    if isinstance(cell, bool):
        return "TRUE/FALSE is not a number"
    if isinstance(cell, (int, float)):
        try:
            v = float(cell)
        except OverflowError:  # an integer of a workbook beyond float range (only a broken writer makes one)
            return "not a finite number"
        return v if math.isfinite(v) else "not a finite number"
    if isinstance(cell, (dt.datetime, dt.date, dt.time)):
        return "a date is not a number"
    s = str(cell).strip()
    if decimal == ",":
        if "." in s and (_NUMBER.fullmatch(s) or _COMMA_NUMBER.fullmatch(s.replace(".", ""))):
            return ("'.' in a number of a file whose decimal mark is ',' (thousands separator or mixed decimal "
                    "marks); write numbers like 1234,5")
        if not (_COMMA_NUMBER.fullmatch(s) or _NUMBER.fullmatch(s)):
            return "not a number"
        s = s.replace(",", ".")
    else:
        if "," in s:
            if _COMMA_NUMBER.fullmatch(s) or _NUMBER.fullmatch(s.replace(",", "")):
                where = "in a ','-separated file" if separator == "," else (
                    "in a tab-separated file" if separator == "\t" else "in a workbook text cell")
                return (f"a ',' inside a number {where} is ambiguous (decimal comma or thousands separator); "
                        "write the number with '.' as the decimal mark and no thousands separator")
            return "not a number"
        if not _NUMBER.fullmatch(s):
            return "not a number" + (": digits other than 0-9 (another script's digits)"
                                     if any(ch.isdigit() and not ch.isascii() for ch in s) else "")
        if separator == ";" and decimal == "?" and _THOUSANDS_DOT.fullmatch(s):
            return ("ambiguous in a ';'-separated file: '.' may be a decimal mark or a thousands separator "
                    "(1.234 or 1234); write decimals with ',' (1,234) or drop the thousands separator")
    v = float(s)
    return v if math.isfinite(v) else "not a finite number"


def _decimal_mark(cells: Iterable[object], separator: str | None) -> str:
    """'.' or ',' for the file, or '?' where only thousands-like '.' numbers show (see module notes)."""
    if separator != ";":
        return "."
    dot_shown = thousands_like = False
    for c in cells:
        if not isinstance(c, str):
            continue
        s = c.strip()
        if _COMMA_NUMBER.fullmatch(s):
            return ","
        if "." in s and _NUMBER.fullmatch(s):
            if _THOUSANDS_DOT.fullmatch(s):
                thousands_like = True
            else:
                dot_shown = True
    return "?" if thousands_like and not dot_shown else "."


def _parse_datetime(cell: object) -> dt.datetime | str:
    if isinstance(cell, dt.datetime):
        value = cell
    elif isinstance(cell, dt.date):
        value = dt.datetime(cell.year, cell.month, cell.day)
    elif isinstance(cell, (int, float)) and not isinstance(cell, bool):
        return "a number, not a date; format the cell as a date or write ISO 8601 (2024-03-05 14:30)"
    else:
        s = str(cell).strip()
        if not re.fullmatch(r"\d{4}-\d{2}-\d{2}([T ]\d{2}:\d{2}(:\d{2}(\.\d{1,6})?)?)?([+-]\d{2}:?\d{2}|Z)?", s):
            return "not an ISO 8601 date (write 2024-03-05 or 2024-03-05 14:30)"
        try:
            value = dt.datetime.fromisoformat(s)
        except ValueError:
            return "not a valid date (write 2024-03-05 or 2024-03-05 14:30)"
    if value.tzinfo is not None:
        return "time-zone offsets are not accepted; give local time without an offset"
    return value


def _text(cell: object) -> str:
    if isinstance(cell, bool):
        return "TRUE" if cell else "FALSE"
    if isinstance(cell, float) and cell.is_integer():
        return str(int(cell))
    if isinstance(cell, float):
        return repr(cell)
    if isinstance(cell, dt.datetime):
        return cell.isoformat(sep=" ")
    return " ".join(str(cell).split()) if isinstance(cell, str) else str(cell)


def _shown(cell: object) -> object:
    return cell.strip() if isinstance(cell, str) else cell


# --------------------------------------------------------------------------- frames


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
        values = columns.get(col.name, [None] * n_rows)
        data[col.name] = _series(col.kind, values)
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
        if all(v is None or (type(v) is dt.datetime and v.tzinfo is None) for v in values):
            return pd.Series(values, dtype="datetime64[us]")  # the same as through pd.Timestamp, 20 times faster
        return pd.Series([None if v is None else pd.Timestamp(v) for v in values], dtype="datetime64[us]")
    return pd.Series([None if v is None else str(v) for v in values], dtype="str")


def _build(raw: _Raw, tdef: Table, cmaps: dict[str, ColumnMap]) -> pd.DataFrame:
    """Apply the template to a raw sheet; raise InputError with every problem."""
    label = raw.label
    problems = list(raw.problems)
    # ---- header: rename, match the template, keep extras
    targets: list[tuple[int, str, str, ColumnMap | None]] = []  # (index, target, header, map)
    seen: dict[str, str] = {}
    names_lower = {n.lower(): n for n in tdef.names}
    unit_headers: set[str] = set()  # template columns written with a unit in the header (reported once)
    for j, head in enumerate(raw.header):
        shown = _norm_header(head)
        if not shown:
            if any(not _is_missing(cells[j]) for _, cells in raw.rows):
                problems.append(Problem(label, f"column {_letters(j)} has values but no header", row=1,
                                        column=_letters(j)))
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
    present = {t for _, t, _, _ in targets}
    for col in tdef.columns:
        if col.required and col.name not in present and col.name not in unit_headers:
            near = difflib.get_close_matches(col.name, [h for _, _, h, _ in targets], n=1, cutoff=0.6)
            hint = f"; found '{near[0]}': rename it or map it in {MAPPING_FILE}" if near else ""
            problems.append(Problem(label, f"required column '{col.name}' is missing{hint}", row=1, column=col.name))
    # ---- decimal mark from the number cells of the file (module notes, rule 4)
    number_idx = [j for j, t, _, _ in targets if t not in tdef.names or tdef.column(t).kind == NUMBER]
    decimal = _decimal_mark((cells[j] for _, cells in raw.rows for j in number_idx), raw.separator)
    # ---- cells
    n = len(raw.rows)
    sheet_rows = [r for r, _ in raw.rows]
    values: dict[str, list] = {}
    extra: dict[str, list] = {}
    headers: dict[str, str] = {}
    bad: set[tuple[int, str]] = set()  # (row index, target) of cells already refused
    by_column = list(zip(*(cells for _, cells in raw.rows))) if raw.rows else []
    for j, target, shown, cmap in targets:
        headers[target] = shown
        cells = list(by_column[j]) if by_column else []
        if raw.formulas:
            for k, (r, _) in enumerate(raw.rows):
                if (r, j) in raw.formulas:
                    problems.append(Problem(label, "formula without a stored result; open and save the file in a "
                                                   "spreadsheet program, or paste values", row=r, column=shown))
                    bad.add((k, target))
        if raw.percent:
            _percent_cells(raw, j, target, shown, tdef, cmap, cells, problems, bad)
        if target not in tdef.names:
            extra[target] = _extra_values(cells, decimal, raw.separator)
            problems += _extra_non_finite(cells, extra[target], decimal, raw.separator, label, sheet_rows, shown)
            continue
        col = tdef.column(target)
        fast = _fast_cells(col, cells, decimal, raw.separator, bad, target)
        if fast is not None:
            values[target] = fast * cmap.factor if cmap and col.kind == NUMBER else fast
            continue
        out: list = []
        for k, cell in enumerate(cells):
            if (k, target) in bad or _is_missing(cell):
                out.append(None)
                continue
            if col.kind == TEXT:
                out.append(_text(cell))
                continue
            parsed = _parse_number(cell, decimal, raw.separator) if col.kind == NUMBER else _parse_datetime(cell)
            if isinstance(parsed, str):
                problems.append(Problem(label, parsed, row=sheet_rows[k], column=shown, value=_shown(cell)))
                bad.add((k, target))
                out.append(None)
            else:
                out.append(parsed * cmap.factor if cmap and col.kind == NUMBER else parsed)
        values[target] = out
    # ---- total roll force -> per cm of roll width
    force_map = next((m for _, t, _, m in targets if m is not None and m.total_force), None)
    if force_map is not None:
        for name in (TOTAL_FORCE_COLUMN, ROLL_WIDTH_COLUMN):
            if isinstance(values.get(name), np.ndarray):
                values[name] = _as_list(values[name])
        widths = values.get(ROLL_WIDTH_COLUMN, [None] * n)
        forces = values[TOTAL_FORCE_COLUMN]
        for k in range(n):
            if forces[k] is None:
                continue
            width, row_width = force_map.roll_width_mm, widths[k]
            if width is not None and row_width is not None and not math.isclose(width, row_width, rel_tol=1e-9):
                problems.append(Problem(label, f"roll width {row_width:g} mm in this row differs from "
                                               f"{width:g} mm in {MAPPING_FILE}", row=sheet_rows[k],
                                        column=headers.get(ROLL_WIDTH_COLUMN, ROLL_WIDTH_COLUMN), value=row_width))
                bad.add((k, TOTAL_FORCE_COLUMN))
                forces[k] = None
                continue
            width = width if width is not None else row_width
            if width is None or not width > 0:
                problems.append(Problem(label, f"a total roll force needs the roll width: give {ROLL_WIDTH_COLUMN} "
                                               f"in the row or roll_width_mm in {MAPPING_FILE}", row=sheet_rows[k],
                                        column=headers[TOTAL_FORCE_COLUMN], value=_shown(_cell(raw, k, targets,
                                                                                           TOTAL_FORCE_COLUMN))))
                bad.add((k, TOTAL_FORCE_COLUMN))
                forces[k] = None
                continue
            forces[k] = forces[k] / (width / 10.0)
    # ---- bounds and non-empty cells
    for col in tdef.columns:
        if col.name not in values:
            continue
        shown = headers[col.name]
        cmap = next((m for _, t, _, m in targets if t == col.name), None)
        required = col.nonempty or col.name in tdef.key
        if isinstance(values[col.name], np.ndarray):
            if _column_clean(col, values[col.name], required):
                continue
            values[col.name] = _as_list(values[col.name])  # something to report: the loop below says what
        elif col.kind != NUMBER and (not required or None not in values[col.name]):
            continue  # no bounds, and nothing missing that must be there
        for k, v in enumerate(values[col.name]):
            if (k, col.name) in bad:
                continue
            if v is None:
                if col.nonempty or col.name in tdef.key:
                    problems.append(Problem(label, f"'{col.name}' must have a value in every row", row=sheet_rows[k],
                                            column=shown, value=_shown(_cell(raw, k, targets, col.name))))
                    bad.add((k, col.name))
                continue
            if col.kind == NUMBER and not _in_bounds(col, v):
                note = ""
                if cmap is not None and cmap.unit is not None:
                    note = f" (read as {cmap.unit}, converted to {v:g} {col.unit})"
                problems.append(Problem(label, f"outside the range {col.bound_text()}{note}", row=sheet_rows[k],
                                        column=shown, value=_shown(_cell(raw, k, targets, col.name))))
                bad.add((k, col.name))
    if isinstance(values.get("lot"), list):
        problems += _lot_id_problems(values["lot"], label, sheet_rows, headers.get("lot", "lot"), bad)
    df = frame_from_columns(tdef.name, values, extra, n_rows=n)
    problems += _key_problems(df, tdef, label, sheet_rows, headers, bad)
    problems += _rule_problems(df, tdef, label, sheet_rows, headers, bad)
    if problems:
        raise InputError(_sorted(problems))
    df.attrs["table"] = tdef.name
    df.attrs["file"] = label
    df.attrs["source_rows"] = SourceRows(sheet_rows)
    return df


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


# ---- fast paths: whole columns at once where every cell is plain. Each one
# returns None (or False) whenever a cell needs the cell-by-cell rules, which
# then run exactly as before; so results and messages do not depend on them.

#: a missing-value token as a regular expression (any case)
_MISSING_TOKEN = "|".join(re.escape(t) for t in sorted(MISSING_TOKENS, key=len, reverse=True) if t)

#: one cell of a date column: ISO 8601 without a time-zone offset (a subset
#: of what _parse_datetime accepts)
_PLAIN_DATE = r"[ \t]*[0-9]{4}-[0-9]{2}-[0-9]{2}(?:[T ][0-9]{2}:[0-9]{2}(?::[0-9]{2}(?:\.[0-9]{1,6})?)?)?[ \t]*"
_PLAIN_DATES = re.compile(rf"{_PLAIN_DATE}(?:\n{_PLAIN_DATE})*")
_DATES_OR_MISSING = re.compile(rf"(?:{_PLAIN_DATE}|[ \t]*(?i:{_MISSING_TOKEN})?[ \t]*)"
                               rf"(?:\n(?:{_PLAIN_DATE}|[ \t]*(?i:{_MISSING_TOKEN})?[ \t]*))*")


def _fast_cells(col: Column, cells: list, decimal: str, separator: str | None, bad: set, target: str):
    """A NUMBER column as a float array (NaN = missing), a TEXT or DATETIME
    column as a list (None = missing), when every cell is a text cell that
    the per-cell rules accept as it is; else None."""
    if not cells or (bad and any((k, target) in bad for k in range(len(cells)))):
        return None
    if set(map(type, cells)) != {str}:
        return None
    if col.kind == DATETIME:
        text = "\n".join(cells)
        if text.count("\n") != len(cells) - 1:
            return None
        try:
            if _PLAIN_DATES.fullmatch(text):
                return [dt.datetime.fromisoformat(c.strip()) for c in cells]
            if _DATES_OR_MISSING.fullmatch(text):
                return [None if _is_missing(c) else dt.datetime.fromisoformat(c.strip()) for c in cells]
        except ValueError:
            return None
        return None
    if col.kind == NUMBER:
        if decimal != "." or separator not in (",", "\t"):
            return None
        try:
            if not _NOT_NUMBER_CHAR.search("".join(cells)):
                values = np.array(list(map(float, cells)), dtype=float)
            else:
                missing = [_is_missing(c) for c in cells]
                present = [c for c, m in zip(cells, missing) if not m]
                if _NOT_NUMBER_CHAR.search("".join(present)):
                    return None
                it = iter(map(float, present))
                values = np.array([math.nan if m else next(it) for m in missing], dtype=float)
        except ValueError:
            return None
        return values if np.all(np.isfinite(values) | np.isnan(values)) else None
    if col.kind == TEXT:
        if _WHITESPACE.search("".join(cells)):
            cells = [" ".join(c.split()) for c in cells]
        tokens = {c for c in set(cells) if c.lower() in MISSING_TOKENS}
        return [None if t in tokens else t for t in cells] if tokens else cells
    return None


#: a character no plain decimal number has. With only digits, '.', 'e', 'E',
#: signs, spaces and tabs in a cell, float() accepts exactly what the rule of
#: _parse_number accepts for the '.' mark (sign, digits with one optional '.',
#: optional exponent, padding); float() raises on anything else (a lone '-',
#: '1.2.3', '1e'), and then the cell-by-cell rules say what is wrong.
_NOT_NUMBER_CHAR = re.compile(r"[^0-9.eE+\- \t]")
#: any character str.split() splits on (re's \s is the same Unicode set)
_WHITESPACE = re.compile(r"\s")


def _as_list(values: np.ndarray) -> list:
    return [None if math.isnan(v) else v for v in values.tolist()]


def _column_clean(col: Column, values: np.ndarray, nonempty: bool) -> bool:
    """No missing value where one is refused and every value within bounds."""
    present = ~np.isnan(values)
    if nonempty and not present.all():
        return False
    v = values[present]
    if col.low is not None and (np.any(v < col.low) or (not col.low_inclusive and np.any(v == col.low))):
        return False
    if col.high is not None and (np.any(v > col.high) or (not col.high_inclusive and np.any(v == col.high))):
        return False
    return True


def _cell(raw: _Raw, k: int, targets, target: str) -> object:
    for j, t, _, _ in targets:
        if t == target:
            return raw.rows[k][1][j]
    return None


def _letters(j: int) -> str:
    s = ""
    j += 1
    while j:
        j, rem = divmod(j - 1, 26)
        s = chr(65 + rem) + s
    return s


def _in_bounds(col: Column, v: float) -> bool:
    if col.low is not None and (v < col.low or (v == col.low and not col.low_inclusive)):
        return False
    if col.high is not None and (v > col.high or (v == col.high and not col.high_inclusive)):
        return False
    return True


def _extra_values(cells: list, decimal: str, separator: str | None) -> list:
    present = [c for c in cells if not _is_missing(c)]
    parsed = [_parse_number(c, decimal, separator) for c in present]
    if all(isinstance(p, float) for p in parsed):
        it = iter(parsed)
        return [None if _is_missing(c) else next(it) for c in cells]
    return [None if _is_missing(c) else _text(c) for c in cells]


_INFINITE_WORDS = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})


def _extra_non_finite(cells: list, values: list, decimal: str, separator: str | None, label: str,
                      sheet_rows: list[int], header: str) -> list[Problem]:
    """An extra column of numbers in which some cells are infinite (``inf``,
    ``1e999``): those cells are refused, as in a template column, rather than
    turning the whole column into text (a missing value is empty or ``NA``)."""
    if not any(isinstance(v, str) for v in values):
        return []  # every present cell a finite number (or the column empty)
    odd: list[int] = []
    for k, c in enumerate(cells):
        if _is_missing(c):
            continue
        parsed = _parse_number(c, decimal, separator)
        if parsed == "not a finite number" or (isinstance(c, str) and c.strip().lower() in _INFINITE_WORDS):
            odd.append(k)
        elif isinstance(parsed, str):
            return []  # a text column: kept as text
    return [Problem(label, "not a finite number; leave the cell empty or write NA for a missing value",
                    row=sheet_rows[k], column=header, value=_shown(cells[k])) for k in odd]


def _key_problems(df, tdef: Table, label, sheet_rows, headers, bad) -> list[Problem]:
    if not bad and not any(df[c].isna().any() for c in tdef.key):
        keys = list(zip(*(df[c].tolist() for c in tdef.key)))
        if len(set(keys)) == len(keys):
            return []  # every key given and none repeated
    problems = []
    first: dict[tuple, int] = {}
    for k, key in enumerate(zip(*(df[c].tolist() for c in tdef.key))):
        if any((k, c) in bad for c in tdef.key) or any(_nan(v) for v in key):
            continue
        if key in first:
            names = ", ".join(tdef.key)
            shown = ", ".join(_fmt(v) for v in key)
            what = "lot row" if tdef.key == ("lot",) else "row for this key"
            problems.append(Problem(label, f"duplicate {what}: ({names}) = ({shown}) is already on row "
                                           f"{sheet_rows[first[key]]}; one row is expected",
                                    row=sheet_rows[k], column=headers.get(tdef.key[-1], tdef.key[-1]),
                                    value=key[-1] if len(key) > 1 else key[0]))
        else:
            first[key] = k
    return problems


# --------------------------------------------------------------------------- lot identity


#: dash-like characters folded to '-' in a lot key: Unicode's dash punctuation (category Pd: hyphen,
#: non-breaking hyphen, figure dash, en and em dash ...) and the minus sign U+2212 (category Sm)
_DASHES = re.compile(r"[\u2010-\u2015\u2212\u2e3a\u2e3b\ufe58\ufe63\uff0d\u058a\u05be\u1400\u1806\u2e17\u2e1a"
                     r"\u2e40\u301c\u3030\u30a0\ufe31\ufe32]")


def lot_key(lot: str) -> str:
    """The identity of a lot id: two ids with the same key are one lot.

    Unicode NFKC normalisation (compatibility forms: full-width letters,
    ligatures; Unicode Standard Annex #15), every dash-like character as
    ``-``, then case folding (``str.casefold``, Unicode's full case folding).
    ``Q-100`` and ``Q‑100`` (U+2011), ``VX25-001`` and ``vx25-001``, ``Ａ1``
    and ``A1`` have one key. Control and format characters are refused before
    (:func:`lot_id_rule`), so they never reach a key.
    """
    return _DASHES.sub("-", unicodedata.normalize("NFKC", lot)).casefold()


def lot_id_rule(lot: str) -> str | None:
    """The rule a lot id breaks, or None. Refused: control characters
    (Unicode category Cc) and format characters (Cf: a byte-order mark
    U+FEFF, zero-width spaces and joiners, direction marks), which print as
    nothing and would make a second lot that looks like the first."""
    found = [ch for ch in lot if unicodedata.category(ch) in ("Cc", "Cf")]
    if not found:
        return None
    names = ", ".join(sorted({f"U+{ord(ch):04X} {unicodedata.name(ch, 'control character')}" for ch in found}))
    return (f"lot id holds an invisible character ({names}), which would make a second lot that prints like "
            "the first (two exports pasted together?); remove it")


def _visible(lot: str) -> str:
    """A lot id with its invisible and non-ASCII characters written as escapes, for a message."""
    return lot.encode("ascii", "backslashreplace").decode("ascii")


def _lot_id_problems(lots: list, label: str, sheet_rows: list[int], header: str, bad: set) -> list[Problem]:
    """Invisible characters in a lot id, and two spellings of one lot in a file (same :func:`lot_key`)."""
    distinct = set(lots) - {None}
    joined = "".join(distinct)
    if joined.isascii() and joined.isprintable() and len({lot.lower() for lot in distinct}) == len(distinct):
        return []  # the common case, decided on the distinct ids: for printable ASCII the key is lower()
    problems: list[Problem] = []
    spelled: dict[str, tuple[str, int]] = {}  # key -> (first spelling, its sheet row)
    for k, lot in enumerate(lots):
        if lot is None or (k, "lot") in bad:
            continue
        rule = lot_id_rule(lot)
        if rule is not None:
            problems.append(Problem(label, rule, row=sheet_rows[k], column=header, value=_visible(lot)))
            bad.add((k, "lot"))
            continue
        key = lot_key(lot)
        first = spelled.setdefault(key, (lot, sheet_rows[k]))
        if first[0] != lot:
            problems.append(Problem(label, f"lot {_visible(lot)!r} is lot {_visible(first[0])!r} of row {first[1]} "
                                           "written another way (case, dash or compatibility form); one lot has "
                                           "one spelling: correct one of them", row=sheet_rows[k], column=header,
                                    value=_visible(lot)))
            bad.add((k, "lot"))
    return problems


def _nan(v) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def _fmt(v) -> str:
    return f"{v:g}" if isinstance(v, float) else str(v)


def _rule_problems(df, tdef: Table, label, sheet_rows, headers, bad) -> list[Problem]:
    problems = []
    for rule in tdef.rules:
        if rule in ROW_RULES_HOLD and ROW_RULES_HOLD[rule](df):
            continue  # no row breaks it (checked on whole columns); else the row-by-row check says where
        check = ROW_RULES[rule]
        for k, col, value, text in check(df, bad):
            row = sheet_rows[k] if k is not None else None
            value = value.item() if hasattr(value, "item") else value
            problems.append(Problem(label, f"{text} (rule: {rule})", row=row, column=headers.get(col, col),
                                    value=value))
    return problems


def _ok(df, bad, k, *cols) -> bool:
    return all((k, c) not in bad and not _nan(df[c].iloc[k]) for c in cols)


def _rule_density(df, bad):
    env, ske = "envelope_density_g_cm3", "skeletal_density_g_cm3"
    for k in range(len(df)):
        if _ok(df, bad, k, env, ske) and df[env].iloc[k] > df[ske].iloc[k]:
            e, s = df[env].iloc[k], df[ske].iloc[k]
            yield k, env, e, f"envelope density {e:g} g/cm3 is above the skeletal density {s:g} g/cm3"


def _rule_sieve_sum(df, bad):
    totals: dict[str, float] = {}
    first: dict[str, int] = {}
    for k, lot in enumerate(df["lot"].tolist()):
        if _nan(lot):
            continue
        first.setdefault(lot, k)
        if _ok(df, bad, k, "retained_g"):
            totals[lot] = totals.get(lot, 0.0) + df["retained_g"].iloc[k]
        elif (k, "retained_g") in bad:
            totals[lot] = math.nan
    for lot, total in totals.items():
        if total == 0:
            yield first[lot], "retained_g", 0.0, f"lot {lot!r}: the retained masses sum to 0 g"


def _rule_d_order(df, bad):
    cols = ("d10_um", "d50_um", "d90_um")
    for k in range(len(df)):
        if _ok(df, bad, k, *cols):
            d10, d50, d90 = (df[c].iloc[k] for c in cols)
            if not d10 <= d50 <= d90:
                col = "d10_um" if d10 > d50 else "d90_um"
                yield k, col, df[col].iloc[k], f"d10 {d10:g}, d50 {d50:g}, d90 {d90:g} um are not in order"


def _rule_cup_depth(df, bad):
    for k in range(len(df)):
        if _ok(df, bad, k, "cup_depth_mm", "thickness_mm"):
            c, t = df["cup_depth_mm"].iloc[k], df["thickness_mm"].iloc[k]
            if not 2 * c < t:
                yield k, "cup_depth_mm", c, f"two cups of {c:g} mm do not fit in a tablet {t:g} mm thick"


#: schema rule text -> checker yielding (row index, column, value, message).
#: Every rule named in ``schema.TABLES`` has one (a test checks this).
ROW_RULES = {
    "envelope_density_g_cm3 <= skeletal_density_g_cm3": _rule_density,
    "each lot's retained masses sum to more than 0 g": _rule_sieve_sum,
    "d10_um <= d50_um <= d90_um": _rule_d_order,
    "2 * cup_depth_mm < thickness_mm": _rule_cup_depth,
}


def _floats(df, *cols) -> list[np.ndarray]:
    return [df[c].to_numpy(dtype=float, na_value=np.nan) for c in cols]


def _density_holds(df) -> bool:
    env, ske = _floats(df, "envelope_density_g_cm3", "skeletal_density_g_cm3")
    return not np.any(env > ske)  # NaN compares False, as a missing value breaks no rule


def _sieve_sum_holds(df) -> bool:
    """Every lot with a retained mass has one above 0 g: masses passed the
    bounds (>= 0), so a zero sum means all zero."""
    lots = df["lot"]
    known = lots.notna().to_numpy()
    codes, _ = pd.factorize(lots[known])
    mass = df["retained_g"].to_numpy(dtype=float, na_value=np.nan)[known]
    if np.any(mass < 0):
        return False
    have = np.bincount(codes, weights=~np.isnan(mass), minlength=codes.max(initial=-1) + 1)
    positive = np.bincount(codes, weights=mass > 0, minlength=codes.max(initial=-1) + 1)
    return not np.any((have > 0) & (positive == 0))


def _d_order_holds(df) -> bool:
    d10, d50, d90 = _floats(df, "d10_um", "d50_um", "d90_um")
    known = ~(np.isnan(d10) | np.isnan(d50) | np.isnan(d90))
    return bool(np.all((d10[known] <= d50[known]) & (d50[known] <= d90[known])))


def _cup_depth_holds(df) -> bool:
    cup, thick = _floats(df, "cup_depth_mm", "thickness_mm")
    known = ~(np.isnan(cup) | np.isnan(thick))
    return bool(np.all(2 * cup[known] < thick[known]))


#: schema rule text -> True when no row breaks the rule, from whole columns
#: (a fast pre-check; where it is not True the row checks of ROW_RULES run)
ROW_RULES_HOLD = {
    "envelope_density_g_cm3 <= skeletal_density_g_cm3": _density_holds,
    "each lot's retained masses sum to more than 0 g": _sieve_sum_holds,
    "d10_um <= d50_um <= d90_um": _d_order_holds,
    "2 * cup_depth_mm < thickness_mm": _cup_depth_holds,
}


def _sorted(problems: list[Problem]) -> list[Problem]:
    return sorted(problems, key=lambda p: (p.file, p.row if p.row is not None else 0))


def _suggest(name: str, choices: Iterable[str]) -> str:
    near = difflib.get_close_matches(str(name), list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{near[0]}'?)" if near else ""


# --------------------------------------------------------------------------- public readers


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
        values, formulas = _open_workbook(path, path.name)
        try:
            sheets = values.sheetnames
            by_name = {_norm_header(s).lower(): s for s in sheets}
            if name in by_name and _hidden(values, by_name[name]):
                raise InputError(_hidden_sheet(path.name, by_name[name]))
            if name in by_name:
                sheet = by_name[name]
            elif len(sheets) == 1:
                sheet = sheets[0]
            else:
                raise InputError(Problem(path.name, f"no sheet named '{name}' and more than one sheet "
                                                    f"({', '.join(sheets)})"))
            label = path.name if len(sheets) == 1 else f"{path.name} (sheet {sheet})"
            raw = _read_sheet(values, formulas, sheet, label)
        finally:
            values.close()
            formulas.close()
    elif path.suffix.lower() in UNSUPPORTED_SUFFIXES:
        raise InputError(Problem(path.name, "this spreadsheet format is not read; save as .xlsx or CSV UTF-8"))
    else:
        raw = _read_csv(path.read_bytes(), path.name)
    return _build(raw, definition or TABLES[name], cmaps)


def read_folder(folder: Path, mapping: Mapping | None = None, *,
                known_lots: Iterable[str] | None = None) -> Ingest:
    """Read every recognised file of an ingest folder (see the module notes).

    ``known_lots`` are the lots already in the store. When given, the folder
    is also checked against them (:func:`cross_check`): results for a lot with
    no process record here or there, and, for an empty store, the tables a
    first ingest needs. The store repeats that check inside its transaction.
    Raises one :class:`InputError` with the problems of every file.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(Problem(str(folder), "not a folder"))
    workbooks: dict[Path, tuple] = {}  # open workbooks, read once for their sheet names and their cells
    try:
        with bulk():
            return _read_folder(folder, mapping, known_lots, workbooks)
    finally:
        for values, formulas in workbooks.values():
            values.close()
            formulas.close()


def _read_folder(folder: Path, mapping: Mapping | None, known_lots, workbooks: dict) -> Ingest:
    problems: list[Problem] = []
    warnings: list[str] = []
    sources: dict[str, dict] = {}
    other: dict[str, dict] = {}
    plan: dict[str, tuple[Path, str | None, str]] = {}  # table -> (file, sheet or None, label)
    spec_path = mapping_path = None
    for entry in sorted(folder.iterdir(), key=lambda p: p.name.lower()):
        name, suffix = entry.name, entry.suffix.lower()
        stem = _norm_header(entry.stem).lower()
        if entry.is_dir():
            warnings.append(f"subfolder {name}/ ignored (only files directly in {folder.name}/ are read)")
        elif name.startswith((".", "~$")):
            warnings.append(f"{name} ignored (hidden or temporary file)")
        elif name.lower() == SPEC_FILE:
            spec_path = entry
        elif name.lower() == MAPPING_FILE:
            mapping_path = entry
        elif stem.startswith("readme"):
            continue
        elif suffix in UNSUPPORTED_SUFFIXES:
            problems.append(Problem(name, "this spreadsheet format is not read; save as .xlsx or CSV UTF-8"))
        elif suffix in DATA_SUFFIXES and stem in TABLES:
            _plan(plan, stem, (entry, None, name), problems)
        elif suffix in WORKBOOK_SUFFIXES:
            _plan_workbook(entry, plan, problems, warnings, workbooks)
        elif suffix in DATA_SUFFIXES or stem in TABLES:
            problems.append(Problem(name, f"not a recognised table file{_suggest(stem, TABLES)}; recognised: "
                                          f"{', '.join(f'{t}.csv' for t in TABLES)} (or .xlsx), "
                                          f"{SPEC_FILE}, {MAPPING_FILE}"))
        else:
            warnings.append(f"{name} ignored (not a table file; recognised: {', '.join(TABLES)} as .csv or "
                            f".xlsx, {SPEC_FILE}, {MAPPING_FILE})")
    if mapping is None and mapping_path is not None:
        try:
            mapping = read_mapping(mapping_path)
        except InputError as exc:
            raise InputError(exc.problems) from None  # a broken mapping would garble every file's errors
        other[MAPPING_FILE] = {"file": mapping_path.name, "sha256": mapping.sha256, "rows": None}
    elif mapping_path is not None:
        warnings.append(f"{mapping_path.name} in the folder ignored: a mapping was given")
    if not plan and not problems:
        problems.append(Problem(folder.name or str(folder), "no table files found; expected "
                                f"{', '.join(f'{t}.csv' for t in TABLES)} (or .xlsx)"))
    tables: dict[str, pd.DataFrame] = {}
    failed: set[str] = set()
    for tname in (t for t in TABLES if t in plan):
        path, sheet, label = plan[tname]
        try:
            if sheet is None:
                df = read_table(path, tname, mapping)
            else:
                df = _build(_read_sheet(*workbooks[path], sheet, label), TABLES[tname],
                            (mapping or Mapping()).for_table(tname))
        except InputError as exc:
            problems += exc.problems
            failed.add(tname)
            continue
        tables[tname] = df
        sources[tname] = {"file": label, "sha256": _sha256(path), "rows": len(df)}
        if len(df) == 0:
            warnings.append(f"{label} has a header but no data rows")
    spec = None
    if spec_path is not None:
        try:
            spec = read_spec(spec_path)
            other[SPEC_FILE] = {"file": spec_path.name, "sha256": _sha256(spec_path), "rows": None}
        except InputError as exc:
            problems += exc.problems
    ingest = Ingest(tables, sources, spec, warnings, folder, other)
    if "process" not in failed:
        problems += cross_check(ingest, known_lots, unread=failed)
    if problems:
        raise InputError(problems)
    return ingest


def _plan(plan: dict, table: str, item: tuple, problems: list[Problem]) -> None:
    if table in plan:
        problems.append(Problem(item[2], f"table '{table}' is given twice: also in {plan[table][2]}"))
    else:
        plan[table] = item


def _plan_workbook(path: Path, plan: dict, problems: list[Problem], warnings: list[str], workbooks: dict) -> None:
    try:
        workbooks[path] = _open_workbook(path, path.name)
    except InputError as exc:
        problems += exc.problems
        return
    sheets = workbooks[path][0].sheetnames
    found = [s for s in sheets if _norm_header(s).lower() in TABLES]
    if not found:
        problems.append(Problem(path.name, f"not a recognised table file: neither the file nor any of its sheets "
                                           f"({', '.join(sheets)}) is named after a table; tables: "
                                           f"{', '.join(TABLES)}"))
        return
    for s in sheets:
        if s in found and _hidden(workbooks[path][0], s):
            problems.append(_hidden_sheet(path.name, s))
        elif s in found:
            _plan(plan, _norm_header(s).lower(), (path, s, f"{path.name} (sheet {s})"), problems)
        else:
            warnings.append(f"{path.name}: sheet '{s}' ignored (not a table name)")


def _hidden(workbook, sheet: str) -> bool:
    """A sheet a person does not see: state 'hidden' or 'veryHidden' (ECMA-376 Part 1, §18.18.68)."""
    return getattr(workbook[sheet], "sheet_state", "visible") != "visible"


def _hidden_sheet(file: str, sheet: str) -> Problem:
    return Problem(file, f"sheet '{sheet}' is named after a table but hidden: what a person sees and what would be "
                         "read differ; unhide it if it holds the data, or delete or rename it")


def _sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def cross_check(ingest: Ingest, known_lots: Iterable[str] | None, unread: Iterable[str] = ()) -> list[Problem]:
    """Rules across tables, given the lots already in the store.

    ``known_lots=None`` means the store is not known yet and nothing is
    checked. Otherwise: every lot of a result table needs a process record in
    this ingest or in the store; and an empty store needs every required table
    (``unread`` names tables that are there but failed to read).
    """
    if known_lots is None:
        return []
    known = set(known_lots)
    problems: list[Problem] = []
    if not known:
        missing = [t.name for t in TABLES.values()
                   if t.required and t.name not in ingest.tables and t.name not in set(unread)]
        if missing:
            needed = ", ".join(t.name for t in TABLES.values() if t.required)
            where = ingest.folder.name if ingest.folder is not None else "input"
            problems += [Problem(where, f"required table '{m}' is missing: the first ingest into an empty store "
                                        f"needs {needed}") for m in missing]
    with_process = known | set(ingest.tables["process"]["lot"]) if "process" in ingest.tables else known
    # one spelling per lot (lot_key): against the store first, then against this folder's process table
    key = {lot: lot_key(lot) for lot in known}  # computed once per distinct id
    for df in ingest.tables.values():
        key.update((lot, lot_key(lot)) for lot in set(df["lot"].tolist()) - key.keys())
    spelling: dict[str, tuple[str, str]] = {}
    for lot in sorted(known):
        spelling.setdefault(key[lot], (lot, "in the store"))
    if "process" in ingest.tables:
        process_label = ingest.sources.get("process", {}).get("file", "process")
        for lot in ingest.tables["process"]["lot"].tolist():
            spelling.setdefault(key[lot], (lot, f"in {process_label}"))
    # a stored id is never refused: a store written before this rule may hold two spellings of one lot
    respelled_ids = {lot for lot, k in key.items() if lot not in known and spelling.get(k, (lot,))[0] != lot}
    for tname, df in ingest.tables.items():
        rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
        label = ingest.sources.get(tname, {}).get("file", tname)
        orphans: dict[str, list[int]] = {}
        respelled: dict[str, list[int]] = {}
        for k, lot in enumerate(df["lot"].tolist()):
            if lot in respelled_ids:
                respelled.setdefault(lot, []).append(rows[k])
            elif lot not in with_process:
                orphans.setdefault(lot, []).append(rows[k])
        for lot, rs in respelled.items():
            other, where = spelling[key[lot]]
            problems.append(Problem(label, f"lot {_visible(lot)!r} is lot {_visible(other)!r} {where}, written "
                                           f"another way (case, dash or compatibility form; {_span(rs)}); one lot "
                                           f"has one spelling: write it {_visible(other)!r}",
                                    row=rs[0], column="lot", value=_visible(lot)))
        if tname == "process":
            continue
        for lot, rs in orphans.items():
            problems.append(Problem(label, f"lot {lot!r} has no process record in this folder or in the store "
                                           f"({_span(rs)}); add it to process", row=rs[0], column="lot", value=lot))
    return problems


def _span(rows: list[int]) -> str:
    return f"row {rows[0]}" if len(rows) == 1 else f"rows {rows[0]}-{rows[-1]}, {len(rows)} rows"
