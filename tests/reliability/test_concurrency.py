"""Concurrent use of one lot store: ingests and readers in separate
processes at the same time.

The promise: two ingests at once both land, or one waits and lands after the
other, or one fails with exit code 3 and a "store busy" message (and lands
when retried); a reader only ever sees whole ingests; the store passes
SQLite's integrity check afterwards and no lot is lost. Each process here is
a fresh ``python`` running the real command line or the library.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from linkage.store import LotStore

from .helpers import OPEN_FINDINGS, integrity, lot_set, rows_of, run_cli, write_batch

pytestmark = pytest.mark.reliability

#: the command line in a fresh interpreter; with GO set, it imports first and waits for that file, so
#: that two commands start at the same moment
CLI = r"""
import os, sys, time
from pathlib import Path
from linkage.cli.main import cli
import linkage.cli.store_cmds, linkage.read, linkage.store
go = os.environ.get("GO")
while go and not Path(go).exists():
    time.sleep(0.001)
cli.main(prog_name="linkage")
"""

READER = r"""
import json, sys, time, traceback
from pathlib import Path
from click.testing import CliRunner
from linkage.cli.main import cli
from linkage.exceptions import LinkageError
from linkage.store import LotStore

store, stop, ready, out, mode, groups_file = sys.argv[1:7]
groups = json.loads(Path(groups_file).read_text())  # name -> {"lots": [...], "rows": {table: n}}
valid = {}
for combo in (["base"], ["base", "A"], ["base", "B"], ["base", "A", "B"]):
    lots = frozenset(l for g in combo for l in groups[g]["lots"])
    rows = {}
    for g in combo:
        for t, n in groups[g]["rows"].items():
            rows[t] = rows.get(t, 0) + n
    valid[lots] = ("+".join(combo), rows)
reads, seen, problems = 0, set(), []
deadline = time.monotonic() + 120
while not Path(stop).exists() and time.monotonic() < deadline:
    try:
        if mode == "library":
            with LotStore(store, create=False) as s:
                tables = s.current_tables()  # one read transaction: one state of the store
            # the lots from the same read (lot_ids() then current_tables() are two reads, and an ingest
            # may land between them)
            lots = frozenset(tables["process"]["lot"])
            rows = {t: len(df) for t, df in tables.items()}
        else:
            args = ["lots", "--json", "--store", store] if mode == "cli-lots" else ["assemble", "--store", store]
            res = CliRunner().invoke(cli, args)
            if res.exit_code != 0:
                problems.append(f"exit {res.exit_code}: {res.output[-300:]}")
                continue
            if mode == "cli-lots":
                lots = frozenset(r["lot"] for r in json.loads(res.stdout))
            else:
                n = int(res.stdout.split("Assembled ", 1)[1].split(" lots", 1)[0])
                lots = next((k for k in valid if len(k) == n), None)
            rows = None
        if lots not in valid:
            problems.append(f"a partial state: {len(lots) if lots else lots} lots")
        else:
            name, expected = valid[lots]
            if rows is not None and rows != expected:
                problems.append(f"state {name}: rows {rows} but expected {expected}")
            seen.add(name)
    except LinkageError as exc:
        problems.append(f"{type(exc).__name__}: {exc}")
    except Exception:
        problems.append(traceback.format_exc()[-600:])
    reads += 1
    if reads == 1:
        Path(ready).write_text("reading")
    time.sleep(0.02)  # leave the writers some CPU
Path(out).write_text(json.dumps({"reads": reads, "seen": sorted(seen), "problems": problems}))
"""


def _env(go: Path | None = None):
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    env.pop("LINKAGE_STORE", None)
    if go is not None:
        env["GO"] = str(go)
    return env


def _ingest(folder: Path, store: Path, cwd: Path, go: Path | None = None) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", CLI, "ingest", str(folder), "--store", str(store)], cwd=cwd,
                            env=_env(go), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _busy_or_ok(proc: subprocess.Popen, timeout: float = 120, counts=None) -> str:
    """'ok', or 'busy' for exit code 3 with the message; anything else fails.

    While finding #16 is open, the refusal that race causes ("not a linkage
    lot store" for a store another process has just created) is counted and
    treated as a refusal to retry; test_a_store_created_between_the_two_reads_of_open
    pins it."""
    out, err = proc.communicate(timeout=timeout)
    assert "Traceback" not in err, err
    if proc.returncode == 0:
        return "ok"
    if 16 in OPEN_FINDINGS and proc.returncode == 1 and "not a linkage lot store" in err and counts is not None:
        counts["  refused by the creation race (finding #16)"] += 1
        return "busy"
    assert proc.returncode == 3 and "store busy" in err, (proc.returncode, err)
    return "busy"


def test_two_ingests_and_three_readers_at_once(tmp_path, counts):
    store = tmp_path / "lots.db"
    groups = {}
    for name, n, seed in (("base", 20, 0), ("A", 100, 1), ("B", 100, 2)):
        lots, rows = write_batch(tmp_path / name, n, seed=seed, prefix=f"C{name}")
        groups[name] = {"lots": sorted(lots), "rows": rows}
    (tmp_path / "groups.json").write_text(json.dumps(groups))
    assert run_cli(["ingest", tmp_path / "base", "--store", store]).exit_code == 0

    stop = tmp_path / "stop"
    readers = []
    for i, mode in enumerate(("library", "cli-lots", "cli-assemble")):
        ready, out = tmp_path / f"ready{i}", tmp_path / f"reader{i}.json"
        readers.append((subprocess.Popen(
            [sys.executable, "-c", READER, str(store), str(stop), str(ready), str(out), mode,
             str(tmp_path / "groups.json")], cwd=tmp_path, env=_env()), ready, out))
    deadline = time.monotonic() + 60
    while not all(r[1].exists() for r in readers) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert all(r[1].exists() for r in readers), "a reader never started"

    go = tmp_path / "go"
    ingests = {name: _ingest(tmp_path / name, store, tmp_path, go) for name in ("A", "B")}
    go.write_text("go")
    outcomes = {name: _busy_or_ok(proc) for name, proc in ingests.items()}
    for name, outcome in outcomes.items():  # "one waits and retries"
        if outcome == "busy":
            counts["store busy refusals"] += 1
            assert _busy_or_ok(_ingest(tmp_path / name, store, tmp_path)) == "ok"
    time.sleep(0.3)  # readers see the final state too
    stop.write_text("stop")
    reports = []
    for proc, _, out in readers:
        assert proc.wait(timeout=60) == 0
        reports.append(json.loads(out.read_text()))

    for report in reports:
        assert report["problems"] == [], report["problems"][:3]
        assert report["reads"] > 0
    ok, fk = integrity(store)
    assert ok == "ok" and fk == []
    every = {lot for g in groups.values() for lot in g["lots"]}
    assert lot_set(store) == every  # no lot lost
    for name in ("A", "B"):
        assert rows_of(store, set(groups[name]["lots"])) == groups[name]["rows"]
    with LotStore(store, create=False) as s:
        assert len(s.ingests()) == 3  # base, A, B: each exactly once
    counts["concurrent ingests landed"] += 2
    counts["concurrent reads checked"] += sum(r["reads"] for r in reports)


def test_two_first_ingests_into_a_new_store(tmp_path, counts):
    """Two processes creating the same new store at once: both land, or one
    is refused clearly and lands on retry; never a traceback."""
    lots = {}
    for name, seed in (("A", 1), ("B", 2)):
        lots[name], _ = write_batch(tmp_path / name, 30, seed=seed, prefix=f"N{name}")
    for attempt in range(2):
        store, go = tmp_path / f"new{attempt}.db", tmp_path / f"go{attempt}"
        procs = {name: _ingest(tmp_path / name, store, tmp_path, go) for name in ("A", "B")}
        time.sleep(1.5)  # both have imported linkage and wait for the go
        go.write_text("go")
        outcomes = {name: _busy_or_ok(p, counts=counts) for name, p in procs.items()}
        for name, outcome in outcomes.items():
            if outcome == "busy":
                counts["store busy refusals"] += 1
                assert _busy_or_ok(_ingest(tmp_path / name, store, tmp_path)) == "ok"
        assert integrity(store) == ("ok", [])
        assert lot_set(store) == lots["A"] | lots["B"]
        counts["concurrent ingests landed"] += 2


def test_a_busy_store_is_refused_clearly(tmp_path, counts, monkeypatch, no_env):
    """A writer that finds the write lock held past its wait gets exit code 3
    and "store busy", writes nothing, and readers are not blocked meanwhile.
    The wait (10 s by default) is shortened here through the keyword default
    of LotStore, which the command uses."""
    store = tmp_path / "busy.db"
    write_batch(tmp_path / "base", 10, seed=0, prefix="Q")
    write_batch(tmp_path / "more", 10, seed=1, prefix="R")
    assert run_cli(["ingest", tmp_path / "base", "--store", store]).exit_code == 0
    monkeypatch.setitem(LotStore.__init__.__kwdefaults__, "busy_timeout_s", 0.3)
    holder = sqlite3.connect(store, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")  # another writer holds the lock
    try:
        before = store.read_bytes()
        result = run_cli(["ingest", tmp_path / "more", "--store", store])
        assert result.exit_code == 3, result.output
        assert "store busy" in result.stderr
        assert store.read_bytes() == before
        listing = run_cli(["lots", "--json", "--store", store])
        assert listing.exit_code == 0 and len(json.loads(listing.stdout)) == 10
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert run_cli(["ingest", tmp_path / "more", "--store", store]).exit_code == 0
    assert len(lot_set(store)) == 20
    counts["store busy refusals"] += 1


def test_a_store_created_between_the_two_reads_of_open(tmp_path, monkeypatch, counts):
    """The interleaving behind finding #16, made deterministic: another
    process creates the store (and commits) just after this one has read the
    file's application id and before it lists the tables. Opening must still
    succeed: the store is a valid linkage store by then."""
    import linkage.store as store_module

    path = tmp_path / "lots.db"
    real_connect = sqlite3.connect
    state = {"raced": False}

    class Rows:
        def __init__(self, rows):
            self.rows = rows

        def fetchone(self):
            return self.rows[0] if self.rows else None

        def __iter__(self):
            return iter(self.rows)

    class Racing(sqlite3.Connection):
        def execute(self, sql, *args):
            cursor = super().execute(sql, *args)
            if sql.strip() == "PRAGMA application_id" and not state["raced"]:
                rows = cursor.fetchall()  # this process has read the id (0: no store yet)
                state["raced"] = True
                monkeypatch.setattr(store_module.sqlite3, "connect", real_connect)
                LotStore(path).close()  # "the other process" creates the store and commits
                return Rows(rows)
            return cursor

    monkeypatch.setattr(store_module.sqlite3, "connect",
                        lambda *a, **k: real_connect(*a, **{**k, "factory": Racing}))
    with LotStore(path) as s:
        assert state["raced"] and s.lot_ids() == []


def test_python_dash_m_runs_the_command_line(tmp_path):
    """`python -m linkage.cli.main ingest ...` (the form a script or a
    scheduler uses when the `linkage` script is not on PATH) must run the
    command, not exit 0 having done nothing."""
    result = subprocess.run([sys.executable, "-m", "linkage.cli.main", "--version"], capture_output=True,
                            text=True, cwd=tmp_path, env=_env(), timeout=60)
    assert result.returncode == 0 and "linkage" in result.stdout, (result.stdout, result.stderr)


def test_a_commit_during_the_seal_check_is_not_taken_for_removed_records(tmp_path, monkeypatch):
    """A reader checks the seals in one read transaction while a writer commits a newer seal and moves the
    anchor (seen once under load: "the anchor names seal 4, which the store does not hold (newest seal: 2)").
    The anchor is read before the snapshot begins, so it never names a seal the snapshot lacks. The writer's
    commit is made here, deterministically, between the snapshot's start and the anchor's check."""
    from linkage import seal

    path = tmp_path / "site.db"
    with LotStore(path) as writer:
        writer.log("train", lot=None, model_id="m-1", inputs={}, outputs={})
    real_check = seal.check

    committed = []

    def commit_meanwhile(c, store_path, **kwargs):
        if not committed:  # once: the writer's own open checks the seals too
            committed.append(c.execute("SELECT COUNT(*) FROM seals").fetchone()[0])  # the snapshot begins
            with LotStore(path) as other:  # another process's audit entry, after the snapshot began
                other.log("predict", lot=None, model_id="m-1", inputs={}, outputs={})
        return real_check(c, store_path, **kwargs)

    with LotStore(path) as reader:
        monkeypatch.setattr(seal, "check", commit_meanwhile)
        counts = reader.check_seals()  # raised StoreIntegrityError ("anchor ... does not hold") before
    assert counts["seals"] == committed[0]  # the snapshot's seals, not the one committed meanwhile
    with LotStore(path) as after:
        assert after.check_seals()["seals"] == committed[0] + 1
