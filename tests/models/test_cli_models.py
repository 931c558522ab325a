"""``linkage train`` and ``linkage models`` through the command line."""

from __future__ import annotations

import json
import shutil

import pytest

from linkage.models.cv import SIMPLICITY_ORDER
from click.testing import CliRunner

from linkage import CAUTION
from linkage.cli.main import cli

from .conftest import assembled_table


def run(*args, env=None):
    result = CliRunner().invoke(cli, [str(a) for a in args], env=env)
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result


@pytest.mark.parametrize("command", ["train", "models"])
def test_help_has_an_example(command):
    result = run(command, "--help")
    assert result.exit_code == 0
    assert "Example:" in result.output and f"linkage {command}" in result.output


def test_train_help_lists_every_candidate_in_the_registry():
    """``train --help`` names each candidate of the registry (linkage.models.candidates.CANDIDATES), in the
    one-SE order of simplicity (regression: four were missing). The list in the help is written by hand, to
    keep scikit-learn and numpy out of ``--help``; this test holds it to the registry. No outside source."""
    from linkage.models.candidates import CANDIDATES

    text = " ".join(run("train", "--help").output.split())
    listed = text[text.index("these candidates"):text.index("the simplest within")]
    positions = [listed.find(f" {name} ") if f" {name} " in listed else listed.find(f" {name},") for name in CANDIDATES]
    assert all(p >= 0 for p in positions), dict(zip(CANDIDATES, positions))
    assert list(CANDIDATES) == list(SIMPLICITY_ORDER) and positions == sorted(positions)


@pytest.fixture
def fake_store(monkeypatch):
    """train reads the store through linkage.store and linkage.assemble; here
    both hand back a table of our own so the command alone is tested."""
    import linkage.assemble
    import linkage.store

    table = assembled_table(12, seed=6)
    seen = {}

    class FakeStore:
        #: a store of the current schema, anchored (what train's opening asks of a real one)
        older_schema = unanchored = upgraded_from = None
        from_copy = False

        def __init__(self, path, create=True, for_writing=False, upgrade=True):
            seen["store"], seen["create"] = path, create

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return None

        def current_tables(self, product=None):
            from linkage.store import LotTables

            seen["product"] = product
            return LotTables({"process": table})

        def log(self, action, **fields):
            seen.setdefault("audit", []).append((action, fields["model_id"]))

    def fake_assemble(tables, dissolution_time_min=30.0, **kwargs):
        seen["time"] = dissolution_time_min
        return table

    monkeypatch.setattr(linkage.store, "LotStore", FakeStore)
    monkeypatch.setattr(linkage.assemble, "assemble", fake_assemble)
    return seen


def test_train_json_and_text(fake_store, tmp_path):
    chain = tmp_path / "chain.toml"
    chain.write_text('[[stage]]\nname = "tablets"\ninputs = ["ribbon_porosity", "compression_force_kn"]\n'
                     'targets = ["dissolution_pct", "friability_pct"]\n')
    models = tmp_path / "models"
    res = run("train", "--store", tmp_path / "s.db", "--models-dir", models, "--chain", chain, "--product", "P1",
              "--seed", 3, "--coverage", 0.8, "--dissolution-time", 45, "--json")
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    # the training is logged in the store's audit trail under the new id
    assert fake_store.pop("audit") == [("train", data["model_id"])]
    assert fake_store == {"store": tmp_path / "s.db", "create": False, "product": "P1", "time": 45.0}
    assert (models / data["model_id"] / "chain.joblib").exists()
    t = data["targets"]["dissolution_pct"]
    for key in ("n_lots", "cv", "candidates", "noise_floor", "selected", "nominal_coverage", "coverage"):
        assert key in t
    assert t["n_lots"] == 12 and t["cv"]["scheme"] == "leave-one-lot-out" and t["cv"]["seed"] == 3
    assert set(t["cv"]["folds"]) == {f"L{i:03d}" for i in range(12)}
    assert t["nominal_coverage"] == 0.8
    assert set(t["candidates"]["pls"]) >= {"rmse", "mae", "q2", "bias"}
    assert data["targets"]["friability_pct"]["noise_floor"] is None
    assert data["caution"] == CAUTION
    regions = t["coverage_by_region"]  # issue 12: thirds of the porosity range, Clopper-Pearson beside each
    assert len(regions) == 3 and sum(r["n"] for r in regions) == 12
    assert all(set(r) == {"range", "n", "coverage", "ci_low", "ci_high"} for r in regions)
    assert t["coverage_region_variable"] == "ribbon_porosity" and "1 − 2α" in t["coverage_guarantee"]["text"]
    # the README's keys (section "JSON outputs" and the candidates' and intervals' paragraphs): the chosen
    # hyperparameters with log_linear's inputs as indices into `inputs`; `spread` null with CV+;
    # `interval_basis` null where locally weighted CV+ is deployed (regression: the three were missing)
    for t in data["targets"].values():
        full = t["hyperparameters"]["full_data"]
        assert t["selected"] in full and len(t["hyperparameters"]["selected_by_fold"]) == t["cv"]["n_splits"]
        if "log_linear" in full:
            assert {"features", "log_inputs"} <= set(full["log_linear"])
            assert all(0 <= i < len(t["inputs"]) for i in full["log_linear"]["features"])
        lw = t["interval_choice"]["method"] == "locally weighted CV+"
        assert (t["spread"] is None) == (not lw)
        assert (t["interval_basis"] is None) == lw
        if t["interval_basis"] is not None:
            assert set(t["interval_basis"]) == {"fold_candidates", "summary", "leverage"}

    chain.write_text('[[stage]]\nname = "tablets"\ninputs = ["ribbon_porosity", "compression_force_kn"]\n'
                     'targets = ["dissolution_pct"]\n')
    text = run("train", "--store", tmp_path / "s.db", "--models-dir", models, "--chain", chain)
    assert text.exit_code == 0, text.output
    out = text.stdout
    assert "dissolution_pct  [tablets stage; 12 lots; leave-one-lot-out" in out
    assert "rd_baseline" in out and "noise floor:" in out and "selected:" in out
    assert "empirical coverage" in out and CAUTION in out
    assert "guarantee: CV+ guarantees at least 1 − 2α" in out and out.count("Clopper–Pearson") == 3


def test_a_misspelt_chain_target_is_refused_and_nothing_trained(fake_store, tmp_path):
    """A regression test of a refusal (no outside source needed): a chain file whose target is no attribute
    (`dissolution_pcx`) used to train, register and put in service a model without dissolution, exit 0, listing
    it only as not trained. Now: exit 2, the file, the name and the nearest attribute, nothing trained, nothing
    registered, nothing in the audit trail."""
    chain = tmp_path / "chain.toml"
    chain.write_text('[[stage]]\nname = "tablets"\ninputs = ["ribbon_porosity", "compression_force_kn"]\n'
                     'targets = ["dissolution_pcx", "friability_pct"]\n')
    models = tmp_path / "models"
    res = run("train", "--store", tmp_path / "s.db", "--models-dir", models, "--chain", chain, "--no-materials")
    assert res.exit_code == 2, res.output
    assert ("chain.toml, key 'targets', value 'dissolution_pcx': stage 'tablets': 'dissolution_pcx' is not an "
            "attribute of the assembled table (did you mean 'dissolution_pct'?)") in res.output
    assert "audit" not in fake_store
    assert not models.exists() or not any(models.iterdir())


def test_models_lists_and_imports(fake_store, tmp_path):
    models = tmp_path / "models"
    empty = run("models", "--models-dir", models)
    assert empty.exit_code == 0 and "No models yet" in empty.output
    chain = tmp_path / "chain.toml"
    chain.write_text('[[stage]]\nname = "tablets"\ninputs = ["ribbon_porosity"]\ntargets = ["dissolution_pct"]\n')
    assert run("train", "--store", tmp_path / "s.db", "--models-dir", models, "--chain", chain).exit_code == 0
    listing = json.loads(run("models", "--models-dir", models, "--json").stdout)
    (row,) = listing["models"]
    assert row["status"] == "ok" and row["latest"] and row["n_lots"] == 12
    assert row["targets"]["dissolution_pct"] in set(SIMPLICITY_ORDER)

    other = tmp_path / "other"
    other.mkdir()
    shutil.copytree(models / row["model_id"], other / row["model_id"])
    text = run("models", "--models-dir", other)
    assert "foreign" in text.output
    no_note = run("models", "--models-dir", other, "--import", other / row["model_id"])
    assert no_note.exit_code == 2 and "--note" in no_note.output
    imp = run("models", "--models-dir", other, "--import", other / row["model_id"], "--note", "from models/")
    assert imp.exit_code == 0 and row["model_id"] in imp.output
    assert "imported from" in run("models", "--models-dir", other).output


def test_train_errors_become_messages(tmp_path):
    res = run("train", "--store", tmp_path / "none.db", "--models-dir", tmp_path / "m")
    assert res.exit_code != 0 and "Error:" in res.output and "no lot store" in res.output
    bad = tmp_path / "chain.toml"
    bad.write_text("[[stage]]\nname = 'x'\n")
    res = run("train", "--store", tmp_path / "none.db", "--models-dir", tmp_path / "m", "--chain", bad)
    assert res.exit_code == 2 and "'inputs' must be a non-empty list" in res.output


def test_ingest_then_train_on_synthetic_lots(tmp_path):
    """End to end through the real store and assembler (written by other
    modules): synthetic lots -> ingest -> train --json (two stages, to stay fast)."""
    synthetic = pytest.importorskip("linkage.synthetic")
    lots = synthetic.make_lots(12, seed=2, with_vessels=True)
    folder = tmp_path / "lab"
    lots.write_csv(folder)
    db = tmp_path / "s.db"
    assert run("ingest", folder, "--store", db).exit_code == 0
    chain = tmp_path / "chain.toml"
    chain.write_text('[[stage]]\nname = "ribbon"\ninputs = ["roll_force_kn_per_cm", "roll_gap_mm"]\n'
                     'targets = ["ribbon_porosity"]\n\n[[stage]]\nname = "tablets"\n'
                     'inputs = ["ribbon_porosity", "compression_force_kn"]\ntargets = ["dissolution_pct"]\n')
    res = run("train", "--store", db, "--models-dir", tmp_path / "models", "--chain", chain, "--json")
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert set(data["targets"]) == {"ribbon_porosity", "dissolution_pct"}
    assert data["targets"]["dissolution_pct"]["noise_floor"] is not None  # from the vessels
    assert data["targets"]["ribbon_porosity"]["noise_floor"] is not None  # from the ribbon replicates
    assert data["n_lots"] == 12


def test_models_help_says_the_commands_using_latest_are_refused_not_models(small_fit, tmp_path):
    """``models --help`` said "A champion that fails its checks is refused (exit code 4)", which reads as if
    ``linkage models`` exits 4; it lists the registry (exit 0), and the commands that use ``latest`` are the ones
    refused. Regression test of a wording: it needs no outside source."""
    from linkage.exceptions import NoVerifiedModelError
    from linkage.models.registry import load, save

    text = " ".join(run("models", "--help").output.split())
    assert "the commands that use 'latest' (predict, window, report ...) are refused (exit code 4)" in text, text
    assert "A champion that fails its checks is refused" not in text
    models = tmp_path / "models"
    mid = save(small_fit[1], models)
    artifact = models / mid / "chain.joblib"
    data = bytearray(artifact.read_bytes())
    data[len(data) // 2] ^= 0x01
    artifact.write_bytes(bytes(data))  # the champion now fails its check
    listed = run("models", "--models-dir", models)
    assert listed.exit_code == 0 and mid in listed.output, listed.output
    with pytest.raises(NoVerifiedModelError) as refused:
        load(models)  # what a command using latest meets
    assert refused.value.exit_code == 4
