"""An ingest folder: which file is which table, reading them all, and the checks across tables."""

from __future__ import annotations

import difflib
import hashlib
import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

import pandas as pd

from linkage.exceptions import InputError, Problem
from linkage.read import DATA_SUFFIXES, MAPPING_FILE, SPEC_FILE, UNSUPPORTED_SUFFIXES, WORKBOOK_SUFFIXES
from linkage.read.lots import row_span, _visible, lot_key
from linkage.read.mapping import UNITS, Mapping, _norm_unit, _suggest, read_mapping
from linkage.read.raw import _norm_header
from linkage.read.table import _build, bulk, read_table, with_cells
from linkage.read.workbook import (_hidden, _hidden_sheet, _only_sheet_table, _open_workbook, _read_sheet,
                                   _table_sheet)
from linkage.schema import TABLES
from linkage.spec import Spec, read_spec


@dataclass
class Ingest:
    """What :func:`read_folder` found: checked tables and where they came from.

    ``sources[table]`` is ``{"file", "sha256", "rows"}``; ``other_sources``
    holds the same for ``spec.toml`` and ``columns.toml`` when present.
    Each table keeps ``attrs["file"]`` and ``attrs["source_rows"]``
    (spreadsheet row of each data row). ``unusual`` holds the values judged
    without history (:func:`linkage.plausible.sieve_apertures`) that were
    taken deliberately (``accept_unusual``), as records for the audit trail.
    ``extra_columns`` holds, per file (as ``sources`` names it), the extra
    columns it kept (:func:`linkage.read.table.extra_columns`); it is said,
    never stored. ``blank_required`` holds, per file, the blank cells of its required columns that may be blank
    (:func:`blank_required`): read as missing values, said, never refused.
    """

    tables: dict[str, pd.DataFrame]
    sources: dict[str, dict]
    spec: Spec | None = None
    warnings: list[str] = field(default_factory=list)
    folder: Path | None = None
    other_sources: dict[str, dict] = field(default_factory=dict)
    unusual: list[dict] = field(default_factory=list)
    extra_columns: dict[str, list[dict]] = field(default_factory=dict)
    blank_required: dict[str, list[dict]] = field(default_factory=dict)

    def lots(self) -> list[str]:
        """Every lot named in any table, process lots first, in file order."""
        seen: dict[str, None] = {}
        for name in TABLES:
            if name in self.tables:
                seen.update(dict.fromkeys(self.tables[name]["lot"].tolist()))
        return list(seen)


def read_folder(folder: Path, mapping: Mapping | None = None, *,
                known_lots: Iterable[str] | None = None, accept_unusual: bool = False) -> Ingest:
    """Read every recognised file of an ingest folder (see the module notes).

    ``known_lots`` are the lots already in the store. When given, the folder
    is also checked against them (:func:`cross_check`): results for a lot with
    no process record here or there, and, for an empty store, the tables a
    first ingest needs. The store repeats that check inside its transaction.
    Raises one :class:`InputError` with the problems of every file; the
    checks across files run on the lots read from every file, a refused one
    included (its rows whose lot cell was read and not refused), unless the
    process table's lots could not be read at all. The refusal carries the
    tables read whole as ``exc.read`` (an :class:`Ingest`), so that the
    ingest can judge their values against the store's history beside it
    (:meth:`linkage.store.LotStore.unusual_beside`), and as ``exc.judged``
    the records of the values judged without history.

    Values that no measurement of the kind can hold, judged without history
    (:data:`linkage.plausible.JUDGED_WITHOUT_HISTORY`: a sieve stack in mm
    for um), are refused with the others, also in a file refused for other
    cells; ``accept_unusual`` takes them deliberately (``Ingest.unusual``).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(Problem(str(folder), "not a folder"))
    workbooks: dict[Path, tuple] = {}  # open workbooks, read once for their sheet names and their cells
    try:
        with bulk():
            return _read_folder(folder, mapping, known_lots, workbooks, accept_unusual)
    finally:
        for values, formulas in workbooks.values():
            values.close()
            formulas.close()


def _plan_files(folder: Path, plan: dict, problems: list, warnings: list, workbooks: dict,
                unread: list) -> tuple[Path | None, Path | None]:
    """Sort the folder's files: each table file (or workbook sheet) planned for reading into ``plan``, a file
    that cannot be read into ``problems``, one ignored into ``warnings``; returns the spec file and the column
    mapping file (None where the folder has none)."""
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
        elif stem.startswith("readme") or name.lower() == PLAN_FILE:
            continue  # plan.json: read by _planned_not_made
        elif suffix in UNSUPPORTED_SUFFIXES:
            problems.append(Problem(name, "this spreadsheet format is not read; save as .xlsx or CSV UTF-8"))
        elif suffix in DATA_SUFFIXES and stem in TABLES:
            _plan(plan, stem, (entry, None, name), problems)
            if suffix in WORKBOOK_SUFFIXES:
                _other_sheets(entry, stem, workbooks, warnings, unread)
        elif suffix in WORKBOOK_SUFFIXES:
            _plan_workbook(entry, plan, problems, warnings, workbooks, unread)
        elif suffix in DATA_SUFFIXES or stem in TABLES:
            problems.append(Problem(name, f"not a recognised table file{_suggest(stem, TABLES)}; recognised: "
                                          f"{', '.join(f'{t}.csv' for t in TABLES)} (or .xlsx), "
                                          f"{SPEC_FILE}, {MAPPING_FILE}"))
        else:
            warnings.append(f"{name} ignored (not a table file; recognised: {', '.join(TABLES)} as .csv or "
                            f".xlsx, {SPEC_FILE}, {MAPPING_FILE})")
    return spec_path, mapping_path


def _read_folder(folder: Path, mapping: Mapping | None, known_lots, workbooks: dict,
                 accept_unusual: bool = False) -> Ingest:
    problems: list[Problem] = []
    warnings: list[str] = []
    sources: dict[str, dict] = {}
    other: dict[str, dict] = {}
    plan: dict[str, tuple[Path, str | None, str]] = {}  # table -> (file, sheet or None, label)
    unread: list[tuple[str, str, str | None]] = []  # sheets not read: (file, sheet, the table it is named after)
    spec_path, mapping_path = _plan_files(folder, plan, problems, warnings, workbooks, unread)
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
    tables, failed, lots_read, values_read = _read_tables(plan, mapping, workbooks, sources, problems, warnings)
    problems += _table_sheets_unread(unread, plan, failed)
    failed |= _only_sheet_tables(plan, workbooks) - set(plan)
    unusual, unusual_records = _without_history({**values_read, **tables}, sources, mapping)
    if not accept_unusual:
        problems += unusual
    spec = None
    if spec_path is not None:
        try:
            spec = read_spec(spec_path)
            other[SPEC_FILE] = {"file": spec_path.name, "sha256": _sha256(spec_path), "rows": None}
        except InputError as exc:
            problems += exc.problems
    ingest = Ingest(tables, sources, spec, warnings, folder, other, unusual_records if accept_unusual else [],
                    {sources[t]["file"]: list(df.attrs["extra_columns"]) for t, df in tables.items()
                     if df.attrs.get("extra_columns")}, _blank_cells(tables, sources, mapping))
    if "process" not in failed or "process" in lots_read:
        # across files on what was read, so that a refused cell of one file does not hide another file's
        # unknown lot until the next run: a refused file contributes the lots of its rows read
        refused = [lot for df in lots_read.values() for lot in df.attrs.get("refused_lots", [])]
        # process rows refused for their number of fields: the lot their lot field reads is as unsure as a
        # refused lot cell, and any other lot they hold is named in its results' messages
        unread_rows = lots_read["process"].attrs.get("unread_rows", []) if "process" in lots_read else []
        refused += [lot for _, lot, _ in unread_rows if lot is not None]
        problems += cross_check(Ingest({**tables, **lots_read}, sources, folder=folder), known_lots, unread=failed,
                                unsure=refused, unread_rows=unread_rows,
                                unread_sheets=[(f, s) for f, s, t in unread if t is None])
    problems += _planned_not_made(folder, {**lots_read, **tables}, known_lots)
    if problems:
        exc = InputError(_with_cell_references(problems, sources, (values_read, lots_read, tables)))
        exc.read = ingest  # the tables read whole, for the checks against the store beside these problems
        exc.judged = unusual_records  # the values judged without history (refused, unless taken deliberately)
        raise exc
    return ingest


def _blank_cells(tables: dict[str, pd.DataFrame], sources: dict, mapping: Mapping | None) -> dict[str, list[dict]]:
    """:func:`blank_required` of every table read, by file as ``sources`` names it; a file without any left out."""
    found = {sources[t]["file"]: blank_required(t, df, mapping) for t, df in tables.items()}
    return {file: columns for file, columns in found.items() if columns}


def _table_sheets_unread(unread: list[tuple[str, str, str | None]], plan: dict, failed: set[str]) -> list[Problem]:
    """A sheet named after a table in a workbook named after another table: refused, since its rows would not be
    read (as a data file not named after a table is). A table given only there is added to ``failed``: it is
    there but not read, so it is not also called missing, nor its lots' results unknown."""
    problems = []
    for file, sheet, table in unread:
        if table is None:
            continue
        problems.append(Problem(file, f"sheet '{sheet}' is named after the table '{table}', but a workbook named "
                                      f"after a table holds that table only: the sheet would not be read; move it "
                                      f"to a workbook of its own ({table}.xlsx), or rename {file} (a workbook not "
                                      "named after a table is read sheet by sheet)"))
        if table not in plan:
            failed.add(table)
    return problems


def _only_sheet_tables(plan: dict, workbooks: dict) -> set[str]:
    """The tables named by the only sheet of a workbook named after another table (``Process`` in
    ``ribbon.xlsx``, refused by :func:`linkage.read.workbook._table_sheet`): such a table may be there, so it
    is not also called missing."""
    named = set()
    for table, (path, sheet, _) in plan.items():
        if sheet is None and path in workbooks:
            other = _only_sheet_table(workbooks[path][0].sheetnames, table)
            if other is not None:
                named.add(other)
    return named


def _with_cell_references(problems: list[Problem], sources: dict, frames: tuple[dict, ...]) -> list[Problem]:
    """The folder's problems with the A1 reference of each workbook cell they name (the checks across files
    too), from the column letters each sheet read recorded (``attrs["cell_letters"]``)."""
    letters = {sources[t]["file"]: df.attrs["cell_letters"] for tables in frames for t, df in tables.items()
               if "cell_letters" in df.attrs and t in sources}
    return with_cells(problems, letters) if letters else problems


def _read_tables(plan: dict, mapping: Mapping | None, workbooks: dict, sources: dict, problems: list[Problem],
                 warnings: list[str]) -> tuple[dict[str, pd.DataFrame], set[str], dict[str, pd.DataFrame],
                                               dict[str, pd.DataFrame]]:
    """Every planned table read: the tables read, the names of those refused (their problems added to
    ``problems``), the lots read from each refused one (for the checks across files), and the values of each
    refused one that are judged without history (:meth:`linkage.read.table._Check.values_read`)."""
    tables: dict[str, pd.DataFrame] = {}
    failed: set[str] = set()
    lots_read: dict[str, pd.DataFrame] = {}
    values_read: dict[str, pd.DataFrame] = {}
    for tname in (t for t in TABLES if t in plan):
        path, sheet, label = plan[tname]
        try:
            if sheet is None and path in workbooks:  # a workbook named after the table, opened already
                sheet, label = _table_sheet(workbooks[path][0], path.name, tname)
            if sheet is None:
                df = read_table(path, tname, mapping)
            else:
                df = _build(_read_sheet(*workbooks[path], sheet, label), TABLES[tname],
                            (mapping or Mapping()).for_table(tname))
        except InputError as exc:
            problems += exc.problems
            failed.add(tname)
            if getattr(exc, "lots_read", None) is not None:
                lots_read[tname] = exc.lots_read
                sources[tname] = {"file": label}  # for the messages only: the ingest is refused
            if getattr(exc, "values_read", None) is not None:
                values_read[tname] = exc.values_read
                sources.setdefault(tname, {"file": label})
            continue
        tables[tname] = df
        sources[tname] = {"file": label, "sha256": _sha256(path), "rows": len(df)}
        if len(df) == 0:
            warnings.append(f"{label} has a header but no data rows")
        warnings += _without_results(tname, df, label)
    return tables, failed, lots_read, values_read


#: columns of a result table that are a setting, not a result: the tablet press's compression force (planned by
#: ``linkage plan``, ``linkage.decide.plan.OTHER_SETTINGS``)
SETTINGS_IN_RESULT_TABLES = frozenset({"compression_force_kn"})


#: the file ``linkage plan --out`` writes beside the planned lots' tables (:func:`linkage.decide.plan.write_plan`)
PLAN_FILE = "plan.json"


def _planned_not_made(folder: Path, tables: dict[str, pd.DataFrame], known_lots) -> list[Problem]:
    """``tables`` holds the tables read and, for a table refused for its cells, the lots of its rows read (a ribbon
    row with a refused cell still says the lot was measured). The lots of a plan (``plan.json`` in the folder, as
    ``linkage plan --out`` writes it) that the folder gives no ribbon measurement for and the store does not hold:
    planned, not made. Their process rows hold the planned settings, not a run's; stored, they would stand as made
    lots in the lot record, the lots list and the watch. A lot is ingested once made, with its settings as run and
    its ribbon results (a ribbon porosity is measured at-line, with the run). A ``plan.json`` that is no plan of
    linkage's is ignored like any other file."""
    path = next((p for p in folder.iterdir() if p.name.lower() == PLAN_FILE and p.is_file()), None)
    process = tables.get("process")
    if path is None or process is None or len(process) == 0:
        return []
    try:
        planned = {lot_key(str(lot["lot"])) for lot in json.loads(path.read_text(encoding="utf-8"))["lots"]}
    except (OSError, UnicodeError, ValueError, TypeError, KeyError):
        return []
    ribbon = tables.get("ribbon")
    made = {lot_key(lot) for lot in ribbon["lot"]} if ribbon is not None else set()
    made |= {lot_key(lot) for lot in known_lots or ()}
    rows = process.attrs.get("source_rows", list(range(2, len(process) + 2)))
    not_made = [(row, lot) for row, lot in zip(rows, process["lot"].tolist())
                if lot_key(lot) in planned and lot_key(lot) not in made]
    if not not_made:
        return []
    lots = [lot for _, lot in not_made]
    named = _first_five(lots)
    where = row_span([r for r, _ in not_made])
    return [Problem(process.attrs.get("file", "process.csv"),
                    f"{len(lots)} planned lot{'s' if len(lots) > 1 else ''} ({named}; {where}) "
                    f"of the plan in {path.name}, with no ribbon measurement in this folder: not made yet. Planned "
                    "settings are no lot record; ingest a lot once it is made, with its settings as run and its "
                    "ribbon results (ribbon.csv beside process.csv), or take the rows of lots not made out of the "
                    "folder's tables", row=not_made[0][0], column="lot", value=lots[0])]


def _first_five(names: list[str]) -> str:
    """The first five names of a message's list, and ', ...' when there are more."""
    return ", ".join(names[:5]) + (", ..." if len(names) > 5 else "")


def _without_results(tname: str, df: pd.DataFrame, label: str) -> list[str]:
    """A warning for the rows of a result table that hold no result: every cell but the key's and a setting's
    blank (the tables ``linkage plan`` writes, before the lab fills them). Such a row is stored as it is read,
    a record of the lot without results; filling it in later adds to the stored lot (a revision that needs no
    ``--reason``, :mod:`linkage.store`)."""
    if tname == "process" or len(df) == 0:
        return []
    values = [c for c in df.columns if c not in TABLES[tname].key and c not in SETTINGS_IN_RESULT_TABLES]
    if not values:
        return []
    blank = df[values].isna().all(axis=1).to_numpy()
    if not blank.any():
        return []
    rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
    lots = list(dict.fromkeys(df.loc[blank, "lot"].tolist()))
    named = _first_five(lots)
    return [f"{label}: {row_span([r for r, b in zip(rows, blank) if b])} (lot{'s' if len(lots) > 1 else ''} "
            f"{named}) hold no result, every cell but the key's and the settings' blank: stored as records "
            "without results; filling them in later adds to the stored lots (a revision without --reason); a "
            "planned lot's tables are best ingested once their results are filled in"]


#: what follows from a blank cell in a required column that may be blank, by table (the template's settings and
#: results: a value not measured yet, or not at all, is missing, not refused): said by the ingest's note
BLANK_MEANS: dict[str, str] = {
    "process": "the lot has no value of this setting; a model stage that takes it leaves the lot out",
    "ribbon": ("the replicate has no ribbon porosity; the lot's porosity is the mean of its other replicates "
               "(a lot with none has none)"),
    "granules": "the lot's sieve analysis gives no granule sizes (assemble says so in its notes)",
    "granules_laser": "the lot has no value of this size; a model stage that takes or predicts it leaves the lot out",
    "tablets": "the lot has no compression force; a model stage that takes it leaves the lot out",
    "dissolution": "the vessel's time point is left out of the lot's profile",
}


#: the rows and lots of a column's blank cells named at most: the ingest's note names this many lots
#: (:func:`linkage.results.blank_required_note`), ``ingest --json`` lists this many rows and lots (:func:`blank_shown`)
BLANK_SHOWN = 5


def blank_shown(column: dict, shown: int = BLANK_SHOWN) -> dict:
    """One column of :func:`blank_required` as ``ingest --json`` gives it: its first ``shown`` rows and lots, the
    counts of all of them (``n_rows``, ``n_lots``) and of those listed (``rows_shown``, ``lots_shown``), so that a
    column blank in thousands of rows stays a short entry (a 10 % blank column at 25,000 lots listed 27,514 rows)
    and none of them is left out unsaid."""
    rows, lots = column["rows"], column["lots"]
    return {**column, "rows": rows[:shown], "lots": lots[:shown], "n_rows": len(rows), "n_lots": len(lots),
            "rows_shown": min(len(rows), shown), "lots_shown": min(len(lots), shown)}


def blank_required(tname: str, df: pd.DataFrame, mapping: Mapping | None = None) -> list[dict]:
    """The blank cells of a table's required columns that may be blank (required: the header must be there;
    a key or a column that must be filled is refused when blank, :mod:`linkage.read.table`): per column, in
    template order, ``{"column", "header", "rows", "lots", "means"}``: the template column, the header as
    written in the file (a ``columns.toml`` mapping's, else the template name), the sheet rows, the rows' lots
    (distinct, in row order) and what follows (:data:`BLANK_MEANS`). Read as missing values, not refused (a
    value not measured is no wrong value), but said, so that a blank setting or result does not pass unheard
    of. Rows that hold no value at all are skipped on reading and are not here."""
    tdef = TABLES[tname]
    if len(df) == 0:
        return []
    headers = {m.target: m.source for m in (mapping or Mapping()).for_table(tname).values() if not m.extra}
    rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
    out = []
    for col in tdef.columns:
        if not col.required or col.nonempty or col.name in tdef.key or col.name not in df:
            continue
        blank = df[col.name].isna().to_numpy()
        if not blank.any():
            continue
        out.append({"column": col.name, "header": headers.get(col.name, col.name),
                    "rows": [int(r) for r, b in zip(rows, blank) if b],
                    "lots": list(dict.fromkeys(df.loc[blank, "lot"].tolist())),
                    "means": BLANK_MEANS.get(tname, "the value is missing")})
    return out


def _without_history(frames: dict[str, pd.DataFrame], sources: dict, mapping: Mapping | None
                     ) -> tuple[list[Problem], list[dict]]:
    """The values no measurement of their kind holds, judged without history (linkage/plausible.py): the
    apertures of each sieve analysis, with the header and unit columns.toml reads them by (for the hint)."""
    from linkage.plausible import sieve_apertures

    df = frames.get("granules")
    if df is None:
        return [], []
    cmap = next((m for m in (mapping or Mapping()).for_table("granules").values() if m.target == "sieve_um"), None)
    header = cmap.source if cmap is not None else "sieve_um"
    return sieve_apertures(df, sources.get("granules", {}).get("file", "granules"), header,
                           unit=None if cmap is None else cmap.unit, header_unit=_header_unit(header))


def _header_unit(header: str) -> str | None:
    """The length unit a header ends with (``Sieve (mm)``, ``aperture_um``, ``Sieve [µm]``), or None."""
    words = re.findall(r"[^\W\d_]+", header)
    unit = _norm_unit(words[-1]) if words else None
    return unit if unit in UNITS["um"] else None


def _plan(plan: dict, table: str, item: tuple, problems: list[Problem]) -> None:
    if table in plan:
        problems.append(Problem(item[2], f"table '{table}' is given twice: also in {plan[table][2]}"))
    else:
        plan[table] = item


def _plan_workbook(path: Path, plan: dict, problems: list[Problem], warnings: list[str], workbooks: dict,
                   unread: list) -> None:
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
                                           f"{', '.join(TABLES)}{_near_table_hint(sheets)}"))
        return
    for s in sheets:
        if s in found and _hidden(workbooks[path][0], s):
            problems.append(_hidden_sheet(path.name, s))
        elif s in found:
            _plan(plan, _norm_header(s).lower(), (path, s, f"{path.name} (sheet {s})"), problems)
        else:
            warnings.append(f"{path.name}: sheet '{s}' ignored (not a table name)")
            unread.append((path.name, s, None))


def _other_sheets(path: Path, table: str, workbooks: dict, warnings: list[str], unread: list) -> None:
    """The sheets of a workbook named after ``table`` that are not read: a sheet named after another table is
    added to ``unread`` with that table (the folder refuses it, since its rows would be lost), any other sheet
    beside the table's is a warning. A workbook that cannot be opened is said so when its table is read."""
    try:
        workbooks[path] = _open_workbook(path, path.name)
    except InputError:
        return
    sheets = workbooks[path][0].sheetnames
    if len(sheets) == 1 or table not in {_norm_header(s).lower() for s in sheets}:
        return  # its only sheet is the table; or no sheet is named after it: said when the table is read
    for s in sheets:
        name = _norm_header(s).lower()
        if name == table:
            continue
        if name in TABLES:
            unread.append((path.name, s, name))
        else:
            warnings.append(f"{path.name}: sheet '{s}' ignored (a workbook named after a table holds that table "
                            "only)")
            unread.append((path.name, s, None))


def _near_table(name: str) -> str | None:
    """The table a sheet or file name probably means (``Process data``, ``Processes``, ``tablet weights``,
    ``Proces``): the longest table name its letters and digits hold, else the one difflib finds close (ratio at
    least 0.8; common practice, no source); None when none is."""
    squeeze = re.sub(r"[\W_]+", "", name.lower())
    held = [t for t in TABLES if t.replace("_", "") in squeeze]
    if held:
        return max(held, key=len)
    near = difflib.get_close_matches(squeeze, {t.replace("_", ""): t for t in TABLES}, n=1, cutoff=0.8)
    return {t.replace("_", ""): t for t in TABLES}[near[0]] if near else None


def _near_table_hint(sheets: list[str]) -> str:
    """'; sheet 'Process data' may hold process: name it 'process'' for each sheet whose name is near a
    table's; empty when none is."""
    hints = [f"sheet '{s}' may hold {t}: name it '{t}'" for s in sheets if (t := _near_table(s)) is not None]
    return "; " + "; ".join(hints) if hints else ""


def _unread_hint(table: str, unread_sheets: Iterable[tuple[str, str]]) -> str:
    """A hint naming the sheets not read whose name is near ``table``'s (``Process data``): the rows they hold
    are not read, and naming the sheet after the table reads them."""
    unread_sheets = list(unread_sheets)
    near = [(f, s) for f, s in unread_sheets if _near_table(s) == table]
    if near:
        return "".join(f"; {f} has a sheet '{s}' that is not read (only a sheet named after a table is): name it "
                       f"'{table}' if it holds that table" for f, s in near)
    others = [(f, s) for f, s in unread_sheets if _near_table(s) is None]
    if others:
        return ("; sheets not read (only a sheet named after a table is): "
                + _first_five([f"{f} '{s}'" for f, s in others]))
    return ""


def _sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def cross_check(ingest: Ingest, known_lots: Iterable[str] | None, unread: Iterable[str] = (),
                unsure: Iterable[str] = (), unread_rows: Iterable[tuple[int, str | None, list[str]]] = (),
                unread_sheets: Iterable[tuple[str, str]] = ()) -> list[Problem]:
    """Rules across tables, given the lots already in the store.

    ``known_lots=None`` means the store is not known yet and nothing is
    checked. Otherwise: every lot of a result table needs a process record in
    this ingest or in the store; and an empty store needs every required table
    (``unread`` names tables that are there but failed to read). ``unsure``
    are lots whose cells were refused already (their process record may be
    one of them): a result without a process record is not reported for a
    lot of the same :func:`lot_key`. ``unread_rows`` are the process rows
    refused for their number of fields, (sheet row, lot field or None, fields):
    a result whose lot is one of a row's other fields is reported as waiting
    for that row (an extra field before the lot column shifts it).
    ``unread_sheets`` are the workbook sheets not read, (file, sheet): those
    whose name is near a table's (``Process data``) are named in the problem
    of that table's absence, or of a lot without a process record.
    """
    if known_lots is None:
        return []
    known = set(known_lots)
    unread_sheets = list(unread_sheets)
    problems = [] if known else _missing_tables(ingest, unread, unread_sheets)
    with_process = known | set(ingest.tables["process"]["lot"].tolist()) if "process" in ingest.tables else known
    spelling, key = _spellings(ingest, known)
    # a stored id is never refused: a store written before this rule may hold two spellings of one lot
    respelled_ids = {lot for lot in key.keys() - known if spelling.get(key[lot], (lot,))[0] != lot}
    unsure_keys = {lot_key(lot) for lot in unsure}
    held_in: dict[str, list[int]] = {}  # the key of each field of an unread process row -> those rows
    for row, _, cells in unread_rows:
        for key_of_cell in {lot_key(c) for c in cells if c}:
            held_in.setdefault(key_of_cell, []).append(row)
    for tname, df in ingest.tables.items():
        odd = {lot for lot in df["lot"].unique().tolist() if lot in respelled_ids or lot not in with_process}
        if not odd:
            continue  # decided on the distinct ids; else the rows of the odd ones are found in order
        rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
        label = ingest.sources.get(tname, {}).get("file", tname)
        orphans: dict[str, list[int]] = {}
        respelled: dict[str, list[int]] = {}
        for k, lot in enumerate(df["lot"].tolist()):
            if lot in respelled_ids:
                respelled.setdefault(lot, []).append(rows[k])
            elif lot in odd:
                orphans.setdefault(lot, []).append(rows[k])
        for lot, rs in respelled.items():
            other, where = spelling[key[lot]]
            problems.append(Problem(label, f"lot {_visible(lot)!r} is lot {_visible(other)!r} {where}, written "
                                           f"another way (case, dash or compatibility form; {row_span(rs)}); one lot "
                                           f"has one spelling: write it {_visible(other)!r}",
                                    row=rs[0], column="lot", value=_visible(lot)))
        if tname == "process":
            continue
        for lot, rs in orphans.items():
            if unsure_keys and lot_key(lot) in unsure_keys:
                continue  # its process record's lot cell is refused already
            held = held_in.get(lot_key(lot)) if held_in else None
            if held:
                process_label = ingest.sources.get("process", {}).get("file", "process")
                where = f"row {held[0]}" if len(held) == 1 else f"rows {', '.join(map(str, held))}"
                problems.append(Problem(label, f"lot {lot!r} has no process record read ({row_span(rs)}): "
                                               f"{process_label} {where}, refused for its number of fields, holds "
                                               f"{lot!r} and is probably its record; this follows from that row: "
                                               "fix it", row=rs[0], column="lot", value=lot))
                continue
            problems.append(Problem(label, f"lot {lot!r} has no process record in this folder or in the store "
                                           f"({row_span(rs)}); add it to process"
                                           f"{_unread_hint('process', unread_sheets) if known else ''}",
                                    row=rs[0], column="lot", value=lot))
    return problems


def _missing_tables(ingest: Ingest, unread: Iterable[str], unread_sheets: list[tuple[str, str]] = ()
                    ) -> list[Problem]:
    """The tables a first ingest into an empty store needs and this one lacks; a sheet not read whose name is
    near a missing table's is named."""
    missing = [t.name for t in TABLES.values()
               if t.required and t.name not in ingest.tables and t.name not in set(unread)]
    if not missing:
        return []
    needed = ", ".join(t.name for t in TABLES.values() if t.required)
    where = ingest.folder.name if ingest.folder is not None else "input"
    return [Problem(where, f"required table '{m}' is missing: the first ingest into an empty store needs {needed}"
                           f"{_unread_hint(m, unread_sheets)}") for m in missing]


def _spellings(ingest: Ingest, known: set[str]) -> tuple[dict[str, tuple[str, str]], dict[str, str]]:
    """The one spelling of each lot (:func:`lot_key`) that a new id of this
    ingest may share a key with: the first in sorted order among the stored
    ids, else the first in this folder's process table; and the key of every
    id of the ingest. Only stored ids with the key of a new id are sorted."""
    ids: set[str] = set()
    for df in ingest.tables.values():
        ids.update(df["lot"].unique().tolist())
    key = dict(zip(ids, _keys(list(ids))))
    wanted = {key[lot] for lot in ids - known}
    spelling: dict[str, tuple[str, str]] = {}
    if wanted:
        stored = list(known)
        for lot in sorted(lot for lot, k in zip(stored, _keys(stored)) if k in wanted):
            spelling.setdefault(key.get(lot) or lot_key(lot), (lot, "in the store"))
    if "process" in ingest.tables:
        process_label = ingest.sources.get("process", {}).get("file", "process")
        for lot in ingest.tables["process"]["lot"].tolist():
            spelling.setdefault(key[lot], (lot, f"in {process_label}"))
    return spelling, key


def _keys(lots: list[str]) -> list[str]:
    """:func:`lot_key` of each id; ids all ASCII on one line each (the common case) lowered in one call."""
    joined = "\n".join(lots)
    if lots and joined.isascii() and joined.count("\n") == len(lots) - 1:
        return joined.lower().split("\n")  # lot_key of an ASCII id is its lower()
    return [lot_key(lot) for lot in lots]
