"""CSV exports that a spreadsheet opens safely, written whole; non-finite numbers refused at ingest
(issue 15 items 6 and 7).

Formula injection: OWASP, "CSV Injection" (cells beginning with = + - @ tab or carriage return are
prefixed with a single quote). Read back with Python's csv module, the reference CSV reader.
"""

from __future__ import annotations

import csv
import io
import os

import pandas as pd
import pytest

from linkage.exceptions import InputError
from linkage.export import FORMULA_LEADS, neutralise_cell, write_atomic, write_table_csv
from linkage.read import read_folder

from .helpers import add_process_column, template_folder

def test_the_formula_leads_are_owasps_list():
    assert set(FORMULA_LEADS) == {"=", "+", "-", "@", "\t", "\r"}


@pytest.mark.parametrize("cell", ["=1+1", "+SUM(A1)", "-2+3", "@cmd", "\t=x", "\r=x"])
def test_text_that_would_start_a_formula_is_quoted(cell):
    assert neutralise_cell(cell) == "'" + cell


def test_an_assembled_export_quotes_text_and_leaves_numbers(tmp_path, counts):
    table = pd.DataFrame({"lot": ["=HYPERLINK(\"x\")", "A-1", "@SUM(1)"], "product": ["-P", "P", None],
                          "ribbon_porosity": [-0.5, 0.3, 0.31]})
    out = write_table_csv(table, tmp_path / "t.csv")
    rows = list(csv.reader(io.StringIO(out.read_text(encoding="utf-8"))))
    assert rows[1][:2] == ["'=HYPERLINK(\"x\")", "'-P"]
    assert rows[2][:2] == ["A-1", "P"]
    assert rows[3][0] == "'@SUM(1)"
    assert [r[2] for r in rows[1:]] == ["-0.5", "0.3", "0.31"]  # a negative number is a value, written as one
    assert table["lot"].iloc[0] == "=HYPERLINK(\"x\")"  # the caller's table is not changed
    counts["fuzz cases tried"] += 1


def test_a_failed_write_leaves_the_old_file_and_no_temporary_file(tmp_path, monkeypatch):
    target = tmp_path / "report.csv"
    target.write_text("old")

    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", full_disk)
    with pytest.raises(OSError):
        write_atomic(target, b"new contents")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.csv"]


@pytest.mark.parametrize("bad", ["inf", "-Infinity", "1e999"])
def test_an_infinite_value_in_an_extra_number_column_is_refused_with_its_row(tmp_path, bad, counts):
    d = template_folder(tmp_path)
    add_process_column(d, "blend_moisture_pct", lambda i: bad if i == 2 else "2.1")
    with pytest.raises(InputError) as info:
        read_folder(d)
    hit = next(p for p in info.value.problems if "not a finite number" in p.rule)
    assert (hit.file, hit.row, hit.column, hit.value) == ("process.csv", 3, "blend_moisture_pct", bad)
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_an_extra_text_column_may_hold_the_word_inf(tmp_path):
    d = template_folder(tmp_path)
    add_process_column(d, "operator_note", lambda i: "inf" if i == 1 else "checked by QA")
    assert read_folder(d).tables["process"]["operator_note"].iloc[0] == "inf"


def test_an_atomic_write_gives_the_mode_a_plain_write_gives(tmp_path):
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    atomic = write_atomic(tmp_path / "atomic.txt", b"x")
    assert atomic.stat().st_mode == plain.stat().st_mode


def test_a_killed_writers_temporary_file_is_removed_by_the_next_write(tmp_path):
    """A SIGKILL leaves the temporary file (no handler runs); the next write of the same file removes it when
    its writer's process is gone, and leaves a live writer's alone."""
    import subprocess
    import sys

    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = int(gone.stdout)
    orphan = tmp_path / f".report.html.{dead_pid}.abc123.part"
    orphan.write_text("half a report")
    live = tmp_path / f".report.html.{os.getpid()}.zzz999.part"
    live.write_text("being written")
    write_atomic(tmp_path / "report.html", b"<html></html>")
    assert not orphan.exists() and live.exists()
    assert (tmp_path / "report.html").read_bytes() == b"<html></html>"
