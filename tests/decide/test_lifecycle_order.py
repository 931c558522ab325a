"""Issue 19 item 5: ``audit --lot`` includes the ingest that created the
lot, and the ``watch`` and ``retrain`` help texts say in which order to use
them."""

from __future__ import annotations

import json

from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.synthetic import make_lots


def test_audit_of_a_lot_includes_the_ingest_that_created_it(tmp_path):
    lots = make_lots(8, seed=2)
    first, second = tmp_path / "a", tmp_path / "b"
    order = list(lots.tables["process"]["lot"])
    for folder, keep in ((first, order[:5]), (second, order[5:])):
        folder.mkdir()
        for name, df in lots.tables.items():
            df[df["lot"].isin(keep)].to_csv(folder / f"{name}.csv", index=False)
    store = tmp_path / "lots.db"
    runner = CliRunner()
    for folder in (first, second):
        r = runner.invoke(cli, ["ingest", str(folder), "--store", str(store)])
        assert r.exit_code == 0, r.output
    r = runner.invoke(cli, ["audit", "--store", str(store), "--lot", order[6], "--json"])
    assert r.exit_code == 0, r.output
    rows = json.loads(r.stdout)
    ingests = [e for e in rows if e["action"] == "ingest"]
    assert len(ingests) == 1 and order[6] in ingests[0]["outputs"]["new"]  # the second ingest only
    all_rows = json.loads(runner.invoke(cli, ["audit", "--store", str(store), "--json"]).stdout)
    assert ingests[0]["id"] == [e for e in all_rows if e["action"] == "ingest"][1]["id"]
    text = runner.invoke(cli, ["audit", "--store", str(store), "--lot", order[0]]).output
    assert "ingest" in text


def test_watch_and_retrain_help_say_the_order():
    runner = CliRunner()
    watch = " ".join(runner.invoke(cli, ["watch", "--help"]).output.split())
    retrain = " ".join(runner.invoke(cli, ["retrain", "--help"]).output.split())
    assert "before 'linkage retrain'" in watch
    assert "run 'linkage watch' first" in retrain
