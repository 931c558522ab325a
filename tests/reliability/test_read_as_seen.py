"""Read what a person sees (issue 15 item 1).

- A workbook cell formatted as a percentage stores a fraction and shows a
  percentage (ECMA-376 Part 1, §18.8.31: a bare ``%`` in a number format code
  multiplies the shown value by 100; a quoted or escaped ``%`` is a literal).
  In a % column it is read as shown; elsewhere it is refused with the cell.
- A hidden sheet (ECMA-376 Part 1, §18.18.68, ST_SheetState ``hidden`` and
  ``veryHidden``) named after a table is refused: what is seen and what would
  be read differ.
- A template column written with a unit in its header is refused with the
  template name, never kept as an extra column that leaves the attribute empty.

The workbooks are written with openpyxl, the reference reader and writer of
the format in Python; the values it stores are read back with openpyxl too.
"""

from __future__ import annotations

from pathlib import Path

import openpyxl
import pytest

from linkage.exceptions import InputError
from linkage.read import _shows_percent, read_folder, read_table

from .helpers import add_process_column, template_folder

def _tablets_workbook(path: Path, fmt: str = "0.00%", column: str = "weight_rsd_pct", hidden_old: bool = False):
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "tablets"
    ws.append(["lot", "compression_force_kn", column])
    ws.append(["EX-001", 10.44, 0.0176])
    ws.append(["EX-002", 14.04, 0.0184])
    for row in (2, 3):
        ws.cell(row=row, column=3).number_format = fmt
    if hidden_old:
        ws.title = "shown"
        old = wb.create_sheet("tablets")
        old.append(["lot", "compression_force_kn", column])
        old.append(["EX-001", 10.44, 3.5])
        old.sheet_state = "hidden"
    wb.save(path)
    return path


@pytest.mark.parametrize("fmt, percent", [
    ("0.00%", True), ("0%", True), ("#,##0.0%", True), ('0.0"%"', False), ("0.0\\%", False), ("General", False),
    ("0.00", False),
])
def test_which_formats_show_a_percentage(fmt, percent):
    assert _shows_percent(fmt) is percent


def test_a_percentage_formatted_rsd_is_read_as_shown(tmp_path, counts):
    path = _tablets_workbook(tmp_path / "tablets.xlsx")
    stored = openpyxl.load_workbook(path)["tablets"]["C2"].value
    assert stored == 0.0176  # what the file holds (openpyxl): the fraction
    df = read_table(path)
    assert df["weight_rsd_pct"].tolist() == [1.76, 1.84]  # what the sheet shows, decimal point moved exactly
    counts["fuzz cases tried"] += 1


def test_a_percentage_literal_in_the_format_is_not_scaled(tmp_path):
    path = _tablets_workbook(tmp_path / "tablets.xlsx", fmt='0.0000"%"')
    assert read_table(path)["weight_rsd_pct"].tolist() == [0.0176, 0.0184]


def test_a_percentage_formatted_cell_in_a_column_not_in_percent_is_refused(tmp_path, counts):
    path = _tablets_workbook(tmp_path / "tablets.xlsx", column="thickness_mm")
    with pytest.raises(InputError) as info:
        read_table(path)
    hits = [p for p in info.value.problems if "formatted as a percentage" in p.rule]
    assert [p.row for p in hits] == [2, 3] and hits[0].column == "thickness_mm"
    assert "1.76" in hits[0].rule and "mm" in hits[0].rule
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_a_hidden_sheet_named_after_the_table_is_refused(tmp_path, counts):
    path = _tablets_workbook(tmp_path / "tablets.xlsx", hidden_old=True)
    assert openpyxl.load_workbook(path)["tablets"].sheet_state == "hidden"
    with pytest.raises(InputError) as info:
        read_table(path)
    assert "hidden" in str(info.value) and "tablets" in str(info.value)
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_a_hidden_table_sheet_in_a_folder_workbook_is_refused(tmp_path, counts):
    d = template_folder(tmp_path)
    (d / "tablets.csv").unlink()
    wb = openpyxl.Workbook()
    wb.active.title = "notes"
    wb.active.append(["free text"])
    hidden = wb.create_sheet("tablets")
    hidden.append(["lot", "compression_force_kn"])
    hidden.append(["EX-001", 10.0])
    hidden.sheet_state = "veryHidden"
    wb.save(d / "results.xlsx")
    with pytest.raises(InputError) as info:
        read_folder(d)
    assert any("'tablets'" in p.rule and "hidden" in p.rule and p.file == "results.xlsx"
               for p in info.value.problems)
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


@pytest.mark.parametrize("header", ["dissolution_pct [%]", "friability_pct (%)", "weight_rsd_pct, %",
                                    "dissolution_pct in %", "roll_gap_mm (mm)"])
def test_a_template_column_with_a_unit_in_the_header_is_refused(tmp_path, header, counts):
    d = template_folder(tmp_path)
    table = "process.csv" if header.startswith("roll_gap") else "tablets.csv"
    name = header.split()[0].rstrip(",")
    text = (d / table).read_text()
    assert name in text.splitlines()[0]
    (d / table).write_text(text.replace(name, f'"{header}"' if "," in header else header, 1))
    with pytest.raises(InputError) as info:
        read_folder(d)
    hits = [p for p in info.value.problems if "with a unit added" in p.rule]
    assert len(hits) == 1 and hits[0].column == header and f"'{name}'" in hits[0].rule
    # a required column written so gets this one message, not also "required column is missing"
    assert not any("required column" in p.rule for p in info.value.problems)
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_an_extra_column_with_a_unit_stays_an_extra_column(tmp_path):
    d = template_folder(tmp_path)
    add_process_column(d, "blend moisture (%)", lambda i: "2.1")
    column = read_folder(d).tables["process"]["blend moisture (%)"].tolist()
    assert column == [2.1] * len(column) and len(column) == 4
