"""Every error a user can cause ends with a documented exit code and a message.

The codes are the project's contract: ``linkage.exceptions.EXIT_CODES``,
stated in README.md ("Exit codes") and DEVELOPERS.md. Here each command is
called the way a user gets it wrong (no lot store, a store that is a folder
or another kind of file, a damaged store, no model, an output path that
cannot be written, a disk that refuses the write) and the exit code, the
message and "nothing written" are checked. Codes 3 (store busy) and 4 (model
integrity) are checked where they are made: tests/reliability/
test_concurrency.py and test_artifacts.py.
"""

from __future__ import annotations

import re
import sqlite3
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.exceptions import EXIT_CODES

ROOT = Path(__file__).resolve().parents[1]
SPEC = ROOT / "data_demo" / "lots" / "spec.toml"
#: the template example (four invented lots), kept in the repository
TEMPLATE = ROOT / "tests" / "data" / "template-example"


def run(*args):
    result = CliRunner().invoke(cli, [str(a) for a in args], env={"LINKAGE_STORE": None,
                                                                  "LINKAGE_MODELS_DIR": None})
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception  # a traceback is a bug (exit code 1), never a user's error
    return result


def test_the_readme_and_developers_notes_state_every_code():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    line = next(x for x in readme.splitlines() if x.startswith("Exit codes:"))
    stated = {int(c) for c in re.findall(r"(?:^|[;:] )(\d) ", line)}
    assert stated == set(EXIT_CODES), line
    developers = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    for code in EXIT_CODES:
        assert f"`{code}`" in developers, f"exit code {code} is not in DEVELOPERS.md"


# --- code 2: --store names no lot store --------------------------------------------------------------------------
@pytest.mark.parametrize("command", [
    ["lots"], ["history", "EX-001"], ["assemble"], ["audit"], ["verify"], ["train", "--models-dir", "MODELS"],
])
def test_a_missing_store_is_usage_exit_2(tmp_path, command):
    store = tmp_path / "none.db"
    args = [str(tmp_path / "m") if a == "MODELS" else a for a in command]
    result = run(*args, "--store", store)
    assert result.exit_code == 2, result.output
    assert f"no lot store at {store}; run `linkage ingest FOLDER` first" in result.stderr
    assert not store.exists() and not (tmp_path / "m").exists()  # nothing written


def test_a_store_that_is_not_one_is_usage_exit_2(tmp_path):
    text = tmp_path / "notes.db"
    text.write_text("not a database")
    other = tmp_path / "other.db"
    with sqlite3.connect(other) as con:
        con.execute("CREATE TABLE samples (x)")
    r = run("lots", "--store", text)
    assert r.exit_code == 2 and f"{text} is not a SQLite file, so not a lot store" in r.stderr
    r = run("lots", "--store", other)
    assert r.exit_code == 2 and "is an SQLite file but not a linkage lot store (tables: samples)" in r.stderr
    r = run("lots", "--store", tmp_path)  # a folder: click's own check of the option, also code 2
    assert r.exit_code == 2 and "is a directory" in r.stderr


def test_ingest_into_a_folder_that_does_not_exist_is_usage_exit_2(tmp_path):
    if not TEMPLATE.is_dir():
        pytest.fail(f"the template example is missing from the repository: {TEMPLATE}")
    store = tmp_path / "no" / "such" / "folder" / "s.db"
    r = run("ingest", TEMPLATE, "--store", store)
    assert r.exit_code == 2, r.output
    assert f"cannot create the lot store {store}: folder {store.parent} does not exist" in r.stderr
    assert not (tmp_path / "no").exists()


# --- code 5: a damaged lot store --------------------------------------------------------------------------------
@pytest.mark.parametrize("command", [["lots"], ["assemble"], ["verify"], ["train", "--models-dir", "MODELS"]])
def test_a_damaged_store_exits_5(tmp_path, command):
    # the 16-byte SQLite header (SQLite file format, section 1.3) followed by bytes that are no database page
    store = tmp_path / "damaged.db"
    store.write_bytes(b"SQLite format 3\x00" + b"\xff" * 4080)
    args = [str(tmp_path / "m") if a == "MODELS" else a for a in command]
    r = run(*args, "--store", store)
    assert r.exit_code == 5, r.output
    assert f"lot store {store}: file is not a database" in r.stderr
    assert not (tmp_path / "m").exists()


# --- code 2: no model -------------------------------------------------------------------------------------------
@pytest.mark.parametrize("command", [
    ["predict", "--set", "ribbon_porosity=0.3", "--no-record"], ["window", "--spec", SPEC, "--no-record"], ["report"],
    ["watch"], ["retrain"],
])
def test_no_model_registry_is_usage_exit_2(tmp_path, command):
    r = run(*command, "--models-dir", tmp_path / "models", "--store", tmp_path / "s.db")
    assert r.exit_code == 2, r.output
    assert (f"no model registry at {tmp_path / 'models'}: no model found in the models folder looked in. Give the "
            "folder that holds the models with --models-dir DIR (or $LINKAGE_MODELS_DIR), or train a model first "
            "('linkage train')") in r.stderr
    assert list(tmp_path.iterdir()) == []


def test_report_without_a_model_on_a_store_too_small_to_train_says_so(tmp_path, monkeypatch):
    """A user test: 'report' on the template example's store (4 lots) said "train a model first ('linkage train')",
    where training cannot work, and did not name --models-dir. The refusal names the models folder it looked in
    (and where a relative one is), says how to give another, and says that training needs more lots than the store
    holds (linkage.models.train.MIN_LOTS). A refusal's wording: no outside source."""
    from linkage.models.train import MIN_LOTS

    store = _template_store(tmp_path)
    monkeypatch.chdir(tmp_path)
    for models in ("models", tmp_path / "elsewhere"):  # the default (relative), and one given
        args = ["report", "--store", store] + (["--models-dir", models] if models != "models" else [])
        r = run(*args)
        assert r.exit_code == 2, r.output
        shown = f"models ({tmp_path / 'models'})" if models == "models" else str(models)
        assert f"no model registry at {shown}: no model found in the models folder looked in" in r.stderr, r.stderr
        assert "--models-dir DIR (or $LINKAGE_MODELS_DIR)" in r.stderr
        assert (f"No model can be trained on the lot store {store} yet: training needs at least {MIN_LOTS} lots "
                "with every input and a target, and it holds 4 lots in use") in r.stderr, r.stderr
        assert "train a model first" not in r.stderr
    assert not (tmp_path / "reports").exists() and not (tmp_path / "models").exists()  # nothing written


def _template_store(tmp_path):
    if not TEMPLATE.is_dir():
        pytest.fail(f"the template example is missing from the repository: {TEMPLATE}")
    store = tmp_path / "s.db"
    assert run("ingest", TEMPLATE, "--store", store).exit_code == 0
    return store


@pytest.mark.parametrize("how", ["option", "environment", "empty folder"])
def test_verify_refuses_a_models_dir_that_is_no_registry(tmp_path, how):
    """A mistyped --models-dir (or LINKAGE_MODELS_DIR), or a folder that holds no registry, is refused as
    every command that reads models refuses it (exit 2), before anything is checked. Regression: verify
    said "0 model(s) checked / Everything matches" with exit 0. A refusal: no outside source."""
    store = _template_store(tmp_path)
    typo = tmp_path / "modles"
    if how == "empty folder":
        typo.mkdir()
    args = ["verify", "--store", str(store)] + (["--models-dir", str(typo)] if how != "environment" else [])
    r = CliRunner().invoke(cli, args, env={"LINKAGE_STORE": None,
                                           "LINKAGE_MODELS_DIR": str(typo) if how == "environment" else None})
    assert r.exit_code == 2, r.output
    assert f"Error: no model registry at {typo} (" in r.stderr and r.stdout == ""


def test_verify_lists_folders_the_registry_does_not_hold(tmp_path, monkeypatch):
    """A folder in the registry's folder that its index does not hold is listed as not registered (it is
    never loaded, so it is no integrity failure); without --models-dir and with no registry in the default
    place, the store alone is checked and the registry is said not to be. A behaviour: no outside source."""
    import json

    store = _template_store(tmp_path)
    models = tmp_path / "models"
    models.mkdir()
    (models / "registry.json").write_text(json.dumps({"format": 1, "models": {}}))
    (models / "m-20260101T000000Z-0123abcd").mkdir()
    (models / ".tmp-interrupted").mkdir()
    r = run("verify", "--store", store, "--models-dir", models)
    assert r.exit_code == 0, r.output
    assert "not registered: m-20260101T000000Z-0123abcd" in r.stdout and ".tmp-" not in r.stdout
    data = json.loads(run("verify", "--store", store, "--models-dir", models, "--json").stdout)
    assert data["models_unregistered"] == ["m-20260101T000000Z-0123abcd"] and data["ok"]
    (models / "registry.json").unlink()  # model folders without an index: still a registry, its folders listed
    r = run("verify", "--store", store, "--models-dir", models, "--json")
    assert r.exit_code == 0 and json.loads(r.stdout)["models_unregistered"] == ["m-20260101T000000Z-0123abcd"]
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    r = run("verify", "--store", store)
    assert r.exit_code == 0, r.output
    assert "Model registry models: not checked (no such folder" in r.stdout and "raw rows" in r.stdout


def test_empty_environment_variables_count_as_unset(tmp_path, monkeypatch):
    """LINKAGE_STORE= and LINKAGE_MODELS_DIR= (set, empty) mean the defaults linkage.db and models/, as an
    unset variable. Regression: the empty text was taken as the path ".", "a folder, not a lot store file".
    A behaviour of this project: no outside source."""
    import json

    if not TEMPLATE.is_dir():
        pytest.fail(f"the template example is missing from the repository: {TEMPLATE}")
    monkeypatch.chdir(tmp_path)
    empty = {"LINKAGE_STORE": "", "LINKAGE_MODELS_DIR": ""}
    assert run("ingest", TEMPLATE, "--store", "linkage.db").exit_code == 0
    r = CliRunner().invoke(cli, ["lots", "--json"], env=empty)
    assert r.exit_code == 0, r.output
    assert [x["lot"] for x in json.loads(r.stdout)] == ["EX-001", "EX-002", "EX-003", "EX-004"]
    (tmp_path / "models").mkdir()
    (tmp_path / "models" / "registry.json").write_text(json.dumps({"format": 1, "models": {}}))
    (tmp_path / "models" / "m-20260101T000000Z-0123abcd").mkdir()
    r = CliRunner().invoke(cli, ["models", "--json"], env=empty)
    assert r.exit_code == 0, r.output
    listed = json.loads(r.stdout)
    assert listed["models_dir"] == "models"
    assert [m["model_id"] for m in listed["models"]] == ["m-20260101T000000Z-0123abcd"]


def _closed_reader(args):
    """Run ``python -m linkage ARGS`` with stdout a pipe whose reading end is closed at once (the reader
    stopped, as ``| head`` does before the command prints): its first write meets EPIPE."""
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k not in ("LINKAGE_STORE", "LINKAGE_MODELS_DIR")}
    env["PYTHONPATH"] = str(ROOT)
    proc = subprocess.Popen([sys.executable, "-m", "linkage", *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, env=env)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    return proc.wait(timeout=300), err


@pytest.mark.parametrize("command", [["lots"], ["assemble"], ["assemble", "--out", "OUT"], ["predict"]])
def test_a_reader_that_stops_reading_is_no_error(tmp_path, command, request):
    """``linkage lots | head -2``: no message, exit code 0 (Python's note on SIGPIPE,
    https://docs.python.org/3/library/signal.html#note-on-sigpipe, with 0 for its 1: code 1 means a bug
    here); a file the command writes is written all the same. Regression: "Error: cannot read or write:
    Broken pipe", exit 5. A behaviour of this project: no outside source."""
    import csv

    if command == ["predict"]:
        moist = request.getfixturevalue("moist_model")
        args = ["predict", "--models-dir", moist.models_dir, "--model", moist.model_id,
                "--set", "roll_force_kn_per_cm=8", "--no-record"]
    else:
        args = [tmp_path / "t.csv" if a == "OUT" else a for a in command] + ["--store", _template_store(tmp_path)]
    code, err = _closed_reader(args)
    assert code == 0, err
    assert "Error" not in err and "Broken pipe" not in err and "Traceback" not in err, err
    if "--out" in command:
        with open(tmp_path / "t.csv", newline="") as fh:
            assert len(list(csv.DictReader(fh))) == 4


# --- code 2: an output that cannot be written, refused before any work ---------------------------------------------
@pytest.mark.parametrize("command, option", [
    (["report"], "--out"), (["assemble"], "--out"), (["predict", "--set", "ribbon_porosity=0.3"], "--html"),
])
def test_an_output_under_a_file_is_usage_exit_2(tmp_path, command, option):
    blocker = tmp_path / "afile"
    blocker.write_text("")
    out = blocker / "out.html"
    r = run(*command, option, out, "--store", tmp_path / "none.db", *(
        ["--models-dir", tmp_path / "models"] if command[0] != "assemble" else []))
    assert r.exit_code == 2, r.output
    assert f"cannot write the output file {out}: {blocker} is a file, not a folder; nothing was written" in r.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["afile"]


def test_demo_into_a_file_is_usage_exit_2(tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("")
    r = run("demo", "--out", blocker / "d")
    assert r.exit_code == 2, r.output
    assert f"cannot write the output folder {blocker / 'd'}: {blocker} is a file" in r.stderr


# --- code 5: the operating system refuses the write ------------------------------------------------------------------
def test_a_disk_that_refuses_the_write_exits_5(tmp_path, monkeypatch):
    """A full disk, simulated: flushing the written table to disk raises the
    OSError the operating system gives (errno 28, ENOSPC; POSIX fsync(2)).
    The message names the file and the reason; nothing is left behind; no
    traceback."""
    if not TEMPLATE.is_dir():
        pytest.fail(f"the template example is missing from the repository: {TEMPLATE}")
    import errno
    import os

    store = tmp_path / "s.db"
    assert run("ingest", TEMPLATE, "--store", store).exit_code == 0
    before = sorted(p.name for p in tmp_path.iterdir())
    out = tmp_path / "table.csv"

    def full(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", full)
    r = run("assemble", "--store", store, "--out", out)
    assert r.exit_code == 5, r.output
    assert f"Error: cannot read or write {out}: {os.strerror(errno.ENOSPC)}" in r.stderr
    assert "Traceback" not in r.output
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # no table, no temporary file


@pytest.mark.slow
def test_demo_whose_progress_reader_stops_still_writes_everything(tmp_path):
    """``linkage demo 2>&1 | head -2``: the progress lines meet a closed pipe; the demo must still write every
    file and record before it ends with code 0 (a second user test found it stopped after the ingest, exit 0).
    A behaviour of this project: no outside source."""
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k not in ("LINKAGE_STORE", "LINKAGE_MODELS_DIR")}
    env["PYTHONPATH"] = str(ROOT)
    out = tmp_path / "demo"
    proc = subprocess.Popen([sys.executable, "-m", "linkage", "demo", "--out", str(out)], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, env=env)
    proc.stdout.close()
    assert proc.wait(timeout=600) == 0
    for name in ("demo-lots.db", "assembled.csv", "window.json", "whatif.html", "report.html", "spec.toml"):
        assert (out / name).is_file(), name
    assert any((out / "models").iterdir())
