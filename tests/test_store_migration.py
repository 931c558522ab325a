"""Store schema 3 (issue 20): a store written by the previous version (schema 2,
``tests/data/store-v2.db``, made by ``tests/data/make_store_v2.py`` with
linkage at the commit before schema 3) opens, upgrades and reads as it did.

References outside the store's code: the expected tables are
:func:`linkage.read.read_folder` of the files the fixture was made from, with
the fixture's one correction applied here with Python's csv module (RFC 4180);
the row-number hash is compared with ``json.dumps`` (Python's JSON encoder,
RFC 8259) of the same list; SQLite's own ``PRAGMA integrity_check``.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import sqlite3
from contextlib import closing
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st

from linkage import seal
from linkage.assemble import assemble
from linkage.read import read_folder
from linkage.store import SCHEMA_VERSION, LotStore
from linkage.store_rows import read_row_texts

DATA = Path(__file__).resolve().parent / "data"
EXAMPLE = DATA / "template-example"


def _corrected(folder: Path, lot: str = "EX-001", change: float = -1.5) -> Path:
    """The example folder with the fixture's correction: ``lot``'s dissolution moved by ``change``."""
    shutil.copytree(EXAMPLE, folder)
    path = folder / "tablets.csv"
    with open(path, newline="", encoding="utf-8") as fh:
        header, *rows = list(csv.reader(fh))
    j = header.index("dissolution_pct")
    for r in rows:
        if r[0] == lot:
            r[j] = str(round(float(r[j]) + change, 2))
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh, lineterminator="\n").writerows([header, *rows])
    return folder


def _tables_equal(got: dict, expected: dict) -> None:
    assert set(got) == set(expected)
    for name, df in expected.items():
        pd.testing.assert_frame_equal(got[name].reset_index(drop=True), df.reset_index(drop=True), check_exact=True)


@pytest.fixture()
def v2(tmp_path) -> Path:
    """The schema 2 store with its anchor file (``store-v2.db.seal``, its newest seal as linkage writes it):
    a store copied without its anchor is read, but neither upgraded nor written (tests/reliability/test_anchor.py)."""
    path = tmp_path / "old.db"
    shutil.copy(DATA / "store-v2.db", path)
    shutil.copy(DATA / "store-v2.db.seal", seal.anchor_path(path))
    return path


def test_the_fixture_is_a_schema_2_store_with_rows_in_raw_rows(v2):
    with closing(sqlite3.connect(v2)) as con:
        assert con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == 2
        assert con.execute("SELECT COUNT(*) FROM raw_rows").fetchone()[0] > 0
        assert not con.execute("SELECT 1 FROM sqlite_master WHERE name = 'row_blocks'").fetchall()


def test_a_schema_2_store_upgrades_and_reads_as_the_files_say(v2, tmp_path):
    expected = read_folder(_corrected(tmp_path / "expected")).tables
    with closing(sqlite3.connect(v2)) as con:
        old_rows = con.execute("SELECT * FROM raw_rows ORDER BY rowid").fetchall()
        old_seals = con.execute("SELECT * FROM seals ORDER BY id").fetchall()
    with LotStore(v2) as s:
        counts = s.check_seals(full=True)
        tables = s.current_tables()
        history = s.history("EX-001")
    assert counts["ingests"] == 2 and counts["raw rows"] == len(old_rows)
    _tables_equal(tables, expected)
    pd.testing.assert_frame_equal(assemble(tables), assemble(expected), check_exact=True)
    assert [h["revision"] for h in history] == [1, 2]
    assert [(c["column"], c["old"], c["new"]) for c in history[1]["changes"]] == [("dissolution_pct", 81.0, 79.5)]
    with closing(sqlite3.connect(v2)) as con:
        assert con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == SCHEMA_VERSION == 3
        assert con.execute("SELECT * FROM raw_rows ORDER BY rowid").fetchall() == old_rows  # kept as they were
        seals = con.execute("SELECT * FROM seals ORDER BY id").fetchall()
        assert seals[:len(old_seals)] == old_seals and [s[1] for s in seals[len(old_seals):]] == ["upgrade"]
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        with pytest.raises(sqlite3.IntegrityError, match="raw_rows is append-only"):  # still
            con.execute("DELETE FROM raw_rows")
        triggers = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'trigger'")}
        assert {"row_blocks_no_update", "row_blocks_no_delete"} <= triggers  # the new table is append-only too


def test_an_upgraded_store_takes_new_ingests_and_reads_both_kinds_of_rows(v2, tmp_path):
    twice = _corrected(tmp_path / "twice", lot="EX-002", change=2.0)
    fix = tmp_path / "fix"
    fix.mkdir()
    header, *rows = (twice / "tablets.csv").read_text(encoding="utf-8").splitlines()
    (fix / "tablets.csv").write_text("\n".join([header, *(r for r in rows if r.startswith("EX-002,"))]) + "\n",
                                     encoding="utf-8")
    with LotStore(v2) as s:
        s.ingest(read_folder(fix, known_lots=s.lot_ids()), reason="deviation D-2")
        counts = s.check_seals(full=True)
        tables = s.current_tables()
        assert [h["revision"] for h in s.history("EX-002")] == [1, 2]
        (change,) = s.history("EX-002")[1]["changes"]
    with closing(sqlite3.connect(v2)) as con:
        assert con.execute("SELECT COUNT(*) FROM row_blocks").fetchone()[0] == 1  # the new ingest's tablets
    # the expected state: both corrections (EX-001 from the schema-2 store, EX-002 from the new record)
    expected = read_folder(_corrected(tmp_path / "expected")).tables
    expected["tablets"] = read_folder(_corrected(tmp_path / "both", lot="EX-002", change=2.0)).tables["tablets"]
    expected["tablets"].loc[expected["tablets"]["lot"] == "EX-001", "dissolution_pct"] = 79.5
    _tables_equal(tables, expected)
    assert counts["ingests"] == 3 and (change["column"], change["old"], change["new"]) == ("dissolution_pct", 75.7,
                                                                                          77.7)


def test_a_read_only_schema_2_store_is_read_without_an_upgrade(v2, tmp_path, monkeypatch):
    """Where the store cannot be written (a read-only file system, as the reliability tests simulate it through
    os.access), a schema-2 store is read as it is, and stays schema 2, byte for byte."""
    expected = read_folder(_corrected(tmp_path / "expected")).tables
    before = v2.read_bytes()
    real_access = os.access

    def no_write(path, mode, *args, **kwargs):
        if mode & os.W_OK and Path(path).resolve() in (v2.resolve(), v2.parent.resolve()):
            return False
        return real_access(path, mode, *args, **kwargs)

    monkeypatch.setattr(os, "access", no_write)
    with LotStore(v2, create=False) as s:
        assert s.read_only
        _tables_equal(s.current_tables(), expected)
        assert [h["revision"] for h in s.history("EX-001")] == [1, 2]
    assert v2.read_bytes() == before


def test_a_new_store_keeps_its_rows_in_row_blocks_with_the_same_row_hashes(tmp_path):
    """The row hash of each lot table (sealed) is over the rows' JSON texts, as in schema 2: recomputed here
    with hashlib from the record's lines."""
    path = tmp_path / "new.db"
    with LotStore(path) as s:
        s.ingest(read_folder(EXAMPLE))
    with closing(sqlite3.connect(path)) as con:
        assert not con.execute("SELECT 1 FROM sqlite_master WHERE name = 'raw_rows'").fetchall()
        stored = dict(con.execute("SELECT lot_table_id, rows_sha256 FROM lot_table_hashes"))
        for tbl, layout, text in con.execute("SELECT tbl, lot_tables_json, rows_text FROM row_blocks"):
            lines = text.split("\n")
            for tid, n in json.loads(layout):
                mine, lines = lines[:n], lines[n:]
                assert seal.rows_sha256(mine) == stored[tid] == read_row_texts_hash(con, tid), (tbl, tid)
            assert lines == []


def read_row_texts_hash(con, tid: int) -> str:
    return seal.rows_sha256(read_row_texts(con, [tid])[1].tolist())


@given(st.lists(st.one_of(st.none(), st.integers(min_value=-2**70, max_value=2**70)), max_size=30))
def test_the_row_number_hash_is_that_of_the_canonical_json_list(rows):
    reference = json.dumps(rows, sort_keys=True, separators=(",", ":"), ensure_ascii=False)  # seal.canonical's rule
    assert seal.source_rows_sha256(rows) == seal.sha256_text(reference)
