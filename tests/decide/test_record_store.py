"""Where `window` and `predict` record, and `--no-record`.

A store the user names (``--store``, or ``$LINKAGE_STORE`` set non-empty) that does not exist is refused, exit
code 2, nothing written: a mistyped ``--store nope.db`` used to run and say only on stderr that the what-if was
not recorded, losing its audit record. ``--no-record`` (Python ``record=False``) runs without writing anything in
the store, which is still read for the stored spelling of ``--lot``. Without a named store, a missing default
``linkage.db`` is noted on stderr and nothing is recorded, as before.

Regression tests of a refusal and of the store's own record: a behaviour of this project, no outside source
needed.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage import api
from linkage.cli.common import STORE_ENV
from linkage.cli.main import cli
from linkage.exceptions import StorePathError
from linkage.store import LotStore

TEMPLATE_EXAMPLE = Path(__file__).resolve().parents[1] / "data" / "template-example"
WHATIF = ("--set", "roll_force_kn_per_cm=9")


@pytest.fixture
def run(saved_model, monkeypatch):
    """The command line with the scenario's registry, ``$LINKAGE_STORE`` unset."""
    models_dir, _, _ = saved_model
    monkeypatch.delenv(STORE_ENV, raising=False)

    def _run(*args):
        return CliRunner().invoke(cli, [*map(str, args), "--models-dir", str(models_dir)], catch_exceptions=False)

    return _run


@pytest.fixture
def lot_store(tmp_path):
    """A lot store holding the template example's lots (EX-001 ...)."""
    store = tmp_path / "lots.db"
    api.ingest(TEMPLATE_EXAMPLE, store=store)
    return store


def _record_of(store: Path) -> tuple[int, int, dict]:
    """The store's audit entries, recorded predictions, and newest seal."""
    with LotStore(store, create=False) as s:
        return len(s.audit()), len(s.predictions()), s.check_seals()["newest seal"]


def _kept_results(saved_model) -> list[str]:
    """The results `window` keeps beside the model (written before it records)."""
    models_dir, model_id, _ = saved_model
    folder = models_dir / model_id / "results"
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


def test_a_named_store_that_does_not_exist_is_refused_and_nothing_written(run, saved_model, tmp_path):
    _, _, spec_path = saved_model
    missing = tmp_path / "nope.db"
    kept = _kept_results(saved_model)
    for args in (["predict", *WHATIF, "--spec", spec_path, "--json"],
                 ["predict", *WHATIF, "--html", tmp_path / "sheet.html", "--page", tmp_path / "page.html"],
                 ["predict", "--from-csv", _rows(tmp_path), "--json"],
                 ["window", "--spec", spec_path, "--set", "roll_gap_mm=2.5", "--draws", 300]):
        r = run(*args, "--store", missing)
        assert r.exit_code == 2, (args, r.output)
        assert f"no lot store at {missing}" in r.stderr, r.stderr
        assert "--no-record" in r.stderr and "nothing was written" in r.stderr
        assert r.stdout == ""
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rows.csv"]  # no store, no sheet, no page
    assert _kept_results(saved_model) == kept  # the window kept nothing beside the model either


def test_a_named_store_that_is_a_folder_is_refused_before_the_work(run, saved_model, tmp_path):
    """A store named that is a folder: the command line refuses it as an option value (click's path check), and
    the Python call, which was refused only when recording after the window had been computed and kept beside the
    model, is now refused before any work, nothing written."""
    models_dir, model_id, spec_path = saved_model
    folder = tmp_path / "lots.db"
    folder.mkdir()
    kept = _kept_results(saved_model)
    r = run("window", "--spec", spec_path, "--draws", 300, "--store", folder)
    assert r.exit_code == 2 and "is a directory" in r.stderr, r.output
    for call in (lambda: api.window(spec_path, store=folder, models_dir=models_dir, model=model_id, n_draws=300),
                 lambda: api.whatif({"roll_force_kn_per_cm": 9.0}, store=folder, models_dir=models_dir,
                                     model=model_id)):
        with pytest.raises(StorePathError, match="is a folder, not a lot store file"):
            call()
    assert list(folder.iterdir()) == []
    assert _kept_results(saved_model) == kept  # the window kept nothing beside the model


def test_a_store_named_by_the_variable_is_refused_as_one_named_by_the_option(run, saved_model, tmp_path, monkeypatch):
    _, _, spec_path = saved_model
    missing = tmp_path / "typo.db"
    monkeypatch.setenv(STORE_ENV, str(missing))
    for args in (["predict", *WHATIF], ["window", "--spec", spec_path, "--draws", 300]):
        r = run(*args)
        assert r.exit_code == 2, (args, r.output)
        assert f"no lot store at {missing}" in r.stderr
    assert not missing.exists()
    r = run("predict", *WHATIF, "--no-record", "--json")
    assert r.exit_code == 0, r.output
    assert "Note: --no-record: this predict was not recorded in an audit trail." in r.stderr
    assert not missing.exists()


def test_no_record_writes_nothing_in_an_existing_store_and_still_reads_it(run, saved_model, lot_store, tmp_path):
    _, _, spec_path = saved_model
    before = _record_of(lot_store)
    r = run("predict", *WHATIF, "--lot", "ex-001", "--spec", spec_path, "--store", lot_store, "--no-record",
            "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["lot"] == "EX-001"  # the stored spelling, read from the store
    assert "Note: --no-record: this predict was not recorded in an audit trail." in r.stderr
    r = run("predict", "--from-csv", _rows(tmp_path), "--store", lot_store, "--no-record", "--json")
    assert r.exit_code == 0, r.output
    assert [d["lot"] for d in json.loads(r.stdout)] == ["EX-002", "EX-901"]
    assert r.stderr.count("Note: --no-record") == 1  # one note for the file's rows (review: it was one a row)
    r = run("window", "--spec", spec_path, "--draws", 300, "--store", lot_store, "--no-record")
    assert r.exit_code == 0, r.output
    assert "Note: --no-record: this window was not recorded in an audit trail." in r.stderr
    assert _record_of(lot_store) == before
    # without --no-record the same store records each of them: the counts above measure the record
    assert run("predict", *WHATIF, "--lot", "ex-001", "--store", lot_store).exit_code == 0
    assert run("window", "--spec", spec_path, "--draws", 300, "--store", lot_store).exit_code == 0
    entries, predictions, _ = _record_of(lot_store)
    assert (entries, predictions) == (before[0] + 2, before[1] + 1)


def test_the_default_store_missing_still_runs_with_the_note(run, saved_model, tmp_path, monkeypatch):
    _, _, spec_path = saved_model
    monkeypatch.chdir(tmp_path)  # no linkage.db here
    r = run("predict", *WHATIF, "--json")
    assert r.exit_code == 0, r.output
    assert "Note: no lot store at linkage.db; this predict was not recorded in an audit trail." in r.stderr
    json.loads(r.stdout)
    r = run("window", "--spec", spec_path, "--draws", 300)
    assert r.exit_code == 0, r.output
    assert "Note: no lot store at linkage.db; this window was not recorded in an audit trail." in r.stderr
    assert list(tmp_path.iterdir()) == []
    # the default named on the command line is a named store: refused
    r = run("predict", *WHATIF, "--store", "linkage.db")
    assert r.exit_code == 2 and "no lot store at linkage.db" in r.stderr, r.output
    assert list(tmp_path.iterdir()) == []


def test_python_record_keyword(saved_model, lot_store, tmp_path, monkeypatch):
    """``record=`` of linkage.api: False writes nothing; the default refuses a missing store other than the
    default linkage.db; True refuses any missing store."""
    models_dir, model_id, spec_path = saved_model
    where = {"models_dir": models_dir, "model": model_id}
    missing = tmp_path / "nope.db"
    with pytest.raises(StorePathError, match="record=False"):
        api.whatif({"roll_force_kn_per_cm": 9}, store=missing, **where)
    with pytest.raises(StorePathError, match="no lot store at"):
        api.whatif_rows([{"roll_force_kn_per_cm": 9}], store=missing, **where)
    with pytest.raises(StorePathError, match="this window would not be recorded"):
        api.window(spec_path, store=missing, n_draws=300, **where)
    assert not missing.exists()
    r = api.whatif({"roll_force_kn_per_cm": 9}, store=missing, record=False, **where)
    assert r.recorded is False and not missing.exists()
    before = _record_of(lot_store)
    r = api.whatif({"roll_force_kn_per_cm": 9}, store=lot_store, lot="ex-003", record=False, **where)
    assert r.recorded is False and r.lot == "EX-003"
    w = api.Workspace(lot_store, models_dir).window(spec_path, model=model_id, n_draws=300, record=False)
    assert w.recorded is False
    assert _record_of(lot_store) == before
    monkeypatch.chdir(tmp_path)
    assert api.whatif({"roll_force_kn_per_cm": 9}, **where).recorded is False  # the default store: as before
    with pytest.raises(StorePathError):
        api.whatif({"roll_force_kn_per_cm": 9}, record=True, **where)
    assert not (tmp_path / "linkage.db").exists()


def _rows(folder: Path) -> Path:
    """A --from-csv file of two what-ifs for two lots, one stored (spelt another way) and one not made yet."""
    path = folder / "rows.csv"
    path.write_text("lot,roll_force_kn_per_cm\nex-002,9\nEX-901,8\n", encoding="utf-8")
    return path
