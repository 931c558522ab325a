"""An ingest says the blank cells of required columns, per file (a user test: ``process.csv`` with a blank
``roll_force_kn_per_cm`` was ingested with exit 0 and no word).

Required (bold in the README's template) means the header must be there; a key, and a column that must be
filled in every row (``nonempty`` in ``linkage.schema``), is refused when blank. Any other required cell may be
blank (a value not measured yet, results in stages) and is read as a missing value; the ingest and its preview
now say it, one ``Note:`` line per file, and ``ingest --json`` gives it as ``blank_required``.

These are regression tests of what the ingest says: the expected rows, lots and columns are read off the edited
files themselves (which cells were emptied), so they need no outside source.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest

from linkage.exceptions import InputError
from linkage.read import read_folder
from linkage.schema import TABLES
from tests.reliability.helpers import run_cli
from tests.test_read import _workbook  # a workbook of the given sheets, written by openpyxl
from tests.test_read_user_findings import _copy  # the template example's CSV files in a folder of their own

FORCE = "roll_force_kn_per_cm"


def _blank(path: Path, column: str, lots: set[str]) -> list[int]:
    """Empty ``column`` in the rows of ``lots`` of a CSV file; returns their sheet rows (the header is row 1)."""
    with path.open(newline="") as fh:
        rows = list(csv.reader(fh))
    at = rows[0].index(column)
    emptied = []
    for number, row in enumerate(rows[1:], start=2):
        if row and row[0] in lots:
            row[at] = ""
            emptied.append(number)
    with path.open("w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    assert emptied
    return emptied


def _ingest(folder: Path, store: Path, *extra: str) -> str:
    result = run_cli(["ingest", folder, "--store", store, *extra])
    assert result.exit_code == 0, result.output
    return result.output


def test_a_blank_setting_is_said_by_the_ingest_its_preview_and_json_and_read_as_missing(tmp_path):
    """The user test: ``EX-002`` with a blank roll force. It is read as a missing value (not refused: a setting
    may be filled in later), and the preview, the ingest and ``--json`` name the file, the row, the lot, the
    column and what follows."""
    folder = _copy(tmp_path)
    rows = _blank(folder / "process.csv", FORCE, {"EX-002"})
    table = read_folder(folder).tables["process"]
    assert table.loc[table["lot"] == "EX-002", FORCE].isna().all()  # kept as missing, the lot not dropped
    assert len(rows) == 1
    store = tmp_path / "x.db"
    for args in (["--preview"], []):
        lines = [ln for ln in _ingest(folder, store, *args).splitlines() if "required columns" in ln]
        assert len(lines) == 1, lines
        assert lines[0].startswith("Note: process.csv: blank cells in required columns, read as missing values: ")
        assert f"{FORCE} in row {rows[0]} (lot EX-002)" in lines[0]
        assert "the lot has no value of this setting; a model stage that takes it leaves the lot out" in lines[0]
    payload = json.loads(_ingest(folder, store, "--json"))  # again: every lot unchanged, still said
    assert payload["blank_required"] == {"process.csv": [
        {"column": FORCE, "header": FORCE, "rows": rows, "lots": ["EX-002"],
         "means": "the lot has no value of this setting; a model stage that takes it leaves the lot out",
         "n_rows": 1, "n_lots": 1, "rows_shown": 1, "lots_shown": 1}]}


def test_a_folder_without_blanks_says_nothing_of_them(tmp_path):
    folder = _copy(tmp_path)
    out = _ingest(folder, tmp_path / "x.db")
    assert "required columns" not in out
    assert json.loads(_ingest(folder, tmp_path / "x.db", "--json"))["blank_required"] == {}


def test_a_blank_workbook_cell_is_said_with_its_sheet_row(tmp_path):
    """The same for a workbook: a blank envelope density of one ribbon replicate, named with its sheet row and
    the header as written (a columns.toml mapping's)."""
    folder = _copy(tmp_path)
    source = folder / "ribbon.csv"
    with source.open(newline="") as fh:
        rows = list(csv.reader(fh))
    source.unlink()
    header = ["Envelope density" if h == "envelope_density_g_cm3" else h for h in rows[0]]
    at = header.index("Envelope density")
    body = [[c if j in (0, 1) else float(c) for j, c in enumerate(r)] for r in rows[1:] if r]
    body[3][at] = None  # sheet row 5
    _workbook(folder / "ribbon.xlsx", {"ribbon": [header, *body]})
    (folder / "columns.toml").write_text('[ribbon.columns]\n"Envelope density" = "envelope_density_g_cm3"\n')
    blanks = read_folder(folder).blank_required
    assert blanks == {"ribbon.xlsx": [{"column": "envelope_density_g_cm3", "header": "Envelope density",
                                       "rows": [5], "lots": [body[3][0]], "means": blanks["ribbon.xlsx"][0]["means"]}]}
    out = _ingest(folder, tmp_path / "x.db", "--preview")
    assert f"Note: ribbon.xlsx: blank cells in required columns, read as missing values: Envelope density in " \
           f"row 5 (lot {body[3][0]}); the replicate has no ribbon porosity" in out


def test_every_blank_required_cell_that_may_be_blank_is_said_and_keys_are_refused(tmp_path):
    """Every required column of every table either is refused when blank (a key, or ``nonempty``) or is said:
    the template example's tables each get their allowed required columns emptied for one lot; a blank
    ``sample`` (a key) is refused, naming the file, row and column."""
    folder = _copy(tmp_path)
    expected = {}
    for path in sorted(folder.glob("*.csv")):
        tdef = TABLES[path.stem]
        allowed = [c.name for c in tdef.columns if c.required and not c.nonempty and c.name not in tdef.key]
        for column in allowed:
            expected.setdefault(path.name, []).append((column, _blank(path, column, {"EX-003"})))
    blanks = read_folder(folder).blank_required
    assert {f: [(c["column"], c["rows"]) for c in cols] for f, cols in blanks.items()} == expected
    assert all(c["lots"] == ["EX-003"] for cols in blanks.values() for c in cols)
    rows = _blank(folder / "ribbon.csv", "sample", {"EX-001"})
    with pytest.raises(InputError) as caught:
        read_folder(folder)
    said = str(caught.value)
    assert "ribbon.csv" in said and f"row {rows[0]}" in said and "'sample' must have a value in every row" in said


def test_the_json_lists_the_first_rows_and_lots_of_a_long_blank_column_with_their_counts(tmp_path):
    """Regression (a review): ``ingest --json`` listed every blank row of a required column, 27,514 rows for a
    10 % blank column at 25,000 lots. Now each entry lists the first rows and lots, as many as the text note
    names (``BLANK_SHOWN``), and counts them all (``n_rows``, ``n_lots``) beside how many are listed
    (``rows_shown``, ``lots_shown``); the text note still spans every row. The expected rows and lots are read off
    the emptied file itself."""
    from linkage.read.folder import BLANK_SHOWN
    from linkage.synthetic import make_lots

    folder = tmp_path / "lots"
    make_lots(12, seed=3).write_csv(folder)
    with (folder / "process.csv").open(newline="") as fh:
        lots = [row[0] for row in list(csv.reader(fh))[1:] if row]
    rows = _blank(folder / "process.csv", FORCE, set(lots[2:]))  # ten lots blank, one row each
    assert len(rows) == 10 > BLANK_SHOWN
    store = tmp_path / "x.db"
    entry = json.loads(_ingest(folder, store, "--json", "--preview"))["blank_required"]["process.csv"][0]
    assert entry["rows"] == rows[:BLANK_SHOWN] and entry["lots"] == lots[2:2 + BLANK_SHOWN]
    assert (entry["n_rows"], entry["n_lots"], entry["rows_shown"], entry["lots_shown"]) == (10, 10, BLANK_SHOWN,
                                                                                            BLANK_SHOWN)
    said = [ln for ln in _ingest(folder, store).splitlines() if "required columns" in ln]
    assert len(said) == 1 and f"{FORCE} in rows {rows[0]}-{rows[-1]} (10 rows)" in said[0]
    assert f"(10 lots: {', '.join(lots[2:2 + BLANK_SHOWN])} and {10 - BLANK_SHOWN} more)" in said[0]  # how many said
    assert read_folder(folder).blank_required["process.csv"][0]["rows"] == rows  # the reader keeps every row
