"""The fast readers give what the record-by-record and cell-by-cell rules give (issue 20).

A CSV file without a double quote is split by pandas' C reader
(``linkage.read.sniff._quote_free``), and plain columns are read once per
distinct cell (``linkage.read.cells._fast_cells``). The reference for both is
the slow path of the same rules: the standard library's ``csv.reader``
(Python docs, "csv — CSV File Reading and Writing": ``skipinitialspace``,
``newline=''`` line ends) followed by the per-cell rules. Each test reads the
same bytes both ways and asks for the same table, or the same problems in
the same order, file, row, column, value and rule.
"""

from __future__ import annotations

import string

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import linkage.read.sniff as sniff
import linkage.read.table as table
from linkage.exceptions import InputError
from linkage.read import read_table

SETTINGS = settings(max_examples=150, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

# cells as labs write them, and as damaged files hold them: numbers, dates, missing tokens, padding, odd spaces
cell_parts = st.sampled_from([
    "1", "0.25", "-3", "1e-3", "1.5E2", "12", "+7", "inf", "nan", "1_0", "1.2.3", ".", "-", "1,5",
    "NA", "n/a", "", " ", "\t", "\xa0", "\u2003", "2024-03-05", "2024-03-05 14:30", "2024-02-30",
    "2024-03-05T14:30:00+01:00", "05.03.2024", "LOT-1", "lot-1", "Q\u2011100", "x y", "\u0661", "%", "a\x0bb",
    "\x1a", "\x0c", "\x1c", "\x85", "\u2028", "#", "\ufeff", "'",
])
cells = st.lists(cell_parts, min_size=0, max_size=3).map("".join)


@st.composite
def csv_files(draw):
    sep = draw(st.sampled_from([",", "\t", ";"]))
    header = draw(st.sampled_from([
        ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3", "sampled_at"],
        ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3", "note"],
        ["Lot", "sample", " envelope_density_g_cm3 ", "skeletal_density_g_cm3"],
    ]))
    lines = [sep.join(header)]
    for _ in range(draw(st.integers(0, 6))):
        width = len(header) + draw(st.sampled_from([0, 0, 0, 0, -1, 1]))
        lines.append(sep.join(draw(cells) for _ in range(max(width, 1))))
    end = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    tail = draw(st.sampled_from(["", end, end + end]))
    return sep, (end.join(lines) + tail).encode("utf-8")


# mostly readable files, so that the column-at-once readers are taken and compared, not only refused
plain_cells = {
    "lot": st.sampled_from(["A", "B", "C-1", " a ", "A", "B", "Lot 7", "NA"]),
    "sample": st.sampled_from(["1", "2", "3", "x", " 4", "1"]),
    "envelope_density_g_cm3": st.sampled_from(["0.5", "0.8 ", "1e-1", "0.75", "NA", "", "0.9", "-", "0.5.1"]),
    "skeletal_density_g_cm3": st.sampled_from(["1.5", "2.0", " 1.45", "1.5", "n/a", "1.50", "3", "0"]),
    "sampled_at": st.sampled_from(["2024-03-05", "2024-03-05 14:30", "2024-03-05T14:30:00", "", "NA",
                                   "2024-03-05T14:30:00.25", " 2024-03-06", "2024-02-30", "2024-03-05"]),
}


@st.composite
def plain_files(draw):
    sep = draw(st.sampled_from([",", "\t"]))
    header = list(plain_cells)
    rows = [sep.join(draw(plain_cells[h]) + (f"{k}" if h == "sample" else "") for h in header)  # keys unique
            for k in range(draw(st.integers(1, 12)))]
    return sep, (sep.join(header) + "\n" + "\n".join(rows) + "\n").encode("utf-8")


def outcome(path):
    """The table (values, dtypes, source rows) or the problems, as comparable data."""
    try:
        df = read_table(path, "ribbon")
    except InputError as exc:
        return "problems", [(p.file, p.row, p.column, repr(p.value), p.rule) for p in exc.problems]
    return "table", df, list(df.attrs["source_rows"])


def assert_same(fast, slow):
    assert fast[0] == slow[0], (fast, slow)
    if fast[0] == "problems":
        assert fast[1] == slow[1]
    else:
        pd.testing.assert_frame_equal(fast[1], slow[1], check_exact=True)
        assert fast[2] == slow[2]


@given(csv_files() | plain_files())
@SETTINGS
def test_a_quote_free_file_reads_as_the_csv_module_reads_it(tmp_path_factory, monkeypatch, spec):
    sep, data = spec
    path = tmp_path_factory.mktemp("fast") / "ribbon.csv"
    path.write_bytes(data)
    fast = outcome(path)
    with monkeypatch.context() as m:
        m.setattr(sniff, "_quote_free", lambda text, sep, label: None)
        m.setattr(table, "_fast_cells", lambda *args: None)
        slow = outcome(path)
    assert_same(fast, slow)


@given(csv_files())
@SETTINGS
def test_the_split_cells_are_the_csv_module_cells_trimmed(spec):
    sep, data = spec
    text = data.decode("utf-8")
    fast = sniff._quote_free(text, sep, "ribbon.csv")
    if fast is None:
        return  # the file needs the record-by-record reader; the test above covers it
    slow = sniff._from_records(text, sep, "ribbon.csv")
    assert fast.row_numbers == slow.row_numbers
    assert [h.strip() for h in fast.header] == [h.strip() for h in slow.header]
    assert [[c.strip() for c in col] for col in fast.columns] == [[c.strip() for c in col] for col in slow.columns]
    assert fast.problems == slow.problems == []


@pytest.mark.parametrize("data", [
    b'lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n"A",1,0.5,1.5\n',  # a quote
    b"lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\nA,1,0.5,1.5\n\nB,1,0.5,1.5\n",  # a blank row
    b"lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\nA,1,0,5,1.5\n",  # a ragged row
    b"lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\nA,1,0.5,1.5\n,,,\n",  # separators only
    b"lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n\xc2\xa0,,,\nA,1,0.5,1.5\n",  # a no-break space
])
def test_files_the_fast_reader_leaves_to_the_csv_module(data):
    assert sniff._quote_free(data.decode("utf-8"), ",", "ribbon.csv") is None


def test_a_plain_file_takes_the_fast_reader():
    rows = "\n".join(f"L{k},{k % 3},0.{k % 9 + 1},1.5" for k in range(50))
    text = "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n" + rows + "\n"
    raw = sniff._quote_free(text, ",", "ribbon.csv")
    assert raw is not None and raw.row_numbers == list(range(2, 52))
    assert raw.columns[0][:2] == ["L0", "L1"]


def test_a_line_past_the_cell_limit_goes_to_the_csv_module(tmp_path):
    long = "x" * 131_073
    path = tmp_path / "ribbon.csv"
    path.write_text(f"lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n{long},1,0.5,1.5\n")
    assert sniff._quote_free(path.read_text(), ",", "ribbon.csv") is None
    with pytest.raises(InputError, match="longer than 131,072 characters"):
        read_table(path)


def test_identical_tables_from_a_large_plain_file_both_ways(tmp_path, monkeypatch):
    letters = string.ascii_uppercase
    rows = [f"{letters[k % 26]}-{k},{k % 5},{(k % 97) / 100 + 0.01!r},{1.5 + (k % 7) / 10!r}" for k in range(3000)]
    path = tmp_path / "ribbon.csv"
    path.write_text("lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\r\n" + "\r\n".join(rows) + "\r\n")
    fast = outcome(path)
    monkeypatch.setattr(sniff, "_quote_free", lambda text, sep, label: None)
    monkeypatch.setattr(table, "_fast_cells", lambda *args: None)
    assert_same(fast, outcome(path))
    assert fast[0] == "table" and len(fast[1]) == 3000


def test_the_key_of_an_ascii_lot_id_is_the_full_unicode_key():
    """lot_key takes ASCII ids straight to lower(): the reference is the full rule, Unicode NFKC (UAX #15),
    the dash folding and str.casefold (Unicode full case folding), applied to every ASCII character."""
    import unicodedata

    from linkage.read.lots import _DASHES, lot_key

    every = "".join(map(chr, range(128)))
    for lot in [every, every.upper(), "VX25-001", "Lot 7/B", "\t\x7f"]:
        assert lot_key(lot) == _DASHES.sub("-", unicodedata.normalize("NFKC", lot)).casefold()


date_chars = st.sampled_from(list("0123456789-T :.+Z\u0661x"))


@given(st.lists(st.text(date_chars, min_size=8, max_size=20), min_size=1, max_size=5)
       | st.lists(st.sampled_from(["2024-03-05", "2024-03-05T14:30", "2024-03-05 14:30:59", "2024-3-05",
                                   "2024-03-05t14:30", "2024-03-05T14-30", "\u0662024-03-05"]), min_size=1))
@SETTINGS
def test_the_fixed_layout_date_check_accepts_only_what_the_date_pattern_accepts(cells):
    """The column-at-once check of the common ISO 8601 layouts is a subset of the per-column pattern
    (ISO 8601-1:2019 extended format, as the module notes give it)."""
    from linkage.read.cells import _PLAIN_DATES, _fixed_layout_dates

    if _fixed_layout_dates(cells):
        assert _PLAIN_DATES.fullmatch("\n".join(cells))


@pytest.mark.parametrize("stored, expected", [
    (["ex-001", "EX-001", "EX-002"], "EX-001"),  # a store written before the rule: two spellings, the first sorted
    (["\uff25\uff38-001", "EX-002"], "\uff25\uff38-001"),  # full-width letters: NFKC makes them EX (UAX #15)
    (["EX\u2011001", "EX-002"], "EX\u2011001"),  # a non-breaking hyphen folds to '-'
])
def test_a_new_id_is_checked_against_every_stored_spelling(tmp_path, stored, expected):
    """The cross-check keys stored ids in one call when they are ASCII, and one by one otherwise; either way a
    new id with a stored id's key (NFKC, dash folding, str.casefold) is refused naming the stored spelling."""
    import shutil
    from pathlib import Path

    from linkage.read import cross_check, read_folder

    folder = tmp_path / "in"
    shutil.copytree(Path(__file__).resolve().parent / "data" / "template-example", folder)
    (folder / "spec.toml").unlink(missing_ok=True)
    for f in folder.glob("*.csv"):
        f.write_text(f.read_text().replace("EX-001", "eX-001"))
    problems = cross_check(read_folder(folder), stored)
    respelled = [p for p in problems if "written another way" in p.rule]
    shown = expected.encode("ascii", "backslashreplace").decode("ascii")
    assert respelled and all(f"{shown!r} in the store" in p.rule for p in respelled)
    assert {p.file for p in respelled} >= {"process.csv", "ribbon.csv"}
