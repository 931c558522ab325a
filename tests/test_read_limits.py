"""Size limits of the readers and damaged cells: linkage.read.

The limits are the module's (``MAX_ROWS``, ``MAX_COLUMNS``,
``MAX_MAPPING_BYTES``; tests/reliability/FINDINGS.md #7, #8, #3). They are
lowered here with monkeypatch, so that a file one row or column past the
limit stays small; each test checks that the limit itself is accepted, one
more is refused, and that the refusal names the file and the limit.

Outside references: Python's ``csv`` module refuses a field longer than
``csv.field_size_limit()``, 131,072 characters by default (Python 3.11
library reference, csv module; checked below against the module itself).
The last column of a spreadsheet sheet is XFD (from memory), which
openpyxl's ``column_index_from_string`` turns into 16,384.
"""

from __future__ import annotations

import csv
import io
import re
import zipfile
from pathlib import Path

import openpyxl
import pytest
from openpyxl.utils import column_index_from_string

from linkage import read
from linkage.exceptions import InputError
from linkage.read import MAX_COLUMNS, MAX_ROWS, read_folder, read_mapping, read_table

PROCESS_HEAD = "lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm"
RIBBON_HEAD = "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3"
WEIGHTS_HEAD = "lot,unit,weight_mg"


def _problems(call, *args) -> list:
    with pytest.raises(InputError) as exc:
        call(*args)
    return exc.value.problems


def _weights_rows(n: int) -> list[str]:
    return [f"A,U{i},{250 + i % 7}" for i in range(n)]


def _workbook(path: Path, rows: list[list], title: str = "tablet_weights") -> Path:
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = title
    for row in rows:
        ws.append(row)
    wb.save(path)
    return path


def _edit_sheet_xml(path: Path, edit) -> None:
    """Rewrite the worksheet XML of a saved workbook (as a hand-edited or
    broken writer might leave it)."""
    buf = io.BytesIO()
    with zipfile.ZipFile(path) as zin, zipfile.ZipFile(buf, "w") as zout:
        for item in zin.infolist():
            data = zin.read(item.filename)
            if item.filename.startswith("xl/worksheets/"):
                data = edit(data)
            zout.writestr(item, data)
    path.write_bytes(buf.getvalue())


# --------------------------------------------------------------------------- the limits themselves


def test_the_limits_are_the_documented_ones():
    assert MAX_ROWS == 500_000
    assert MAX_COLUMNS == column_index_from_string("XFD") == 16_384
    assert read.MAX_MAPPING_BYTES == 1_000_000
    for name in ("MAX_ROWS", "MAX_COLUMNS", "MAX_MAPPING_BYTES"):
        assert name in read.__doc__, f"{name} is not in the module notes"


# --------------------------------------------------------------------------- rows


@pytest.mark.parametrize("end", ["\n", "\r\n", "\r"])
def test_csv_with_max_rows_is_read_and_one_more_refused(tmp_path, monkeypatch, end):
    monkeypatch.setattr(read, "MAX_ROWS", 5)
    path = tmp_path / "tablet_weights.csv"
    path.write_bytes(end.join([WEIGHTS_HEAD, *_weights_rows(5)]).encode() + end.encode() * 3)  # + blank lines
    assert len(read_table(path)) == 5
    path.write_bytes(end.join([WEIGHTS_HEAD, *_weights_rows(5)]).encode())  # no line end after the last row
    assert len(read_table(path)) == 5
    path.write_bytes(end.join([WEIGHTS_HEAD, *_weights_rows(6)]).encode() + end.encode())
    (p,) = _problems(read_table, path)
    assert p.file == "tablet_weights.csv" and p.row is None
    assert p.rule.startswith("6 rows below the header; at most 5 data rows per file")
    assert "split the export" in p.rule


def test_blank_rows_between_data_rows_count_as_in_the_row_numbers(tmp_path, monkeypatch):
    monkeypatch.setattr(read, "MAX_ROWS", 5)
    path = tmp_path / "tablet_weights.csv"
    rows = _weights_rows(5)
    path.write_text("\n".join([WEIGHTS_HEAD, *rows[:2], "", *rows[2:]]) + "\n")  # the last row is row 7
    (p,) = _problems(read_table, path)
    assert "6 rows below the header" in p.rule


def test_too_many_rows_refused_beside_the_problems_of_other_files(tmp_path, monkeypatch):
    """The refusal is at once for that file; the folder still reports every
    other file's problems with it (nothing is written)."""
    monkeypatch.setattr(read, "MAX_ROWS", 5)
    (tmp_path / "process.csv").write_text(f"{PROCESS_HEAD}\nA,-9,2,5,20,1\n")
    (tmp_path / "ribbon.csv").write_text(f"{RIBBON_HEAD}\nA,1,1.0,1.5\n")
    (tmp_path / "tablet_weights.csv").write_text("\n".join([WEIGHTS_HEAD, *_weights_rows(8)]) + "\n")
    ps = _problems(read_folder, tmp_path)
    assert {p.file for p in ps} == {"process.csv", "tablet_weights.csv"}
    (weights,) = [p for p in ps if p.file == "tablet_weights.csv"]
    assert "8 rows below the header; at most 5 data rows" in weights.rule


def test_workbook_with_max_rows_is_read_and_one_more_refused(tmp_path, monkeypatch):
    monkeypatch.setattr(read, "MAX_ROWS", 5)
    head = WEIGHTS_HEAD.split(",")
    rows = [["A", f"U{i}", 250.0 + i] for i in range(6)]
    path = _workbook(tmp_path / "tablet_weights.xlsx", [head, *rows[:5]])
    assert len(read_table(path)) == 5
    path = _workbook(path, [head, *rows])
    (p,) = _problems(read_table, path)
    assert p.file == "tablet_weights.xlsx"
    assert p.rule.startswith("6 rows below the header; at most 5 data rows per file")


def test_workbook_that_records_no_size_is_counted_while_read(tmp_path, monkeypatch):
    """Without a <dimension> element openpyxl knows no size before reading
    (max_row is None): the rows are counted as they are read."""
    monkeypatch.setattr(read, "MAX_ROWS", 5)
    head = WEIGHTS_HEAD.split(",")
    path = _workbook(tmp_path / "tablet_weights.xlsx", [head, *(["A", f"U{i}", 250.0] for i in range(6))])
    _edit_sheet_xml(path, lambda xml: re.sub(rb"<dimension [^>]*/>", b"", xml))
    wb = openpyxl.load_workbook(path, read_only=True)
    try:
        assert wb.active.max_row is None
    finally:
        wb.close()
    (p,) = _problems(read_table, path)
    assert p.file == "tablet_weights.xlsx"
    assert p.rule.startswith("more than 5 rows below the header; at most 5 data rows per file")


# --------------------------------------------------------------------------- columns


def _process_with_extras(n_extra: int) -> str:
    head = PROCESS_HEAD + "".join(f",x{i}" for i in range(n_extra))
    return f"{head}\nA,9,2,5,20,1{',1' * n_extra}\n"


def test_csv_with_max_columns_is_read_and_one_more_refused(tmp_path, monkeypatch):
    monkeypatch.setattr(read, "MAX_COLUMNS", 8)  # the 6 template columns of process and 2 extra ones
    path = tmp_path / "process.csv"
    path.write_text(_process_with_extras(2))
    assert list(read_table(path).columns[-2:]) == ["x0", "x1"]
    path.write_text(_process_with_extras(3))
    (p,) = _problems(read_table, path)
    assert (p.file, p.row) == ("process.csv", 1)
    assert p.rule.startswith("9 columns; at most 8 columns per file")


def test_a_wide_data_row_under_a_narrow_header_is_no_wide_file(tmp_path, monkeypatch):
    """The limit is on the header: trailing empty fields of a row are
    dropped as before (an export padded with separators)."""
    monkeypatch.setattr(read, "MAX_COLUMNS", 8)
    path = tmp_path / "process.csv"
    path.write_text(f"{PROCESS_HEAD}\nA,9,2,5,20,1{',' * 50}\n")
    assert len(read_table(path)) == 1


def test_workbook_with_max_columns_is_read_and_one_more_refused(tmp_path, monkeypatch):
    monkeypatch.setattr(read, "MAX_COLUMNS", 8)
    head = PROCESS_HEAD.split(",")
    path = _workbook(tmp_path / "process.xlsx", [[*head, "x0", "x1"], ["A", 9, 2, 5, 20, 1, 1, 1]], "process")
    assert list(read_table(path).columns[-2:]) == ["x0", "x1"]
    _workbook(path, [[*head, "x0", "x1", "x2"], ["A", 9, 2, 5, 20, 1, 1, 1, 1]], "process")
    (p,) = _problems(read_table, path)
    assert (p.file, p.row) == ("process.xlsx", 1)
    assert p.rule.startswith("9 columns; at most 8 columns per file")


def test_too_many_rows_and_columns_of_a_workbook_reported_together(tmp_path, monkeypatch):
    monkeypatch.setattr(read, "MAX_ROWS", 2)
    monkeypatch.setattr(read, "MAX_COLUMNS", 7)
    head = PROCESS_HEAD.split(",")
    path = _workbook(tmp_path / "process.xlsx", [[*head, "x0", "x1"], *(["A", 9, 2, 5, 20, 1, 1, 1],) * 3],
                     "process")
    rules = [p.rule for p in _problems(read_table, path)]
    assert len(rules) == 2
    assert rules[0].startswith("3 rows below the header; at most 2") and rules[1].startswith("8 columns; at most 7")


# --------------------------------------------------------------------------- long cells


def test_csv_field_size_limit_is_the_documented_default():
    assert csv.field_size_limit() == 131_072  # Python library reference, csv.field_size_limit


def test_a_cell_of_the_field_limit_is_read_and_one_character_more_refused(tmp_path):
    limit = csv.field_size_limit()
    path = tmp_path / "process.csv"
    path.write_text(f"{PROCESS_HEAD},note\nA,9,2,5,20,1,x\nB,9,2,5,20,1,{'y' * limit}\n")
    assert len(read_table(path)["note"].iloc[1]) == limit
    path.write_text(f"{PROCESS_HEAD},note\nA,9,2,5,20,1,x\n\nB,9,2,5,20,1,{'y' * (limit + 1)}\n")
    (p,) = _problems(read_table, path)
    assert (p.file, p.row) == ("process.csv", 4)  # row 3 is blank and still counted
    assert f"longer than {limit:,} characters" in p.rule


def test_a_header_longer_than_the_field_limit_is_refused_on_row_1(tmp_path):
    path = tmp_path / "process.csv"
    path.write_text(f"{PROCESS_HEAD},{'h' * (csv.field_size_limit() + 1)}\nA,9,2,5,20,1,1\n")
    (p,) = _problems(read_table, path)
    assert (p.file, p.row) == ("process.csv", 1)


def test_a_long_cell_in_a_file_of_two_header_separators(tmp_path):
    """The separator is tried with each candidate (``_fits``); a cell too long
    for the csv module is refused there too, not raised as csv.Error."""
    path = tmp_path / "process.csv"
    path.write_text(f"{PROCESS_HEAD};note\nA,9,2,5,20,1;{'y' * (csv.field_size_limit() + 1)}\n")
    (p,) = _problems(read_table, path)
    assert p.file == "process.csv" and "longer than" in p.rule


# --------------------------------------------------------------------------- damaged workbook cells


def _process_workbook(path: Path, stored: str) -> Path:
    """A process workbook whose roll gap on row 3 is stored as ``stored``."""
    _workbook(path, [PROCESS_HEAD.split(","), ["A", 9, 2, 5, 20, 1], ["B", 9, 7777777, 5, 20, 1]], "process")
    _edit_sheet_xml(path, lambda xml: xml.replace(b"<v>7777777</v>", f"<v>{stored}</v>".encode()))
    return path


def test_workbook_integer_beyond_float_range_is_not_a_finite_number(tmp_path):
    (p,) = _problems(read_table, _process_workbook(tmp_path / "process.xlsx", "9" * 400))
    assert (p.file, p.row, p.column) == ("process.xlsx", 3, "roll_gap_mm")
    assert p.value == int("9" * 400) and p.rule == "not a finite number"


def test_parse_number_of_an_integer_beyond_float_range():
    assert read._parse_number(10**400, ".", None) == "not a finite number"
    assert read._parse_number(-(10**400), ".", None) == "not a finite number"
    assert read._parse_number(2**1023, ".", None) == float(2**1023)  # still within float range


@pytest.mark.parametrize("stored", ["NaN", "1,5", "9" * 5000])
def test_damaged_workbook_number_cell_names_file_and_sheet(tmp_path, stored):
    """openpyxl parses cells while the rows are read and raises ValueError
    for a number cell holding text (or an integer past Python's 4300-digit
    conversion limit)."""
    (p,) = _problems(read_table, _process_workbook(tmp_path / "process.xlsx", stored))
    assert p.file == "process.xlsx"
    assert p.rule.startswith("cannot read sheet 'process': a cell after row 2 is damaged")


# --------------------------------------------------------------------------- columns.toml


def test_mapping_roll_width_beyond_float_range_is_refused_with_the_column(tmp_path):
    path = tmp_path / "columns.toml"
    path.write_text('[process.columns]\n"Force" = { column = "roll_force_kn_per_cm", unit = "kN", '
                    f'roll_width_cm = {"9" * 400} }}\n')
    (p,) = _problems(read_mapping, path)
    assert (p.file, p.column) == ("columns.toml", "Force") and "roll_width_cm must be a number > 0" in p.rule


@pytest.mark.parametrize("depth", [2_000, 100_000])
def test_mapping_nested_too_deeply(tmp_path, depth):
    path = tmp_path / "columns.toml"
    path.write_text("a = " + "[" * depth + "]" * depth + "\n")
    (p,) = _problems(read_mapping, path)
    assert (p.file, p.rule) == ("columns.toml", "not valid TOML: nested too deeply")


def test_mapping_larger_than_the_limit_refused_before_parsing(tmp_path, monkeypatch):
    monkeypatch.setattr(read, "MAX_MAPPING_BYTES", 100)
    path = tmp_path / "columns.toml"
    text = '[process.columns]\n"Batch" = "lot"\n'
    path.write_text(text + "#" * (100 - len(text)))  # exactly the limit: read
    assert read_mapping(path).for_table("process")["batch"].target == "lot"
    path.write_text(text + "#" * (101 - len(text)))
    (p,) = _problems(read_mapping, path)
    assert p.file == "columns.toml" and p.rule.startswith("101 bytes; a mapping file may hold at most 100 bytes")
