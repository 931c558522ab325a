"""The SQLite lot store (linkage.store).

Outside references: SHA-256 as defined in FIPS 180-4 (computed here with
Python's hashlib, independent of the store); SQLite's own documentation for
what the store relies on: "PRAGMA journal_mode=WAL" returns "wal"
(sqlite.org/wal.html), RAISE(ABORT, ...) in a BEFORE trigger aborts the
statement (sqlite.org/lang_createtrigger.html), "BEGIN IMMEDIATE" takes the
write lock at once and a second writer gets SQLITE_BUSY after the busy
timeout (sqlite.org/lang_transaction.html).
"""

from __future__ import annotations

import hashlib
import math
import shutil
import sqlite3
from contextlib import closing
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from linkage.exceptions import InputError, StoreBusyError, StoreError, UsageError
from linkage.read import read_folder
from linkage.store import APPEND_ONLY, APPLICATION_ID, SCHEMA_VERSION, LotStore
from linkage.store_rows import read_row_texts

# a copy of the shared template example (four invented lots), kept here so a clone alone runs these tests
TEMPLATE = Path(__file__).resolve().parent / "data" / "template-example"

PROCESS = ("lot,product,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm,"
           "blend_moisture_pct\n"
           "A,P1,9.0,2.0,5,20,1.0,2.1\n"
           "B,P1,10.0,2.5,5,20,1.0,2.4\n"
           "C,P2,11.0,3.0,5,20,1.0,\n")
RIBBON = ("lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n"
          "A,1,1.05,1.50\nA,2,1.07,1.50\nB,1,1.10,1.50\nC,1,1.12,1.51\n")
TABLETS = ("lot,compression_force_kn,breaking_force_n,thickness_mm,diameter_mm,dissolution_pct\n"
           "A,10,80,4.2,10,81.0\nB,12,90,4.1,10,84.5\nC,14,95,4.0,10,88.0\n")


def folder(root: Path, name: str, **files: str) -> Path:
    path = root / name
    path.mkdir()
    for table, text in files.items():
        (path / f"{table}.csv").write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def base(tmp_path):
    return folder(tmp_path, "base", process=PROCESS, ribbon=RIBBON, tablets=TABLETS)


@pytest.fixture
def store(tmp_path, base):
    with LotStore(tmp_path / "lots.db") as s:
        s.ingest(read_folder(base), reason="a test revision")
        yield s


def dump(path: Path) -> list[str]:
    with closing(sqlite3.connect(path)) as c:
        return list(c.iterdump())


# --------------------------------------------------------------------------- opening


def test_new_store_settings(tmp_path):
    with LotStore(tmp_path / "new.db") as s:
        c = s.connection
        assert c.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert c.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        assert c.execute("PRAGMA busy_timeout").fetchone()[0] == 10_000
        assert c.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
        assert c.execute("SELECT version FROM schema_version").fetchall() == [(SCHEMA_VERSION,)]
        assert s.lot_ids() == [] and s.lots().empty and s.current_tables() == {}


def test_refuses_what_is_not_a_lot_store(tmp_path):
    other = tmp_path / "other.db"
    with closing(sqlite3.connect(other)) as c:
        c.execute("CREATE TABLE things (x)")
        c.commit()
    before = other.read_bytes()
    with pytest.raises(StoreError, match="not a linkage lot store"):
        LotStore(other)
    assert other.read_bytes() == before
    text = tmp_path / "notes.db"
    text.write_text("hello")
    with pytest.raises(StoreError, match="not a SQLite file"):
        LotStore(text)
    with pytest.raises(StoreError, match="is a folder"):
        LotStore(tmp_path)
    with pytest.raises(StoreError, match="no lot store at"):
        LotStore(tmp_path / "missing.db", create=False)
    assert not (tmp_path / "missing.db").exists()
    with pytest.raises(StoreError, match="does not exist"):
        LotStore(tmp_path / "no" / "such" / "dir.db")


def test_newer_schema_refused(tmp_path):
    path = tmp_path / "s.db"
    LotStore(path).close()
    with closing(sqlite3.connect(path)) as c:  # the version table is append-only: a newer linkage adds a row
        c.execute("INSERT INTO schema_version VALUES (?, 'later')", (SCHEMA_VERSION + 1,))
        c.commit()
    with pytest.raises(StoreError, match="newer linkage"):
        LotStore(path)


# --------------------------------------------------------------------------- ingest and revisions


def test_round_trip_is_exact(store, base):
    ingest = read_folder(base)
    tables = store.current_tables()
    assert set(tables) == {"process", "ribbon", "tablets"}
    for name, df in ingest.tables.items():
        pd.testing.assert_frame_equal(tables[name], df, check_exact=True)
    assert tables["process"]["blend_moisture_pct"].tolist()[:2] == [2.1, 2.4]  # extra column kept


def test_raw_rows_not_means(store):
    # every replicate is kept: lot A has two ribbon samples in the file
    ribbon = store.current_tables()["ribbon"]
    assert ribbon.loc[ribbon["lot"] == "A", "envelope_density_g_cm3"].tolist() == [1.05, 1.07]


def test_ingest_records_files_with_sha256(store, base):
    (record,) = store.ingests()
    files = {f["table"]: f for f in record["files"]}
    for name in ("process", "ribbon", "tablets"):
        expected = hashlib.sha256((base / f"{name}.csv").read_bytes()).hexdigest()  # FIPS 180-4 via hashlib
        assert files[name]["sha256"] == expected and files[name]["file"] == f"{name}.csv"
    assert files["ribbon"]["rows"] == 4 and record["lots_new"] == 3
    assert record["at"].endswith("+00:00") and record["user"]


def test_identical_reingest_is_a_noop(store, base):
    before = store.connection.execute("SELECT COUNT(*) FROM revisions").fetchone()[0]
    result = store.ingest(read_folder(base), reason="a test revision")
    assert (result.lots_new, result.lots_revised, result.lots_unchanged) == ([], [], ["A", "B", "C"])
    assert not result.changed
    assert store.connection.execute("SELECT COUNT(*) FROM revisions").fetchone()[0] == before
    assert [h["revision"] for h in store.history("A")] == [1]


def test_reordered_rows_and_respelled_numbers_are_unchanged(store, tmp_path):
    lines = RIBBON.splitlines()
    shuffled = "\n".join([lines[0], *reversed(lines[1:])]).replace("1.50", "1.5") + "\n"
    result = store.ingest(read_folder(folder(tmp_path, "again", ribbon=shuffled)), reason="a test revision")
    assert result.lots_unchanged == ["C", "B", "A"] and not result.changed


def test_changed_value_makes_a_new_revision_of_that_lot_only(store, tmp_path):
    changed = TABLETS.replace("A,10,80,4.2,10,81.0", "A,10,80,4.2,10,79.5")
    result = store.ingest(read_folder(folder(tmp_path, "fix", tablets=changed)), reason="a test revision")
    assert result.lots_revised == ["A"] and result.lots_unchanged == ["B", "C"] and result.lots_new == []
    history = store.history("A")
    assert [h["revision"] for h in history] == [1, 2]
    assert history[1]["changes"] == [{"table": "tablets", "change": "value changed", "key": {}, "column":
                                      "dissolution_pct", "old": 81.0, "new": 79.5}]
    assert history[1]["tables"]["tablets"]["changed"] and not history[1]["tables"]["ribbon"]["changed"]
    assert history[1]["tables"]["ribbon"]["ingest_id"] == history[0]["ingest_id"]  # carried over
    assert store.current_tables()["tablets"].set_index("lot").loc["A", "dissolution_pct"] == 79.5
    # the old revision is kept: its rows are still in the store
    (old_table,) = store.connection.execute(
        "SELECT lt.id FROM revisions r JOIN revision_tables rt ON rt.revision_id = r.id "
        "JOIN lot_tables lt ON lt.id = rt.lot_table_id "
        "WHERE r.lot = 'A' AND r.revision = 1 AND rt.tbl = 'tablets'").fetchone()
    (old,) = read_row_texts(store.connection, [old_table])[1]  # schema 3: in the ingest's row_blocks record
    assert '"dissolution_pct": 81.0' in old
    assert [h["revision"] for h in store.history("B")] == [1]


def test_partial_update_carries_other_tables(store, tmp_path):
    laser = "lot,d10_um,d50_um,d90_um\nB,60,210,480\n"
    result = store.ingest(read_folder(folder(tmp_path, "laser", granules_laser=laser)), reason="a test revision")
    assert result.lots_revised == ["B"]
    tables = store.current_tables()
    assert set(tables) == {"process", "ribbon", "granules_laser", "tablets"}
    assert tables["ribbon"]["lot"].tolist() == ["A", "A", "B", "C"]
    (change,) = store.history("B")[1]["changes"]
    assert change == {"table": "granules_laser", "change": "table added", "key": None, "column": None,
                      "old": None, "new": "1 row"}


def test_row_level_diff(store, tmp_path):
    ribbon = RIBBON.replace("A,2,1.07,1.50\n", "A,3,1.06,1.50\n").replace("A,1,1.05", "A,1,1.04")
    store.ingest(read_folder(folder(tmp_path, "rows", ribbon=ribbon)), reason="a test revision")
    changes = store.history("A")[1]["changes"]
    assert {(c["change"], c["column"], str(c["key"])) for c in changes} == {
        ("value changed", "envelope_density_g_cm3", "{'sample': '1'}"),
        ("row added", None, "{'sample': '3'}"),
        ("row removed", None, "{'sample': '2'}"),
    }
    added = next(c for c in changes if c["change"] == "row added")
    assert added["new"]["envelope_density_g_cm3"] == 1.06


def test_results_for_an_unknown_lot_refused_and_nothing_written(tmp_path, base):
    path = tmp_path / "lots.db"
    with LotStore(path) as s:
        s.ingest(read_folder(base), reason="a test revision")
    before_bytes, before_dump = path.read_bytes(), dump(path)
    bad = folder(tmp_path, "bad", tablets=TABLETS + "Z,10,80,4.2,10,81.0\n")
    ingest = read_folder(bad)  # without the store's lots this folder reads fine
    with LotStore(path) as s:
        with pytest.raises(InputError) as exc:
            s.ingest(ingest, reason="a test revision")
    (p,) = exc.value.problems
    assert (p.file, p.row, p.column, p.value) == ("tablets.csv", 5, "lot", "Z")
    assert "no process record in this folder or in the store" in p.rule
    assert path.read_bytes() == before_bytes and dump(path) == before_dump


def test_first_ingest_needs_the_required_tables(tmp_path):
    only_tablets = folder(tmp_path, "t", process=PROCESS, tablets=TABLETS)
    with LotStore(tmp_path / "s.db") as s:
        with pytest.raises(InputError, match="required table 'ribbon' is missing"):
            s.ingest(read_folder(only_tablets), reason="a test revision")
        assert s.lot_ids() == [] and s.ingests() == []


def test_failure_inside_the_transaction_leaves_nothing(tmp_path, base, monkeypatch):
    path = tmp_path / "lots.db"
    with LotStore(path) as s:
        s.ingest(read_folder(base), reason="a test revision")
    before = dump(path)
    calls = []
    original = LotStore._insert_lot_tables

    def fail_after_writing(c, ingest_id, batch):
        original(c, ingest_id, batch)  # the lot tables and raw rows are in, the transaction still open
        calls.append(len(batch))
        raise RuntimeError("disk gone")

    monkeypatch.setattr(LotStore, "_insert_lot_tables", staticmethod(fail_after_writing))
    changed = folder(tmp_path, "c", tablets=TABLETS.replace("81.0", "70.0").replace("84.5", "70.5"))
    with LotStore(path) as s:
        with pytest.raises(RuntimeError, match="disk gone"):
            s.ingest(read_folder(changed), reason="a test revision")
        assert calls == [2]  # the new tablets rows of lots A and B
    assert dump(path) == before


def test_products(store, tmp_path):
    assert store.lots(product="P2")["lot"].tolist() == ["C"]
    assert store.current_tables(product="P1")["ribbon"]["lot"].tolist() == ["A", "A", "B"]
    moved = PROCESS.replace("C,P2", "C,P1")
    result = store.ingest(read_folder(folder(tmp_path, "moved", process=moved)), reason="a test revision")
    assert result.warnings == ["lot C: product changes from P2 to P1"]
    assert store.lots(product="P2").empty


def test_lots_completeness(store):
    lots = store.lots().set_index("lot")
    assert lots.loc["A", "ribbon_rows"] == 2 and lots.loc["B", "ribbon_rows"] == 1
    assert lots.loc["A", "granules_rows"] == 0 and math.isnan(lots.loc["A", "granules_filled_pct"])
    # ribbon has 8 template columns besides lot; lot A fills sample and both densities on 2 rows: 6 of 16
    assert lots.loc["A", "ribbon_filled_pct"] == pytest.approx(100 * 6 / 16)
    assert lots.loc["A", "revision"] == 1 and lots.loc["A", "product"] == "P1"


def test_extra_column_turning_text_is_no_change(store, tmp_path):
    text_col = PROCESS.replace("C,P2,11.0,3.0,5,20,1.0,\n", "C,P2,11.0,3.0,5,20,1.0,dry\n")
    result = store.ingest(read_folder(folder(tmp_path, "text", process=text_col)), reason="a test revision")
    assert result.lots_revised == ["C"] and result.lots_unchanged == ["A", "B"]
    process = store.current_tables()["process"]
    assert process["blend_moisture_pct"].tolist() == ["2.1", "2.4", "dry"]


def test_history_of_an_unknown_lot(store):
    with pytest.raises(UsageError, match="lot 'AA' is not in the store .*did you mean A"):
        store.history("AA")


def test_a_lot_is_found_under_any_spelling_of_it(tmp_path):
    """README, "One lot, one spelling": ids are one lot under Unicode NFKC (Unicode Standard Annex #15), dash-like
    characters read as '-' and full case folding. A lot ingested as `EX–001` (en dash, U+2013) used not to be
    found by `history EX-001`, and `audit --lot` split a lot's entries by the spelling they were recorded under.
    Now the store finds the lot and every entry of it, old entries under another spelling included (none is
    rewritten: the trail is append-only)."""
    lot = "EX\u2013001"
    path = folder(tmp_path, "dash", process=PROCESS.replace("A,P1", f"{lot},P1"),
                  ribbon=RIBBON.replace("A,", f"{lot},"), tablets=TABLETS.replace("A,", f"{lot},"))
    with LotStore(tmp_path / "lots.db") as s:
        s.ingest(read_folder(path))
        assert s.stored_spelling("ex-001") == s.stored_spelling("EX-001") == lot
        assert s.stored_spelling("EX-002") is None
        assert [r["lot"] for r in s.history("EX-001")] == [lot]
        ids = [s.log("predict", lot=spelling, model_id="m1") for spelling in ("ex-001", lot, "EX-001", "B")]
        p = [s.record_prediction("m1", {}, {}, lot=spelling) for spelling in ("Ex-001", "B")]
        for spelling in ("ex-001", "EX-001", lot):
            entries = s.audit(spelling, with_ingests=True)
            assert [e["action"] for e in entries] == ["ingest", "predict", "predict", "predict"]
            assert [e["id"] for e in entries[1:]] == ids[:3]
            assert [e["lot"] for e in entries[1:]] == ["ex-001", lot, "EX-001"]  # as they were recorded
            assert [r["id"] for r in s.predictions(spelling)] == p[:1]
        assert [e["id"] for e in s.audit("b")] == ids[3:]


def test_template_example_through_the_store(tmp_path):
    if not TEMPLATE.is_dir():
        pytest.skip(f"template example not found at {TEMPLATE}")
    copy = tmp_path / "template"
    shutil.copytree(TEMPLATE, copy)
    with LotStore(tmp_path / "t.db") as s:
        result = s.ingest(read_folder(copy, known_lots=s.lot_ids()), reason="a test revision")
        assert result.lots_new == ["EX-001", "EX-002", "EX-003", "EX-004"]
        assert len(s.current_tables()["granules"]) == 44  # 11 sieve rows x 4 lots in granules.csv


# --------------------------------------------------------------------------- append-only records


def test_audit_and_predictions(store):
    entries = store.audit()
    assert [e["action"] for e in entries] == ["ingest"]
    assert entries[0]["outputs"]["new"] == ["A", "B", "C"]
    i = store.log("window", lot="A", model_id="m1", inputs={"x": np.float64(0.25), "n": np.int64(3)},
                  outputs={"y": [1.0, float("nan")]}, user="tester")
    assert [e["id"] for e in store.audit(lot="A")] == [i]
    assert store.audit(lot="A")[0]["inputs"] == {"x": 0.25, "n": 3}
    assert store.audit(lot="A")[0]["outputs"] == {"y": [1.0, None]}  # NaN kept as JSON null
    p = store.record_prediction("m1", {"roll_force_kn_per_cm": 9.0}, {"ribbon_porosity": 0.31}, lot="B")
    store.record_prediction("m1", {"roll_force_kn_per_cm": 12.0}, {"ribbon_porosity": 0.25})
    assert [r["id"] for r in store.predictions(lot="B")] == [p]
    assert len(store.predictions()) == 2 and store.predictions()[0]["outputs"] == {"ribbon_porosity": 0.31}


@pytest.mark.parametrize("table", APPEND_ONLY)
def test_records_refuse_update_and_delete(store, tmp_path, table):
    store.log("check", lot="A")
    store.record_prediction("m1", {}, {}, lot="A")
    path = store.path
    with closing(sqlite3.connect(path)) as c:  # straight through sqlite3, as any other program could
        first_col = c.execute(f"SELECT name FROM pragma_table_info('{table}')").fetchone()[0]
        assert c.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0] > 0
        with pytest.raises(sqlite3.IntegrityError, match=f"{table} is append-only"):
            c.execute(f"UPDATE {table} SET {first_col} = {first_col}")
        with pytest.raises(sqlite3.IntegrityError, match=f"{table} is append-only"):
            c.execute(f"DELETE FROM {table}")
    # and through the library's own connection
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        store.connection.execute(f"DELETE FROM {table}")
    assert store.audit(lot="A")[0]["action"] == "check"


def test_store_busy(tmp_path, base):
    path = tmp_path / "lots.db"
    LotStore(path).close()
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")  # another writer holds the lock
    try:
        with LotStore(path, busy_timeout_s=0.2) as s:
            assert s.lot_ids() == []  # readers are not blocked in WAL mode
            with pytest.raises(StoreBusyError, match="store busy") as exc:
                s.ingest(read_folder(base), reason="a test revision")
            assert exc.value.exit_code == 3
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    with LotStore(path) as s:
        assert s.ingest(read_folder(base), reason="a test revision").lots_new == ["A", "B", "C"]


_KILLED_INGEST = """
import sys, time
from pathlib import Path
from linkage.read import read_folder
from linkage.store import LotStore

store_path, folder, flag = sys.argv[1:]
original = LotStore._insert_lot_tables


def stall(*args):
    original(*args)
    Path(flag).write_text("rows written, transaction open")
    time.sleep(120)


LotStore._insert_lot_tables = staticmethod(stall)
with LotStore(store_path) as s:
    s.ingest(read_folder(folder), reason="a test revision")
"""


@pytest.mark.reliability
def test_sigkill_during_ingest_leaves_all_or_nothing(tmp_path, base):
    import signal
    import subprocess
    import sys
    import time

    path = tmp_path / "lots.db"
    with LotStore(path) as s:
        s.ingest(read_folder(base), reason="a test revision")
    before = dump(path)
    changed = folder(tmp_path, "c", tablets=TABLETS.replace("81.0", "70.0"))
    flag = tmp_path / "flag"
    proc = subprocess.Popen([sys.executable, "-c", _KILLED_INGEST, str(path), str(changed), str(flag)])
    try:
        deadline = time.monotonic() + 60
        while not flag.exists() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert flag.exists(), "the ingest never reached its first insert"
    finally:
        proc.send_signal(signal.SIGKILL)  # only the process this test started
        proc.wait()
    with LotStore(path) as s:
        assert s.connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert [h["revision"] for h in s.history("A")] == [1]
    assert dump(path) == before


def test_tables_built_in_memory(tmp_path, base):
    from linkage.read import Ingest

    read = read_folder(base)
    ingest = Ingest(tables=read.tables, sources={}, spec=None)
    with LotStore(tmp_path / "m.db") as s:
        assert s.ingest(ingest, reason="a test revision").lots_new == ["A", "B", "C"]
        files = {f["table"]: f["file"] for f in s.ingests()[0]["files"]}
        assert files["ribbon"] == "(ribbon, not from a file)"
        pd.testing.assert_frame_equal(s.current_tables()["ribbon"], read.tables["ribbon"])
