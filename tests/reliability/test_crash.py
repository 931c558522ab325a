"""Crash safety: `linkage ingest`, `linkage train` and the model registry
killed with SIGKILL at random (seeded) moments.

After every kill the store must open through linkage, pass SQLite's own
``PRAGMA integrity_check`` and ``foreign_key_check`` (SQLite documentation,
"Pragma statements"), and hold either all or none of the interrupted ingest,
with every earlier row unchanged (the tables are append-only, so the rows
before the kill must be a prefix of the rows after it). The registry must
parse, every model in its index must verify, and ``latest`` must be the
newest indexed model and load; a half-written model is never resolved.

The kill moments are drawn from a seeded generator in stratified blocks, as
fractions of the lengths measured in the latest uninterrupted run (a
calibration run first, then any run that finished before its kill). For the
ingest, 4 in 10 are a time after the start, spread over the whole run, and 6
in 10 a time after the child takes SQLite's WAL write lock (watched through
/proc/locks), spread over the write transaction. For train, half are a time
after the start (mostly inside the cross-validation) and half a time after
the child takes the registry's lock, spread over the save. A kill "inside
the write transaction" is one where the child held the write lock when it
was stopped and the store shows nothing of its ingest (see ``helpers``); the
test requires some of those, so that it proves what it claims. A run that
finishes before its kill must have succeeded; it is not counted as a kill.
"""

from __future__ import annotations

import json
import shutil
import threading
import warnings
from datetime import datetime, timezone
from pathlib import Path

import joblib
import numpy as np
import pytest

from linkage.models import registry
from linkage.store import LotStore

from .helpers import (OPEN_FINDINGS, Forker, dump, held_wal_write_lock, integrity, is_prefix, lot_set, posix_fork,
                      rows_of, run_cli, time_limit, write_batch)

pytestmark = [pytest.mark.reliability,
              pytest.mark.skipif(not posix_fork(), reason="needs fork and /proc/locks (Linux)")]

SEED = 20260301
N_INGEST_KILLS = 50
LANES = 2
BATCH_LOTS = 150
N_FIRST_INGEST_KILLS = 6
N_TRAIN_KILLS = 12
N_SAVE_KILLS = 25
STORE_MODULES = ["pandas", "linkage.read", "linkage.store", "linkage.assemble", "linkage.api", "linkage.cli.store_cmds"]
MODEL_MODULES = STORE_MODULES + ["sklearn.cross_decomposition", "sklearn.linear_model", "sklearn.ensemble",
                                 "sklearn.model_selection", "linkage.models.train", "linkage.models.registry",
                                 "linkage.cli.model_cmds", "threadpoolctl", "joblib"]


def kill_fractions(rng: np.random.Generator, n: int, spans: list[tuple[float, float, float]]) -> list[float]:
    """``n`` kill moments as fractions of a run: ``spans`` are (share, low,
    high); within each span the moments are stratified (one per equal slice,
    at a random place in it), then all are shuffled."""
    out: list[float] = []
    for k, (share, lo, hi) in enumerate(spans):
        m = n - len(out) if k == len(spans) - 1 else round(n * share)
        out += [lo + (hi - lo) * (i + rng.uniform()) / m for i in range(m)]
    rng.shuffle(out)
    return out


def check_store_after_kill(store: Path, before: dict, before_lots: set[str], batch_lots: set[str],
                           batch_rows: dict[str, int]) -> tuple[str, dict]:
    """The promise after a kill; returns "none" or "all" (of the ingest), and
    the store's rows."""
    with LotStore(store, create=False) as s:  # opens cleanly: linkage's own open, SQLite recovers the WAL
        lots = set(s.lot_ids())
    ok, fk = integrity(store)
    assert ok == "ok", f"integrity_check: {ok}"
    assert fk == [], f"foreign_key_check: {fk[:5]}"
    after = dump(store)
    assert is_prefix(before, after), "an earlier row changed or vanished"
    if lots == before_lots:
        assert after == before, "the ingest left rows behind although its lots are absent"
        return "none", after
    assert lots == before_lots | batch_lots, (f"partial ingest: {len(lots - before_lots)} of {len(batch_lots)} "
                                              "new lots present")
    assert len(after["ingests"]) == len(before["ingests"]) + 1
    assert rows_of(store, batch_lots) == batch_rows, "the ingest landed with rows missing"
    return "all", after


def test_sigkill_ingest_50_times(tmp_path, counts):
    """50 SIGKILLs of `linkage ingest` (two stores in parallel, 25 each);
    every earlier lot intact, the interrupted ingest all or nothing."""
    base_dir = tmp_path / "base"
    write_batch(base_dir, 20, seed=0, prefix="BASE")
    revised = tmp_path / "revised"  # a second ingest that revises one lot, so history exists
    revised.mkdir()
    tablets = (base_dir / "tablets.csv").read_text().splitlines()
    head, first = tablets[0].split(","), tablets[1].split(",")
    first[head.index("compression_force_kn")] = "19.5"
    (revised / "tablets.csv").write_text("\n".join([tablets[0], ",".join(first)]) + "\n")

    forkers = [Forker(tmp_path / f"lane{i}", STORE_MODULES) for i in range(LANES)]
    try:
        stores = [tmp_path / f"lane{i}" / "lots.db" for i in range(LANES)]
        for f, store in zip(forkers, stores):
            for folder in (base_dir, revised):
                res = f.run(["ingest", folder, "--store", store, "--reason", "a test revision"])
                assert res["code"] == 0, (f.workdir / "child.log").read_text()

        # calibrate: uninterrupted ingests, both lanes at once (as the kills will run), watching when the
        # child holds the write lock; the first run of a process is slower (cold caches), so the second counts
        estimate: list[dict] = [{} for _ in range(LANES)]

        def calibrate(i):
            write_batch(forkers[i].workdir / "calib", BATCH_LOTS, seed=999 + i, prefix=f"CAL{i}")
            for attempt in range(2):
                scratch = stores[i].with_name(f"scratch{attempt}.db")
                shutil.copy(stores[i], scratch)
                shutil.copy(f"{stores[i]}.seal", f"{scratch}.seal")  # with its anchor: else refused for writing
                res = forkers[i].run(["ingest", forkers[i].workdir / "calib", "--store", scratch], watch=True)
                assert res["code"] == 0
            w0, w1 = res["write_lock_span"]
            estimate[i] = {"start": res["elapsed"], "lock": w1 - w0}

        _in_threads([lambda i=i: calibrate(i) for i in range(LANES)])
        outcomes: list[list[tuple[str, bool | None]]] = [[] for _ in range(LANES)]

        def lane(i):
            f, store = forkers[i], stores[i]
            rng_lane = np.random.default_rng([SEED, i])
            before = dump(store)
            before_lots = lot_set(store)
            k, batch, block, attempts = 0, None, [], 0
            while len(outcomes[i]) < N_INGEST_KILLS // LANES:
                attempts += 1
                assert attempts <= 4 * N_INGEST_KILLS, "the ingests keep finishing before the kill"
                if not block:
                    # kill moments, in blocks of ten (stratified, shuffled): four at a fraction of the whole
                    # run after its start, six at a fraction of the write transaction after the child takes
                    # the write lock; the lengths are those of the latest uninterrupted run
                    block = [("start", t) for t in kill_fractions(rng_lane, 4, [(1.0, 0.02, 0.95)])]
                    block += [("lock", t) for t in kill_fractions(rng_lane, 6, [(1.0, 0.0, 0.95)])]
                    rng_lane.shuffle(block)
                after, fraction = block.pop()
                delay = fraction * estimate[i][after]
                if batch is None:
                    folder = f.workdir / f"batch{k}"
                    batch = (folder, *write_batch(folder, BATCH_LOTS, seed=1000 * i + k, prefix=f"L{i}B{k:02d}"))
                    k += 1
                folder, batch_lots, batch_rows = batch
                res = f.run(["ingest", folder, "--store", store, "--reason", "a test revision"],
                            kill_after=delay if after == "start" else None,
                            kill_after_lock=delay if after == "lock" else None, watch=True)
                locked = held_wal_write_lock(res, store) if res["killed"] else None
                if not res["killed"]:  # it finished first: it must have succeeded; learn its timing
                    assert res["code"] == 0, (f.workdir / "child.log").read_text()
                    estimate[i]["start"] = res["elapsed"]
                    if res["write_lock_span"]:
                        estimate[i]["lock"] = res["write_lock_span"][1] - res["write_lock_span"][0]
                outcome, before = check_store_after_kill(store, before, before_lots, batch_lots, batch_rows)
                if res["killed"]:
                    outcomes[i].append((outcome, locked))
                if outcome == "all":
                    before_lots |= batch_lots
                    batch = None

        _in_threads([lambda i=i: lane(i) for i in range(LANES)])
        for i, store in enumerate(stores):  # the command line still reads the stores
            result = run_cli(["lots", "--json", "--store", store])
            assert result.exit_code == 0
            assert {r["lot"] for r in json.loads(result.stdout)} == lot_set(store)
    finally:
        for f in forkers:
            f.close()
    flat = [o for lane_out in outcomes for o in lane_out]
    # held the write lock and left nothing: killed inside the open transaction, which SQLite rolled back.
    # (Held the lock and landed whole: killed after the commit record reached the WAL, while the
    # connection was finishing or closing; the ingest is durable from that record on.)
    in_txn = sum(1 for outcome, locked in flat if locked and outcome == "none")
    landed = sum(1 for outcome, _ in flat if outcome == "all")
    counts["ingest kills survived"] += len(flat)
    counts["  of which inside the write transaction"] += in_txn
    counts["  of which after the commit"] += landed
    assert len(flat) == N_INGEST_KILLS
    assert in_txn >= 5, f"only {in_txn} of {len(flat)} kills fell inside the write transaction"


def test_sigkill_first_ingest_into_a_new_store(tmp_path, counts):
    """A kill while the store file is being created never leaves a path that
    linkage cannot use: the next ingest into it succeeds, and `lots` either
    reads it or says clearly that there is no store."""
    rng = np.random.default_rng(SEED + 1)
    folder = tmp_path / "lots"
    lots, rows = write_batch(folder, BATCH_LOTS // 2, seed=3, prefix="NEW")
    f = Forker(tmp_path / "work", STORE_MODULES)
    try:
        res = f.run(["ingest", folder, "--store", tmp_path / "calib.db"])
        assert res["code"] == 0
        duration = res["elapsed"]
        survived = 0
        for i, frac in enumerate(kill_fractions(rng, 3 * N_FIRST_INGEST_KILLS, [(1.0, 0.3, 0.98)])):
            if survived == N_FIRST_INGEST_KILLS:
                break
            store = tmp_path / f"new{i}.db"
            res = f.run(["ingest", folder, "--store", store, "--reason", "a test revision"], kill_after=frac * duration)
            listing = run_cli(["lots", "--json", "--store", store])
            if listing.exit_code == 0:
                assert {r["lot"] for r in json.loads(listing.stdout)} in (set(), lots)
                ok, fk = integrity(store)
                assert ok == "ok" and fk == []
            else:
                assert listing.exit_code == 2 and "no lot store" in listing.stderr, listing.output
                if store.exists() and store.stat().st_size == 0:
                    counts["  of which left an empty store file (see #15)"] += 1
                    if 15 in OPEN_FINDINGS:
                        store.unlink()  # an empty file blocks the next ingest (pinned below)
            again = f.run(["ingest", folder, "--store", store])
            assert again["code"] == 0, (f.workdir / "child.log").read_text()
            assert lot_set(store) == lots and rows_of(store, lots) == rows
            survived += res["killed"]
            if not res["killed"]:  # it finished first: learn its length
                duration = res["elapsed"]
    finally:
        f.close()
    counts["first-ingest kills survived"] += survived
    assert survived == N_FIRST_INGEST_KILLS


def test_an_empty_file_left_by_a_killed_first_ingest_does_not_block_the_next(tmp_path, counts, no_env):
    """SQLite creates the store file when it connects; a first ingest killed
    before the first page is written leaves it empty (0 bytes), as
    test_sigkill_first_ingest_into_a_new_store observes. The next `linkage
    ingest` must create the store there, not stop with "no lot store"."""
    folder = tmp_path / "lots"
    lots, _ = write_batch(folder, 5, seed=3, prefix="E")
    store = tmp_path / "lots.db"
    store.touch()
    result = run_cli(["ingest", folder, "--store", store])
    assert result.exit_code == 0, result.output
    assert lot_set(store) == lots


# --------------------------------------------------------------------------- models


def check_registry(models_dir: Path) -> tuple[str, list[dict]]:
    """The registry's promise after a kill; returns the latest id and the
    leftovers of interrupted saves."""
    index = json.loads((models_dir / registry.INDEX).read_text(encoding="utf-8"))  # always whole JSON
    rows = registry.list_models(models_dir)
    status = {r["model_id"]: r for r in rows}
    for mid in index["models"]:
        assert status[mid]["status"] == "ok", f"{mid} in the index but {status[mid]['status']}: {status[mid]}"
    expected = max(index["models"], key=lambda m: (str(index["models"][m].get("created_at", "")), m))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # resolve warns when it skips a newer broken model: there must be none
        assert registry.resolve(models_dir, "latest").name == expected
        assert registry.load(models_dir).model_id == expected
    leftovers = [r for r in rows if r["status"] in ("incomplete", "foreign")]
    assert not any(r["latest"] for r in leftovers)
    assert [r["model_id"] for r in rows if r["latest"]] == [expected]
    return expected, leftovers


@pytest.fixture(scope="module")
def model_forker(tmp_path_factory):
    f = Forker(tmp_path_factory.mktemp("model-forker"), MODEL_MODULES)
    yield f
    f.close()


def test_sigkill_train(tmp_path, counts, small_chain_toml, model_forker):
    """`linkage train` killed 12 times: the registry never resolves a
    half-written model as latest, and a finished train is always whole."""
    rng = np.random.default_rng(SEED + 2)
    folder = tmp_path / "lots"
    write_batch(folder, 5, seed=5, prefix="T")  # the fewest lots train accepts: the quickest real train
    store, models = tmp_path / "lots.db", tmp_path / "models"
    assert run_cli(["ingest", folder, "--store", store]).exit_code == 0
    chain = tmp_path / "chain.toml"
    chain.write_text(small_chain_toml)
    args = ["train", "--store", store, "--models-dir", models, "--chain", chain]
    f = model_forker
    registry_lock = ("FLOCK", "WRITE", "0")  # registry.save holds an flock on .registry.lock while it writes
    res = f.run(args, watch=True, lock=registry_lock)
    assert res["code"] == 0, (f.workdir / "child.log").read_text()
    estimate = {"start": res["elapsed"], "lock": res["write_lock_span"][1] - res["write_lock_span"][0] + 0.002}
    latest, _ = check_registry(models)
    survived = in_save = attempts = 0
    block: list[tuple[str, float]] = []
    while survived < N_TRAIN_KILLS:
        attempts += 1
        assert attempts <= 4 * N_TRAIN_KILLS, "the trains keep finishing before the kill"
        if not block:
            # in blocks of four: two at a fraction of the run after its start (mostly inside the training),
            # two at a fraction of the save after the child takes the registry lock (stratified, shuffled)
            block = [("start", t) for t in kill_fractions(rng, 2, [(1.0, 0.05, 0.95)])]
            block += [("lock", t) for t in kill_fractions(rng, 2, [(1.0, 0.0, 0.95)])]
            rng.shuffle(block)
        after, fraction = block.pop()
        delay = fraction * estimate[after]
        known = set(json.loads((models / registry.INDEX).read_text())["models"])
        res = f.run(args, kill_after=delay if after == "start" else None, lock=registry_lock, watch=True,
                    kill_after_lock=delay if after == "lock" else None)
        new_latest, _ = check_registry(models)
        added = set(json.loads((models / registry.INDEX).read_text())["models"]) - known
        assert len(added) <= 1
        assert new_latest == (added.pop() if added else latest)
        latest = new_latest
        if res["killed"]:
            survived += 1
            in_save += any(lk[0] == "FLOCK" for lk in res["locks"] or [])
        else:  # it finished first: it must have succeeded; learn its timing
            assert res["code"] == 0, (f.workdir / "child.log").read_text()
            estimate["start"] = res["elapsed"]
            if res["write_lock_span"]:
                estimate["lock"] = res["write_lock_span"][1] - res["write_lock_span"][0] + 0.002
    counts["train kills survived"] += survived
    counts["  of which inside registry.save"] += in_save
    assert survived == N_TRAIN_KILLS
    assert in_save >= 2, f"only {in_save} kills fell inside registry.save"


_SAVE_LOOP = """
import datetime, joblib
from linkage.models.registry import save
chain = joblib.load(ARGS[0])
while True:  # saves as fast as it can, until it is killed
    chain.created_at = datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="microseconds")
    save(chain, ARGS[1])
"""


def test_sigkill_registry_save(tmp_path, counts, trained_small, model_forker):
    """A process saving models back to back, killed 25 times: wherever the
    kill lands, the index stays whole, every indexed model verifies, and
    `latest` is the newest complete one."""
    rng = np.random.default_rng(SEED + 3)
    artifact, models = tmp_path / "chain.joblib", tmp_path / "models"
    joblib.dump(trained_small, artifact)  # our own object, for the child to save
    registry.save(trained_small, models)
    f = model_forker
    leftovers_seen: set[str] = set()
    check_registry(models)
    for _ in range(N_SAVE_KILLS):
        res = f.run([artifact, models], kill_after=float(rng.uniform(0.15, 0.5)), code=_SAVE_LOOP)
        assert res["killed"], (f.workdir / "child.log").read_text()
        _, leftovers = check_registry(models)
        leftovers_seen |= {r["model_id"] for r in leftovers}
    trained_small.created_at = datetime.now(timezone.utc).isoformat(timespec="microseconds")  # a newer train
    with time_limit(30, "a save after the kills"):  # the registry lock was not left held
        mid = registry.save(trained_small, models)
    assert check_registry(models)[0] == mid
    counts["registry save kills survived"] += N_SAVE_KILLS
    counts["  half-written models left behind (never resolved)"] += len(leftovers_seen)


def _in_threads(jobs) -> None:
    """Run callables in threads; re-raise the first failure here."""
    errors: list[BaseException] = []

    def wrap(job):
        try:
            job()
        except BaseException as exc:  # reported in the main thread below
            errors.append(exc)

    threads = [threading.Thread(target=wrap, args=(j,)) for j in jobs]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    if errors:
        raise errors[0]
