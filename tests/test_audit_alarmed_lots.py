"""``linkage audit --lot X`` lists the entries that name X as flagged by the watch's alarm, and the watch's entry
names its alarmed lots (a user test: ``audit --lot Q28-003`` listed only the lot's ingest, not the watch that
alarmed on it nor the retrain and promote entries that name it as flagged; the watch's line "6 alarm(s) on 16
lot(s)" named no lot). ``history`` of a lot the store does not hold points to ``audit --lot`` when entries name it.

Regression tests of what the audit trail lists and says: they need no outside source.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.results import _audit_outcome
from linkage.store import LotStore

EXAMPLE = Path(__file__).resolve().parent / "data" / "template-example"


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture
def store(tmp_path):
    if not EXAMPLE.is_dir():
        pytest.skip(f"template example not found at {EXAMPLE}")
    folder = tmp_path / "lab"
    shutil.copytree(EXAMPLE, folder)
    db = tmp_path / "s.db"
    assert run("ingest", folder, "--store", db).exit_code == 0
    with LotStore(db) as s:
        # entries as linkage.api.watch and linkage.decide.retrain write them (their own lot column is empty)
        s.log("watch", model_id="m-1", inputs={}, outputs={
            "alarms": ["MEWMA …, lot EX-002: …", "MEWMA …, lot EX-003: …"], "alarmed_lots": ["EX-002", "EX-003"],
            "new_lots": ["EX-002", "EX-003", "EX-004"]})
        s.log("promote", model_id="m-2", inputs={"champion": "m-1", "force": True, "reason": "test",
                                                 "alarmed_lots": [{"lot": "EX-002", "signal": "T² above h"}]},
              outputs={})
        s.log("watch", model_id="m-2", inputs={}, outputs={"alarms": ["…"], "alarmed_lots": ["EX-004"],
                                                            "new_lots": ["EX-004"]})
        s.log("watch", model_id="m-2", inputs={}, outputs={"alarms": [], "alarmed_lots": [], "new_lots": ["EX-004"]})
        s.log("running", lot="Q29-001", inputs={}, outputs={"drift": {"drifting": False}})
    return db


def _listed(db, lot):
    out = run("audit", "--store", db, "--lot", lot, "--json")
    assert out.exit_code == 0, out.output
    return [(e["action"], e["model_id"]) for e in json.loads(out.stdout)]


def test_audit_of_a_lot_lists_the_watch_retrain_and_promote_entries_that_flag_it(store):
    assert _listed(store, "EX-002") == [("ingest", None), ("watch", "m-1"), ("promote", "m-2")]
    # under another spelling of the lot (letter case, a Unicode dash), as the lot's own entries are found
    assert _listed(store, "ex‐002") == _listed(store, "EX-002")
    assert _listed(store, "EX-003") == [("ingest", None), ("watch", "m-1")]
    assert _listed(store, "EX-004") == [("ingest", None), ("watch", "m-2")]  # new, not alarmed, in m-1's watch
    assert _listed(store, "EX-001") == [("ingest", None)]
    # the JSON keeps every key it had
    entry = json.loads(run("audit", "--store", store, "--lot", "EX-003", "--json").stdout)[1]
    assert set(entry) == {"id", "at", "user", "action", "lot", "model_id", "inputs", "outputs"}


def test_the_watch_entry_names_its_alarmed_lots(store):
    text = run("audit", "--store", store, "--lot", "EX-003").output
    assert "2 alarm(s) on 3 lot(s) since training: lot(s) EX-002, EX-003" in text
    many = {"action": "watch", "outputs": {"alarms": ["…"] * 7, "alarmed_lots": [f"L{i}" for i in range(7)],
                                           "new_lots": [f"L{i}" for i in range(9)]}}
    assert _audit_outcome(many)[0] == "7 alarm(s) on 9 lot(s) since training: lot(s) L0, L1, L2, L3, L4 and 2 more"
    # an entry written before the lots were recorded says what it said
    older = {"action": "watch", "outputs": {"alarms": ["…"] * 2, "new_lots": ["A", "B", "C"]}}
    assert _audit_outcome(older)[0] == "2 alarm(s) on 3 lot(s) since training"


def test_history_of_a_lot_not_stored_points_to_its_audit_entries(store):
    named = run("history", "Q29-001", "--store", store)
    assert named.exit_code == 2
    assert "lot 'Q29-001' is not in the store" in named.stderr
    assert "the audit trail has entries naming it: linkage audit --lot Q29-001" in named.stderr
    unnamed = run("history", "Q29-999", "--store", store)
    assert unnamed.exit_code == 2 and "linkage audit --lot" not in unnamed.stderr
