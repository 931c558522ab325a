"""The anchor file under concurrent writers: it always ends at the store's newest seal.

A writer writes the anchor (``<store>.seal``) after its commit, outside SQLite's write lock. Before
``seal.advance_anchor``, two writers finishing together could leave it naming the older of their two seals (the
first writer's anchor written last). These tests run writers in forked processes, widen the window between
reading the newest seal and writing the anchor, and ask after every write that the anchor names at least the
seal the write made, and after every round that it names the newest seal and that ``check_seals(full=True)``
(what ``linkage verify`` checks) is clean. Regression tests of the project's own invariant: they need no outside
source.
"""

from __future__ import annotations

import multiprocessing
import sqlite3
import threading
import time
from contextlib import closing
from pathlib import Path

import pytest

from linkage import seal as seal_module
from linkage.store import LotStore

from .helpers import posix_fork

pytestmark = pytest.mark.reliability

ROUNDS, WRITES = 8, 12


def _slow_anchor_writes(seed: int) -> None:
    """Widen the race window: each anchor write waits 0-4 ms before it writes (seeded per process)."""
    import random

    rng = random.Random(seed)
    write = seal_module.write_anchor

    def slow(*args, **kwargs):
        time.sleep(rng.uniform(0.0, 0.004))
        return write(*args, **kwargs)

    seal_module.write_anchor = slow


def _writer(store: str, barrier, seed: int, out) -> None:
    """ROUNDS rounds of WRITES audit entries, the rounds started together with the other writer; after each
    write, the seal it made against the anchor (a write whose anchor names an older seal is a failure)."""
    _slow_anchor_writes(seed)
    behind = []
    with LotStore(store, create=False) as s:
        for round_ in range(ROUNDS):
            barrier.wait()
            for k in range(WRITES):
                s.log("race", inputs={"seed": seed, "round": round_, "k": k})
                with closing(sqlite3.connect(store)) as c:
                    mine = c.execute("SELECT MAX(id) FROM seals WHERE kind = 'audit' AND ref_id = "
                                     "(SELECT MAX(id) FROM audit WHERE inputs_json LIKE ?)",
                                     (f'%"seed": {seed}, "round": {round_}, "k": {k}}}%',)).fetchone()[0]
                anchor = seal_module.read_anchor(Path(store))
                if anchor is None or anchor["seal_id"] < mine:
                    behind.append((round_, k, mine, None if anchor is None else anchor["seal_id"]))
            barrier.wait()  # the round is over for both: the test's process checks the anchor now
            barrier.wait()
    out.put((seed, behind))


@pytest.mark.skipif(not posix_fork(), reason="forks writers (POSIX)")
def test_two_writers_leave_the_anchor_at_the_newest_seal(tmp_path):
    store = tmp_path / "s.db"
    LotStore(store).close()  # created and anchored
    ctx = multiprocessing.get_context("fork")
    barrier, out = ctx.Barrier(3), ctx.Queue()
    procs = [ctx.Process(target=_writer, args=(str(store), barrier, seed, out)) for seed in (1, 2)]
    for p in procs:
        p.start()
    stale = []
    for round_ in range(ROUNDS):
        barrier.wait()  # go
        barrier.wait()  # both done with the round
        with closing(sqlite3.connect(store)) as c:
            newest = seal_module.head(c)
        anchor = seal_module.read_anchor(store)
        if (anchor["seal_id"], anchor["sha256"]) != newest:
            stale.append((round_, anchor["seal_id"], newest[0]))
        barrier.wait()
    results = dict(out.get(timeout=120) for _ in procs)
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    assert stale == [], f"rounds that ended with the anchor behind the newest seal: {stale}"
    assert results == {1: [], 2: []}, f"writes whose anchor named an older seal than their own: {results}"
    with LotStore(store, create=False) as s:
        counts = s.check_seals(full=True)  # what `linkage verify` checks of the store: clean
    assert counts["seals"] == 2 * ROUNDS * WRITES and counts["newest seal"]["id"] == 2 * ROUNDS * WRITES


def _seals(n: int) -> sqlite3.Connection:
    """A connection holding a seal chain of ``n`` seals (as the store's seals table holds it)."""
    c = sqlite3.connect(":memory:", isolation_level=None)
    c.execute(seal_module.DDL[0])
    prev = seal_module.GENESIS
    for k in range(1, n + 1):
        digest = seal_module.link(prev, seal_module.AUDIT, k, seal_module.sha256_text(str(k)))
        c.execute("INSERT INTO seals VALUES (?, ?, ?, ?, ?, ?)", (k, seal_module.AUDIT, k, "x", prev, digest))
        prev = digest
    return c


@pytest.mark.parametrize("flock", [True, False], ids=["with flock", "without fcntl (Windows)"])
def test_an_older_seal_never_replaces_a_newer_anchor(tmp_path, monkeypatch, flock):
    if not flock:
        monkeypatch.setitem(__import__("sys").modules, "fcntl", None)  # `import fcntl` raises ImportError
    store = tmp_path / "s.db"
    newer, older = _seals(5), _seals(3)
    assert seal_module.advance_anchor(store, newer) is True
    written = seal_module.anchor_path(store).read_bytes()
    assert seal_module.read_anchor(store) == dict(zip(("seal_id", "sha256"), seal_module.head(newer)))
    # a writer that read seal 3 (before the writer of seal 5 committed) comes second: the anchor stays at 5
    assert seal_module.advance_anchor(store, older) is False
    assert seal_module.anchor_path(store).read_bytes() == written
    assert seal_module.advance_anchor(store, newer) is True  # the same seal again: nothing to write
    assert seal_module.anchor_path(store).read_bytes() == written
    assert seal_module.advance_anchor(store, _seals(6)) is True  # a newer one is written
    assert seal_module.read_anchor(store)["seal_id"] == 6
    assert seal_module.anchor_lock_path(store).exists() is flock  # the lock file only where flock is used


@pytest.mark.skipif(not posix_fork(), reason="fcntl.flock (POSIX)")
def test_the_anchor_waits_for_the_lock(tmp_path):
    """While another holds the anchor lock, the anchor is not written; once it is released, it is."""
    import fcntl
    import os

    store = tmp_path / "s.db"
    fd = os.open(seal_module.anchor_lock_path(store), os.O_RDWR | os.O_CREAT)
    fcntl.flock(fd, fcntl.LOCK_EX)
    done = threading.Thread(target=lambda: seal_module.advance_anchor(store, _seals(2)))  # its own connection
    done.start()
    time.sleep(0.3)
    assert not seal_module.anchor_path(store).exists()
    os.close(fd)  # releases the lock
    done.join(timeout=10)
    assert seal_module.read_anchor(store)["seal_id"] == 2


@pytest.mark.skipif(not posix_fork(), reason="fcntl.flock (POSIX)")
def test_a_lock_that_fails_leaves_the_write_standing(tmp_path, monkeypatch):
    """``flock`` failing other than by waiting (ENOLCK: a network drive without locks) comes after the commit: the
    write stands, the anchor is written without the lock (as on Windows), and nothing raises. A regression test of
    the store's own rule: it needs no outside source."""
    import errno
    import fcntl

    def no_locks(fd, op):
        raise OSError(errno.ENOLCK, "No locks available")

    store = tmp_path / "s.db"
    with LotStore(store, create=True) as s:
        s.log("first", inputs={"k": 1})
        monkeypatch.setattr(fcntl, "flock", no_locks)
        s.log("second", inputs={"k": 2})  # raised OSError after its commit before the fix
        monkeypatch.undo()
        assert s.audit()[-1]["action"] == "second"
        counts = s.check_seals(full=True)
    assert seal_module.read_anchor(store)["seal_id"] == counts["newest seal"]["id"]


def test_an_anchor_naming_the_newest_seal_under_another_hash_is_a_mismatch(tmp_path):
    """The anchor names the newest seal's id but another hash (the anchor or the chain was changed): not "the
    anchor names the newest seal" (False), and the anchor is left as it is, for ``check`` to report. A regression
    test of the store's own rule: it needs no outside source."""
    store = tmp_path / "s.db"
    newer = _seals(5)
    seal_id, digest = seal_module.head(newer)
    assert seal_module.write_anchor(store, seal_id, "0" * 64)
    written = seal_module.anchor_path(store).read_bytes()
    assert seal_module.advance_anchor(store, newer) is False
    assert seal_module.anchor_path(store).read_bytes() == written
    assert seal_module.write_anchor(store, seal_id, digest) and seal_module.advance_anchor(store, newer) is True
