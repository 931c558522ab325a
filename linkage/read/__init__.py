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
table holds it on the sheet of that name (in any case) or on its only sheet;
a sheet in it named after another table is refused (its rows would not be
read; as its only sheet, which table its rows are is not guessed). A
workbook with any other name is read sheet by sheet, and each sheet
named after a table (in any case) is that table. The other sheets are listed
in the warnings, and, when a table is missing or a lot has no process
record, in that problem (a sheet whose name is near the table's, such as
``Process data``, with "name it 'process'"). Beside them the
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
  text otherwise. A header that is a misspelling of a template column the
  file lacks (difflib ratio at least ``table.MISSPELLING_CUTOFF`` and a change
  inside its words, never a word added: ``table._misspelling_of``) is refused,
  "did you mean ...?"; map it in ``columns.toml`` with
  ``extra = true`` to keep it as an extra column. The extra columns each file
  kept are listed (``table.extra_columns``, ``Ingest.extra_columns``; the
  ingest says them), with the template column the file *has* that a header
  would be taken for a misspelling of (the same rule): a near-twin, kept but
  warned of. A column mapped in ``columns.toml`` is never warned of.
- A cell that is empty or one of ``schema.MISSING_TOKENS`` (``NA``, ``n/a``,
  ``-`` ..., any case) is missing. In a key or a column that must be filled
  (``nonempty``) it is refused; in another required column it is kept as
  missing and said (``folder.blank_required``, ``Ingest.blank_required``).
- A value outside its bounds that a common unit slip explains (a density in
  kg/m3, a force in N for kN, a total roll force) is refused with the slip
  named (``cells.bound_slip``, ``cells.total_force_slip``).
- Dates are ISO 8601 (``2024-03-05`` or ``2024-03-05 14:30``), or date cells
  of a workbook. ``05.03.2024`` or ``3/5/2024`` are refused, never guessed.
  Time-zone offsets are refused: give local time.
- Text cells are trimmed and runs of spaces become one (``" EX-001 "`` is
  ``EX-001``).
- Blank rows are skipped; row numbers still count them, as a spreadsheet does.
- The header is row 1. A title above it (row 1 holding no column of the
  table while a row below, within ``table.TITLE_ROWS``, holds ``lot`` and
  another one) is one problem naming the header's row.
- A problem in a workbook cell carries its A1 reference (``Problem.cell``,
  ``C4``); its value is shown as the sheet shows it (a date in ISO 8601,
  ``exceptions.shown_value``), and a formula cell's message gives the
  formula.

Separator and decimal mark (the rule that keeps numbers from being misread)
--------------------------------------------------------------------------
1. The separator is read from the header line (row 1): the one of ``,``,
   ``;`` and tab that occurs there outside double quotes. If none occurs the
   file has one column. If more than one occurs, the one that splits every row
   into as many fields as the header is taken; if that is not exactly one of
   them, the file is refused.
2. A row with more non-empty fields than the header, or fewer fields, is
   refused (this is what an unquoted decimal comma in a ``,`` file causes).
   Where ``lot`` is the first column its field is still read (no stray field
   comes before it): the message names the lot, and the lot's rows in the
   other files are not called lots without a process record.
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

Layout
------
The package reads in steps, one module each: :mod:`~linkage.read.sniff`
(bytes of a CSV file: encodings, the separator, the records),
:mod:`~linkage.read.workbook` (sheets of a workbook), :mod:`~linkage.read.mapping`
(``columns.toml``: headers and units), :mod:`~linkage.read.cells` (one
cell, or a whole column, as a number, date or text), :mod:`~linkage.read.table`
(a raw sheet checked against the template), :mod:`~linkage.read.rules` and
:mod:`~linkage.read.lots` (keys, row rules and lot identity) and
:mod:`~linkage.read.folder` (which file is which table; the checks across
tables). The names below are the public ones; the limits live here, in the
package, and are looked up when a file is read (so that a test can lower them).
"""

from __future__ import annotations

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

# the modules read the limits above from this package, so they are imported after them
from linkage.read.cells import _parse_number  # noqa: E402
from linkage.read.folder import Ingest, cross_check, read_folder  # noqa: E402
from linkage.read.lots import lot_id_rule, lot_key  # noqa: E402
from linkage.read.mapping import (  # noqa: E402
    ROLL_WIDTH_COLUMN, TOTAL_FORCE_COLUMN, TOTAL_FORCE_UNITS, UNITS, ColumnMap, Mapping, _unit_map, read_mapping)
from linkage.read.rules import ROW_RULES, ROW_RULES_HOLD  # noqa: E402
from linkage.read.sniff import _read_csv, _records  # noqa: E402
from linkage.read.table import SourceRows, bulk, frame_from_columns, read_table  # noqa: E402
from linkage.read.workbook import _read_sheet, _shows_percent  # noqa: E402

__all__ = [
    "DATA_SUFFIXES", "MAPPING_FILE", "MAX_COLUMNS", "MAX_MAPPING_BYTES", "MAX_ROWS", "ROLL_WIDTH_COLUMN",
    "ROW_RULES", "ROW_RULES_HOLD", "SPEC_FILE", "TOTAL_FORCE_COLUMN", "TOTAL_FORCE_UNITS", "UNITS",
    "UNSUPPORTED_SUFFIXES", "WORKBOOK_SUFFIXES", "ColumnMap", "Ingest", "Mapping", "SourceRows", "bulk",
    "cross_check", "frame_from_columns", "lot_id_rule", "lot_key", "read_folder", "read_mapping", "read_table",
]
