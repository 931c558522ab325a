"""``linkage retrain --product B`` for a champion of another product is refused (exit code 2, nothing written),
but a decision a killed retrain left pending was settled first: the registry was written before the refusal.
The product is now checked before anything is settled.

A regression test of a refusal: it needs no outside source.
"""

from __future__ import annotations

import sqlite3
from contextlib import closing
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.decide.retrain import retrain
from linkage.exceptions import UsageError
from linkage.models import registry



def dump(path: Path) -> dict[str, list[tuple]]:
    """Every row of every table of the store, read with plain sqlite3 (not through linkage)."""
    with closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True)) as con:
        names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
        return {n: con.execute(f'SELECT rowid, * FROM "{n}" ORDER BY rowid').fetchall() for n in names}


@pytest.fixture()
def pending(tmp_path) -> tuple[Path, Path, str]:
    """A store of 16 synthetic lots of product A, a champion trained on them (mean and PLS candidates), and a
    decision left pending in the registry (phase 1 of a retrain, as a kill leaves it)."""
    from linkage.assemble import assemble
    from linkage.models.train import train_chain
    from linkage.synthetic import make_lots

    lots = make_lots(16, seed=3, product="A")
    lots.write_csv(tmp_path / "lots")
    store, models = tmp_path / "site.db", tmp_path / "models"
    done = CliRunner().invoke(cli, ["ingest", str(tmp_path / "lots"), "--store", str(store)])
    assert done.exit_code == 0, done.output
    champion = registry.save(train_chain(assemble(lots.tables), seed=0, candidates=["mean", "pls"],
                                         n_bootstrap=10), models)
    decision_id = registry.begin_decision(models, {"challenger_id": champion, "promoted": False})
    return store, models, decision_id


def test_another_product_is_refused_before_a_pending_decision_is_settled(pending):
    store, models, decision_id = pending
    before, index = dump(store), (models / registry.INDEX).read_bytes()
    with pytest.raises(UsageError, match="--product 'B'"):
        retrain(store, models, product="B")
    result = CliRunner().invoke(cli, ["retrain", "--store", str(store), "--models-dir", str(models),
                                      "--product", "B"])
    assert result.exit_code == 2 and "--product 'B'" in result.output, result.output
    assert [d["decision_id"] for d in registry.pending_decisions(models)] == [decision_id]  # still pending
    assert (models / registry.INDEX).read_bytes() == index and dump(store) == before
