"""Reading workbooks: what the messages say, from a user test that ingested .xlsx files (a sheet of a table
not read without a word, a title row above the header reported column by column, a date shown as a Python
repr, a formula cell without its formula, no cell reference).

Most of these are regression tests of refusals and of what their messages name: the expected outcome is read
off the workbook each test builds (which sheet, which row, which cell), so they need no outside source. Where a
message follows an outside definition it is named beside the check: ISO 8601-1:2019 (§5.2.2 calendar date
YYYY-MM-DD, §5.4.2 date and time of day) for dates, and the A1 cell reference of ECMA-376 Part 1 (5th ed.
2016, §18.3.1.4 ``c`` (Cell), attribute ``r``: column letters A ... Z, AA ... then the row number), checked
against openpyxl's ``get_column_letter`` and against the reference the saved file itself records.
"""

from __future__ import annotations

import datetime as dt
import re
import zipfile
from pathlib import Path

import pytest

from linkage.exceptions import InputError, Problem
from linkage.read import read_folder, read_table
from tests.test_read import _workbook  # a workbook of the given sheets, written by openpyxl

PROCESS = ["lot", "roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm"]
RIBBON = ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3"]


def _problems(fn, *args, **kwargs) -> list[Problem]:
    with pytest.raises(InputError) as exc:
        fn(*args, **kwargs)
    return exc.value.problems


# --------------------------------------------------------------------------- 1. a sheet that is not read


def test_a_table_sheet_in_a_workbook_named_after_another_table_is_refused_not_ignored(tmp_path):
    """ribbon.xlsx with sheets 'Process' and 'Ribbon': only the ribbon sheet is read (the workbook is named after
    ribbon), so the process rows were lost and the ingest said only "required table 'process' is missing".
    Now the sheet is named, with what to do, and the process table is not also called missing (it is there)."""
    _workbook(tmp_path / "ribbon.xlsx", {"Process": [PROCESS, ["A", 9, 2, 5, 20, 1]],
                                         "Ribbon": [RIBBON, ["A", 1, 1.0, 1.5]]})
    ps = _problems(read_folder, tmp_path, known_lots=[])
    assert len(ps) == 1, [str(p) for p in ps]
    (p,) = ps
    assert p.file == "ribbon.xlsx"
    assert "sheet 'Process' is named after the table 'process'" in p.rule and "process.xlsx" in p.rule
    # a copy of the process sheet beside a process.csv would be lost as silently: refused too
    (tmp_path / "process.csv").write_text(",".join(PROCESS) + "\nA,9,2,5,20,1\n", encoding="utf-8")
    ps = _problems(read_folder, tmp_path, known_lots=[])
    assert [p.file for p in ps] == ["ribbon.xlsx"] and "sheet 'Process'" in ps[0].rule


def test_the_only_sheet_of_a_table_workbook_named_after_another_table_is_refused(tmp_path):
    """ribbon.xlsx whose only sheet is 'Process' (holding ribbon rows) was read as ribbon without a word, while
    the same sheet beside a 'Ribbon' sheet is refused (README, "Which sheet"): the sheet's name says one table,
    the file's another, and which one is meant is not guessed. Regression test of a refusal and of what its
    message names (read off the workbook built here), so no outside source."""
    _workbook(tmp_path / "ribbon.xlsx", {"Process": [RIBBON, ["A", 1, 1.0, 1.5]]})
    ps = _problems(read_folder, tmp_path, known_lots=[])
    assert len(ps) == 1, [str(p) for p in ps]  # process is not also called missing: it may be that sheet
    (p,) = ps
    assert p.file == "ribbon.xlsx"
    assert "only sheet 'Process' is named after the table 'process'" in p.rule
    assert "read as the table 'ribbon'" in p.rule
    assert "rename the sheet 'ribbon'" in p.rule and "save it as process.xlsx" in p.rule
    # beside a process.csv, and read as one file (as 'linkage running' reads its samples), the same refusal
    (tmp_path / "process.csv").write_text(",".join(PROCESS) + "\nA,9,2,5,20,1\n", encoding="utf-8")
    assert [p.rule for p in _problems(read_folder, tmp_path, known_lots=[])] == [p.rule]
    assert [p.rule for p in _problems(read_table, tmp_path / "ribbon.xlsx", "ribbon")] == [p.rule]


@pytest.mark.parametrize("sheet", ["Sheet1", "RIBBON", " ribbon ", "notes"])
def test_the_only_sheet_of_a_table_workbook_with_a_neutral_name_is_that_table(tmp_path, sheet):
    """ribbon.xlsx with one sheet named after no other table (or after ribbon itself, in any case) is ribbon."""
    _workbook(tmp_path / "ribbon.xlsx", {sheet: [RIBBON, ["A", 1, 1.0, 1.5]]})
    (tmp_path / "process.csv").write_text(",".join(PROCESS) + "\nA,9,2,5,20,1\n", encoding="utf-8")
    ingest = read_folder(tmp_path, known_lots=[])
    assert ingest.tables["ribbon"]["envelope_density_g_cm3"].tolist() == [1.0]
    assert read_table(tmp_path / "ribbon.xlsx", "ribbon")["envelope_density_g_cm3"].tolist() == [1.0]


def test_a_table_workbook_with_its_own_sheet_only_still_reads(tmp_path):
    """The sheet named after the workbook's table is read in any case ('Ribbon' in ribbon.xlsx); a notes sheet
    beside it is a warning, never a refusal."""
    _workbook(tmp_path / "ribbon.xlsx", {"Ribbon": [RIBBON, ["A", 1, 1.0, 1.5]], "notes": [["free text"]]})
    (tmp_path / "process.csv").write_text(",".join(PROCESS) + "\nA,9,2,5,20,1\n", encoding="utf-8")
    ingest = read_folder(tmp_path, known_lots=[])
    assert ingest.tables["ribbon"]["envelope_density_g_cm3"].tolist() == [1.0]
    assert ingest.sources["ribbon"]["file"] == "ribbon.xlsx (sheet Ribbon)"
    assert any("sheet 'notes' ignored" in w for w in ingest.warnings)


@pytest.mark.parametrize("sheet", ["Process data", "Processes", "Process_1", "proces"])
def test_a_sheet_named_nearly_after_a_missing_table_is_named(sheet, tmp_path):
    """A sheet whose name is near a table's is not read (no guess: 'Process data' may be notes on the
    process); when that table is then missing, the message names the sheet and says how to have it read."""
    _workbook(tmp_path / "lab.xlsx", {sheet: [PROCESS, ["A", 9, 2, 5, 20, 1]], "ribbon": [RIBBON, ["A", 1, 1.0, 1.5]]})
    ps = _problems(read_folder, tmp_path, known_lots=[])
    (missing,) = [p for p in ps if "required table 'process' is missing" in p.rule]
    assert f"lab.xlsx has a sheet '{sheet}' that is not read" in missing.rule and "name it 'process'" in missing.rule


def test_a_sheet_far_from_any_table_name_is_listed_when_a_table_is_missing(tmp_path):
    _workbook(tmp_path / "lab.xlsx", {"Sheet1": [PROCESS, ["A", 9, 2, 5, 20, 1]],
                                      "ribbon": [RIBBON, ["A", 1, 1.0, 1.5]]})
    ps = _problems(read_folder, tmp_path, known_lots=[])
    (missing,) = [p for p in ps if "required table 'process' is missing" in p.rule]
    assert "sheets not read" in missing.rule and "lab.xlsx 'Sheet1'" in missing.rule


def test_a_near_sheet_is_named_beside_a_lot_without_process_record_in_a_later_ingest(tmp_path):
    _workbook(tmp_path / "lab.xlsx", {"Process data": [PROCESS, ["B", 9, 2, 5, 20, 1]],
                                      "ribbon": [RIBBON, ["B", 1, 1.0, 1.5]]})
    ps = _problems(read_folder, tmp_path, known_lots=["A"])
    (p,) = ps
    assert "lot 'B' has no process record" in p.rule and "sheet 'Process data' that is not read" in p.rule


# --------------------------------------------------------------------------- 2. a title above the header


def test_a_title_row_above_the_header_is_one_problem(tmp_path):
    """Before: one 'column X has values but no header' per filled column and one 'required column ... is
    missing' per required column (11 messages here). Now one, naming the row that holds the header."""
    path = _workbook(tmp_path / "process.xlsx", {"process": [
        ["Compaction record, line 3"], PROCESS, ["A", 9, 2, 5, 20, 1], ["B", 10, 2, 5, 20, 1]]})
    ps = _problems(read_table, path)
    assert len(ps) == 1, [str(p) for p in ps]
    assert ps[0].row == 1 and ps[0].value == "Compaction record, line 3"
    assert "row 1 looks like a title above the header (row 2 holds the template's column names" in ps[0].rule


def test_title_rows_and_a_blank_row_above_the_header(tmp_path):
    # rows 1-2 a title and a subtitle, row 3 blank, the header on row 4 (blank rows count, as a spreadsheet does)
    path = _workbook(tmp_path / "ribbon.xlsx", {"ribbon": [
        ["Ribbon densities"], [None, "lab 2"], [], RIBBON, ["A", 1, 1.0, 1.5]]})
    (p,) = _problems(read_table, path)
    assert "rows 1-3 look like a title above the header (row 4 holds" in p.rule and "delete them" in p.rule


def test_a_title_line_above_the_header_of_a_csv_file(tmp_path):
    path = tmp_path / "process.csv"
    path.write_text("Process export 2026\n" + ",".join(PROCESS) + "\nA,9,2,5,20,1\n", encoding="utf-8")
    (p,) = _problems(read_table, path)
    assert "row 1 looks like a title above the header (row 2 holds" in p.rule


def test_a_header_of_other_names_is_no_title(tmp_path):
    """Row 1 holding some template column is a header, whatever the rows below hold: the usual messages."""
    path = _workbook(tmp_path / "process.xlsx", {"process": [["lot", "force"], PROCESS, ["A", 9, 2, 5, 20, 1]]})
    ps = _problems(read_table, path)
    assert not any("title" in p.rule for p in ps)
    assert any("required column 'roll_gap_mm' is missing" in p.rule for p in ps)


# --------------------------------------------------------------------------- 3. dates as a person sees them


def test_a_date_cell_is_shown_in_iso_8601_not_as_a_python_repr(tmp_path):
    """ISO 8601-1:2019 §5.2.2 (calendar date, extended format YYYY-MM-DD) and §5.4.2 (date and time of day,
    hh:mm): a midnight date cell is shown as the date a spreadsheet shows, a time of day only where it has one."""
    path = _workbook(tmp_path / "ribbon.xlsx", {"ribbon": [
        RIBBON, ["A", 1, dt.datetime(2026, 1, 5), 1.5], ["A", 2, dt.datetime(2026, 1, 5, 14, 30), 1.5],
        ["A", 3, True, 1.5]]})
    ps = _problems(read_table, path)
    shown = [str(p) for p in ps]
    assert "value 2026-01-05:" in shown[0] and "value 2026-01-05 14:30:" in shown[1], shown
    assert "value TRUE:" in shown[2]  # as a spreadsheet shows the cell
    assert not any("datetime." in s for s in shown)
    assert ps[0].value == dt.datetime(2026, 1, 5)  # the value itself kept for programs


# --------------------------------------------------------------------------- 4. formulas


def _with_cached_value(path: Path, cell: str, formula: str, cached: str, kind: str | None = None) -> None:
    """Write a stored result for a formula cell: openpyxl saves formulas without one (``<v />``), as a
    spreadsheet program does not (ECMA-376 Part 1, §18.3.1.4: ``f`` the formula, ``v`` its last result; t="e"
    an error)."""
    with zipfile.ZipFile(path) as z:
        parts = {n: z.read(n) for n in z.namelist()}
    xml = parts["xl/worksheets/sheet1.xml"].decode()
    old = f'<c r="{cell}"><f>{formula}</f><v /></c>'
    assert old in xml, xml
    attr = f' t="{kind}"' if kind else ""
    new = f'<c r="{cell}"{attr}><f>{formula}</f><v>{cached}</v></c>'
    parts["xl/worksheets/sheet1.xml"] = xml.replace(old, new).encode()
    with zipfile.ZipFile(path, "w") as z:
        for name, data in parts.items():
            z.writestr(name, data)


def test_a_formula_without_stored_result_names_its_formula(tmp_path):
    path = _workbook(tmp_path / "ribbon.xlsx", {"ribbon": [RIBBON, ["A", 1, "=B2*0.5", 1.5]]})
    (p,) = _problems(read_table, path)
    assert "formula without a stored result (the cell holds =B2*0.5)" in p.rule and p.cell == "C2"


def test_a_formula_whose_stored_result_is_refused_names_formula_and_result(tmp_path):
    path = _workbook(tmp_path / "ribbon.xlsx", {"ribbon": [RIBBON, ["A", 1, "=1/0", 1.5], ["A", 2, "=B3*7", 1.5]]})
    _with_cached_value(path, "C2", "1/0", "#DIV/0!", kind="e")
    _with_cached_value(path, "C3", "B3*7", "14")
    first, second = _problems(read_table, path)
    assert first.value == "#DIV/0!" and "not a number" in first.rule
    assert "the cell holds the formula =1/0; its stored result is the value shown" in first.rule
    assert second.value == 14 and "outside the range" in second.rule and "the formula =B3*7" in second.rule


def test_a_text_cell_starting_with_an_equals_sign_is_no_formula(tmp_path):
    """A text cell '=x' (stored as text, t="inlineStr") reads the same with and without formulas: no formula
    is named for it."""
    import openpyxl

    path = tmp_path / "ribbon.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "ribbon"
    ws.append(RIBBON)
    ws.append(["A", 1, 1.0, 1.5])
    ws["C2"].value = "=not a formula"
    ws["C2"].data_type = "s"
    wb.save(path)
    (p,) = _problems(read_table, path)
    assert p.value == "=not a formula" and "the cell holds the formula" not in p.rule and "not a number" in p.rule


# --------------------------------------------------------------------------- 5. A1 references


def test_cell_references_beside_row_and_column(tmp_path):
    """ECMA-376 Part 1 §18.3.1.4: the A1 reference is the column letters and the row number; checked against
    openpyxl's get_column_letter and against the references the saved sheet records for the same cells."""
    from openpyxl.utils import get_column_letter

    extra = [f"x{i}" for i in range(24)]  # the template columns then 24 extra ones: the last in column AB
    head = RIBBON + extra
    row = ["A", 1, 9.0, 1.5] + [1.0] * 23 + ["inf"]
    path = _workbook(tmp_path / "lab.xlsx", {"process": [PROCESS, ["A", 9, 2, 5, 20, 1]],
                                             "ribbon": [head, ["B", 1, 1.0, 1.5], [], row]})
    ps = _problems(read_folder, tmp_path, known_lots=[])
    cells = {(p.column, p.row): p.cell for p in ps}
    assert cells[("envelope_density_g_cm3", 4)] == f"{get_column_letter(3)}4" == "C4"
    assert cells[("x23", 4)] == f"{get_column_letter(28)}4" == "AB4"
    assert cells[("lot", 2)] == "A2"  # the check across files (lot B has no process record) too
    with zipfile.ZipFile(path) as z:
        recorded = set(re.findall(r'<c r="([A-Z]+\d+)"', z.read("xl/worksheets/sheet2.xml").decode()))
    assert {"C4", "AB4", "A2"} <= recorded
    text = [str(p) for p in ps]
    expected = "lab.xlsx (sheet ribbon), row 4, column 'envelope_density_g_cm3', cell C4, value 9: outside the range"
    assert any(t.startswith(expected)
               for t in text), text


def test_header_cells_get_references_and_missing_columns_none(tmp_path):
    path = _workbook(tmp_path / "process.xlsx", {"Sheet1": [
        ["lot", "roll_force_kn_per_cm", "roll_gap_mm [mm]", None, "roll_speed_rpm", "screw_speed_rpm",
         "mill_screen_mm"], ["A", 9, 2, "x", 5, 20, 1]]})
    ps = _problems(read_table, path)
    by_rule = {p.rule.split(";")[0].split(":")[0]: p for p in ps}
    assert by_rule["header 'roll_gap_mm [mm]' is the template column 'roll_gap_mm' with a unit added"].cell == "C1"
    assert by_rule["column D has values but no header"].cell == "D1"
    assert all(p.cell is None for p in ps if "is missing" in p.rule)


def test_csv_problems_have_no_cell_reference(tmp_path):
    path = tmp_path / "ribbon.csv"
    path.write_text(",".join(RIBBON) + "\nA,1,9,1.5\n", encoding="utf-8")
    (p,) = _problems(read_table, path)
    assert p.cell is None and "cell" not in str(p).split(":")[0]


# --------------------------------------------------------------------------- the plan's tables read back


def test_a_planned_lots_blank_results_are_read_as_stored_and_said(tmp_path):
    """`linkage plan` writes process.csv and, when it sets the compression force, tablets.csv with blank
    results. Read back once the lots are made (their ribbon measured), a row without any result is kept as it
    is (not refused, not dropped: it becomes a record of the lot without results, and filling it in later adds
    to a stored lot), so the ingest says so; this
    is also why the plan writes no ribbon or granules table (their keys, the replicate ids and the sieve
    stack, are the lab's, and every row would be such a record). A regression test of a warning: no outside
    source needed."""
    from linkage.decide.plan import start_design, write_plan

    plan = start_design({"roll_force_kn_per_cm": (3.0, 14.0), "roll_gap_mm": (1.5, 3.5)}, 4, seed=3,
                        held={"compression_force_kn": 14.0})
    written = write_plan(plan, tmp_path / "plan")
    assert sorted(p.name for p in written) == ["plan.json", "process.csv", "tablets.csv"]
    (tmp_path / "plan" / "ribbon.csv").write_text(  # the lots made: a plan's lots not made are refused
        "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n"
        + "".join(f"{lot.lot},1,1.05,1.50\n" for lot in plan.lots), encoding="utf-8")
    ingest = read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    assert ingest.tables["tablets"]["compression_force_kn"].tolist() == [14.0] * 4  # read as written
    (said,) = [w for w in ingest.warnings if w.startswith("tablets.csv: rows 2-5 (4 rows)")]
    assert "PLAN-001" in said and "hold no result" in said and "adds to the stored lots" in said
    # a row with a result is no such row
    text = (tmp_path / "plan" / "tablets.csv").read_text(encoding="utf-8").splitlines()
    head = text[0].split(",")
    row = text[1].split(",")
    row[head.index("breaking_force_n")] = "95"
    (tmp_path / "plan" / "tablets.csv").write_text("\n".join([text[0], ",".join(row), *text[2:]]) + "\n",
                                                    encoding="utf-8")
    (said,) = [w for w in read_folder(tmp_path / "plan", known_lots=["OLD-001"]).warnings if "hold no result" in w]
    assert said.startswith("tablets.csv: rows 3-5 (3 rows)")


def test_two_sheets_named_after_the_table_are_refused(tmp_path):
    """Sheet names are matched trimmed and in any case, so 'Ribbon' and ' ribbon ' in ribbon.xlsx both name the
    table: refused, not one of them taken. (Two names that differ only in case cannot be saved: openpyxl renames
    the second, 'ribbon1', as a spreadsheet program refuses it.)"""
    path = _workbook(tmp_path / "ribbon.xlsx", {"Ribbon": [RIBBON, ["A", 1, 1.0, 1.5]],
                                                " ribbon ": [RIBBON, ["A", 1, 2.0, 1.5]]})
    (p,) = _problems(read_table, path)
    assert "sheets 'Ribbon' and ' ribbon ' are both named after the table 'ribbon'" in p.rule


def test_a_numpy_scalar_is_shown_as_python_writes_the_number():
    """Review: np.float64 is a float whose repr is 'np.float64(1.5)' under numpy 2; a message shows the number
    as Python writes it (reference: Python's own repr of the same float and int)."""
    import numpy as np

    from linkage.exceptions import shown_value

    assert shown_value(np.float64(1.5)) == repr(1.5)
    assert shown_value(np.int64(7)) == "7"
    assert shown_value(np.bool_(True)) == "TRUE"
    assert shown_value(np.str_("EX-001")) == repr("EX-001")
