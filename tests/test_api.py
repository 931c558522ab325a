"""The Python API (issue 14, item 5): the README's "From Python" section runs
as written, and each call leaves the same audit entry as the command of the
same name (the reference here is the command line, run on the same store and
model with the same arguments)."""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage import CAUTION
from linkage.cli.main import cli

README = Path(__file__).resolve().parents[1] / "README.md"


def readme_python() -> str:
    """The first ```python block under the README's "## From Python"."""
    text = README.read_text(encoding="utf-8")
    section = text.split("\n## From Python\n", 1)[1].split("\n## ", 1)[0]
    match = re.search(r"```python\n(.*?)```", section, re.S)
    assert match, "the README's From Python section has no python block"
    return match.group(1)


def test_import_linkage_stays_light():
    """`import linkage` and reaching the API import neither pandas nor
    scikit-learn (they come with the first call that needs them)."""
    probe = ("import sys, linkage; linkage.Workspace; linkage.api; linkage.DEMO_DATA; "
             "print(','.join(m for m in ('pandas', 'sklearn', 'scipy', 'matplotlib', 'shap') if m in sys.modules))")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    proc = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == ""


def test_a_name_the_package_does_not_have_is_an_attribute_error():
    import linkage

    with pytest.raises(AttributeError, match="no attribute 'nothing_here'"):
        linkage.nothing_here  # noqa: B018


@pytest.fixture(scope="module")
def readme_run(tmp_path_factory):
    """Run the README's Python block as written (its temporary folder made
    under pytest's), and keep its namespace and what it printed."""
    base = tmp_path_factory.mktemp("readme")
    saved = tempfile.tempdir
    tempfile.tempdir = str(base)
    printed = io.StringIO()
    namespace: dict = {"__name__": "__readme__"}
    try:
        with contextlib.redirect_stdout(printed):
            exec(compile(readme_python(), str(README), "exec"), namespace)
    finally:
        tempfile.tempdir = saved
    return namespace, printed.getvalue()


def _entries(store) -> list[dict]:
    from linkage.store import LotStore

    with LotStore(store, create=False) as s:
        return s.audit()


def _same_entry(a: dict, b: dict, *, ignore_inputs=(), ignore_outputs=()) -> None:
    """Two audit entries record the same thing (their ids, times and, where
    named, keys that name a time or a folder aside)."""
    assert (a["action"], a["lot"], a["model_id"]) == (b["action"], b["lot"], b["model_id"])
    drop = lambda d, keys: {k: v for k, v in d.items() if k not in keys}  # noqa: E731
    assert drop(a["inputs"], ignore_inputs) == drop(b["inputs"], ignore_inputs)
    assert drop(a["outputs"], ignore_outputs) == drop(b["outputs"], ignore_outputs)


@pytest.mark.slow
def test_the_readme_python_section_runs_and_records_every_step(readme_run):
    ns, printed = readme_run
    lab, trained, window, whatif = ns["lab"], ns["trained"], ns["window"], ns["whatif"]
    assert (ns["folder"] / "report.html").is_file()
    # every step the CLI records, recorded by the library: ingest (by the store), train, window, predict
    entries = _entries(lab.store)[:4]  # (the tests below add the commands' entries after these)
    assert [e["action"] for e in entries] == ["ingest", "train", "window", "predict"]
    assert [e["model_id"] for e in entries[1:]] == [trained.model_id] * 3
    from linkage.store import LotStore

    with LotStore(lab.store, create=False) as s:
        assert [p["model_id"] for p in s.predictions()][:1] == [trained.model_id]
    assert window.recorded and whatif.recorded
    # what the block printed is what the results say
    assert repr(trained) in printed and repr(window) in printed
    assert trained.model_id in repr(trained) and "48 lots" in repr(trained)


@pytest.mark.slow
def test_train_keeps_the_alarms_design_in_the_model(readme_run):
    """Issue 20: `train` simulates the watch's multivariate alarm once and keeps it with the model (its training
    record, in `train --json` too), the same design mewma.design simulates for the charted attributes and the
    training lots (Lowry et al. 1992's scheme, h by simulation)."""
    from linkage.decide import mewma
    from linkage.decide.mewma import design
    from linkage.decide.watch import watch

    trained = readme_run[0]["trained"]
    kept = trained.chain.training["watch_design"]
    assert kept["simulation"] == mewma.simulation_settings()
    assert trained.to_dict()["watch_design"] == kept  # train --json
    saved = dict(mewma._KEPT)
    try:
        mewma._KEPT.clear()
        mewma._design.cache_clear()
        fresh = dict(design(kept["design"]["attributes"], n_ref=kept["design"]["n_reference"]))  # simulated here
        assert {k: fresh[k] for k in ("h", "arl", "n_reference")} == {k: kept["design"][k] for k in
                                                                    ("h", "arl", "n_reference")}
        lab = readme_run[0]["lab"]
        assert watch(trained.chain, lab.assemble()).mewma["design"] == kept["design"]  # what the watch states
        # the README's report (two cores: the watch in a child) read the model's design and kept no copy beside it
        assert (readme_run[0]["folder"] / "report.html").is_file()
        assert not list(Path(lab.models_dir).glob("*/results/mewma-*.npz"))
    finally:
        mewma._KEPT.clear()
        mewma._KEPT.update(saved)


@pytest.mark.slow
def test_summaries_hold_the_numbers_the_json_holds(readme_run):
    ns, _ = readme_run
    trained, window, whatif = ns["trained"], ns["window"], ns["whatif"]
    scores = trained.summary()
    meta = trained.to_dict()["targets"]
    assert set(scores.index.get_level_values("attribute")) == set(meta)
    for attribute, t in meta.items():
        chosen = scores.loc[attribute]
        assert chosen.index[chosen["selected"]].tolist() == [t["selected"]]
        for cand, m in t["candidates"].items():
            assert chosen.loc[cand, "rmse"] == m["rmse"] and chosen.loc[cand, "q2"] == m["q2"]
        assert (chosen["coverage"] == t["coverage"]).all()

    d = window.to_dict()
    edges = window.summary()
    assert edges.loc["low", "ribbon_porosity"] == d["ribbon_porosity"]["low"]
    assert edges.loc["high", "limited_by"] == d["limiting_attribute"]["high"]
    assert edges.loc["low", "roll_force_kn_per_cm"] == d["roll_force_kn_per_cm"]["low"]
    curve = window.curve()
    assert curve["ribbon_porosity"].tolist() == d["curve"]["ribbon_porosity"]
    assert curve["p_all"].tolist() == d["curve"]["p_all"]

    preds = whatif.to_dict()["predictions"]
    table = whatif.summary()
    assert table.index.tolist() == list(preds)
    for name, p in preds.items():
        assert (table.loc[name, "value"], table.loc[name, "low"], table.loc[name, "high"]) == (
            p["value"], p["low"], p["high"])
        if "p_pass" in p:
            assert table.loc[name, "p_pass"] == p["p_pass"]
    for result in (trained, window, whatif):
        assert CAUTION in str(result)


@pytest.mark.slow
def test_window_and_predict_from_the_command_line_record_and_print_the_same(readme_run):
    """The commands, run on the README's store and model with the same
    arguments, print the results' text and leave the same audit entries."""
    import linkage

    ns, _ = readme_run
    lab, window, whatif = ns["lab"], ns["window"], ns["whatif"]
    spec = linkage.DEMO_DATA / "lots" / "spec.toml"
    where = ["--store", str(lab.store), "--models-dir", str(lab.models_dir)]
    runner = CliRunner()
    r = runner.invoke(cli, ["window", "--spec", str(spec), "--set", "roll_gap_mm=2.5", "--confidence", "0.9",
                            *where], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    assert r.stdout == window.text() + "\n"
    r = runner.invoke(cli, ["predict", "--set", "ribbon_porosity=0.30", "--set", "compression_force_kn=12",
                            "--spec", str(spec), *where], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    assert r.stdout == whatif.text() + "\n"
    entries = _entries(lab.store)
    windows = [e for e in entries if e["action"] == "window"]
    predicts = [e for e in entries if e["action"] == "predict"]
    assert len(windows) == len(predicts) == 2  # the README's, then the command's
    _same_entry(windows[0], windows[1])
    _same_entry(predicts[0], predicts[1], ignore_outputs=("made_at",))


@pytest.mark.slow
def test_train_from_the_command_line_records_the_same(readme_run, tmp_path):
    ns, _ = readme_run
    lab = ns["lab"]
    other = tmp_path / "models"
    r = CliRunner().invoke(cli, ["train", "--store", str(lab.store), "--models-dir", str(other), "--seed", "0",
                                 "--json"], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    printed = json.loads(r.stdout)
    api_train, cli_train = [e for e in _entries(lab.store) if e["action"] == "train"]
    assert cli_train["model_id"] == printed["model_id"] != api_train["model_id"]
    assert cli_train["inputs"]["models_dir"] == str(other)
    _same_entry({**api_train, "model_id": None}, {**cli_train, "model_id": None}, ignore_inputs=("models_dir",))
    # and the CLI's JSON is the result's to_dict, up to the model id and the time
    same = {k: v for k, v in ns["trained"].to_dict().items() if k not in ("model_id", "created_at")}
    assert {k: v for k, v in printed.items() if k not in ("model_id", "created_at")} == json.loads(json.dumps(same))


def test_a_whatif_needs_values_and_numbers(tmp_path):
    from linkage.api import whatif
    from linkage.exceptions import UsageError

    with pytest.raises(UsageError, match="nothing to predict from"):
        whatif({}, models_dir=tmp_path)
    with pytest.raises(UsageError, match="roll_gap_mm: 'wide' is not a number"):
        whatif({"roll_gap_mm": "wide"}, models_dir=tmp_path)


@pytest.mark.slow
def test_ingest_and_watch_from_the_command_line_record_and_print_the_same(readme_run, tmp_path):
    import linkage

    ns, _ = readme_run
    lab, ingested = ns["lab"], ns["ingested"]
    assert ingested.summary()["status"].eq("new").sum() == len(ingested.result.lots_new) == 48
    # the same folder into a fresh store from the command line: the same report and audit entry
    store = tmp_path / "cli.db"
    r = CliRunner().invoke(cli, ["ingest", str(linkage.DEMO_DATA / "lots"), "--store", str(store), "--json"],
                           catch_exceptions=False)
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout) == {**ingested.to_dict(), "store": str(store)}
    _same_entry(_entries(lab.store)[0], _entries(store)[0])

    watched = lab.watch()
    r = CliRunner().invoke(cli, ["watch", "--store", str(lab.store), "--models-dir", str(lab.models_dir), "--json"],
                           catch_exceptions=False)
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout) == json.loads(json.dumps(watched.to_dict()))
    api_watch, cli_watch = [e for e in _entries(lab.store) if e["action"] == "watch"]
    _same_entry(api_watch, cli_watch)
    assert watched.summary()["alarm"].tolist() == watched.result.alarms
    assert f"{watched.n_lots} lots" in repr(watched) and CAUTION in watched.text()
