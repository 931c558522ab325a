"""``linkage audit``'s outcome column for entries whose lots are written as a count, not a list: a no-op ingest
(the store writes ``unchanged`` as the number of lots) said "no lots", and a train entry of the schema 2 store
(``inputs: {"lots": 4}``) said "trained on 0 lots"; a ``reanchor`` entry had no outcome at all.

Regression tests of the wording of the audit trail: they need no outside source.
"""

from __future__ import annotations

import shutil
import warnings
from pathlib import Path

from linkage import seal
from linkage.read import read_folder
from linkage.results import audit_text
from linkage.store import LotStore

DATA = Path(__file__).resolve().parent / "data"
EXAMPLE = DATA / "template-example"


def _outcomes(rows: list[dict]) -> dict[int, str]:
    """Each entry's line of the text table, by audit id."""
    lines = audit_text(rows).splitlines()[1:-1]
    return {r["id"]: line for r, line in zip(rows, lines)}


def test_a_no_op_ingest_counts_its_unchanged_lots(tmp_path):
    with LotStore(tmp_path / "site.db") as s:
        s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))
        again = s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))
        rows = s.audit()
    assert len(again.lots_unchanged) == 4 and rows[-1]["outputs"]["unchanged"] == 4  # written as a count
    line = _outcomes(rows)[rows[-1]["id"]]
    assert "4 unchanged lot(s)" in line and "no lots" not in line, line


def test_a_train_entry_says_its_lots_or_just_trained(tmp_path):
    path = tmp_path / "store-v2.db"  # the schema 2 fixture: a train entry with inputs {"lots": 4}
    shutil.copy(DATA / "store-v2.db", path)
    shutil.copy(DATA / "store-v2.db.seal", seal.anchor_path(path))
    with LotStore(path) as s:
        s.log("train", model_id="m-2")  # no inputs: how many lots is not recorded
        rows = s.audit()
    trains = [r for r in rows if r["action"] == "train"]
    assert [r["inputs"] for r in trains] == [{"lots": 4}, None]
    lines = _outcomes(rows)
    assert "trained on 4 lots" in lines[trains[0]["id"]], lines[trains[0]["id"]]
    assert "trained" in lines[trains[1]["id"]] and "trained on" not in lines[trains[1]["id"]], lines[trains[1]["id"]]


def test_a_reanchor_entry_names_the_seal_checked(tmp_path):
    path = tmp_path / "site.db"
    with LotStore(path) as s:
        s.ingest(read_folder(EXAMPLE, known_lots=s.lot_ids()))
    seal.anchor_path(path).unlink()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        s = LotStore(path, create=False)
    with s:
        done = s.reanchor("anchor lost in the copy")
        rows = s.audit()
    line = _outcomes(rows)[done["audit_id"]]
    assert f"re-anchored at seal {done['checked_seal']['id']}" in line, line


def test_an_ingest_that_only_adds_says_so(tmp_path):
    """Re-test: an ingest of results in stages (no reason needed) read as an unexplained revision in the text."""
    import pandas as pd

    folder = tmp_path / "first"
    shutil.copytree(EXAMPLE, folder)
    tablets = folder / "tablets.csv"
    later = tmp_path / "later"
    later.mkdir()
    shutil.move(tablets, later / "tablets.csv")  # the tablets tested days after the ribbons
    with LotStore(tmp_path / "site.db") as s:
        s.ingest(read_folder(folder, known_lots=s.lot_ids()))
        added = s.ingest(read_folder(later, known_lots=s.lot_ids()))
        rows = s.audit()
    n = len(pd.read_csv(later / "tablets.csv")["lot"].unique())
    assert len(added.lots_added_to) == n
    line = _outcomes(rows)[rows[-1]["id"]]
    assert f"{n} revised lot(s) ({n} of them only added to)" in line, line
