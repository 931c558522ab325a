"""``linkage ingest --preview``: what an ingest would do, with nothing written.

The preview runs the ingest's own decisions (``LotStore._plan``) in a read snapshot of a store opened for
reading only. What is checked here is that the preview agrees with the ingest that follows it on the same
folder (counts, lots, refusals, exit codes, the differences ``history`` then shows) and that it writes nothing
(every file beside the store hashed before and after). These are regression tests of the project's own
contract: the reference is the real ingest itself, so they need no outside source.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from pathlib import Path

import pytest

from linkage import api
from linkage.exceptions import InputError, StorePathError, UsageError
from linkage.store import PREVIEW_CHANGES, PREVIEW_LOTS, LotStore
from tests.reliability.helpers import run_cli
from tests.reliability.test_plausible import _history_and_new_lot, _set
from tests.test_store import folder
from tests.test_store_migration import DATA, _corrected, v2  # noqa: F401 (v2: a fixture)
from tests.test_store_stages import PROCESS, RIBBON, TABLETS


def _files(where: Path) -> dict[str, str]:
    """Every file in ``where`` (the store, its -wal and -shm while open, its anchor file), name -> SHA-256."""
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(where.iterdir()) if p.is_file()}


@pytest.fixture
def stored(tmp_path):
    """A store of lots A and B (process, ribbon), in a folder of its own."""
    (tmp_path / "db").mkdir()
    store = tmp_path / "db" / "lots.db"
    api.ingest(folder(tmp_path, "first", process=PROCESS, ribbon=RIBBON), store)
    return store


def _mixed(tmp_path: Path) -> Path:
    """A's ribbon gains a replicate (added to), B's roll force changes (changed), C is new, tablets for all."""
    process = PROCESS.replace("B,P1,10.0", "B,P1,10.4") + "C,P1,11.0,2.2,5,20,1.0\n"
    ribbon = RIBBON + "A,3,1.06,1.50,\nC,1,1.12,1.50,\n"
    return folder(tmp_path, "mixed", process=process, ribbon=ribbon, tablets=TABLETS + "C,11,88,83.0\n")


def test_the_preview_writes_nothing_and_says_what_the_ingest_then_does(tmp_path, stored):
    path = _mixed(tmp_path)
    before = _files(stored.parent)
    preview = api.ingest(path, stored, reason="DEV-7: roll force re-read", preview=True)
    assert _files(stored.parent) == before  # the store, its anchor file and the audit trail: byte for byte
    real = api.ingest(path, stored, reason="DEV-7: roll force re-read")
    p, r = preview.result, real.result
    assert p.preview and p.ingest_id is None and not r.preview and r.ingest_id == 2
    for key in ("lots_new", "lots_revised", "lots_unchanged", "lots_added_to", "lots_changed", "warnings",
                "accepted_unusual"):
        assert getattr(p, key) == getattr(r, key), key
    assert (p.lots_new, p.lots_added_to, p.lots_changed) == (["C"], ["A"], ["B"])
    with LotStore(stored, create=False) as s:  # each revised lot's differences, as its history now shows them
        for lot in p.lots_revised:
            assert p.changes[lot]["changes"] == s.history(lot)[-1]["changes"]
            assert p.changes[lot]["revision"] == ("changed" if lot in r.lots_changed else "added to")
    assert set(p.changes) == {"A", "B"} and p.more_lots == 0
    assert "roll_force_kn_per_cm 10 -> 10.4" in preview.text() and "Nothing was written" in preview.text()
    assert "preview" not in real.to_dict() or real.to_dict()["preview"] is False
    assert "changes" not in real.to_dict() and preview.to_dict()["preview"] is True


def test_the_cli_preview_gives_the_ingest_refusal_and_exit_code(tmp_path, stored):
    """Without --reason the change of B is refused by the preview as by the ingest: same message (the preview's
    last lines on stdout; stderr says it short, naming the lot), code 2."""
    path = _mixed(tmp_path)
    before = _files(stored.parent)
    preview = run_cli(["ingest", path, "--store", stored, "--preview"])
    assert _files(stored.parent) == before
    real = run_cli(["ingest", path, "--store", stored])
    assert preview.exit_code == real.exit_code == 2
    error = real.stderr[real.stderr.index("Error:"):].removeprefix("Error: ")
    assert f"The ingest would be refused: {error}" in preview.stdout
    assert "would be refused" in preview.stderr and "(B)" in preview.stderr and "Nothing was written" in preview.stderr
    assert _files(stored.parent) == before  # the refused ingest wrote nothing either
    given = run_cli(["ingest", path, "--store", stored, "--preview", "--reason", "DEV-7", "--json"])
    assert given.exit_code == 0, given.stderr
    out = json.loads(given.stdout)
    assert out["preview"] is True and out["ingest_id"] is None and out["lots_changed"] == ["B"]
    assert out["changes"]["B"]["changes"][0]["old"] == 10.0 and out["changes"]["B"]["changes"][0]["new"] == 10.4
    assert _files(stored.parent) == before
    assert run_cli(["ingest", path, "--store", stored, "--reason", "DEV-7"]).exit_code == 0


def test_bad_input_is_refused_alike_with_every_problem(tmp_path, stored):
    bad = folder(tmp_path, "bad", process=PROCESS.replace("9.0", "99.0").replace("2.5", "-1"), ribbon=RIBBON)
    before = _files(stored.parent)
    with pytest.raises(InputError) as previewed:
        api.ingest(bad, stored, preview=True)
    with pytest.raises(InputError) as ingested:
        api.ingest(bad, stored)
    assert str(previewed.value) == str(ingested.value) and len(previewed.value.problems) == 2
    assert _files(stored.parent) == before


def test_a_store_that_does_not_exist_is_not_created(tmp_path):
    where = tmp_path / "empty"
    where.mkdir()
    store = where / "new.db"
    preview = api.ingest(folder(tmp_path, "first", process=PROCESS, ribbon=RIBBON), store, preview=True)
    assert preview.result.lots_new == ["A", "B"] and not store.exists() and list(where.iterdir()) == []
    missing = run_cli(["ingest", tmp_path / "first", "--store", tmp_path / "nowhere" / "new.db", "--preview"])
    assert missing.exit_code == 2 and "does not exist" in missing.stderr
    assert not (tmp_path / "nowhere").exists()
    with pytest.raises(StorePathError):  # the first ingest's own refusal: a folder where the file would be
        api.ingest(tmp_path / "first", where, preview=True)
    # results without a process record in an empty store: refused by the preview as by the ingest
    with pytest.raises(InputError, match="process"):
        api.ingest(folder(tmp_path, "only", tablets=TABLETS), store, preview=True)
    assert list(where.iterdir()) == []


def test_an_empty_sqlite_file_is_previewed_as_a_first_ingest_and_left_as_it_is(tmp_path):
    """Regression: the preview of an ingest into an SQLite file without a table (what a killed first ingest, or
    another tool, leaves) was refused as "read-only here", though the ingest makes the store in it. Now it previews
    the first ingest, on an empty store of its own, and leaves the file and its folder byte for byte; the ingest
    then agrees. The reference is the real ingest: no outside source."""
    import sqlite3
    from contextlib import closing

    where = tmp_path / "db"
    where.mkdir()
    store = where / "e.db"
    with closing(sqlite3.connect(store)) as con:
        con.execute("PRAGMA journal_mode = WAL")
    before = _files(where)
    data = folder(tmp_path, "first", process=PROCESS, ribbon=RIBBON)
    preview = api.ingest(data, store, preview=True)
    assert preview.result.lots_new == ["A", "B"] and _files(where) == before
    assert api.ingest(data, store).result.lots_new == preview.result.lots_new


def test_a_store_without_its_anchor_is_refused_by_the_preview_as_by_the_ingest(tmp_path, stored):
    """Regression: the preview of a store whose anchor file was removed went through (exit 0, a caution) where
    the ingest is refused with exit code 6; a script pre-checking with the preview was told yes. Now the same
    refusal, message and exit code, with the line that nothing was written. A refusal of the project's own
    contract: no outside source needed."""
    stored.with_name(stored.name + ".seal").unlink()
    before = _files(stored.parent)
    path = folder(tmp_path, "more", tablets=TABLETS)
    preview = run_cli(["ingest", path, "--store", stored, "--preview", "--json"])
    assert _files(stored.parent) == before
    real = run_cli(["ingest", path, "--store", stored])
    assert preview.exit_code == real.exit_code == 6 and preview.stdout == ""
    error = real.stderr[real.stderr.index("Error:"):]
    assert "anchor" in error and error in preview.stderr
    assert "ingest would be refused as follows, with the same exit code; nothing was written" in preview.stderr
    assert _files(stored.parent) == before


def test_a_preview_keeps_its_cautions_key(tmp_path, stored):
    """The documented ``cautions`` key of a preview's JSON stays (empty for an anchored store)."""
    out = run_cli(["ingest", folder(tmp_path, "more", tablets=TABLETS), "--store", stored, "--preview", "--json"])
    assert out.exit_code == 0, out.stderr
    assert json.loads(out.stdout)["cautions"] == []


def _no_write(monkeypatch, *paths: Path) -> None:
    """This account may not write ``paths`` (as tests/reliability/test_tamper.py simulates a read-only file
    system through os.access: the tests may run as root, who may write anything)."""
    real_access = os.access
    denied = {p.resolve() for p in paths}

    def no_write(path, mode, *args, **kwargs):
        if mode & os.W_OK and Path(path).resolve() in denied:
            return False
        return real_access(path, mode, *args, **kwargs)

    monkeypatch.setattr(os, "access", no_write)


def test_a_store_this_account_cannot_write_is_refused_by_the_preview_as_by_the_ingest(tmp_path, stored,
                                                                                     monkeypatch):
    """Regression: the preview of a store the account cannot write went through (exit 0) where the ingest is
    refused with exit code 5. Now the same refusal; bad input is still reported first, as the ingest reports
    it. A refusal of the project's own contract: no outside source needed."""
    path = folder(tmp_path, "more", tablets=TABLETS)
    bad = folder(tmp_path, "bad", tablets=TABLETS.replace(",90,", ",-90,"))
    _no_write(monkeypatch, stored, stored.parent)
    before = _files(stored.parent)
    for given in (path, bad):
        preview = run_cli(["ingest", given, "--store", stored, "--preview"])
        real = run_cli(["ingest", given, "--store", stored])
        assert preview.exit_code == real.exit_code == (5 if given == path else 2), (given, preview.stderr)
        assert real.stderr[real.stderr.index("Error:"):] in preview.stderr
        assert "ingest would be refused as follows" in preview.stderr
        assert ("read-only here" in preview.stderr) == (given == path)
    assert _files(stored.parent) == before
    where = tmp_path / "locked"
    where.mkdir()
    _no_write(monkeypatch, stored, stored.parent, where)
    new = run_cli(["ingest", path.parent / "first", "--store", where / "new.db", "--preview"])
    assert new.exit_code == 5 and "cannot write in folder" in new.stderr and list(where.iterdir()) == []


def test_a_schema_1_store_is_previewed_on_an_upgraded_copy(tmp_path, monkeypatch):
    """Regression: the preview of a schema 1 store (before seals, tests/data/store-v1.db) was refused (exit code
    5, "read-only here: open it once with write access") where the ingest upgrades the store and decides
    (here: exit 2, the change needs --reason). Now the preview decides on an upgraded copy in a temporary folder,
    removed after, as the ingest would, and the store stays byte for byte, with no file added beside it. The
    reference is the real ingest on a copy of the same store: no outside source needed."""
    (tmp_path / "db").mkdir()
    store = tmp_path / "db" / "old.db"
    shutil.copy(DATA / "store-v1.db", store)
    twin = tmp_path / "twin.db"
    shutil.copy(DATA / "store-v1.db", twin)
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))  # where the preview's copy goes, to see it removed
    fix = _corrected(tmp_path / "fix", lot="EX-002", change=2.0)
    before = _files(store.parent)
    preview = run_cli(["ingest", fix, "--store", store, "--preview"])
    real = run_cli(["ingest", fix, "--store", twin])
    assert preview.exit_code == real.exit_code == 2, preview.stderr
    # the preview's last lines say the refusal (the ingest's next line: the caution that the store was not upgraded)
    error = real.stderr[real.stderr.index("Error:"):].splitlines()[0].removeprefix("Error: ") + "\n"
    assert f"The ingest would be refused: {error}" in preview.stdout and "--reason" in preview.stderr
    given = api.ingest(fix, store, reason="deviation D-2", preview=True)
    assert _files(store.parent) == before and list(scratch.iterdir()) == []
    done = api.ingest(fix, twin, reason="deviation D-2")
    for key in ("lots_new", "lots_revised", "lots_unchanged", "lots_added_to", "lots_changed", "warnings"):
        assert getattr(given.result, key) == getattr(done.result, key), key
    with LotStore(twin, create=False) as s:
        assert given.result.changes["EX-002"]["changes"] == s.history("EX-002")[-1]["changes"]
    assert [c["column"] for c in given.result.changes["EX-002"]["changes"]] == ["dissolution_pct"]


def test_a_schema_1_store_this_account_cannot_write_is_refused_alike(tmp_path, monkeypatch):
    """A schema 1 store the account cannot write: the ingest can neither upgrade nor write it (exit code 5); the
    preview makes no copy and gives that refusal, as the ingest's. No outside source needed (a refusal)."""
    (tmp_path / "db").mkdir()
    store = tmp_path / "db" / "old.db"
    shutil.copy(DATA / "store-v1.db", store)
    fix = _corrected(tmp_path / "fix", lot="EX-002", change=2.0)
    _no_write(monkeypatch, store, store.parent)
    before = _files(store.parent)
    preview = run_cli(["ingest", fix, "--store", store, "--preview", "--reason", "deviation D-2"])
    real = run_cli(["ingest", fix, "--store", store, "--reason", "deviation D-2"])
    assert preview.exit_code == real.exit_code == 5
    error = real.stderr[real.stderr.index("Error:"):]
    assert "earlier linkage" in error and error in preview.stderr and "would be refused" in preview.stderr
    assert _files(store.parent) == before


def test_a_store_that_cannot_be_read_is_not_told_as_a_refusal_of_the_ingest(tmp_path, stored):
    """Regression: every failure of a preview was introduced as "the ingest would be refused as follows, with
    the same exit code", also a store the preview could not open. Now only the ingest's own refusals are; a
    failure to read the store says so. No outside source needed (the CLI's own wording)."""
    path = folder(tmp_path, "more", tablets=TABLETS)
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"not a store at all, " * 10)
    failed = run_cli(["ingest", path, "--store", junk, "--preview"])
    assert failed.exit_code == 2 and "not a SQLite file" in failed.stderr
    assert "would be refused" not in failed.stderr and "could not be read" in failed.stderr
    assert "nothing was written" in failed.stderr
    refused = run_cli(["ingest", folder(tmp_path, "bad", tablets=TABLETS.replace(",90,", ",-90,")), "--store",
                       stored, "--preview"])
    assert refused.exit_code == 2 and "would be refused" in refused.stderr


def test_a_terminal_shows_the_refusal_for_want_of_a_reason_once(tmp_path, stored):
    """Regression of the command line's output (no outside source; the reference is the preview's own refusal,
    ``needs_reason``): the preview of a folder that needs --reason printed the refusal's full text twice on a
    terminal, which shows stdout and stderr together: as the report's last lines, then as the error. Now stdout
    keeps the whole preview (the refusal's full text in it, for a script) and stderr says it short, naming the lots
    and where the full text is, with exit code 2; the Python API still raises the full refusal."""
    path = _mixed(tmp_path)
    before = _files(stored.parent)
    full = json.loads(run_cli(["ingest", path, "--store", stored, "--preview", "--json"]).stdout)["needs_reason"]
    with pytest.raises(UsageError) as refused:
        api.ingest(path, stored, preview=True)
    assert str(refused.value) == full and "B process: roll_force_kn_per_cm 10 -> 10.4" in full
    for as_json in (False, True):
        run = run_cli(["ingest", path, "--store", stored, "--preview", *(["--json"] if as_json else [])])
        assert run.exit_code == 2
        if as_json:  # the refusal's full text once: in the JSON on stdout
            assert json.loads(run.stdout)["needs_reason"] == full
        else:  # a terminal shows both streams
            assert (run.stdout + run.stderr).count(full) == 1, run.stdout + run.stderr
        assert full not in run.stderr and run.stderr.count("Error:") == 1
        error = " ".join(run.stderr.split())
        assert "would be refused" in error and "1 lot(s) (B)" in error and "--reason TEXT" in error, error
        assert ("needs_reason" in error) == as_json and "Nothing was written" in error
        if not as_json:
            assert f"The ingest would be refused: {full}" in run.stdout  # the whole preview, the refusal in it
            assert run.stdout.rstrip().endswith("with --reason TEXT ingests the folder.")
    assert _files(stored.parent) == before


def test_unusual_values_preview_as_they_ingest(tmp_path):
    """A dissolution written as a fraction (0.85 for 85 %): refused by the preview as by the ingest; taken with
    --accept-unusual --reason, listed by the preview as the ingest then records it in the audit trail."""
    _, new, store = _history_and_new_lot(tmp_path, _set("tablets", "dissolution_pct", lambda v: f"{v / 100:.4f}"))
    before = store.read_bytes(), store.with_name("s.db.seal").read_bytes()
    refused = run_cli(["ingest", new, "--store", store, "--preview"])
    assert refused.exit_code == 2 and "hundred times too small" in refused.stderr
    no_reason = run_cli(["ingest", new, "--store", store, "--preview", "--accept-unusual"])
    assert no_reason.exit_code == 2 and "--reason" in no_reason.stderr
    taken = run_cli(["ingest", new, "--store", store, "--preview", "--accept-unusual", "--reason", "DEV-9"])
    assert taken.exit_code == 0, taken.stderr
    assert "Unusual values taken deliberately (1)" in taken.stdout and "dissolution_pct" in taken.stdout
    assert (store.read_bytes(), store.with_name("s.db.seal").read_bytes()) == before
    real = api.ingest(new, store, accept_unusual=True, reason="DEV-9")
    preview = api.ingest(new.parent / "history", store, preview=True)  # every lot now as stored
    assert not preview.result.changed and "Nothing would change" in preview.text()
    with LotStore(store, create=False) as s:
        recorded = [a for a in s.audit() if a["action"] == "ingest"][-1]["inputs"]["accepted_unusual"]
    assert recorded == real.result.accepted_unusual
    assert [r["lot"] for r in recorded] == ["H-031"]


def test_the_listing_is_capped_and_says_how_many_more(tmp_path):
    """25 lots of 12 ribbon replicates each, every density then re-measured: 20 lots listed, 10 changes each."""
    n_lots, n_rep = PREVIEW_LOTS + 5, PREVIEW_CHANGES + 2
    lots = [f"L{k:02d}" for k in range(n_lots)]
    process = "lot,product,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm\n" + \
        "".join(f"{lot},P1,9.0,2.0,5,20,1.0\n" for lot in lots)
    head = "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n"
    ribbon = head + "".join(f"{lot},{j},1.05,1.50\n" for lot in lots for j in range(1, n_rep + 1))
    store = tmp_path / "s.db"
    api.ingest(folder(tmp_path, "first", process=process, ribbon=ribbon), store)
    preview = api.ingest(folder(tmp_path, "again", ribbon=ribbon.replace(",1.05,", ",1.08,")), store,
                         reason="DEV-3", preview=True)
    r = preview.result
    assert len(r.lots_changed) == n_lots and list(r.changes) == lots[:PREVIEW_LOTS] and r.more_lots == 5
    assert all(len(c["changes"]) == PREVIEW_CHANGES and c["more"] == 2 for c in r.changes.values())
    assert "... and 2 more change(s)" in preview.text() and "... and 5 more revised lot(s)" in preview.text()


def test_accept_unusual_without_a_reason_is_refused_before_the_store_is_read(tmp_path):
    with pytest.raises(UsageError, match="--reason"):
        api.ingest(tmp_path, tmp_path / "none.db", accept_unusual=True, preview=True)
    assert not (tmp_path / "none.db").exists()


def test_a_schema_2_store_is_previewed_without_its_upgrade(v2, tmp_path):
    """The preview reads an earlier store as it is (the ingest upgrades it first, then decides alike)."""
    fix = _corrected(tmp_path / "twice", lot="EX-002", change=2.0)
    before = _files(v2.parent)
    preview = api.ingest(fix, v2, reason="deviation D-2", preview=True)
    assert _files(v2.parent) == before
    real = api.ingest(fix, v2, reason="deviation D-2")
    assert (preview.result.lots_changed, preview.result.lots_unchanged) == (real.result.lots_changed,
                                                                            real.result.lots_unchanged)
    [change] = preview.result.changes["EX-002"]["changes"]
    assert (change["column"], change["old"], change["new"]) == ("dissolution_pct", 75.7, 77.7)


def test_a_preview_that_needs_a_reason_still_shows_its_whole_report(tmp_path, stored):
    """A regression test of the preview's output (no outside source; the reference is the preview given --reason):
    without --reason the preview still prints every change (text) and its JSON (``needs_reason`` set), then the
    ingest's refusal, exit code 2. Before, it printed the refusal only, and --json left stdout empty."""
    path = _mixed(tmp_path)
    before = _files(stored.parent)
    given = json.loads(run_cli(["ingest", path, "--store", stored, "--preview", "--reason", "DEV-7",
                                "--json"]).stdout)
    bare = run_cli(["ingest", path, "--store", stored, "--preview", "--json"])
    assert bare.exit_code == 2 and "--reason" in bare.stderr and "would be refused" in bare.stderr
    out = json.loads(bare.stdout)
    assert out["needs_reason"] and "B" in out["needs_reason"] and given["needs_reason"] is None
    for key in ("lots_new", "lots_revised", "lots_added_to", "lots_changed", "changes", "more_lots"):
        assert out[key] == given[key], key
    text = run_cli(["ingest", path, "--store", stored, "--preview"])
    assert text.exit_code == 2
    assert "roll_force_kn_per_cm 10 -> 10.4" in text.stdout and "New lots (1): C" in text.stdout
    assert "The ingest would be refused" in text.stdout and "with --reason TEXT" in text.stdout
    with pytest.raises(UsageError) as refused:  # the API raises as before, the preview on the refusal
        api.ingest(path, stored, preview=True)
    assert refused.value.preview.result.lots_changed == ["B"]
    assert _files(stored.parent) == before
