"""Commands that record nothing in the lot store read a store written by an earlier linkage without changing it.

A store of schema 1 (before seals, ``tests/data/store-v1.db``) or 2 (raw rows in ``raw_rows``,
``tests/data/store-v2.db`` with its anchor file) is read by ``lots``, ``history``, ``audit``, ``assemble`` and
``verify`` as it is (schema 2) or from an upgraded temporary copy (schema 1): every file of the store's folder
is hashed before and after (names and SHA-256: no anchor file, -wal, -shm or byte added), and each command's
output is compared with its output on an upgraded copy of the same store. The commands that write (ingest)
still upgrade it.

These are regression tests of the project's own contract (a reading command changes no record; before this
change, each of these commands upgraded the store in place, after which an earlier linkage refused it): the
reference is linkage itself on the upgraded copy, so they need no outside source.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
import tempfile
import warnings
from contextlib import closing
from pathlib import Path

import pandas as pd
import pytest

from linkage import api, seal
from linkage.exceptions import StoreCaution
from linkage.store import SCHEMA_VERSION, LotStore
from tests.reliability.helpers import run_cli
from tests.test_ingest_preview import _no_write
from tests.test_store_migration import DATA, _corrected

#: the commands that only read the store, each as its arguments before --store
READING = [["lots"], ["lots", "--json"], ["history", "EX-001"], ["history", "ex-001", "--json"], ["audit"],
           ["audit", "--json"], ["audit", "--lot", "EX-002"], ["assemble"]]


def _files(where: Path) -> dict[str, str]:
    """Every file in ``where`` (the store, its anchor file, any -wal or -shm), name -> SHA-256."""
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(where.iterdir()) if p.is_file()}


def _schema(path: Path) -> int:
    """The store's schema, read immutable (sqlite.org, "URI filenames": no -shm, no lock, nothing written)."""
    with closing(sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro&immutable=1", uri=True)) as con:
        return con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0]


def _copy(fixture: str, folder: Path) -> Path:
    folder.mkdir()
    path = folder / "old.db"
    shutil.copy(DATA / fixture, path)
    if fixture == "store-v2.db":
        shutil.copy(DATA / "store-v2.db.seal", seal.anchor_path(path))
    return path


@pytest.fixture(params=[("store-v1.db", 1), ("store-v2.db", 2)], ids=["schema1", "schema2"])
def old(request, tmp_path):
    """(the old store alone in its folder, its schema, an upgraded copy of it in another folder)."""
    fixture, version = request.param
    store = _copy(fixture, tmp_path / "db")
    twin = _copy(fixture, tmp_path / "twin")
    with LotStore(twin, create=False):  # opened for writing, as an ingest opens it: upgraded
        pass
    assert _schema(store) == version and _schema(twin) == SCHEMA_VERSION
    return store, version, twin


@pytest.mark.parametrize("args", READING, ids=[" ".join(a) for a in READING])
def test_a_reading_command_changes_no_byte_of_an_older_store_and_says_so(old, args, tmp_path, monkeypatch):
    """Regression: each of these commands upgraded the store in place (new tables, seals, an anchor file
    ``old.db.seal``), after which an earlier linkage refused it. Now the folder's files are byte for byte as
    before, the output is the one on an upgraded copy, and stderr says once that the store was not upgraded."""
    store, version, twin = old
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))  # where a schema 1 store's copy goes, to see it removed
    before = _files(store.parent)
    got = run_cli([*args, "--store", store])
    assert got.exit_code == 0, got.output
    assert _files(store.parent) == before and _schema(store) == version
    assert list(scratch.iterdir()) == []
    upgraded = run_cli([*args, "--store", twin])
    assert upgraded.exit_code == 0 and upgraded.stderr == "", upgraded.output
    assert got.stdout == upgraded.stdout.replace(str(twin), str(store))
    said = f"{store} was written by an earlier linkage (store schema {version}"
    assert got.stderr.count(said) == 1 and "not upgraded" in got.stderr, got.stderr


def test_verify_checks_a_schema_2_store_as_it_is(tmp_path):
    """``verify`` checks every seal of a schema 2 store without upgrading it: the same records as on the upgraded
    copy, which holds one seal more (its ``upgrade`` seal)."""
    store = _copy("store-v2.db", tmp_path / "db")
    twin = _copy("store-v2.db", tmp_path / "twin")
    with LotStore(twin, create=False):
        pass
    before = _files(store.parent)
    got = run_cli(["verify", "--store", store, "--json"])
    assert got.exit_code == 0 and _files(store.parent) == before, got.output
    upgraded = json.loads(run_cli(["verify", "--store", twin, "--json"]).stdout)
    found = json.loads(got.stdout)
    assert found["ok"] and found["store_problems"] == []
    for key in ("audit entries", "predictions", "ingests", "lot tables", "raw rows"):
        assert found["store_checked"][key] == upgraded["store_checked"][key], key
    assert found["store_checked"]["seals"] == upgraded["store_checked"]["seals"] - 1
    assert any("store schema 2" in c and "not upgraded" in c for c in found["store_cautions"])
    text = run_cli(["verify", "--store", store])
    assert "Everything matches its seals and hashes. (see the caution above)" in text.stdout
    assert _files(store.parent) == before


def test_verify_says_what_it_could_not_check_in_a_store_without_seals(tmp_path):
    """Regression: ``verify`` sealed a schema 1 store in place, then checked the seals it had just made and said
    "Everything matches its seals and hashes". Now it says what it checked (SQLite's integrity check, each lot
    table's content hash against its raw rows) and what it could not (no seals), and changes nothing."""
    store = _copy("store-v1.db", tmp_path / "db")
    before = _files(store.parent)
    text = run_cli(["verify", "--store", store])
    assert text.exit_code == 0, text.output
    assert "Everything matches" not in text.stdout and "no seals" in text.stdout
    assert "could not be checked against seals" in text.stderr and "content hash" in text.stderr
    found = json.loads(run_cli(["verify", "--store", store, "--json"]).stdout)
    checked = found["store_checked"]
    assert found["ok"] and checked["newest seal"] == {"id": None, "sha256": None}
    assert checked["seals"] == checked["audit entries"] == checked["ingests"] == 0 and checked["lot tables"] > 0
    assert len(found["store_cautions"]) == 1
    assert _files(store.parent) == before and _schema(store) == 1


def test_verify_finds_a_raw_row_changed_in_a_store_without_seals(tmp_path):
    """The check that verify does make of a schema 1 store is real: a raw row edited behind linkage's back (its
    append-only trigger dropped, as tests/reliability/test_tamper.py does) no longer matches the content hash its
    ingest recorded; exit code 6, and the store is left as it was found."""
    store = _copy("store-v1.db", tmp_path / "db")
    with closing(sqlite3.connect(store)) as con:
        for (name,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'trigger' AND tbl_name = 'raw_rows'"
                                   ).fetchall():
            con.execute(f"DROP TRIGGER {name}")
        rowid, text = con.execute("SELECT rowid, data_json FROM raw_rows WHERE data_json LIKE '%breaking_force_n%' "
                                  "ORDER BY rowid LIMIT 1").fetchone()
        row = json.loads(text)
        row["breaking_force_n"] = row["breaking_force_n"] + 5
        con.execute("UPDATE raw_rows SET data_json = ? WHERE rowid = ?", (json.dumps(row), rowid))
        con.commit()
    before = _files(store.parent)
    got = run_cli(["verify", "--store", store])
    assert got.exit_code == 6 and "content hash does not match its rows" in got.stderr, got.output
    assert "The record is NOT whole." in got.stdout
    assert _files(store.parent) == before and _schema(store) == 1


def test_the_library_reads_an_older_store_as_the_upgraded_copy_and_warns_once(old):
    store, version, twin = old
    before = _files(store.parent)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        table = api.assemble(store)
        trail = api.audit(store)
    pd.testing.assert_frame_equal(table, api.assemble(twin), check_exact=True)
    pd.testing.assert_frame_equal(trail, api.audit(twin), check_exact=True)
    cautions = [str(w.message) for w in caught if issubclass(w.category, StoreCaution)]
    assert len(cautions) == 2 and all(f"store schema {version}" in c for c in cautions)  # one per opening
    assert _files(store.parent) == before


def test_the_next_ingest_still_upgrades_it(old, tmp_path):
    """Reading leaves the store as it was; the ingest that follows upgrades it, anchors it and records as before."""
    store, version, _ = old
    run_cli(["lots", "--store", store])
    fix = _corrected(tmp_path / "fix", lot="EX-002", change=2.0)
    done = run_cli(["ingest", fix, "--store", store, "--reason", "deviation D-2"])
    assert done.exit_code == 0, done.output
    assert _schema(store) == SCHEMA_VERSION and seal.anchor_path(store).exists()
    after = run_cli(["lots", "--store", store])
    assert after.exit_code == 0 and after.stderr == ""  # the current schema: nothing to say


def test_a_schema_1_store_this_account_cannot_write_is_read_from_a_copy(tmp_path, monkeypatch):
    """Where the store cannot be written (a read-only file system, simulated through os.access), a schema 1 store
    was refused by every reading command (exit code 5, "open it once with write access"); it is read from an
    upgraded copy now, as where it could be written."""
    store = _copy("store-v1.db", tmp_path / "db")
    twin = _copy("store-v1.db", tmp_path / "twin")
    with LotStore(twin, create=False):
        pass
    _no_write(monkeypatch, store, store.parent)
    before = _files(store.parent)
    got = run_cli(["lots", "--store", store, "--json"])
    assert got.exit_code == 0, got.output
    assert json.loads(got.stdout) == json.loads(run_cli(["lots", "--store", twin, "--json"]).stdout)
    assert _files(store.parent) == before


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    """A model trained on twelve synthetic lots (linkage.synthetic.make_lots, seed 3) in a store of its own, and a
    spec of the lot mean (the model has no vessel data to judge by stages)."""
    return trained_lab(tmp_path_factory.mktemp("lab"))


def trained_lab(folder: Path, product: str | None = None) -> tuple[Path, Path]:
    """(the models folder, the spec) of :func:`model` made in ``folder``, its lots of ``product`` when given."""
    from linkage.synthetic import make_lots

    make_lots(12, seed=3, product=product).write_csv(folder / "lots")
    api.ingest(folder / "lots", folder / "lab.db")
    api.train(folder / "lab.db", folder / "models", seed=0, materials=False)
    spec = folder / "spec.toml"
    spec.write_text('[dissolution_pct]\nmin = 80.0\ntime_min = 30.0\n\n[tensile_strength_mpa]\nmin = 1.7\n',
                    encoding="utf-8")
    return folder / "models", spec


@pytest.mark.slow
def test_report_and_the_unrecorded_what_if_and_window_leave_an_older_store_as_it_was(old, model, tmp_path):
    """``report`` (which records nothing in the store), and ``predict`` and ``window`` with ``--no-record``, read
    the older store without changing it; the what-if and window say what they say on the upgraded copy, and the
    report states the caution in the document itself."""
    store, version, twin = old
    models, spec = model
    before = _files(store.parent)
    out = tmp_path / "report.html"
    made = run_cli(["report", "--store", store, "--models-dir", models, "--out", out])
    assert made.exit_code == 0, made.output
    assert f"written by an earlier linkage (store schema {version}" in out.read_text(encoding="utf-8")
    for args in (["predict", "--no-record", "--lot", "ex-001", "--set", "roll_force_kn_per_cm=8", "--json"],
                 ["window", "--no-record", "--spec", spec, "--json"]):
        got = run_cli([*args, "--store", store, "--models-dir", models])
        upgraded = run_cli([*args, "--store", twin, "--models-dir", models])
        assert got.exit_code == upgraded.exit_code == 0, got.output
        mine, theirs = json.loads(got.stdout), json.loads(upgraded.stdout)
        for d in (mine, theirs):  # the run's own times and the store's path are not the store's content
            for key in ("created_at", "made_at", "store"):
                d.pop(key, None)
        assert mine == theirs, args[0]
        assert got.stderr.count(f"written by an earlier linkage (store schema {version}") == 1
    assert _files(store.parent) == before and _schema(store) == version


def test_a_refused_reanchor_leaves_an_older_store_as_it_was(tmp_path):
    """Regression: ``verify --reanchor --reason`` on a schema 1 store upgraded (and so anchored) it, then refused
    the re-anchoring as having nothing to anchor (exit 2): a refused command had written the store. Now the
    refusal is decided on the store read as it is, and nothing is written. No outside source needed (a refusal)."""
    store = _copy("store-v1.db", tmp_path / "db")
    before = _files(store.parent)
    got = run_cli(["verify", "--store", store, "--reanchor", "--reason", "anchor lost in the copy"])
    assert got.exit_code == 2 and "no seals yet" in got.stderr, got.output
    assert _files(store.parent) == before and _schema(store) == 1


def _empty_sqlite(path: Path) -> Path:
    """An SQLite file without a table, in WAL mode (what a killed first ingest, or another tool, can leave)."""
    with closing(sqlite3.connect(path)) as con:
        con.execute("PRAGMA journal_mode = WAL")
    return path


def test_a_reading_command_does_not_make_a_store_in_an_empty_sqlite_file(tmp_path):
    """Regression: ``lots --store e.db`` on an SQLite file without a table made the store in it (tables, seal,
    ``e.db.seal`` and ``e.db.seal.lock`` beside it), though the command records nothing. Now it is refused as no
    store is (exit code 2, "no lot store at ..."), and the folder is left byte for byte; the ingest still makes the
    store in it. A regression test of a refusal: no outside source."""
    folder = tmp_path / "db"
    folder.mkdir()
    store = _empty_sqlite(folder / "e.db")
    before = _files(folder)
    for args in (["lots"], ["audit"], ["history", "EX-001"], ["assemble"], ["verify"]):
        got = run_cli([*args, "--store", store])
        assert got.exit_code == 2 and f"no lot store at {store}" in got.stderr, (args, got.output)
        assert _files(folder) == before, args
    done = run_cli(["ingest", DATA / "template-example", "--store", store])
    assert done.exit_code == 0 and _schema(store) == SCHEMA_VERSION, done.output


def test_the_errors_of_a_damaged_schema_1_store_name_the_store_and_verify_says_it_is_not_whole(tmp_path):
    """Regression: a damaged schema 1 store (read from an upgraded temporary copy) was reported by the name of the
    temporary copy, already removed ("lot store /tmp/linkage-read-.../old.db: database disk image is malformed",
    exit code 5), and ``verify`` exited 5 without its verdict, where damage found in a current store is a store
    problem (exit code 6, "The record is NOT whole."). Now the store is named, and the damage is the store's, as
    the check of a current store says it. A regression test of a refusal: no outside source."""
    store = _copy("store-v1.db", tmp_path / "db")
    with open(store, "r+b") as fh:  # a page of the lot tables overwritten (SQLite then finds the file malformed)
        fh.seek(7 * 4096)
        fh.write(b"\x00\xff\xff\xff")
    before = _files(store.parent)
    got = run_cli(["lots", "--store", store])
    assert got.exit_code == 6 and f"lot store {store} is damaged" in got.stderr, got.output
    assert "linkage-read-" not in got.stderr
    checked = run_cli(["verify", "--store", store])
    assert checked.exit_code == 6 and "The record is NOT whole." in checked.stdout, checked.output
    assert f"store: lot store {store} is damaged" in checked.stderr and "linkage-read-" not in checked.stderr
    assert _files(store.parent) == before


#: a writer that commits two transactions (a table made and dropped: the store's content unchanged) and dies
#: before it closes, leaving its -wal beside the store, not copied into it (no checkpoint)
_CRASHED_WRITER = """
import os, sqlite3, sys
con = sqlite3.connect(sys.argv[1], isolation_level=None)
con.execute("PRAGMA wal_autocheckpoint = 0")
con.execute("CREATE TABLE scratch_left (a)")
con.execute("DROP TABLE scratch_left")
os._exit(0)
"""


def test_a_crashed_writers_wal_beside_an_older_store_is_left_as_it_is(old, tmp_path):
    """Regression: a reading command opened an older store beside a -wal left by a crashed writer with a
    connection that could write (SQLite's ``query_only``), which at its close, the last one, copied the -wal into
    the store (a checkpoint) and deleted the -wal and -shm: the store's bytes changed (not its content). Now such a
    store is read through a read-only connection (sqlite.org, "URI filenames": ``mode=ro``), which reads the -wal's
    transactions and neither checkpoints nor deletes it: the store and the -wal are byte for byte as before
    (SQLite's -shm index beside them, which holds no content, may be rebuilt). A regression test of the project's
    own contract: no outside source."""
    import subprocess
    import sys

    store, version, twin = old
    wal = Path(f"{store}-wal")
    subprocess.run([sys.executable, "-c", _CRASHED_WRITER, str(store)], check=True)
    assert wal.stat().st_size > 0
    before = {k: v for k, v in _files(store.parent).items() if not k.endswith("-shm")}
    for args in (["lots", "--json"], ["verify", "--json"]):
        got = run_cli([*args, "--store", store])
        assert got.exit_code == 0, got.output
        assert {k: v for k, v in _files(store.parent).items() if not k.endswith("-shm")} == before, args
    assert json.loads(run_cli(["lots", "--json", "--store", store]).stdout) == \
        json.loads(run_cli(["lots", "--json", "--store", twin]).stdout)
    assert _schema(store) == version


def test_a_store_upgraded_by_a_writer_while_it_was_copied_is_read_as_a_current_store(tmp_path, monkeypatch):
    """Regression (a race): a schema 1 store upgraded by a writer after a reading command found it needed the
    upgrade and before it was copied gave a copy of schema 3, still marked as a schema 1 store read from a copy
    (its caution said so, and ``verify`` counted no seals). Now the copy's schema is read first: the store, current
    by then, is read itself, with no caution. The writer is simulated by upgrading the store just before the copy.
    A regression test of the project's own contract: no outside source."""
    from contextlib import ExitStack

    from linkage import store as store_module

    path = _copy("store-v1.db", tmp_path / "db")
    real_copy = store_module.backup_copy

    def upgraded_first(source, to):
        with LotStore(source, create=False):  # the writer: opened for writing, so upgraded
            pass
        real_copy(source, to)

    monkeypatch.setattr(store_module, "backup_copy", upgraded_first)
    with warnings.catch_warnings(record=True) as caught, ExitStack() as stack:
        warnings.simplefilter("always")
        s = store_module.open_to_read(stack, path)
        assert s.path == path and s.older_schema is None and not s.from_copy and s.cautions() == []
        assert s.check_seals(full=True)["seals"] > 0
    assert not [w for w in caught if issubclass(w.category, StoreCaution)]
    assert _schema(path) == SCHEMA_VERSION


def test_reanchor_of_a_schema_2_store_whose_anchor_is_there_is_refused_and_writes_nothing(tmp_path):
    """``verify --reanchor --reason`` on a schema 2 store with its anchor file: nothing to anchor again, refused
    (exit code 2) on the store read as it is, before any upgrade: the store, its anchor and its folder are left
    byte for byte. A regression test of a refusal: no outside source."""
    store = _copy("store-v2.db", tmp_path / "db")
    before = _files(store.parent)
    got = run_cli(["verify", "--store", store, "--reanchor", "--reason", "anchor lost in the copy"])
    assert got.exit_code == 2 and "nothing to anchor again" in got.stderr, got.output
    assert _files(store.parent) == before and _schema(store) == 2


def test_the_refusals_of_an_opening_that_must_not_write_are_one_class_wherever_imported(tmp_path):
    """``EmptyStoreFile`` and ``StoreNeedsUpgrade`` live in linkage.exceptions with the other errors; the names
    they had in linkage.store and linkage.store_open are the same classes (older scripts import them there), and
    their exit codes are those of their bases (2: no store to read; 5: a store that cannot be read as it is)."""
    from linkage import exceptions, store, store_open

    for name in ("EmptyStoreFile", "StoreNeedsUpgrade"):
        assert getattr(store, name) is getattr(store_open, name) is getattr(exceptions, name), name
    assert exceptions.EmptyStoreFile.exit_code == 2 and exceptions.StoreNeedsUpgrade.exit_code == 5
    path = _copy("store-v1.db", tmp_path / "db")
    with pytest.raises(exceptions.StoreNeedsUpgrade) as caught:  # schema 1, opened without its upgrade
        LotStore(path, create=False, upgrade=False)
    assert caught.value.version == 1


def test_the_cautions_of_an_older_store_name_the_line_that_opened_it(tmp_path):
    """Regression (a review): the caution of a store read without its upgrade named a line of
    linkage/store_open.py (where reading, open_to_read and upgraded_copy open the store) as the warning's place,
    not the caller's line, as a store opened by ``LotStore(...)`` itself names it (Python's ``warnings.warn``,
    ``stacklevel``). Each way of opening, on a schema 1 store (an upgraded copy) and a schema 2 store (read as it
    is, its anchor file left out), now names the line of this test that opened it."""
    from contextlib import ExitStack

    from linkage.store import open_to_read, reading

    def opened_by_reading(path):
        with reading(path):  # the place the cautions should name
            return _this_line() - 1

    def opened_by_open_to_read(path):
        with ExitStack() as stack:
            open_to_read(stack, path)  # the place the cautions should name
            return _this_line() - 1

    for fixture in ("store-v1.db", "store-v2.db"):
        for how in (opened_by_reading, opened_by_open_to_read):
            path = tmp_path / f"{how.__name__}-{fixture}"
            shutil.copy(DATA / fixture, path)
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                line = how(path)
            places = {(Path(w.filename).name, w.lineno) for w in caught if issubclass(w.category, StoreCaution)}
            assert places == {(Path(__file__).name, line)}, (fixture, how.__name__, places)


def _this_line() -> int:
    """The line of the caller's frame that calls this."""
    import sys

    return sys._getframe(1).f_lineno
