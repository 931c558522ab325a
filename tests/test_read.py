"""Reading and checking input files: linkage.read.

Where a check rests on an outside definition, it is named beside it:
RFC 4180 (Shafranovich 2005, "Common Format and MIME Type for CSV Files")
for quoting and CRLF, The Unicode Standard (v15, sec. 23.8) for the UTF-8
byte-order mark EF BB BF, ISO 8601-1:2019 for dates. The bounds themselves
are the schema's (linkage/schema.py); these tests check they are applied and
reported with file, row, column, value and rule.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import pandas as pd
import pytest

from linkage.exceptions import InputError
from linkage.read import ROW_RULES, cross_check, read_folder, read_table
from linkage.schema import MISSING_TOKENS, TABLES

# a copy of the shared template example (four invented lots), kept here so a clone alone runs these tests
TEMPLATE = Path(__file__).resolve().parent / "data" / "template-example"

PROCESS_HEAD = "lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm"
RIBBON_HEAD = "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3"


def write(folder: Path, name: str, text: str, encoding: str = "utf-8", newline: str = "\n") -> Path:
    path = folder / name
    path.write_bytes(text.replace("\n", newline).encode(encoding))
    return path


def problems_of(exc_info) -> list:
    return exc_info.value.problems


def find(problems, **fields):
    """The problems whose fields equal ``fields`` (``rule`` matches a substring)."""
    out = []
    for p in problems:
        if all((v in p.rule) if k == "rule" else getattr(p, k) == v for k, v in fields.items()):
            out.append(p)
    return out


# --------------------------------------------------------------------------- what labs send


def test_template_example_ingests_cleanly():
    if not TEMPLATE.is_dir():
        pytest.skip(f"template example not found at {TEMPLATE}")
    ingest = read_folder(TEMPLATE, known_lots=set())
    assert set(ingest.tables) == {"process", "ribbon", "granules", "tablets"}
    # counted from the files themselves, not from the reader
    for name, df in ingest.tables.items():
        lines = [ln for ln in (TEMPLATE / f"{name}.csv").read_text().splitlines()[1:] if ln.strip()]
        assert len(df) == len(lines) == ingest.sources[name]["rows"]
    assert ingest.tables["ribbon"]["envelope_density_g_cm3"].iloc[0] == 1.0617  # first data row of ribbon.csv
    assert ingest.spec.limits["dissolution_pct"].min == 80
    assert ingest.warnings == []  # README.md is documentation, not an unknown file


def test_bom_crlf_header_spaces_and_missing_tokens(tmp_path):
    # UTF-8 BOM (Unicode 15, 23.8) and CRLF line ends (RFC 4180, 2.1) are what spreadsheet programs write
    rows = [" Lot , sample ,envelope_density_g_cm3 ,  skeletal_density_g_cm3, ribbon_break_force_n "]
    tokens = sorted(MISSING_TOKENS)
    for i, token in enumerate(tokens):
        rows.append(f"L1,{i},1.05,1.50,{token.upper() if i % 2 else token}")
    path = write(tmp_path, "ribbon.csv", "\n".join(rows) + "\n", encoding="utf-8-sig", newline="\r\n")
    assert path.read_bytes()[:3] == b"\xef\xbb\xbf"
    df = read_table(path)
    assert list(df.columns[:4]) == ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3"]
    assert df["lot"].tolist() == ["L1"] * len(tokens)
    assert df["ribbon_break_force_n"].isna().all()
    assert df.attrs["source_rows"] == list(range(2, 2 + len(tokens)))


def test_types_of_columns(tmp_path):
    path = write(tmp_path, "process.csv",
                 "lot,product,manufactured_at,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,"
                 "mill_screen_mm,blend_moisture_pct,supplier\n"
                 "007,P1,2024-03-05 14:30,9.5,2.0,5,20,1.0,2.5,north\n"
                 "008,P1,2024-03-06,10,2.5,5,20,1.0,NA,south\n")
    df = read_table(path)
    assert df["lot"].tolist() == ["007", "008"]  # keys stay text: leading zeros kept
    assert df["manufactured_at"].tolist() == [pd.Timestamp("2024-03-05 14:30"), pd.Timestamp("2024-03-06")]
    assert df["roll_force_kn_per_cm"].dtype == "float64"
    assert df["blend_moisture_pct"].dtype == "float64"  # extra column, every value a number
    assert math.isnan(df["blend_moisture_pct"].iloc[1])
    assert df["supplier"].tolist() == ["north", "south"]  # extra text column kept
    assert df["roll_width_mm"].isna().all()  # optional template column absent from the file


def test_quoted_fields_and_blank_rows(tmp_path):
    # RFC 4180, 2.6-2.7: a quoted field may hold the separator, a line break and doubled quotes
    path = write(tmp_path, "process.csv",
                 "lot,compactor,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm\n"
                 "A,\"pilot, line \"\"2\"\"\",9,2,5,20,1\n"
                 "\n"
                 "B,\"two\nlines\",9,2,5,20,1\n")
    df = read_table(path)
    assert df["compactor"].tolist() == ['pilot, line "2"', "two lines"]
    assert df.attrs["source_rows"] == [2, 4]  # the blank row 3 still counts, as in a spreadsheet


# --------------------------------------------------------------------------- every rule, reported in full


def test_all_problems_of_a_file_at_once(tmp_path):
    path = write(tmp_path, "process.csv",
                 PROCESS_HEAD + "\n"
                 "A,abc,0,5,20,1\n"       # row 2: not a number; gap 0 breaks 0 < gap
                 "A,9,2,5,20,1\n"         # row 3: duplicate lot
                 ",9,2,5,20,1\n"          # row 4: missing lot
                 "C,61,2,5,20,1\n"        # row 5: force above 60
                 "D,9,2,-1,20,1\n")       # row 6: speed not > 0
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert len(ps) == 6
    assert find(ps, file="process.csv", row=2, column="roll_force_kn_per_cm", value="abc", rule="not a number")
    assert find(ps, row=2, column="roll_gap_mm", value="0", rule="0 < roll_gap_mm <= 15")
    assert find(ps, row=3, column="lot", value="A", rule="duplicate lot row")
    assert find(ps, row=3, rule="already on row 2")
    assert find(ps, row=4, column="lot", rule="must have a value in every row")
    assert find(ps, row=5, column="roll_force_kn_per_cm", value="61", rule="roll_force_kn_per_cm <= 60")
    assert find(ps, row=6, column="roll_speed_rpm", value="-1", rule="0 < roll_speed_rpm")
    text = str(exc.value)
    assert text.startswith("6 problems found; nothing was written.")
    assert "process.csv, row 2, column 'roll_force_kn_per_cm', value 'abc': not a number" in text


def test_required_column_missing_names_a_near_header(tmp_path):
    path = write(tmp_path, "process.csv", "lot,roll_force_kn_per_cm,roll_gap,roll_speed_rpm,screw_speed_rpm\n"
                                          "A,9,2,5,20\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert find(ps, file="process.csv", row=1, column="roll_gap_mm", rule="found 'roll_gap'")
    assert find(ps, row=1, column="mill_screen_mm", rule="required column 'mill_screen_mm' is missing")


def test_duplicate_header_and_values_without_header(tmp_path):
    path = write(tmp_path, "ribbon.csv", "lot,sample,envelope_density_g_cm3,Envelope_Density_g_cm3,"
                                         "skeletal_density_g_cm3,\nA,1,1.0,1.0,1.5,oops\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert find(ps, row=1, column="Envelope_Density_g_cm3", rule="two columns become 'envelope_density_g_cm3'")
    assert find(ps, row=1, column="F", rule="column F has values but no header")


@pytest.mark.parametrize("rule", list(ROW_RULES))
def test_every_schema_rule_has_a_checker(rule):
    assert any(rule in t.rules for t in TABLES.values())


def test_schema_rules_all_implemented():
    assert {r for t in TABLES.values() for r in t.rules} == set(ROW_RULES)


def test_envelope_above_skeletal_refused(tmp_path):
    # porosity = 1 - envelope/skeletal density < 0 is impossible (references.md, sec. 1, edge cases)
    path = write(tmp_path, "ribbon.csv", RIBBON_HEAD + "\nA,1,1.20,1.50\nA,2,1.60,1.50\nA,3,1.50,1.50\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert len(ps) == 1  # equal densities (porosity 0) are allowed
    p = ps[0]
    assert (p.file, p.row, p.column, p.value) == ("ribbon.csv", 3, "envelope_density_g_cm3", 1.6)
    assert "envelope_density_g_cm3 <= skeletal_density_g_cm3" in p.rule


def test_density_bounds_and_masses(tmp_path):
    ribbon = write(tmp_path, "ribbon.csv", RIBBON_HEAD + "\nA,1,0,1.5\nA,2,1.0,-1.5\n")
    with pytest.raises(InputError) as exc:
        read_table(ribbon)
    ps = problems_of(exc)
    assert find(ps, row=2, column="envelope_density_g_cm3", value="0", rule="0 < envelope_density_g_cm3")
    assert find(ps, row=3, column="skeletal_density_g_cm3", value="-1.5", rule="0 < skeletal_density_g_cm3")
    granules = write(tmp_path, "granules.csv", "lot,sieve_um,retained_g\nA,500,-0.1\nA,0,0\nB,500,0\nB,0,0\n")
    with pytest.raises(InputError) as exc:
        read_table(granules)
    ps = problems_of(exc)
    assert find(ps, row=2, column="retained_g", value="-0.1", rule="0 <= retained_g")
    assert find(ps, row=4, column="retained_g", rule="lot 'B': the retained masses sum to 0 g")
    assert not find(ps, rule="lot 'A'")  # A's sum is unknown once a cell is refused


def test_granule_keys_and_pan(tmp_path):
    path = write(tmp_path, "granules.csv", "lot,sieve_um,retained_g\nA,500,3\nA,0,1\nA,500.0,2\nA,,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert find(ps, row=4, column="sieve_um", value=500.0, rule="(lot, sieve_um) = (A, 500) is already on row 2")
    assert find(ps, row=5, column="sieve_um", rule="must have a value in every row")


def test_laser_order_and_cup_depth(tmp_path):
    laser = write(tmp_path, "granules_laser.csv", "lot,d10_um,d50_um,d90_um\nA,50,200,150\nB,50,200,400\n")
    with pytest.raises(InputError) as exc:
        read_table(laser)
    assert [(p.row, p.column, p.value) for p in problems_of(exc)] == [(2, "d90_um", 150.0)]
    tablets = write(tmp_path, "tablets.csv", "lot,compression_force_kn,thickness_mm,cup_depth_mm\n"
                                             "A,10,4.0,2.0\nB,10,4.0,1.0\nC,10,4.0,\n")
    with pytest.raises(InputError) as exc:
        read_table(tablets)
    ps = problems_of(exc)
    assert [(p.row, p.column, p.value) for p in ps] == [(2, "cup_depth_mm", 2.0)]
    assert "2 * cup_depth_mm < thickness_mm" in ps[0].rule


def test_percentages_and_unit_tables(tmp_path):
    tablets = write(tmp_path, "tablets.csv", "lot,compression_force_kn,friability_pct,dissolution_pct,"
                                             "weight_rsd_pct\nA,10,101,151,-1\n")
    with pytest.raises(InputError) as exc:
        read_table(tablets)
    cols = {p.column: p.value for p in problems_of(exc)}
    assert cols == {"friability_pct": "101", "dissolution_pct": "151", "weight_rsd_pct": "-1"}
    weights = write(tmp_path, "tablet_weights.csv", "lot,unit,weight_mg\nA,1,250\nA,1,251\nA,2,\n")
    with pytest.raises(InputError) as exc:
        read_table(weights)
    ps = problems_of(exc)
    assert find(ps, row=3, column="unit", rule="(lot, unit) = (A, 1) is already on row 2")
    assert find(ps, row=4, column="weight_mg", rule="must have a value in every row")
    diss = write(tmp_path, "dissolution.csv", "lot,vessel,time_min,released_pct\nA,1,30,85\nA,1,30,86\n")
    with pytest.raises(InputError) as exc:
        read_table(diss)
    assert find(problems_of(exc), row=3, column="time_min", rule="(lot, vessel, time_min) = (A, 1, 30)")


def test_dates_iso_8601_only(tmp_path):
    # ISO 8601-1:2019 calendar dates (YYYY-MM-DD) with optional time; day-first forms are refused, not guessed
    path = write(tmp_path, "process.csv",
                 "lot,manufactured_at," + PROCESS_HEAD.split(",", 1)[1] + "\n"
                 "A,2024-03-05T14:30:00,9,2,5,20,1\n"
                 "B,05.03.2024,9,2,5,20,1\n"
                 "C,3/5/2024,9,2,5,20,1\n"
                 "D,2024-02-30,9,2,5,20,1\n"
                 "E,2024-03-05T14:30:00+01:00,9,2,5,20,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert [(p.row, p.value) for p in ps] == [(3, "05.03.2024"), (4, "3/5/2024"), (5, "2024-02-30"),
                                              (6, "2024-03-05T14:30:00+01:00")]
    assert "ISO 8601" in ps[0].rule and "not a valid date" in ps[2].rule and "time-zone" in ps[3].rule


def test_encoding_problems(tmp_path):
    latin = write(tmp_path, "process.csv", PROCESS_HEAD + ",Bemerkung\nA,9,2,5,20,1,Trübung\n", encoding="cp1252")
    with pytest.raises(InputError) as exc:
        read_table(latin)
    (p,) = problems_of(exc)
    assert (p.file, p.row) == ("process.csv", 2)
    assert "not UTF-8" in p.rule and "0xfc" in p.rule  # 'ü' is 0xFC in Windows-1252
    utf16 = write(tmp_path, "ribbon.csv", RIBBON_HEAD + "\nA,1,1,1.5\n", encoding="utf-16")
    with pytest.raises(InputError, match="UTF-16"):
        read_table(utf16)


@pytest.mark.parametrize("data, row, rule", [
    (b"PK\x03\x04rest of a zip", None, "zipped workbook (.xlsx), not a CSV"),
    (b"lot,sample\nA,\x001\n", None, "NUL bytes"),
    (b"\n\nlot,sample\nA,1\n", 1, "the header must be on row 1"),
    (b"", None, "the file is empty: no header and no rows"),  # a user test: it said row 1 is empty
    (b"\n\n ,\n", None, "the file is empty: no header and no rows"),
])
def test_file_level_problems(tmp_path, data, row, rule):
    path = tmp_path / "ribbon.csv"
    path.write_bytes(data)
    with pytest.raises(InputError) as exc:
        read_table(path)
    (p,) = problems_of(exc)
    assert (p.file, p.row, p.column) == ("ribbon.csv", row, None) and rule in p.rule


def test_numbers_that_are_not_finite_refused(tmp_path):
    path = write(tmp_path, "granules.csv", "lot,sieve_um,retained_g\nA,500,1e999\nA,0,inf\nA,250,1_000\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    assert [(p.row, p.column, p.value, p.rule) for p in problems_of(exc)] == [
        (2, "retained_g", "1e999", "not a finite number"),
        (3, "retained_g", "inf", "not a number"),
        (4, "retained_g", "1_000", "not a number"),  # Python's float() would take it; a lab's file should not
    ]


def test_row_with_too_many_or_too_few_fields(tmp_path):
    path = write(tmp_path, "ribbon.csv", RIBBON_HEAD + "\nA,1,1,05,1,50\nA,2,1.0\nA,3,1.0,1.5,,\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert [(p.row, p.value) for p in ps] == [(2, "A,1,1,05,1,50"), (3, "A,2,1.0")]
    assert "6 fields but the header has 4" in ps[0].rule and "decimal comma" in ps[0].rule


# --------------------------------------------------------------------------- separators and decimal marks


def test_semicolon_with_decimal_commas_read_right(tmp_path):
    path = write(tmp_path, "ribbon.csv", "lot;sample;envelope_density_g_cm3;skeletal_density_g_cm3\n"
                                         "A;1;1,234;1,5\nA;2;0,98;1,47E0\n")
    df = read_table(path)
    assert df["envelope_density_g_cm3"].tolist() == [1.234, 0.98]
    assert df["skeletal_density_g_cm3"].tolist() == [1.5, 1.47]


def test_semicolon_with_thousands_dots_refused(tmp_path):
    # a ';' file with decimal commas: '1.234,5' has a thousands separator -> refused, not misread
    path = write(tmp_path, "granules.csv", "lot;sieve_um;retained_g\nA;1.000;1,5\nA;0;1.234,5\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert [(p.row, p.column, p.value) for p in ps] == [(2, "sieve_um", "1.000"), (3, "retained_g", "1.234,5")]
    assert all("thousands separator" in p.rule for p in ps)


def test_semicolon_with_only_thousands_like_dots_refused(tmp_path):
    # '1.250' in a ';' file without any other decimal mark may be 1.25 or 1250: refused as ambiguous
    path = write(tmp_path, "tablet_weights.csv", "lot;unit;weight_mg\nA;1;980\nA;2;1.250\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    (p,) = problems_of(exc)
    assert (p.row, p.column, p.value) == (3, "weight_mg", "1.250") and "ambiguous" in p.rule


def test_semicolon_with_decimal_points_read_right(tmp_path):
    # '0.98' shows the file's decimal mark is '.', so '1.473' is 1.473
    path = write(tmp_path, "ribbon.csv", "lot;sample;envelope_density_g_cm3;skeletal_density_g_cm3\n"
                                         "A;1;0.98;1.473\n")
    df = read_table(path)
    assert df["skeletal_density_g_cm3"].tolist() == [1.473]


def test_comma_file_with_quoted_comma_numbers_refused(tmp_path):
    # RFC 4180 lets "1,5" stand quoted in a ',' file; as a number it may be 1.5 or 15 (thousands): refused
    path = write(tmp_path, "ribbon.csv", RIBBON_HEAD + ',note\nA,1,"1,05",1.5,"a, b"\nA,2,"1,234",1.5,x\n')
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert [(p.row, p.column, p.value) for p in ps] == [(2, "envelope_density_g_cm3", "1,05"),
                                                        (3, "envelope_density_g_cm3", "1,234")]
    assert all("ambiguous" in p.rule for p in ps)


def test_comma_in_text_and_extra_columns_kept_as_text(tmp_path):
    path = write(tmp_path, "ribbon.csv", RIBBON_HEAD + ',note\nA,1,1.05,1.5,"1,5"\n')
    assert read_table(path)["note"].tolist() == ["1,5"]  # extra column: text, not a misread number


def test_header_with_both_separators(tmp_path):
    ok = write(tmp_path, "ribbon.csv", "lot;sample;envelope_density_g_cm3;skeletal_density_g_cm3;note, free\n"
                                       "A;1;1,0;1,5;x\n")
    df = read_table(ok)
    assert df["skeletal_density_g_cm3"].tolist() == [1.5] and df["note, free"].tolist() == ["x"]
    bad = write(tmp_path, "tablets.csv", "lot;a,b\nA;1,2\n")
    with pytest.raises(InputError, match="cannot tell the separator"):
        read_table(bad)


# --------------------------------------------------------------------------- workbooks


def _workbook(path: Path, sheets: dict[str, list[list]]) -> Path:
    import openpyxl

    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for name, rows in sheets.items():
        ws = wb.create_sheet(name)
        for row in rows:
            ws.append(row)
    wb.save(path)
    return path


def test_xlsx_table(tmp_path):
    when = dt.datetime(2024, 3, 5, 14, 30)
    path = _workbook(tmp_path / "process.xlsx", {"Sheet1": [
        ["lot ", "manufactured_at", "roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm",
         "mill_screen_mm", "lubricant_pct"],
        [101, when, 9.5, 2, 5, 20, 1.0, 0.5],
        [None] * 8,
        ["102", "2024-03-06", "10.25", 2.5, 5, 20, 1.0, None],
    ]})
    df = read_table(path)
    assert df["lot"].tolist() == ["101", "102"]
    assert df["manufactured_at"].tolist() == [pd.Timestamp(when), pd.Timestamp("2024-03-06")]
    assert df["roll_force_kn_per_cm"].tolist() == [9.5, 10.25]
    assert df["lubricant_pct"].dtype == "float64"
    assert df.attrs["source_rows"] == [2, 4]


def test_xlsx_problems_name_sheet_row_and_column(tmp_path):
    path = _workbook(tmp_path / "lab.xlsx", {
        "process": [PROCESS_HEAD.split(","), ["A", 9, 2, 5, 20, 1]],
        "ribbon": [RIBBON_HEAD.split(","), ["A", 1, "1,05", 1.5], ["A", 2, True, 1.5], ["A", 3, 1.7, 1.5]],
        "notes": [["anything"]],
    })
    with pytest.raises(InputError) as exc:
        read_folder(tmp_path)
    ps = problems_of(exc)
    assert [(p.file, p.row, p.column) for p in ps] == [("lab.xlsx (sheet ribbon)", 2, "envelope_density_g_cm3"),
                                                       ("lab.xlsx (sheet ribbon)", 3, "envelope_density_g_cm3"),
                                                       ("lab.xlsx (sheet ribbon)", 4, "envelope_density_g_cm3")]
    assert "ambiguous" in ps[0].rule and "TRUE/FALSE" in ps[1].rule and "skeletal" in ps[2].rule


def test_xlsx_dates_and_numbers_in_the_wrong_column(tmp_path):
    path = _workbook(tmp_path / "process.xlsx", {"process": [
        ["lot", "manufactured_at", *PROCESS_HEAD.split(",")[1:]],
        ["A", 45356, dt.datetime(2024, 3, 5), 2, 5, 20, 1],
    ]})
    with pytest.raises(InputError) as exc:
        read_table(path)
    ps = problems_of(exc)
    assert [(p.file, p.row, p.column) for p in ps] == [("process.xlsx", 2, "manufactured_at"),
                                                       ("process.xlsx", 2, "roll_force_kn_per_cm")]
    assert ps[0].value == 45356 and "a number, not a date" in ps[0].rule
    assert ps[1].value == dt.datetime(2024, 3, 5) and "a date is not a number" in ps[1].rule


def test_workbooks_without_a_table_sheet(tmp_path):
    _workbook(tmp_path / "export.xlsx", {"Data": [["lot"]], "Notes": [["x"]]})
    _workbook(tmp_path / "ribbon.xlsx", {"first": [["lot"]], "second": [["lot"]]})
    _minimal_process(tmp_path)
    ps = _raises(read_folder, tmp_path)
    assert find(ps, file="export.xlsx", rule="neither the file nor any of its sheets (Data, Notes)")
    assert find(ps, file="ribbon.xlsx", rule="no sheet named 'ribbon' and more than one sheet (first, second)")


def _minimal_process(folder: Path) -> None:
    write(folder, "process.csv", PROCESS_HEAD + "\nA,9,2,5,20,1\n")


def test_xlsx_workbook_of_sheets(tmp_path):
    _workbook(tmp_path / "lab.xlsx", {
        "process": [PROCESS_HEAD.split(","), ["A", 9, 2, 5, 20, 1]],
        "ribbon": [RIBBON_HEAD.split(","), ["A", 1, 1.0, 1.5]],
        "notes": [["anything"]],
    })
    ingest = read_folder(tmp_path)
    assert set(ingest.tables) == {"process", "ribbon"}
    assert ingest.sources["ribbon"]["file"] == "lab.xlsx (sheet ribbon)"
    assert any("sheet 'notes' ignored" in w for w in ingest.warnings)


def test_xlsx_formula_without_cached_value_refused(tmp_path):
    # openpyxl writes formulas without a computed result; reading None there would drop a value silently
    path = _workbook(tmp_path / "ribbon.xlsx", {"ribbon": [RIBBON_HEAD.split(","), ["A", 1, "=0.5*2", 1.5]]})
    with pytest.raises(InputError) as exc:
        read_table(path)
    (p,) = problems_of(exc)
    assert (p.row, p.column) == (2, "envelope_density_g_cm3") and "formula" in p.rule


# --------------------------------------------------------------------------- folders


def _minimal(folder: Path) -> None:
    write(folder, "process.csv", PROCESS_HEAD + "\nA,9,2,5,20,1\n")
    write(folder, "ribbon.csv", RIBBON_HEAD + "\nA,1,1.0,1.5\n")


def test_unknown_files(tmp_path):
    _minimal(tmp_path)
    write(tmp_path, "tablet.csv", "lot\nA\n")
    write(tmp_path, "old.xls", "x")
    write(tmp_path, "notes.docx", "x")
    write(tmp_path, "README.md", "x")
    with pytest.raises(InputError) as exc:
        read_folder(tmp_path)
    ps = problems_of(exc)
    assert find(ps, file="tablet.csv", rule="did you mean 'tablets'")
    assert find(ps, file="tablet.csv", rule="recognised: process.csv")
    assert find(ps, file="old.xls", rule="save as .xlsx or CSV UTF-8")
    (tmp_path / "tablet.csv").unlink()
    (tmp_path / "old.xls").unlink()
    ingest = read_folder(tmp_path)
    assert ingest.warnings == ["notes.docx ignored (not a table file; recognised: process, ribbon, granules, "
                               "granules_laser, tablets, tablet_weights, dissolution as .csv or .xlsx, spec.toml, "
                               "columns.toml)"]


def test_errors_of_every_file_together(tmp_path):
    write(tmp_path, "process.csv", PROCESS_HEAD + "\nA,9,2,5,20,x\n")
    write(tmp_path, "ribbon.csv", RIBBON_HEAD + "\nA,1,2.0,1.5\n")
    write(tmp_path, "spec.toml", "[friability_pct]\nmax = 100.5\n")
    with pytest.raises(InputError) as exc:
        read_folder(tmp_path)
    assert {p.file for p in problems_of(exc)} == {"process.csv", "ribbon.csv", "spec.toml"}


def test_same_table_twice_and_empty_folder(tmp_path):
    assert find(_raises(read_folder, tmp_path), rule="no table files found")
    _minimal(tmp_path)
    write(tmp_path, "process.tsv", "lot\tx\n")
    assert find(_raises(read_folder, tmp_path), file="process.tsv", rule="given twice")


def _raises(fn, *args, **kw):
    with pytest.raises(InputError) as exc:
        fn(*args, **kw)
    return problems_of(exc)


def test_results_without_process_record(tmp_path):
    write(tmp_path, "process.csv", PROCESS_HEAD + "\nA,9,2,5,20,1\n")
    write(tmp_path, "granules.csv", "lot,sieve_um,retained_g\nA,0,1\nB,500,2\nB,0,1\n")
    ingest = read_folder(tmp_path)  # without the store's lots, nothing is decided yet
    ps = cross_check(ingest, known_lots=["Z"])
    assert [(p.file, p.row, p.column, p.value) for p in ps] == [("granules.csv", 3, "lot", "B")]
    assert "no process record" in ps[0].rule and "rows 3-4" in ps[0].rule
    assert cross_check(ingest, known_lots=["B"]) == []
    ps = _raises(read_folder, tmp_path, known_lots=[])
    assert find(ps, rule="required table 'ribbon' is missing")
    assert find(ps, file="granules.csv", value="B")


def test_tables_keep_a_pure_header_file_with_a_warning(tmp_path):
    _minimal(tmp_path)
    write(tmp_path, "tablets.csv", "lot,compression_force_kn\n")
    ingest = read_folder(tmp_path)
    assert len(ingest.tables["tablets"]) == 0
    assert ingest.warnings == ["tablets.csv has a header but no data rows"]
