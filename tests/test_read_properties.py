"""Property tests of the readers (hypothesis): valid tables read back exactly,
junk is reported, never crashes.

The files are written with Python's csv module (RFC 4180 quoting) and
openpyxl, both independent of linkage's reader. In CSV, floats are written
with ``repr``, which round-trips every finite double exactly (Python's float
repr, shortest representation, Python 3.1+); in a workbook the reference is
what openpyxl reads back from the saved file.
"""

from __future__ import annotations

import csv
import io
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from linkage.exceptions import InputError, Problem
from linkage.read import read_table
from linkage.schema import MISSING_TOKENS

SETTINGS = settings(max_examples=40, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])
HEAD = ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3"]

# names as labs write them: letters, digits, and characters that need quoting in CSV
name_chars = st.characters(categories=("L", "N"), max_codepoint=0x24F) | st.sampled_from(list("-_./#;,\"'"))
names = st.text(name_chars, min_size=1, max_size=8).filter(lambda s: s.strip().lower() not in MISSING_TOKENS)
densities = st.floats(min_value=1e-6, max_value=5.0, allow_nan=False, allow_infinity=False)


@st.composite
def ribbon_tables(draw):
    lots = draw(st.lists(names, min_size=1, max_size=4, unique=True))
    rows = []
    for lot in lots:
        for sample in draw(st.lists(names, min_size=1, max_size=3, unique=True)):
            a, b = draw(densities), draw(densities)
            rows.append([lot, sample, min(a, b), max(a, b)])
    return rows


def csv_text(rows, sep=",", decimal="."):
    buf = io.StringIO()
    writer = csv.writer(buf, delimiter=sep, lineterminator="\r\n")
    writer.writerow(HEAD)
    for r in rows:
        writer.writerow([v if isinstance(v, str) else repr(v).replace(".", decimal) for v in r])
    return buf.getvalue()


def check_frame(df, rows):
    assert df["lot"].tolist() == [r[0] for r in rows]
    assert df["sample"].tolist() == [r[1] for r in rows]
    assert df["envelope_density_g_cm3"].tolist() == [r[2] for r in rows]  # exact, not approximately
    assert df["skeletal_density_g_cm3"].tolist() == [r[3] for r in rows]


@SETTINGS
@given(rows=ribbon_tables(), sep=st.sampled_from([",", ";", "\t"]))
def test_valid_csv_reads_back_exactly(rows, sep):
    decimal = "," if sep == ";" else "."
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "ribbon.csv"
        path.write_text(csv_text(rows, sep, decimal), encoding="utf-8-sig")
        check_frame(read_table(path), rows)


@settings(max_examples=10, deadline=None, derandomize=True)
@given(rows=ribbon_tables())
def test_valid_xlsx_reads_back_exactly(rows):
    import openpyxl

    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "ribbon.xlsx"
        wb = openpyxl.Workbook()
        ws = wb.active
        ws.append(HEAD)
        for r in rows:
            ws.append(r)
        wb.save(path)
        # openpyxl writes doubles with 16 significant digits (Excel keeps 15-17), so the reference is what
        # the saved workbook holds, read back by openpyxl itself
        stored = [list(r) for r in openpyxl.load_workbook(path).active.iter_rows(min_row=2, values_only=True)]
        assert [r[:2] for r in stored] == [r[:2] for r in rows]
        assert all(abs(a - b) <= 1e-15 * b for s, r in zip(stored, rows) for a, b in zip(s[2:], r[2:]))
        check_frame(read_table(path), stored)


junk = st.text(st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=12)


@SETTINGS
@given(rows=ribbon_tables(), cell=junk, where=st.tuples(st.integers(0, 100), st.integers(0, 3)))
def test_junk_cells_are_reported_not_crashed(rows, cell, where):
    k, j = where[0] % len(rows), where[1]
    rows = [list(r) for r in rows]
    rows[k][j] = cell
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "ribbon.csv"
        path.write_text(csv_text(rows), encoding="utf-8")
        try:
            df = read_table(path)
        except InputError as exc:
            assert exc.problems and all(isinstance(p, Problem) and p.file == "ribbon.csv" for p in exc.problems)
            assert all(p.row is None or 1 <= p.row <= len(rows) + 1 for p in exc.problems)
            # the junk cell's row (k + 2) is named, unless the junk broke a key shared with another row
            # or made its row blank, or the refusal is of the whole file
            assert any(p.row in (k + 2, None, 1) for p in exc.problems) or any(
                "duplicate" in p.rule for p in exc.problems)
        else:
            assert len(df) <= len(rows)


@settings(max_examples=40, deadline=None, derandomize=True)
@given(data=st.binary(max_size=200), suffix=st.sampled_from([".csv", ".xlsx"]))
def test_junk_files_are_refused_not_crashed(data, suffix):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / f"ribbon{suffix}"
        path.write_bytes(data)
        try:
            read_table(path)
        except InputError as exc:
            assert exc.problems and all(p.file == path.name for p in exc.problems)


@pytest.mark.parametrize("value", ["1,5", "1.234,5", "1.250"])
def test_semicolon_numbers_are_never_misread(tmp_path, value):
    """A ';' file either reads a number as the lab meant it or refuses it.

    '1,5' is 1.5 (decimal comma); '1.234,5' and a lone '1.250' could mean two
    things and are refused. Checked against the reading each convention gives
    (decimal comma: 1.5; thousands dot: 1234.5, 1250).
    """
    path = tmp_path / "granules.csv"
    path.write_text(f"lot;sieve_um;retained_g\nA;500;{value}\nA;0;2\n", encoding="utf-8")
    meant = {"1,5": 1.5}
    if value in meant:
        assert read_table(path)["retained_g"].tolist() == [meant[value], 2.0]
    else:
        with pytest.raises(InputError) as exc:
            read_table(path)
        assert [(p.row, p.column, p.value) for p in exc.value.problems] == [(2, "retained_g", value)]
