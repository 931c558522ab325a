"""A lot store whose anchor file is missing (a user test): the newest audit entry and its seal deleted behind
linkage's back, then ``<store>.seal`` removed. Before, verify said everything matched (with a caution), and the
next write, even a no-op ingest, wrote a new anchor silently; after that nothing showed the gap. Now every command
that writes refuses such a store (exit code 6, nothing written, no anchor made), every command that only reads
says so in one caution line, and ``verify --reanchor --reason`` anchors it again on the record.

These are regression tests of a refusal and of the record it leaves: they need no outside source. The seal chain
they look at is the hash chain of Haber & Stornetta (1991, J. Cryptology 3:99-111), read here with plain sqlite3.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
from contextlib import closing
from pathlib import Path

import pytest

from linkage import seal
from linkage.exceptions import StoreIntegrityError
from linkage.read import read_folder
from linkage.store import LotStore, current_user

from .helpers import dump, run_cli, write_batch

DATA = Path(__file__).resolve().parents[1] / "data"
EXAMPLE = DATA / "template-example"
CAUTION = "caution, store: no anchor file "


def _newest_seal(path: Path) -> tuple[int, str]:
    with closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True)) as con:
        return con.execute("SELECT id, sha256 FROM seals ORDER BY id DESC LIMIT 1").fetchone()


def _remove_newest_entry_and_anchor(path: Path) -> None:
    """The user's edit: the newest audit entry and its seal deleted (the append-only triggers dropped and made
    again), then the anchor file removed."""
    con = sqlite3.connect(path)
    triggers = con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'trigger'").fetchall()
    for name, _ in triggers:
        con.execute(f"DROP TRIGGER {name}")
    newest = con.execute("SELECT id FROM audit ORDER BY id DESC LIMIT 1").fetchone()[0]
    assert con.execute("SELECT kind, ref_id FROM seals ORDER BY id DESC LIMIT 1").fetchone() == ("audit", newest)
    con.execute("DELETE FROM seals WHERE id = (SELECT MAX(id) FROM seals)")
    con.execute("DELETE FROM audit WHERE id = ?", (newest,))
    for _, sql in triggers:
        con.execute(sql)
    con.commit()
    con.close()
    seal.anchor_path(path).unlink()


@pytest.fixture()
def store(tmp_path) -> Path:
    path = tmp_path / "site.db"
    with LotStore(path) as s:
        s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))
        s.log("train", model_id="m-1", inputs={"lots": 4}, outputs={"ok": True})
        s.log("predict", lot="EX-001", model_id="m-1", inputs={"roll_gap_mm": 2.0}, outputs={"p": 0.9})
    return path


@pytest.fixture()
def unanchored(store) -> Path:
    _remove_newest_entry_and_anchor(store)
    return store


def _refused(result, store: Path, before: dict) -> None:
    """Exit code 6, a message naming the store, the missing anchor file, what it means and the way on; nothing
    written (every table as it was), and no anchor file made."""
    assert result.exit_code == 6, result.output
    err = result.stderr
    for words in (f"lot store {store}", f"anchor file {seal.anchor_path(store)} is missing",
                  "removal of the newest records cannot be ruled out", "--reanchor --reason", "Nothing was written"):
        assert words in err, (words, err)
    assert CAUTION not in err  # the error says it; no caution line beside it
    assert dump(store) == before
    assert not seal.anchor_path(store).exists()


def test_the_users_no_op_ingest_is_refused_and_makes_no_anchor(unanchored):
    before = dump(unanchored)
    verify = run_cli(["verify", "--store", unanchored])
    assert verify.exit_code == 0 and f"{CAUTION}{seal.anchor_path(unanchored)}" in verify.stderr  # as before
    _refused(run_cli(["ingest", EXAMPLE, "--store", unanchored]), unanchored, before)
    again = run_cli(["verify", "--store", unanchored])  # still says so: nothing re-anchored it
    assert again.exit_code == 0 and CAUTION in again.stderr and "(see the caution above)" in again.stdout


def test_every_write_of_the_library_is_refused_and_nothing_written(unanchored):
    before = dump(unanchored)
    with pytest.warns(UserWarning, match="no anchor file"), LotStore(unanchored, create=False) as s:
        assert s.unanchored == dict(zip(("id", "sha256"), _newest_seal(unanchored)))
        for write in (lambda: s.log("train", model_id="m-2"),
                      lambda: s.record_prediction("m-2", {"roll_gap_mm": 2.0}, {"p": 0.5}),
                      lambda: s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))):
            with pytest.raises(StoreIntegrityError, match="anchor file .* is missing"):
                write()
    with pytest.raises(StoreIntegrityError, match="cannot be ruled out"):
        LotStore(unanchored, create=False, for_writing=True)
    assert dump(unanchored) == before and not seal.anchor_path(unanchored).exists()


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """A small model (16 synthetic lots, the mean and PLS candidates) and its spec, to run the commands that
    record at the end of their work."""
    from linkage.assemble import assemble
    from linkage.models import registry
    from linkage.models.train import train_chain
    from linkage.synthetic import WINDOW_SPEC, make_lots, spec_toml

    folder = tmp_path_factory.mktemp("trained")
    chain = train_chain(assemble(make_lots(16, seed=3).tables), seed=0, candidates=["mean", "pls"],
                        n_bootstrap=10)
    registry.save(chain, folder / "models")
    spec = folder / "spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    return folder / "models", spec


def test_every_command_that_records_is_refused_before_its_work(unanchored, trained, tmp_path):
    """predict, window, plan, watch, train, retrain, running and transfer write their record at the end: each is
    refused first, and writes neither its files (the sheet, the plan) nor a model."""
    models, spec = trained
    before, registry_before = dump(unanchored), sorted(p.name for p in models.iterdir())
    given = ["--store", unanchored, "--models-dir", models]
    sheet, planned = tmp_path / "sheet.html", tmp_path / "plan"
    samples = tmp_path / "samples.csv"  # at-line ribbon samples of a running lot (read only after the refusal)
    samples.write_text("lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\nEX-009,1,1.0,1.5\n",
                       encoding="utf-8")
    commands = [["predict", *given, "--set", "roll_force_kn_per_cm=8", "--spec", spec, "--html", sheet],
                ["predict", *given, "--set", "roll_force_kn_per_cm=8", "--lot", "EX-001"],
                ["window", *given, "--spec", spec],
                ["plan", "--lots", "2", *given, "--spec", spec, "--out", planned],
                ["watch", *given],
                ["train", "--store", unanchored, "--models-dir", tmp_path / "new-models"],
                ["retrain", *given],
                ["running", samples, *given, "--window", "0.25:0.35"],
                ["transfer", "--store", unanchored, "--roll-diameter-mm", "250", "--roll-width-mm", "50",
                 "--gap-mm", "2", "--porosity", "0.3"]]
    for args in commands:
        _refused(run_cli(args), unanchored, before)
    assert not sheet.exists() and not planned.exists() and not (tmp_path / "new-models").exists()
    assert sorted(p.name for p in models.iterdir()) == registry_before


def test_predict_and_window_without_recording_only_read_the_store(unanchored, trained, tmp_path):
    """``--no-record`` writes nothing in the store, so a store without its anchor does not refuse it: the
    command runs, and says the caution where it reads the store (the stored spelling of ``--lot``)."""
    models, spec = trained
    before = dump(unanchored)
    given = ["--store", unanchored, "--models-dir", models, "--no-record"]
    predict = run_cli(["predict", *given, "--set", "roll_force_kn_per_cm=8", "--lot", "ex-001"])
    assert predict.exit_code == 0, predict.output
    assert [line for line in predict.stderr.splitlines() if line.startswith("caution, store:")] != []
    window = run_cli(["window", *given, "--spec", spec])
    assert window.exit_code == 0, window.output
    assert dump(unanchored) == before and not seal.anchor_path(unanchored).exists()


def test_commands_that_only_read_say_so_in_one_caution_line(unanchored):
    verify = run_cli(["verify", "--store", unanchored])
    (said,) = [line.strip() for line in verify.stderr.splitlines() if CAUTION in line]
    for args in (["lots"], ["history", "EX-001"], ["audit"], ["assemble"]):
        result = run_cli([*args, "--store", unanchored])
        assert result.exit_code == 0, result.output
        assert result.stderr.splitlines() == [said], (args, result.stderr)  # verify's words, once


def test_reanchor_needs_a_reason_and_writes_nothing_without_one(unanchored):
    before = dump(unanchored)
    for args in (["--reanchor"], ["--reanchor", "--reason", "  "], ["--reason", "copied"]):
        result = run_cli(["verify", "--store", unanchored, *args])
        assert result.exit_code == 2 and "--reason" in result.stderr, result.output
    assert dump(unanchored) == before and not seal.anchor_path(unanchored).exists()


def test_reanchor_records_who_when_why_and_the_seal_checked_and_the_store_is_whole_again(unanchored):
    checked_id, checked_sha = _newest_seal(unanchored)
    result = run_cli(["verify", "--store", unanchored, "--reanchor", "--reason", "anchor lost; hash = batch record",
                      "--json"])
    assert result.exit_code == 0, result.output
    done = json.loads(result.stdout)["reanchored"]
    assert done["checked_seal"] == {"id": checked_id, "sha256": checked_sha}
    # the new anchor names the entry's own seal, which follows the seal checked in the chain
    anchor = json.loads(seal.anchor_path(unanchored).read_text(encoding="utf-8"))
    with closing(sqlite3.connect(f"file:{unanchored}?mode=ro", uri=True)) as con:
        kind, ref_id, prev, digest = con.execute("SELECT kind, ref_id, prev_sha256, sha256 FROM seals "
                                                 "WHERE id = ?", (anchor["seal_id"],)).fetchone()
    assert (kind, ref_id, prev, digest) == ("audit", done["audit_id"], checked_sha, anchor["sha256"])
    entries = json.loads(run_cli(["audit", "--store", unanchored, "--json"]).stdout)
    entry = entries[-1]
    assert entry["id"] == done["audit_id"] and entry["action"] == "reanchor" and entry["user"] == current_user()
    assert entry["inputs"]["reason"] == "anchor lost; hash = batch record"
    assert entry["inputs"]["anchor_file"] == str(seal.anchor_path(unanchored))
    assert entry["outputs"]["checked_seal"] == {"id": checked_id, "sha256": checked_sha}
    assert "reanchor" in run_cli(["audit", "--store", unanchored]).stdout
    verify = run_cli(["verify", "--store", unanchored])
    assert verify.exit_code == 0 and verify.stderr == "" and "(see the caution" not in verify.stdout
    assert run_cli(["lots", "--store", unanchored]).stderr == ""
    assert run_cli(["ingest", EXAMPLE, "--store", unanchored]).exit_code == 0  # written again


def test_reanchor_is_refused_for_a_store_that_fails_its_check(unanchored):
    """An audit entry edited behind linkage's back as well: the check fails, nothing is anchored."""
    con = sqlite3.connect(unanchored)
    triggers = con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'trigger' AND name LIKE 'audit%'")
    triggers = triggers.fetchall()
    for name, _ in triggers:
        con.execute(f"DROP TRIGGER {name}")
    con.execute("UPDATE audit SET user = 'someone else' WHERE id = 1")
    for _, sql in triggers:
        con.execute(sql)
    con.commit()
    con.close()
    before = dump(unanchored)
    result = run_cli(["verify", "--store", unanchored, "--reanchor", "--reason", "x"])
    assert result.exit_code == 6 and "changed after it was sealed" in result.stderr
    assert dump(unanchored) == before and not seal.anchor_path(unanchored).exists()


def test_reanchor_is_refused_where_the_anchor_file_is_there(store):
    before = dump(store)
    result = run_cli(["verify", "--store", store, "--reanchor", "--reason", "just in case"])
    assert result.exit_code == 2 and "nothing to anchor again" in result.stderr
    assert dump(store) == before


def test_a_new_store_and_a_store_without_seals_are_anchored_by_their_first_write(tmp_path):
    first = tmp_path / "first.db"
    assert run_cli(["ingest", EXAMPLE, "--store", first]).exit_code == 0
    anchor = json.loads(seal.anchor_path(first).read_text(encoding="utf-8"))
    assert (anchor["seal_id"], anchor["sha256"]) == _newest_seal(first)
    empty = tmp_path / "empty.db"
    LotStore(empty).close()  # created: tables, no seals
    seal.anchor_path(empty).unlink()
    result = run_cli(["ingest", EXAMPLE, "--store", empty])
    assert result.exit_code == 0 and result.stderr == "", result.output
    anchor = json.loads(seal.anchor_path(empty).read_text(encoding="utf-8"))
    assert (anchor["seal_id"], anchor["sha256"]) == _newest_seal(empty)


def test_a_schema_2_store_without_its_anchor_is_read_not_upgraded_nor_written(tmp_path):
    path = tmp_path / "old.db"
    shutil.copy(DATA / "store-v2.db", path)
    before = dump(path)
    result = run_cli(["lots", "--store", path])
    assert result.exit_code == 0 and CAUTION in result.stderr
    assert dump(path) == before  # an upgrade would have written a seal and an anchor
    folder = tmp_path / "more"
    write_batch(folder, 2, seed=5, prefix="NEW")
    _refused(run_cli(["ingest", folder, "--store", path]), path, before)


def test_a_successful_reanchor_drops_the_caution_of_the_check_before_it(unanchored):
    """The caution "no anchor file ..." was computed before the re-anchoring and still shown after it, with
    "(see the caution above)", in the text and in --json's ``store_cautions``. Regression test of the wording
    of a report: it needs no outside source."""
    text = run_cli(["verify", "--store", unanchored, "--reanchor", "--reason", "anchor lost in the copy"])
    assert text.exit_code == 0, text.output
    assert "Anchored again" in text.stdout and CAUTION not in text.stderr and "(see the caution" not in text.stdout
    seal.anchor_path(unanchored).unlink()  # lost again: the same through --json
    as_json = run_cli(["verify", "--store", unanchored, "--reanchor", "--reason", "lost again", "--json"])
    assert as_json.exit_code == 0, as_json.output
    found = json.loads(as_json.stdout)
    assert found["reanchored"] is not None and found["store_cautions"] == []


def test_the_library_what_if_is_refused_before_its_work(unanchored, trained, monkeypatch):
    """``api.whatif`` / ``api.whatif_rows`` computed the prediction and were refused only when the record was
    written (README and DEVELOPERS say predict is refused before its work, as ``window`` is). Regression test of
    a refusal: it needs no outside source."""
    import linkage.api as api
    import linkage.decide.whatif as whatif

    models, _ = trained
    before = dump(unanchored)
    worked = []

    def work(name):
        def done(*a, **kw):
            worked.append(name)
            raise AssertionError(f"{name}: the prediction was computed before the refusal")
        return done

    monkeypatch.setattr(whatif, "predict_whatif", work("predict_whatif"))
    monkeypatch.setattr(whatif, "predict_many", work("predict_many"))
    for call in (lambda: api.whatif({"roll_force_kn_per_cm": 8}, store=unanchored, models_dir=models),
                 lambda: api.whatif_rows([{"roll_force_kn_per_cm": 8}], store=unanchored, models_dir=models)):
        with pytest.raises(StoreIntegrityError, match="anchor file .* is missing"):
            call()
    assert worked == [] and dump(unanchored) == before and not seal.anchor_path(unanchored).exists()
