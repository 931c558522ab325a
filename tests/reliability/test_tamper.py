"""Tamper evidence (issue 15 item 5): each edit below is made the way the
tester made it, with Python's sqlite3 module behind linkage's back (dropping
the append-only triggers, editing, recreating them) or by changing bytes of
the file; each must stop the next command with exit code 6 and a clear
message, and ``linkage verify`` must name it.

The chain is a hash chain in the sense of Haber & Stornetta (1991,
J. Cryptology 3:99–111); SHA-256 is FIPS 180-4, computed here with Python's
hashlib (the reference implementation used for the expected values).
"""

from __future__ import annotations

import hashlib
import json
import os
import pwd
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from linkage import seal
from linkage.exceptions import StoreIntegrityError
from linkage.read import read_folder
from linkage.store import APPEND_ONLY, SCHEMA_VERSION, LotStore, current_user
from linkage.store_rows import read_row_texts

from .helpers import run_cli

DATA = Path(__file__).resolve().parents[1] / "data"
EXAMPLE = DATA / "template-example"


@pytest.fixture()
def store(tmp_path) -> Path:
    path = tmp_path / "site.db"
    with LotStore(path) as s:
        s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))
        s.log("train", lot=None, model_id="m-1", inputs={"lots": 4}, outputs={"ok": True})
        s.record_prediction("m-1", {"roll_gap_mm": 2.0}, {"ribbon_porosity": 0.3}, lot="EX-001")
        s.log("predict", lot="EX-001", model_id="m-1", inputs={"roll_gap_mm": 2.0}, outputs={"p": 0.9})
    return path


def _behind_the_back(path: Path, *statements: str, params=()) -> None:
    """Drop every append-only trigger, run the statements, recreate the triggers (as the tester did)."""
    con = sqlite3.connect(path)
    triggers = con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'trigger'").fetchall()
    assert len(triggers) == 2 * len(APPEND_ONLY)
    for name, _ in triggers:
        con.execute(f"DROP TRIGGER {name}")
    for stmt in statements:
        con.execute(stmt, params if "?" in stmt else ())
    for _, sql in triggers:
        con.execute(sql)
    con.commit()
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"  # SQLite sees nothing wrong
    con.close()


def _detected(path: Path, counts, *words: str, command=("lots",)) -> None:
    result = run_cli([*command, "--store", path])
    assert result.exit_code == 6, result.output
    assert "integrity check" in result.stderr and "Traceback" not in result.output
    for w in words:
        assert w in result.stderr, result.stderr
    verify = run_cli(["verify", "--store", path])
    assert verify.exit_code == 6 and "NOT whole" in verify.output
    counts["tamper cases detected"] += 1


def test_a_whole_store_verifies_and_prints_its_newest_seal(store):
    result = run_cli(["verify", "--store", store, "--json"])
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert out["ok"] and out["store_checked"]["raw rows"] > 0 and out["store_checked"]["audit entries"] == 3
    con = sqlite3.connect(store)
    newest = con.execute("SELECT id, sha256 FROM seals ORDER BY id DESC LIMIT 1").fetchone()
    assert out["store_checked"]["newest seal"] == {"id": newest[0], "sha256": newest[1]}


def test_the_chain_links_are_sha256_of_the_previous_link_and_the_record(store):
    con = sqlite3.connect(store)
    prev = "0" * 64
    for kind, ref, content, prev_sha, digest in con.execute(
            "SELECT kind, ref_id, content_sha256, prev_sha256, sha256 FROM seals ORDER BY id"):
        assert prev_sha == prev
        assert digest == hashlib.sha256(f"{prev}|{kind}|{ref}|{content}".encode()).hexdigest()
        prev = digest
    row = con.execute("SELECT id, at, user, action, lot, model_id, inputs_json, outputs_json FROM audit "
                      "WHERE id = 1").fetchone()
    expected = hashlib.sha256(json.dumps(list(row), sort_keys=True, separators=(",", ":"),
                                         ensure_ascii=False).encode()).hexdigest()
    assert con.execute("SELECT content_sha256 FROM seals WHERE kind = 'audit' AND ref_id = 1").fetchone()[0] == expected


def test_an_edited_audit_user_and_time_are_detected(store, counts):
    _behind_the_back(store, "UPDATE audit SET user = 'someone-else', at = '2020-01-01T00:00:00' WHERE id = 2")
    _detected(store, counts, "audit record 2 was changed")


def test_an_edited_raw_measurement_is_detected_on_read(store, counts):
    con = sqlite3.connect(store)  # schema 3: the rows are lines of the ingest's row_blocks record
    ingest_id, tbl, block = con.execute("SELECT ingest_id, tbl, rows_text FROM row_blocks WHERE rows_text LIKE "
                                        "'%envelope_density_g_cm3%' LIMIT 1").fetchone()
    con.close()
    lines = block.split("\n")
    row = json.loads(lines[0])
    row["envelope_density_g_cm3"] = round(row["envelope_density_g_cm3"] + 0.01, 4)
    lines[0] = json.dumps(row)
    _behind_the_back(store, "UPDATE row_blocks SET rows_text = ? WHERE ingest_id = ? AND tbl = ?",
                     params=("\n".join(lines), ingest_id, tbl))
    _detected(store, counts, "raw rows changed", command=("assemble",))


def test_four_bytes_changed_in_the_file_are_detected(store, counts):
    con = sqlite3.connect(store)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    text = con.execute("SELECT rows_text FROM row_blocks WHERE rows_text LIKE '%1.0617%'").fetchone()[0]
    con.close()
    data = bytearray(store.read_bytes())
    at = data.find(b"1.0617")
    assert at > 0 and data.count(b"1.0617") == 1 and "1.0617" in text
    data[at:at + 6] = b"1.0549"  # the lot's envelope density, so its porosity, moves
    store.write_bytes(bytes(data))
    con = sqlite3.connect(store)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    con.close()
    _detected(store, counts, "raw rows changed", command=("assemble",))


def test_removing_the_newest_audit_entry_and_its_seal_is_detected_by_the_anchor(store, counts):
    con = sqlite3.connect(store)
    newest = con.execute("SELECT id FROM audit ORDER BY id DESC LIMIT 1").fetchone()[0]
    con.close()
    _behind_the_back(store, "DELETE FROM seals WHERE id = (SELECT MAX(id) FROM seals)",
                     f"DELETE FROM audit WHERE id = {newest}")
    _detected(store, counts, "anchor")


def test_a_record_added_outside_linkage_is_detected(store, counts):
    _behind_the_back(store, "INSERT INTO audit (at, user, action) VALUES ('2026-01-01', 'x', 'train')")
    _detected(store, counts, "without a seal")


def test_rows_and_their_row_hash_rewritten_together_are_found_by_verify(store, counts):
    con = sqlite3.connect(store)  # schema 3: the rows are lines of the ingest's row_blocks record
    tids, all_texts, _ = read_row_texts(con)
    tid = int(tids[[("1.0617" in t) for t in all_texts.tolist()]][0])
    texts = all_texts[tids == tid].tolist()
    block = con.execute("SELECT rows_text FROM row_blocks WHERE rows_text LIKE '%1.0617%'").fetchone()[0]
    con.close()
    texts = [t.replace("1.0617", "1.0549") for t in texts]
    _behind_the_back(store, "UPDATE row_blocks SET rows_text = ? WHERE rows_text LIKE '%1.0617%'",
                     f"UPDATE lot_table_hashes SET rows_sha256 = '{seal.rows_sha256(texts)}' "
                     f"WHERE lot_table_id = {tid}", params=(block.replace("1.0617", "1.0549"),))
    result = run_cli(["verify", "--store", store])
    assert result.exit_code == 6 and "ingest record 1 was changed" in result.stderr
    assert "content hash does not match" in result.stderr
    counts["tamper cases detected"] += 1


def test_a_whole_rewrite_changes_the_newest_seal_that_verify_prints(store):
    """The limit of a keyless chain, as documented: rewriting every seal and the anchor passes the store's
    own check, but the newest seal's hash differs from the one recorded outside the store."""
    before = json.loads(run_cli(["verify", "--store", store, "--json"]).stdout)["store_checked"]["newest seal"]
    _behind_the_back(store, "UPDATE audit SET user = 'someone-else' WHERE id = 2", "DELETE FROM seals")
    con = sqlite3.connect(store, isolation_level=None)
    for (trigger,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'trigger'").fetchall():
        con.execute(f"DROP TRIGGER {trigger}")
    con.execute("BEGIN")
    for kind, table in (("ingest", "ingests"), ("audit", "audit"), ("prediction", "predictions")):
        for (ref,) in con.execute(f"SELECT id FROM {table} ORDER BY id").fetchall():
            seal.seal(con, kind, ref)
    con.execute("COMMIT")
    seal.write_anchor(store, *seal.head(con))
    con.close()
    after = json.loads(run_cli(["verify", "--store", store, "--json"]).stdout)["store_checked"]["newest seal"]
    assert after["sha256"] != before["sha256"]


def test_a_schema_1_store_is_sealed_on_first_open_and_keeps_its_records(tmp_path):
    path = tmp_path / "old.db"
    shutil.copy(DATA / "store-v1.db", path)
    con = sqlite3.connect(path)
    before_audit = con.execute("SELECT * FROM audit ORDER BY id").fetchall()
    assert con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == 1
    con.close()
    with LotStore(path) as s:
        assert [r["revision"] for r in s.history("EX-001")] == [1, 2]
        counts = s.check_seals(full=True)
        assert counts["ingests"] == 2 and counts["audit entries"] == len(before_audit)
        s.log("window", model_id="m-1")
    con = sqlite3.connect(path)
    assert con.execute("SELECT id, at, user, action, lot, model_id, inputs_json, outputs_json FROM audit "
                       f"WHERE id <= {len(before_audit)} ORDER BY id").fetchall() == before_audit
    assert con.execute("SELECT kind FROM seals WHERE kind = 'upgrade'").fetchall() == [("upgrade",)]
    assert con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == SCHEMA_VERSION  # 3: via 2


def test_the_user_is_the_operating_system_account_not_an_environment_variable(monkeypatch):
    monkeypatch.setenv("USER", "mallory")
    monkeypatch.setenv("LOGNAME", "mallory")
    monkeypatch.setenv("USERNAME", "mallory")
    assert current_user() == pwd.getpwuid(os.getuid()).pw_name != "mallory"


def test_a_store_opened_by_linkage_refuses_the_edit_it_did_not_make(store):
    with LotStore(store) as s, pytest.raises(sqlite3.IntegrityError, match="append-only"):
        s.connection.execute("DELETE FROM seals")
    with LotStore(store) as s:
        assert s.check_seals()["seals"] > 0


def test_the_library_raises_the_documented_error(store):
    _behind_the_back(store, "UPDATE predictions SET user = 'x' WHERE id = 1")
    with pytest.raises(StoreIntegrityError, match="prediction record 1 was changed") as info:
        LotStore(store)
    assert info.value.exit_code == 6


def test_a_read_only_store_is_read_and_refuses_writes_clearly(store, monkeypatch):
    """A store this account cannot write (a read-only file system): opened immutable and read-only (SQLite URI
    parameters mode=ro and immutable=1, sqlite.org "URI filenames"); reading commands work, a write says why."""
    real_access = os.access

    def no_write(path, mode, *args, **kwargs):
        if mode & os.W_OK and Path(path).resolve() in (store.resolve(), store.parent.resolve()):
            return False
        return real_access(path, mode, *args, **kwargs)

    before = store.read_bytes()
    monkeypatch.setattr(os, "access", no_write)
    lots = run_cli(["lots", "--store", store, "--json"])
    assert lots.exit_code == 0 and len(json.loads(lots.stdout)) == 4
    assert run_cli(["assemble", "--store", store]).exit_code == 0
    with LotStore(store) as s:
        assert s.read_only
        with pytest.raises(Exception, match="read-only here") as refused:
            s.log("window")
    # the way out is said: the commands that can record nothing (a user test found it missing)
    assert "--no-record" in str(refused.value) and "'linkage window', 'predict' and 'running'" in str(refused.value)
    assert store.read_bytes() == before


def test_random_bytes_in_the_middle_of_the_store_stop_every_command_without_a_traceback(store, tmp_path, counts):
    """8 KiB of random bytes written over the middle of the file (the tester's case): no traceback, no ingest
    into it, the file unchanged by the attempts. SQLite's own checks (quick_check, "database disk image is
    malformed") or the seals find it; which one depends on the pages hit."""
    con = sqlite3.connect(store)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.close()
    whole = run_cli(["assemble", "--store", store]).output
    data = bytearray(store.read_bytes())
    mid = len(data) // 2
    data[mid:mid + 8192] = np.random.default_rng(7).integers(0, 256, 8192, dtype=np.uint8).tobytes()
    store.write_bytes(bytes(data))
    damaged = store.read_bytes()
    folder = tmp_path / "more"
    shutil.copytree(EXAMPLE, folder)
    for name in folder.glob("*.csv"):
        name.write_text(name.read_text().replace("EX-0", "NEW-0"))
    for args in (["lots"], ["ingest", folder], ["verify"]):
        result = run_cli([*args, "--store", store])
        assert result.exit_code != 0 and "Traceback" not in result.output, (args, result.output)
        assert str(store) in result.output, (args, result.output)
    assemble = run_cli(["assemble", "--store", store])  # the pages it reads may be whole: then it reads right
    assert "Traceback" not in assemble.output
    assert (assemble.exit_code != 0 and "Error:" in assemble.stderr) or assemble.output == whole
    assert store.read_bytes() == damaged
    counts["tamper cases detected"] += 1


def test_removing_the_newest_records_and_the_anchor_is_said_to_be_beyond_the_store(store, counts):
    """The anchor file removed with the newest records: the store alone cannot tell (the limit stated in
    linkage.seal's notes), so verify says so as a caution naming the newest seal's hash to compare with the batch
    record, rather than a plain 'Everything matches' (a second user test)."""
    con = sqlite3.connect(store)
    newest = con.execute("SELECT id FROM audit ORDER BY id DESC LIMIT 1").fetchone()[0]
    con.close()
    _behind_the_back(store, "DELETE FROM seals WHERE id = (SELECT MAX(id) FROM seals)",
                     f"DELETE FROM audit WHERE id = {newest}")
    seal.anchor_path(store).unlink()
    result = run_cli(["verify", "--store", store])
    assert result.exit_code == 0
    assert f"caution, store: no anchor file {seal.anchor_path(store)}" in result.stderr
    assert "(see the caution above)" in result.stdout
    as_json = json.loads(run_cli(["verify", "--store", store, "--json"]).stdout)
    assert as_json["ok"] is True and as_json["store_cautions"][0].startswith("no anchor file")
    counts["tamper cases detected"] += 1
