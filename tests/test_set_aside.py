"""Setting a stored lot aside, with a reason, on the record (``linkage set-aside`` / ``linkage restore``).

A GMP lab may exclude data only by a recorded, justified, reversible decision, and nothing may be deleted. The
refusals here (no reason, an unknown lot, a lot already set aside or not set aside, a store without its anchor file)
and the tamper checks are regression tests of the store's own rules: they need no outside source. Where a test
compares a table, the expected one is computed outside the store: the folder's files read by
:func:`linkage.read.read_folder`, the lot's rows dropped with pandas, and assembled as any table is. The seal chain
tampered with is the hash chain of Haber & Stornetta (1991, J. Cryptology 3:99-111), edited here with plain sqlite3.
"""

from __future__ import annotations

import html
import json
import shutil
import sqlite3
from contextlib import closing
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from linkage import CAUTION, api, seal
from linkage.assemble import assemble
from linkage.cli.main import cli
from linkage.exceptions import UsageError
from linkage.read import read_folder
from linkage.store import LotStore, current_user

DATA = Path(__file__).resolve().parent / "data"
EXAMPLE = DATA / "template-example"
REASON = "DEV-2026-014: blend error, wrong excipient lot charged"


def _run(args: list) -> object:
    result = CliRunner().invoke(cli, [str(a) for a in args], env={"LINKAGE_STORE": None}, catch_exceptions=True)
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise AssertionError(f"linkage {' '.join(map(str, args))} raised {result.exception!r}") from result.exception
    assert "Traceback" not in result.output, result.output
    return result


def _dump(path: Path) -> dict:
    """Every row of every table, and the anchor file's bytes, read with plain sqlite3."""
    with closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True)) as con:
        names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
        rows = {n: con.execute(f'SELECT rowid, * FROM "{n}" ORDER BY rowid').fetchall() for n in names}
    anchor = seal.anchor_path(path)
    return {**rows, "(anchor)": anchor.read_bytes() if anchor.exists() else None}


@pytest.fixture()
def store(tmp_path) -> Path:
    path = tmp_path / "site.db"
    api.ingest(EXAMPLE, path)
    return path


def _expected_without(lot: str | None) -> pd.DataFrame:
    """The example folder assembled, without ``lot``'s rows (dropped with pandas)."""
    tables = read_folder(EXAMPLE).tables
    if lot is not None:
        tables = {t: df[df["lot"] != lot].reset_index(drop=True) for t, df in tables.items()}
    return assemble(tables)


def test_set_aside_leaves_the_lot_out_of_assemble_and_says_so_and_restore_brings_it_back(store):
    before = api.assemble(store)
    pd.testing.assert_frame_equal(before, _expected_without(None), check_exact=True)
    result = _run(["set-aside", "ex-002", "--reason", REASON, "--store", store])  # found under any spelling
    assert result.exit_code == 0, result.output
    assert "Set aside 1 lot(s)" in result.stdout and "EX-002" in result.stdout and REASON in result.stdout
    aside = api.assemble(store)
    pd.testing.assert_frame_equal(aside, _expected_without("EX-002"), check_exact=True)
    assert aside.attrs["set_aside_lots"] == ["EX-002"]
    said = _run(["assemble", "--store", store])
    assert said.exit_code == 0 and "Assembled 3 lots" in said.stdout
    assert "1 lot set aside in the store is left out: EX-002" in said.stdout and "'linkage lots'" in said.stdout
    back = _run(["restore", "EX-002", "--reason", "DEV-2026-014 closed: not confirmed", "--store", store, "--json"])
    assert back.exit_code == 0, back.output
    assert json.loads(back.stdout)["set_aside_lots"] == [] and json.loads(back.stdout)["lots"] == ["EX-002"]
    again = api.assemble(store)
    pd.testing.assert_frame_equal(again, before, check_exact=True)  # the identical table
    assert again.attrs["set_aside_lots"] == []


def test_the_rows_stay_in_the_store_unchanged(store):
    with closing(sqlite3.connect(store)) as con:
        kept = {t: con.execute(f"SELECT * FROM {t} ORDER BY rowid").fetchall()
                for t in ("lots", "lot_tables", "row_blocks", "revisions", "revision_tables", "ingests")}
    api.set_aside(["EX-001", "EX-003"], store, reason=REASON)
    with closing(sqlite3.connect(store)) as con:
        assert {t: con.execute(f"SELECT * FROM {t} ORDER BY rowid").fetchall() for t in kept} == kept
    with LotStore(store, create=False) as s:
        every = s.current_tables(include_set_aside=True)
        assert sorted(every["process"]["lot"]) == ["EX-001", "EX-002", "EX-003", "EX-004"]
        assert list(s.current_tables().set_aside) == ["EX-001", "EX-003"]


@pytest.mark.parametrize("reason", [None, "", "   "])
def test_a_reason_is_required_and_nothing_is_written_without_one(store, reason):
    before = _dump(store)
    for command in ("set-aside", "restore"):
        args = [command, "EX-001", "--store", store] + ([] if reason is None else ["--reason", reason])
        result = _run(args)
        assert result.exit_code == 2 and "--reason TEXT" in result.stderr and "Nothing was written" in result.stderr
    assert _dump(store) == before


def test_unknown_lots_are_all_named_and_nothing_is_written(store):
    before = _dump(store)
    result = _run(["set-aside", "EX-001", "EX-02", "NOPE-9", "--reason", REASON, "--store", store])
    assert result.exit_code == 2, result.output
    err = result.stderr
    assert "2 lot(s) not in the store" in err and "'EX-02'" in err and "'NOPE-9'" in err
    assert "did you mean" in err and "Nothing was written" in err
    assert _dump(store) == before  # EX-001, known, was not set aside either


def test_setting_aside_twice_or_restoring_a_lot_in_use_is_refused_and_writes_nothing(store):
    api.set_aside("EX-001", store, reason=REASON)
    before = _dump(store)
    twice = _run(["set-aside", "EX-001", "EX-002", "--reason", REASON, "--store", store])
    assert twice.exit_code == 2 and "already set aside" in twice.stderr and "EX-001" in twice.stderr
    in_use = _run(["restore", "EX-002", "--reason", "x", "--store", store])
    assert in_use.exit_code == 2 and "not set aside" in in_use.stderr and "EX-002" in in_use.stderr
    assert _dump(store) == before


def test_a_store_without_its_anchor_file_is_refused_exit_6_and_nothing_written(store):
    seal.anchor_path(store).unlink()
    before = _dump(store)
    for command in ("set-aside", "restore"):
        result = _run([command, "EX-001", "--reason", REASON, "--store", store])
        assert result.exit_code == 6, result.output
        assert "anchor file" in result.stderr and "Nothing was written" in result.stderr
    assert _dump(store) == before and not seal.anchor_path(store).exists()


def test_a_missing_store_is_refused_and_not_created(tmp_path):
    path = tmp_path / "typo.db"
    result = _run(["set-aside", "EX-001", "--reason", REASON, "--store", path])
    assert result.exit_code == 2 and "no lot store" in result.stderr
    assert not path.exists()


def _edit(path: Path, sql: str, params: tuple = ()) -> None:
    """An edit behind linkage's back: the append-only triggers dropped, the statement run, the triggers made
    again."""
    con = sqlite3.connect(path)
    triggers = con.execute("SELECT name, sql FROM sqlite_master WHERE type = 'trigger'").fetchall()
    for name, _ in triggers:
        con.execute(f"DROP TRIGGER {name}")
    con.execute(sql, params)
    for _, text in triggers:
        con.execute(text)
    con.commit()
    con.close()


@pytest.mark.parametrize("edit", ["reason changed", "decision removed", "newest decision removed"])
def test_verify_finds_a_decision_edited_or_removed(store, edit):
    api.set_aside("EX-001", store, reason=REASON)
    api.restore("EX-001", store, reason="closed")
    assert _run(["verify", "--store", store]).exit_code == 0
    with closing(sqlite3.connect(store)) as con:
        first, newest = [r[0] for r in con.execute("SELECT id FROM audit WHERE action IN ('set-aside', 'restore') "
                                                    "ORDER BY id")]
    if edit == "reason changed":  # the decision made to look justified otherwise
        _edit(store, "UPDATE audit SET inputs_json = ? WHERE id = ?", (json.dumps({"reason": "routine"}), first))
    elif edit == "decision removed":  # the restore hidden: the lot would look in use without a record
        _edit(store, "DELETE FROM audit WHERE id = ?", (first,))
    else:
        _edit(store, "DELETE FROM audit WHERE id = ?", (newest,))
    result = _run(["verify", "--store", store])
    assert result.exit_code == 6, result.output
    assert "The record is NOT whole" in result.stdout
    said = {"reason changed": f"audit record {first} was changed", "decision removed": f"audit record {first} was "
            "removed", "newest decision removed": f"audit record {newest} was removed"}[edit]
    assert said in result.stderr
    assert _run(["lots", "--store", store]).exit_code == 6  # every command checks the audit entries on opening


def test_lots_history_and_audit_show_the_decisions(store):
    api.set_aside(["EX-003"], store, reason=REASON)
    api.restore(["EX-003"], store, reason="closed: not confirmed")
    api.set_aside(["EX-003"], store, reason="confirmed after all")
    lots = _run(["lots", "--store", store])
    assert lots.exit_code == 0
    header, *rows = lots.stdout.splitlines()[:5]
    assert header.split()[-1] == "state"
    assert [r.split()[0] for r in rows if r.rstrip().endswith("set aside")] == ["EX-003"]
    assert [r.split()[0] for r in rows if r.rstrip().endswith("in use")] == ["EX-001", "EX-002", "EX-004"]
    assert "EX-003: confirmed after all" in lots.stdout and "1 of them set aside" in lots.stdout
    records = {r["lot"]: r for r in json.loads(_run(["lots", "--store", store, "--json"]).stdout)}
    assert records["EX-003"]["state"] == "set aside" and records["EX-003"]["set_aside_reason"] == "confirmed after all"
    assert records["EX-001"]["state"] == "in use" and records["EX-001"]["set_aside_reason"] is None
    history = _run(["history", "ex-003", "--store", store])
    text = history.stdout
    at = [text.index(w) for w in (REASON, "closed: not confirmed", "confirmed after all")]
    assert history.exit_code == 0 and at == sorted(at)  # in time order
    assert text.count("Set aside: audit entry") == 2 and text.count("Restored (back in use)") == 1
    assert f"by {current_user()}" in text
    events = json.loads(_run(["history", "EX-003", "--store", store, "--json"]).stdout)[-1]["set_aside_events"]
    assert [(e["action"], e["reason"], e["user"]) for e in events] == [
        ("set-aside", REASON, current_user()), ("restore", "closed: not confirmed", current_user()),
        ("set-aside", "confirmed after all", current_user())]
    audit = _run(["audit", "--store", store, "--lot", "EX-003"])
    assert audit.exit_code == 0
    lines = [line for line in audit.stdout.splitlines() if " set-aside " in line or " restore " in line]
    assert len(lines) == 3 and lines[0].rstrip().endswith(REASON) and "back in use" in lines[1]
    entries = json.loads(_run(["audit", "--store", store, "--json"]).stdout)
    assert [e["action"] for e in entries[-3:]] == ["set-aside", "restore", "set-aside"]


def test_a_lot_revised_while_set_aside_stays_set_aside_and_ingest_says_so(store, tmp_path):
    api.set_aside("EX-001", store, reason=REASON)
    fix = tmp_path / "fix"
    shutil.copytree(EXAMPLE, fix)
    tablets = fix / "tablets.csv"
    header, *rows = tablets.read_text(encoding="utf-8").splitlines()
    column = header.split(",").index("breaking_force_n")
    changed = []
    for r in rows:
        cells = r.split(",")
        if cells[0] == "EX-001":
            cells[column] = str(float(cells[column]) + 5)
        changed.append(",".join(cells))
    tablets.write_text("\n".join([header, *changed]) + "\n", encoding="utf-8")
    preview = api.ingest(fix, store, reason="breaking force re-measured", preview=True)  # nothing written
    assert preview.to_dict()["lots_set_aside"] == ["EX-001"] and preview.to_dict()["lots_revised"] == ["EX-001"]
    result = _run(["ingest", fix, "--store", store, "--reason", "breaking force re-measured"])
    assert result.exit_code == 0, result.output
    assert "Set aside, and they stay so (1): EX-001" in result.stdout
    as_json = _run(["ingest", fix, "--store", store, "--json"])
    assert json.loads(as_json.stdout)["lots_set_aside"] == ["EX-001"]
    with LotStore(store, create=False) as s:
        assert list(s.set_aside_lots()) == ["EX-001"] and s.history("EX-001")[-1]["revision"] == 2
    assert "EX-001" not in set(api.assemble(store)["lot"])


@pytest.mark.parametrize("fixture", ["store-v2.db", "store-v1.db"])
def test_a_store_written_by_an_earlier_version_takes_a_set_aside(tmp_path, fixture):
    """Stores written before this change (schema 2 with its anchor, tests/data/make_store_v2.py; schema 1,
    before seals): the decisions are audit entries, which every version's store holds, so no new table."""
    path = tmp_path / "old.db"
    shutil.copy(DATA / fixture, path)
    if fixture == "store-v2.db":
        shutil.copy(DATA / "store-v2.db.seal", seal.anchor_path(path))
    before = api.assemble(path)
    result = _run(["set-aside", "EX-004", "--reason", REASON, "--store", path])
    assert result.exit_code == 0, result.output
    after = api.assemble(path)
    expected = before[before["lot"] != "EX-004"].reset_index(drop=True)
    pd.testing.assert_frame_equal(after, expected, check_exact=True)
    assert _run(["verify", "--store", path]).exit_code == 0
    assert _run(["restore", "EX-004", "--reason", "x", "--store", path]).exit_code == 0
    pd.testing.assert_frame_equal(api.assemble(path), before, check_exact=True)


def test_a_store_made_by_the_code_before_this_change_reads_and_writes(store):
    """The store fixture is written by ingest alone, as main's code wrote it (no set-aside entries): it reads with
    every lot in use, then takes decisions."""
    with LotStore(store, create=False) as s:
        assert s.set_aside_lots() == {} and set(s.lots()["state"]) == {"in use"}
    api.set_aside("EX-002", store, reason=REASON)
    assert _run(["verify", "--store", store]).exit_code == 0


@pytest.fixture(scope="module")
def trained_lab(tmp_path_factory):
    """Twelve synthetic lots (linkage.synthetic.make_lots, seed 3) ingested, and a model trained on all of them."""
    from linkage.synthetic import make_lots

    folder = tmp_path_factory.mktemp("lab")
    lots = make_lots(12, seed=3)
    lots.write_csv(folder / "lots")
    store, models = folder / "lab.db", folder / "models"
    api.ingest(folder / "lots", store)
    trained = api.train(store, models, seed=0, materials=False)
    return store, models, trained, sorted(lots.tables["process"]["lot"])


@pytest.mark.slow
def test_a_train_after_setting_aside_does_not_use_the_lot_and_the_watch_names_it(trained_lab, tmp_path):
    store, models, first, lots = trained_lab
    path = tmp_path / "lab.db"  # a copy: the module's store stays as trained
    shutil.copy(store, path)
    shutil.copy(seal.anchor_path(store), seal.anchor_path(path))
    lot = lots[4]
    assert lot in first.chain.training["lots"] and first.chain.training["set_aside_lots"] == []
    api.set_aside(lot, path, reason=REASON)
    watched = _run(["watch", "--store", path, "--models-dir", models, "--json"])
    assert watched.exit_code == 0, watched.output
    d = json.loads(watched.stdout)
    assert d["set_aside_lots"] == [lot] and d["set_aside_in_training"] == [lot]
    text = _run(["watch", "--store", path, "--models-dir", models]).stdout
    assert f"1 lot set aside in the store is not watched: {lot}" in text
    assert f"was in the training set of model {first.model_id}: {lot}" in text
    second = _run(["train", "--store", path, "--models-dir", tmp_path / "models", "--no-materials", "--json"])
    assert second.exit_code == 0, second.output
    assert json.loads(second.stdout)["set_aside_lots"] == [lot]
    assert f"1 lot set aside in the store is left out of its training set: {lot}" in second.stderr
    meta = json.loads(next((tmp_path / "models").glob("m-*/metadata.json")).read_text(encoding="utf-8"))
    assert sorted(meta["training"]["lots"]) == sorted(x for x in lots if x != lot)
    assert meta["training"]["set_aside_lots"] == [lot]
    entry = api.audit(path).iloc[-1]
    assert entry["action"] == "train" and entry["inputs"]["set_aside_lots"] == [lot]
    assert lot not in entry["inputs"]["lots"]


@pytest.fixture(scope="module")
def aside_lab(trained_lab, tmp_path_factory):
    """A copy of the trained lab (store and registry) with one training lot set aside after the model was trained."""
    store, models, first, lots = trained_lab
    folder = tmp_path_factory.mktemp("aside")
    path = folder / "lab.db"
    shutil.copy(store, path)
    shutil.copy(seal.anchor_path(store), seal.anchor_path(path))
    shutil.copytree(models, folder / "models")
    lot = lots[7]
    api.set_aside(lot, path, reason=REASON)
    return path, folder / "models", first, lot, folder


@pytest.mark.slow
def test_retrain_fits_the_challenger_without_the_lot_and_says_the_champion_was_fitted_on_it(aside_lab):
    path, models, first, lot, _ = aside_lab
    result = _run(["retrain", "--store", path, "--models-dir", models, "--json"])
    assert result.exit_code == 0, result.output
    d = json.loads(result.stdout)
    assert d["set_aside_lots"] == [lot] and d["set_aside_in_training"] == [lot]
    assert any(f"was in the training set of model {first.model_id}: {lot}" in n for n in d["notes"])
    meta = json.loads((models / d["challenger_id"] / "metadata.json").read_text(encoding="utf-8"))
    assert lot not in meta["training"]["lots"] and meta["training"]["set_aside_lots"] == [lot]


@pytest.mark.slow
def test_report_transfer_and_plan_leave_the_lot_out_and_say_so(aside_lab):
    from linkage.synthetic import WINDOW_SPEC, spec_toml

    path, models, first, lot, folder = aside_lab
    moved = api.transfer(path, roll_diameter_mm=250, roll_width_mm=50, roll_gap_mm=2.0, porosity=0.3)
    assert moved.to_dict()["set_aside_lots"] == [lot] and f"left out of the fit: {lot}" in moved.text()
    in_use = api.assemble(path)
    assert lot not in set(in_use["lot"])
    assert moved.physics.n_lots + moved.physics.n_dropped == len(in_use)  # fitted on the lots in use alone
    spec = folder / "spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    planned = _run(["plan", "--lots", "2", "--store", path, "--models-dir", models, "--model", first.model_id,
                    "--spec", spec, "--json"])
    assert planned.exit_code == 0, planned.output
    d = json.loads(planned.stdout)
    assert d["set_aside_lots"] == [lot] and any(f"plan starts from: {lot}" in n for n in d["notes"])
    out = api.report(folder / "report.html", store=path, models_dir=models, model=first.model_id)
    html = out.read_text(encoding="utf-8")
    assert f"1 lot set aside in the store is left out of this report: {lot}" in html
    assert f"was in the training set of model {first.model_id}: {lot}" in html and REASON in html
    assert f"set aside since training ({lot}): not in this report" in html  # the domain section's count
    assert "so not counted among the training lots below" in html


def test_a_store_whose_every_lot_is_set_aside_is_refused_by_assemble_naming_them(store):
    api.set_aside(["EX-001", "EX-002", "EX-003", "EX-004"], store, reason=REASON)
    result = _run(["assemble", "--store", store])
    assert result.exit_code == 2, result.output
    assert "every lot in the store" in result.stderr and "is set aside" in result.stderr
    assert "EX-001, EX-002, EX-003, EX-004" in result.stderr and "'linkage lots'" in result.stderr


@pytest.mark.parametrize("action", ["set-aside", "restore", "reanchor", "ingest", " Set-Aside "])
def test_log_and_record_entry_refuse_the_store_decisions_and_write_nothing(store, action):
    """A set-aside, restore, re-anchoring or ingest written through ``LotStore.log`` / ``api.record_entry`` would
    bypass its rules (a reason, a stored lot, a checked store), for good in an append-only trail: refused, the
    command to use named, nothing written. A regression test of the store's own rules: it needs no outside
    source."""
    before = _dump(store)
    with LotStore(store, create=False) as s, pytest.raises(UsageError, match="recorded only by its command"):
        s.log(action, lot="EX-001", inputs={"reason": "forged"})
    with pytest.raises(UsageError, match="use linkage "):
        api.record_entry(store, action, model_id=None, lot="EX-001", inputs=["not", "a", "dict"], outputs=None)
    assert _dump(store) == before
    api.set_aside("EX-001", store, reason=REASON)  # the commands still write them
    api.restore("EX-001", store, reason="closed")
    with LotStore(store, create=False) as s:
        assert [e["action"] for e in s.audit()[-2:]] == ["set-aside", "restore"]


def test_an_odd_decision_entry_from_before_the_refusal_does_not_break_later_reads(store):
    """Entries that ``log`` wrote before it refused these actions (inputs not a JSON object, no lot) stay in the
    append-only trail: every later read still works (the reason is None). A regression test of the store's own
    rules: it needs no outside source."""
    with LotStore(store, create=False) as s:
        with s._write() as c:  # what LotStore.log wrote before it refused these actions
            s._log(c, "set-aside", "someone", "EX-002", None, ["not", "a", "dict"], None)
            s._log(c, "set-aside", "someone", None, None, "just text", None)
        assert s.set_aside_lots()["EX-002"]["reason"] is None
        assert [e["reason"] for e in s.set_aside_events("EX-002")] == [None]
        assert s.history("EX-002")[-1]["set_aside_events"][0]["action"] == "set-aside"
        assert list(s.current_tables().set_aside) == ["EX-002"]
    assert _run(["lots", "--store", store]).exit_code == 0
    assert _run(["history", "EX-002", "--store", store]).exit_code == 0
    assert "EX-002" not in set(api.assemble(store)["lot"])


def _folder(path: Path) -> dict:
    """The store's bytes and the names of the files beside it."""
    return {"store": path.read_bytes(), "files": sorted(p.name for p in path.parent.iterdir())}


@pytest.mark.parametrize("fixture", ["store-v1.db", "store-v2.db"])
def test_a_refused_decision_leaves_an_older_store_as_it_was(tmp_path, fixture):
    """A refusal (no reason, no lot, an unknown lot, a lot in use restored, a lot set aside twice) on a store of an
    earlier schema says "Nothing was written": the store's bytes and the folder's files (no upgrade, no anchor or
    lock file made) are as they were. A regression test of the store's own rules: it needs no outside source."""
    path = tmp_path / "old.db"
    shutil.copy(DATA / fixture, path)
    if fixture == "store-v2.db":
        shutil.copy(DATA / "store-v2.db.seal", seal.anchor_path(path))
    before = _folder(path)
    refusals = [["set-aside", "EX-004", "--reason", " "], ["set-aside", "", "--reason", REASON],
                ["set-aside", "NOPE-9", "--reason", REASON], ["restore", "EX-004", "--reason", REASON]]
    for args in refusals:
        result = _run([*args, "--store", path])
        assert result.exit_code == 2 and "Nothing was written" in result.stderr, (args, result.output)
        assert _folder(path) == before, args
    assert _run(["set-aside", "EX-004", "--reason", REASON, "--store", path]).exit_code == 0  # upgrades, writes
    written = _folder(path)
    twice = _run(["set-aside", "EX-004", "--reason", REASON, "--store", path])
    assert twice.exit_code == 2 and "already set aside" in twice.stderr
    assert _folder(path) == written


@pytest.mark.slow
def test_a_set_aside_training_lot_revised_after_training_is_named_once_not_as_revised(trained_lab, tmp_path,
                                                                                       monkeypatch):
    """A training lot revised after the model was trained, then set aside: watch and retrain name it as set aside
    (and in the training set), not among the training lots revised after training, whose words speak of the lots
    they use. The rule of the commands' scope (which lots they read): no outside source; the challenger is fitted
    with two candidates and 20 bootstrap replicates to keep the test quick (what is tested is its notes)."""
    from functools import partial

    from linkage.models import train as training

    store, models, first, lots = trained_lab
    path = tmp_path / "lab.db"
    shutil.copy(store, path)
    shutil.copy(seal.anchor_path(store), seal.anchor_path(path))
    shutil.copytree(models, tmp_path / "models")
    lot = lots[2]
    fix = tmp_path / "fix"
    shutil.copytree(store.parent / "lots", fix)
    tablets = pd.read_csv(fix / "tablets.csv")
    tablets.loc[tablets["lot"] == lot, "breaking_force_n"] += 5.0
    tablets.to_csv(fix / "tablets.csv", index=False)
    api.ingest(fix, path, reason="breaking force re-measured")
    watched = api.watch(store=path, models_dir=tmp_path / "models")
    assert [r["lot"] for r in watched.revised] == [lot]  # revised after training, in use: said so
    api.set_aside(lot, path, reason=REASON)
    watched = api.watch(store=path, models_dir=tmp_path / "models")
    assert watched.revised == [] and watched.to_dict()["set_aside_in_training"] == [lot]
    assert lot not in "\n".join(line for line in watched.text().splitlines() if "revised after" in line)
    monkeypatch.setattr(training, "train_chain", partial(training.train_chain, candidates=["mean", "linear_select"],
                                                        n_bootstrap=20))
    decided = api.retrain(path, tmp_path / "models").to_dict()
    assert decided["set_aside_in_training"] == [lot]
    assert not [n for n in decided["notes"] if "revised after it was trained" in n], decided["notes"]


def test_an_ambiguous_lot_id_of_an_older_store_is_said_ambiguous_naming_both(store, tmp_path, monkeypatch):
    """A store written before the one-spelling rule may hold 'EX-001' and 'ex-001' (made here by ingesting with
    the rule switched off, as the code before it ingested): 'Ex-001' is neither, and is refused as ambiguous with
    both spellings named, not as "not in the store"; the exact spelling is taken. A regression test of the store's
    own rules: it needs no outside source."""
    import linkage.read.folder as folder_module
    import linkage.store as store_module

    lower = tmp_path / "lower"
    shutil.copytree(EXAMPLE, lower)
    for path in lower.glob("*.csv"):
        path.write_text(path.read_text(encoding="utf-8").replace("EX-001", "ex-001"), encoding="utf-8")
    with monkeypatch.context() as m:
        m.setattr(store_module, "lot_key", str)
        m.setattr(folder_module, "lot_key", str)
        api.ingest(lower, store, reason="written before the one-spelling rule")
    before = _dump(store)
    result = _run(["set-aside", "Ex-001", "NOPE-9", "--reason", REASON, "--store", store])
    assert result.exit_code == 2, result.output
    err = " ".join(result.stderr.split())
    assert "1 lot id(s) ambiguous" in err and "'Ex-001' is 'EX-001' and 'ex-001'" in err, err
    assert "1 lot(s) not in the store" in err and "'NOPE-9'" in err and "'Ex-001' (did" not in err
    assert _dump(store) == before
    assert _run(["set-aside", "ex-001", "--reason", REASON, "--store", store]).exit_code == 0
    with LotStore(store, create=False) as s:
        assert list(s.set_aside_lots()) == ["ex-001"]


def test_the_set_aside_texts_name_the_first_twelve_lots_alike(tmp_path):
    """The commands' note, the training-set note and the set-aside result name a long list of lots the same way,
    by one helper: the first 12 ids and how many more. A regression test of the texts' own rule: it needs no
    outside source."""
    from linkage.results import SetAside
    from linkage.store import set_aside_note, set_aside_trained_note

    lots = [f"L{k:02d}" for k in range(1, 15)]
    said = "L01, L02, L03, L04, L05, L06, L07, L08, L09, L10, L11, L12 and 2 more"
    aside = {lot: {} for lot in lots}
    assert f": {said} (" in set_aside_note(aside)
    assert f": {said}; the model" in set_aside_trained_note(aside, lots, "m-1")[1]
    result = SetAside(action="set-aside", decisions=[{"lot": "L01", "audit_id": 1, "at": "t", "user": "u",
                                                      "reason": "r"}], store=tmp_path / "s.db", set_aside_now=lots)
    assert f"Lots set aside now: 14 ({said})" in result.text()
    assert set_aside_note({}) is None and set_aside_trained_note(aside, [], "m-1") == ([], None)


def test_every_problem_of_a_decision_is_named_in_one_refusal(store):
    """All errors at once (project rule; a regression test of the refusal, no outside source): an unknown lot, a
    lot in the wrong state and a missing reason are named together, exit code 2, nothing written. Before, only
    the first kind found was named and the next one appeared on the next run."""
    api.set_aside("EX-001", store, reason=REASON)
    before = _dump(store)
    restore = _run(["restore", "EX-999", "EX-003", "--reason", "x", "--store", store])
    assert restore.exit_code == 2 and "'EX-999'" in restore.stderr
    assert "EX-003 is not set aside" in restore.stderr, restore.stderr
    twice = _run(["set-aside", "EX-999", "EX-001", "--reason", REASON, "--store", store])
    assert twice.exit_code == 2 and "'EX-999'" in twice.stderr and "EX-001 is already set aside" in twice.stderr
    bare = _run(["set-aside", "EX-999", "EX-001", "--store", store])
    assert bare.exit_code == 2, bare.output
    for said in ("--reason TEXT", "'EX-999'", "EX-001 is already set aside", "3 problems", "Nothing was written"):
        assert said in bare.stderr, (said, bare.stderr)
    assert _dump(store) == before


def test_already_set_aside_names_the_lot_and_the_decision_in_force(store):
    """The refusal names the lot and its decision: when (UTC, to the second), by whom, why. Before it read
    "1 lot(s) already set aside (since EX-001: 2026-...T...+00:00)". A regression test of a message, no outside
    source: the expected time is the stored one converted with the standard library."""
    from datetime import timezone, datetime

    api.set_aside("EX-001", store, reason=REASON)
    with LotStore(store, create=False) as s:
        decision = s.set_aside_lots()["EX-001"]
    at = datetime.fromisoformat(decision["at"]).astimezone(timezone.utc).strftime("%Y-%m-%d %H:%M:%S")
    result = _run(["set-aside", "ex-001", "--reason", REASON, "--store", store])
    assert result.exit_code == 2
    expected = f"EX-001 is already set aside (since {at} UTC, by {decision['user']}: {REASON})"
    assert expected in " ".join(result.stderr.split()), result.stderr


@pytest.mark.slow
def test_retrain_says_the_challenger_has_fewer_lots_and_what_replaces_the_model(aside_lab, tmp_path):
    """A regression test of the retrain's notes (no outside source). With no new lot but a training lot set aside,
    the challenger is fitted on one lot fewer (said so, not "the same data"), and the rule cannot promote it without
    new lots to judge it by: the note points to 'retrain --force' and 'train'. After a forced promotion the old
    champion's note is in the past tense: it is no longer the model in service, and the note of the fewer lots says the
    promotion was forced in this run instead of pointing to '--force'."""
    path, models, first, lot, _ = aside_lab
    d = json.loads(_run(["retrain", "--store", path, "--models-dir", models, "--json"]).stdout)
    assert d["new_lots"] == [] and not d["promoted"]
    notes = " ".join(d["notes"])
    assert "the challenger sees the same data" not in notes
    assert f"less the 1 set aside since ({lot}): 1 lot fewer" in notes, notes
    assert "'linkage retrain --force --reason TEXT' or 'linkage train' replaces the model now" in notes
    copy, store = tmp_path / "models", tmp_path / "lab.db"  # copies: the module's lab keeps its champion
    shutil.copytree(models, copy)
    shutil.copy(path, store)
    shutil.copy(seal.anchor_path(path), seal.anchor_path(store))
    forced = _run(["retrain", "--store", store, "--models-dir", copy, "--force", "--reason", "blend error", "--json"])
    d = json.loads(forced.stdout)
    assert d["promoted"] and d["set_aside_in_training"] == [lot]
    notes = " ".join(d["notes"])
    assert f"model {first.model_id}, the champion until this retrain: {lot}" in notes, notes
    assert "the challenger promoted now was fitted without it" in notes and "replaces the model now" not in notes
    # the forced run says the rule alone would not promote, and that --force did: no hint to give --force again
    assert "so the rule does not promote it (promoted by --force in this run)" in notes, notes
    assert "'--force --reason TEXT' does" not in notes


@pytest.mark.slow
def test_a_lot_restored_after_training_is_said_to_be_restored_not_new(trained_lab, tmp_path):
    """A regression test of the watch's and the retrain's notes (no outside source): a lot set aside when the model
    was trained and restored since is among the lots since training (the model never saw it), and the commands say
    why (a note, and ``restored_since_training`` in the JSON) instead of counting it as new without a word; the report
    says why in 'At a glance' and in its table of lots a model left out."""
    store, _, _, lots = trained_lab
    path, models = tmp_path / "lab.db", tmp_path / "models"
    shutil.copy(store, path)
    shutil.copy(seal.anchor_path(store), seal.anchor_path(path))
    lot = lots[2]
    api.set_aside(lot, path, reason=REASON)
    assert _run(["train", "--store", path, "--models-dir", models, "--no-materials"]).exit_code == 0
    api.restore(lot, path, reason="DEV-2026-014 closed: not confirmed")
    watched = json.loads(_run(["watch", "--store", path, "--models-dir", models, "--json"]).stdout)
    assert watched["new_lots"] == [lot] and watched["restored_since_training"] == [lot]
    assert any(f"set aside when model {watched['model_id']} was trained and has been restored since: {lot}" in n
               for n in watched["notes"]), watched["notes"]
    decided = json.loads(_run(["retrain", "--store", path, "--models-dir", models, "--json"]).stdout)
    assert decided["new_lots"] == [lot] and decided["restored_since_training"] == [lot]
    assert any("restored since" in n for n in decided["notes"])
    # the report says it too: 'At a glance' gives the reason of the extra lot, and the table of lots a model left
    # out names it as set aside when the model was trained, not as added or changed later
    from linkage.models import registry
    from linkage.report.html import _exclusions, _glance_restored

    chain, table = registry.load(models, watched["model_id"]), api.assemble(path)
    assert _glance_restored(chain, table["lot"]) == (f"1 lot of the table ({lot}) was set aside when the model was "
                                                     "trained and has been restored since: the model was fitted "
                                                     "without it")
    left_out = html.unescape(_exclusions(chain, table))
    assert "set aside when the model was trained, restored since" in left_out and "added or changed" not in left_out


@pytest.mark.parametrize("command", ["assemble", "train", "watch", "retrain", "report", "plan", "transfer", "running"])
def test_the_help_of_each_command_that_fits_or_judges_lots_says_set_aside_lots_are_left_out(command):
    """A regression test of the help texts (no outside source): each command that leaves set-aside lots out says so."""
    result = _run([command, "--help"])
    assert result.exit_code == 0
    assert "Lots set aside ('linkage set-aside') are left out, and named." in " ".join(result.stdout.split())


def test_restore_help_says_which_spellings_find_a_lot_and_no_more(store):
    """A regression test of the help text (no outside source): set-aside and restore say a lot is found under a
    spelling differing only in letter case and dash characters, not 'any spelling' — 'EX004', 'EX 004' and 'EX_004'
    are refused as lots the store does not hold, while 'ex‐004' (a Unicode hyphen) is the stored EX-004."""
    for command in ("set-aside", "restore"):
        text = " ".join(_run([command, "--help"]).stdout.split())
        assert "differs only in letter case and dash characters (‐ – — and the like)" in text, text
        assert "any spelling" not in text
    for other in ("EX004", "EX 004", "EX_004"):
        assert _run(["set-aside", other, "--reason", REASON, "--store", store]).exit_code == 2
    assert _run(["set-aside", "ex\u2010004", "--reason", REASON, "--store", store]).exit_code == 0


@pytest.mark.parametrize("reason", ["", "   "])
def test_a_blank_reason_is_said_to_be_empty_not_missing(store, reason):
    """A regression test of the refusal (no outside source): '--reason ""' was given, so the refusal says the reason
    given is empty; without --reason it says only to give one."""
    given = _run(["set-aside", "EX-001", "--reason", reason, "--store", store])
    assert given.exit_code == 2 and "the reason given is empty; give --reason TEXT to say why" in given.stderr
    missing = _run(["restore", "EX-001", "--store", store])
    assert missing.exit_code == 2 and "give --reason TEXT" in missing.stderr and "empty" not in missing.stderr


def test_many_entries_are_shown_as_runs_and_a_multiline_reason_stays_on_one_table_line(store):
    """Regression tests of the texts (no outside source): the audit entries of a decision on many lots are shown as a
    run ('5–8'), not one by one; a reason with line breaks is shown on one line in the 'lots' and 'audit' tables
    and in 'history LOT' ('⏎' for each break) and stored unchanged."""
    reason = "DEV-2026-014: blend error\nwrong excipient lot charged"
    made = _run(["set-aside", "EX-001", "EX-002", "EX-003", "EX-004", "--reason", reason, "--store", store, "--json"])
    ids = [d["audit_id"] for d in json.loads(made.stdout)["decisions"]]
    assert ids == list(range(ids[0], ids[0] + 4))
    api.restore(["EX-001", "EX-002", "EX-003", "EX-004"], store, reason="closed")
    again = _run(["set-aside", "EX-001", "EX-002", "EX-003", "EX-004", "--reason", reason, "--store", store])
    first = ids[-1] + 5  # the four restores, then these four
    assert f"(entries {first}–{first + 3})" in again.stdout, again.stdout
    joined = "DEV-2026-014: blend error ⏎ wrong excipient lot charged"
    for command in ("lots", "audit", "history EX-001"):  # history: each decision's reason line, on one line too
        text = _run([*command.split(), "--store", store]).stdout
        assert joined in text, text
        assert not any(line.startswith("wrong excipient") for line in text.splitlines())
    with LotStore(store, create=False) as s:
        assert s.set_aside_lots()["EX-001"]["reason"] == reason


def test_an_invisible_character_is_shown_escaped_once(store):
    """A regression test of the refusal (no outside source): the zero-width space is shown as \\u200b, the backslash
    once, not doubled by repr."""
    result = _run(["set-aside", "EX-001\u200b", "--reason", REASON, "--store", store])
    assert result.exit_code == 2
    assert "lot 'EX-001\\u200b'" in result.stderr and "\\\\u200b" not in result.stderr, result.stderr


@pytest.mark.slow
def test_a_whatif_for_a_set_aside_lot_says_the_watch_will_not_compare_it(aside_lab, tmp_path):
    """A regression test of the what-if's note (no outside source): 'predict --lot' on a set-aside lot is recorded as
    before, and says the lot is set aside and that the watch leaves it out, on the terminal and on its --html sheet."""
    path, models, _, lot, _ = aside_lab
    store = tmp_path / "lab.db"  # a copy: the what-if is recorded
    shutil.copy(path, store)
    shutil.copy(seal.anchor_path(path), seal.anchor_path(store))
    sheet = tmp_path / "s.html"
    result = _run(["predict", "--lot", lot.lower(), "--store", store, "--models-dir", models, "--set",
                   "ribbon_porosity=0.3", "--html", sheet])
    assert result.exit_code == 0, result.output
    text = " ".join(result.stdout.split())
    assert f"Note: lot {lot} is set aside (since" in text and "'linkage watch' leaves the lot out" in text
    assert "this what-if is recorded for it" in text
    # the sheet says it too (the what-if page takes no lot, so it has nothing to say of one)
    page = html.unescape(sheet.read_text(encoding="utf-8"))
    assert f"<b>Lot set aside.</b> Lot {lot} is set aside (since" in page and "leaves the lot out" in page
    d = json.loads(_run(["predict", "--lot", lot, "--store", store, "--models-dir", models, "--set",
                         "ribbon_porosity=0.3", "--json"]).stdout)
    assert d["lot_set_aside"] is True and lot in d["lot_set_aside_note"]


@pytest.mark.slow
def test_the_window_of_a_model_fitted_on_a_lot_now_set_aside_says_so(aside_lab):
    """``window`` reads the model, not the store's lots, but says which of its training lots the store now holds
    set aside, as ``watch`` does (text and ``--json`` ``set_aside_in_training``); with no store, nothing. A
    regression test of a label: no outside source."""
    from linkage.synthetic import WINDOW_SPEC, spec_toml

    path, models, first, lot, folder = aside_lab
    spec = folder / "window-spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    args = ["window", "--store", path, "--models-dir", models, "--model", first.model_id, "--spec", spec,
            "--draws", "200", "--no-record"]
    d = json.loads(_run([*args, "--json"]).stdout)
    assert d["set_aside_in_training"] == [lot]
    text = _run(args).stdout
    assert f"Note: 1 lot now set aside was in the training set of model {first.model_id}: {lot}" in text
    assert text.rstrip().endswith(CAUTION)  # the note comes before the caution, as in every text
    alone = api.window(spec, store=None, models_dir=models, model=first.model_id, n_draws=200)
    assert alone.to_dict(curve=False)["set_aside_in_training"] == [] and "set aside" not in alone.text()


@pytest.mark.slow
def test_the_map_of_a_model_fitted_on_a_lot_now_set_aside_says_so_as_the_window_does(aside_lab):
    """``space`` reads the model's numbers alone; it now also reads the store (never writing it) and says which of
    the model's training lots the store holds set aside, in the window's words (text, before the caution, and
    ``--json`` ``set_aside_in_training``). The map itself is the same with or without the store; with no store,
    nothing is said, and a store named that does not exist is said not read. A regression test of a label: no
    outside source."""
    from linkage.decide.space import space_text
    from linkage.synthetic import WINDOW_SPEC, spec_toml

    path, models, first, lot, folder = aside_lab
    spec = folder / "space-spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    before = _dump(path)
    args = ["space", "--store", path, "--models-dir", models, "--model", first.model_id, "--spec", spec,
            "--grid", "5"]
    said = _run([*args, "--json"])
    d = json.loads(said.stdout)
    assert d["set_aside_in_training"] == [lot]
    window = api.window(spec, store=path, models_dir=models, model=first.model_id, n_draws=200, record=False)
    text = _run(args).stdout
    assert f"Note: {window.set_aside_note}." in text and f"model {first.model_id}: {lot}" in text
    assert text.rstrip().endswith(CAUTION) and text.index("Note: 1 lot now set aside") < text.index(CAUTION)
    alone = api.space(spec, store=None, models_dir=models, model=first.model_id, n_grid=5)
    assert alone.to_dict()["set_aside_in_training"] == [] and "set aside" not in space_text(alone)
    assert {k: v for k, v in d.items() if k != "set_aside_in_training"} == \
        {k: v for k, v in json.loads(json.dumps(alone.to_dict())).items() if k != "set_aside_in_training"}
    missing = _run([*args[:2], folder / "no-such.db", *args[3:]])
    assert missing.exit_code == 0 and "set aside" not in missing.stdout
    assert f"no lot store at {folder / 'no-such.db'}" in missing.stderr and not (folder / "no-such.db").exists()
    assert _dump(path) == before  # read, never written


@pytest.mark.slow
def test_space_and_the_unrecorded_window_refuse_a_tampered_store_and_say_when_a_store_could_not_be_read(aside_lab,
                                                                                                         tmp_path):
    """Regression: ``space --store`` and ``window --no-record --store`` exited 0 and said nothing when the store
    failed its integrity check (every other command that reads it exits 6) or was not a lot store: the lookup of
    the training lots set aside swallowed every error. Now a tampered store is refused, exit code 6, as ``lots``
    refuses it; a file that is not a lot store, and a store named that does not exist, are said on stderr, with
    the training lots set aside not looked for, by both commands in the same words. A regression test of refusals
    and notes: no outside source."""
    from linkage.synthetic import WINDOW_SPEC, spec_toml

    path, models, first, lot, folder = aside_lab
    spec = tmp_path / "spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    tampered = tmp_path / "tampered.db"
    shutil.copy(path, tampered)
    shutil.copy(seal.anchor_path(path), seal.anchor_path(tampered))
    with closing(sqlite3.connect(tampered)) as con:
        decision = con.execute("SELECT id FROM audit WHERE action = 'set-aside' ORDER BY id").fetchone()[0]
    _edit(tampered, "UPDATE audit SET inputs_json = ? WHERE id = ?", (json.dumps({"reason": "routine"}), decision))
    other = tmp_path / "other.db"
    with closing(sqlite3.connect(other)) as con:
        con.execute("CREATE TABLE results (a)")
        con.commit()
    missing = tmp_path / "no-such.db"
    commands = {"space": ["space", "--grid", "5"], "window": ["window", "--draws", "200", "--no-record"]}
    for name, head in commands.items():
        args = [*head, "--models-dir", models, "--model", first.model_id, "--spec", spec, "--store"]
        assert _run(["lots", "--store", tampered]).exit_code == 6
        refused = _run([*args, tampered])
        assert refused.exit_code == 6 and f"audit record {decision} was changed" in refused.stderr, name
        unread = _run([*args, other])
        assert unread.exit_code == 0, unread.output
        assert (f"Note: the lot store {other} could not be read ({other} is an SQLite file but not a linkage lot "
                "store (tables: results)); the model's training lots now set aside were not looked for."
                in unread.stderr), (name, unread.stderr)
        absent = _run([*args, missing])
        assert absent.exit_code == 0 and (f"Note: no lot store at {missing}; the model's training lots now set "
                                          "aside were not looked for." in absent.stderr), (name, absent.stderr)
        assert not missing.exists()
        read = _run([*args, path])
        assert "could not be read" not in read.stderr and "not looked for" not in read.stderr
