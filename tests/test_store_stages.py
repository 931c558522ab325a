"""Results that arrive in stages: an ingest that only adds to a stored lot needs no reason (user test).

A lot's tablets are tested days after it was compacted, its three-point bend after its densities; a plan's
lots get their results after they are made. Such an ingest adds a table, rows with new keys or values in
blank cells: it makes a revision (kept in the history and the audit trail, sealed as any other) but changes
no stored value, so it needs no --reason. Changing or removing a stored value still needs one.

These are regression tests of a refusal removed and of the refusals kept: the expected values are the
folders' own numbers, written here; they need no outside source.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from linkage.cli.main import cli
from linkage.exceptions import UsageError
from linkage.read import read_folder
from linkage.store import LotStore, _diff, _only_adds, adds_only
from tests.test_store import dump, folder

PROCESS = ("lot,product,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm\n"
           "A,P1,9.0,2.0,5,20,1.0\nB,P1,10.0,2.5,5,20,1.0\n")
RIBBON = ("lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3,ribbon_break_force_n\n"
          "A,1,1.05,1.50,\nA,2,1.07,1.50,\nB,1,1.10,1.50,\n")
TABLETS = ("lot,compression_force_kn,breaking_force_n,dissolution_pct\n"
           "A,10,,81.0\nB,12,90,84.5\n")
GRANULES = "lot,sieve_um,retained_g\nA,500,20\nA,250,30\nA,0,10\n"


@pytest.fixture
def store(tmp_path):
    """Lots A and B compacted: process and ribbon (no three-point bend yet), no tablets."""
    with LotStore(tmp_path / "lots.db") as s:
        s.ingest(read_folder(folder(tmp_path, "compacted", process=PROCESS, ribbon=RIBBON)))
        yield s


def _ingest(s: LotStore, path: Path, reason: str | None = None):
    return s.ingest(read_folder(path, known_lots=s.lot_ids()), reason=reason)


def test_a_table_sent_later_needs_no_reason(store, tmp_path):
    """The user's case: process and ribbon first, tablets.csv alone days later (before: refused without
    --reason, exit 2)."""
    result = _ingest(store, folder(tmp_path, "tested", tablets=TABLETS))
    assert result.lots_revised == ["A", "B"] and result.lots_added_to == ["A", "B"] and result.lots_changed == []
    assert store.ingests()[-1]["lots_revised"] == 2
    tablets = store.current_tables()["tablets"].set_index("lot")
    assert tablets.loc["B", "breaking_force_n"] == 90 and tablets.loc["A", "dissolution_pct"] == 81.0
    assert [h["revision"] for h in store.history("A")] == [1, 2]
    store.check_seals(full=True)  # the revision is sealed as any other


def test_blank_cells_filled_and_replicates_added_need_no_reason(store, tmp_path):
    """A blank breaking force filled, the three-point bend filled into stored replicates, a third ribbon
    replicate of lot A: all additions."""
    _ingest(store, folder(tmp_path, "tested", tablets=TABLETS))
    filled = TABLETS.replace("A,10,,81.0", "A,10,85,81.0")
    bend = RIBBON.replace("A,1,1.05,1.50,", "A,1,1.05,1.50,31.5") + "A,3,1.06,1.50,30.0\n"
    result = _ingest(store, folder(tmp_path, "later", tablets=filled, ribbon=bend))
    assert result.lots_added_to == ["A"] and result.lots_changed == [] and result.lots_unchanged == ["B"]
    changes = store.history("A")[-1]["changes"]
    assert {(c["table"], c["change"], c["column"], c["old"], c["new"] if c["column"] else None)
            for c in changes} == {("tablets", "value changed", "breaking_force_n", None, 85.0),
                                  ("ribbon", "value changed", "ribbon_break_force_n", None, 31.5),
                                  ("ribbon", "row added", None, None, None)}


def test_a_changed_value_still_needs_a_reason(store, tmp_path):
    """A stored value changed (a planned setting that the run did not keep) is refused without a reason,
    naming the lot and the change, and nothing is written; with one it is a change, not an addition."""
    moved = PROCESS.replace("B,P1,10.0", "B,P1,10.4")
    path = folder(tmp_path, "run", process=moved, tablets=TABLETS)
    before = dump(store.path)
    with pytest.raises(UsageError) as refused:
        _ingest(store, path)
    text = str(refused.value)
    assert "(B)" in text and "roll_force_kn_per_cm 10 -> 10.4" in text and "--reason" in text
    assert dump(store.path) == before
    result = _ingest(store, path, reason="DEV-7: run at 10.4 kN/cm")
    assert result.lots_changed == ["B"] and result.lots_added_to == ["A"] and result.lots_revised == ["A", "B"]
    assert not store.history("B")[-1]["adds_only"] and store.history("A")[-1]["adds_only"]


@pytest.mark.parametrize("case", ["replicate left out", "value cleared", "sieve row added"])
def test_removing_a_stored_value_still_needs_a_reason(store, tmp_path, case):
    """A table sent replaces the lot's stored table: a replicate left out of it is removed, a cell left blank
    is cleared. A sieve row added to a stored sieve analysis changes the shares of the stored rows."""
    if case == "sieve row added":
        _ingest(store, folder(tmp_path, "sieved", granules=GRANULES))
        files = {"granules": GRANULES + "A,1000,5\n"}
        said = "granules [sieve_um=1000.0]: row added"
    elif case == "replicate left out":
        files = {"ribbon": RIBBON.replace("A,2,1.07,1.50,\n", "") + "A,3,1.06,1.50,\n"}
        said = "ribbon [sample=2]: row removed"
    else:
        files = {"process": PROCESS.replace("A,P1,9.0", "A,,9.0")}
        said = "process: product 'P1' -> (missing)"
    path = folder(tmp_path, "again", **files)
    before = dump(store.path)
    with pytest.raises(UsageError) as refused:
        _ingest(store, path)
    assert said in str(refused.value) and "(A)" in str(refused.value)
    assert dump(store.path) == before
    assert _ingest(store, path, reason="DEV-8").lots_changed == ["A"]


def test_history_and_audit_show_the_addition(store, tmp_path):
    """What was added is in `history` (text and JSON: adds_only, the changes) and in the ingest's audit entry
    (added_to); `audit --lot` finds the ingest."""
    _ingest(store, folder(tmp_path, "tested", tablets=TABLETS))
    (entry,) = [e for e in store.audit() if e["action"] == "ingest"][-1:]
    assert entry["outputs"]["added_to"] == ["A", "B"] and entry["outputs"]["revised"] == ["A", "B"]
    assert entry["inputs"]["reason"] is None
    assert [e["id"] for e in store.audit("B", with_ingests=True)][-1] == entry["id"]
    runner = CliRunner()
    text = runner.invoke(cli, ["history", "B", "--store", str(store.path)])
    assert text.exit_code == 0, text.output
    assert "added to: no stored value changed or removed" in text.output
    assert "tablets: table added (1 row)" in text.output
    revs = json.loads(runner.invoke(cli, ["history", "B", "--store", str(store.path), "--json"]).stdout)
    assert [r["adds_only"] for r in revs] == [True, True] and revs[1]["reason"] is None


def test_the_command_says_which_lots_were_added_to_and_which_changed(store, tmp_path):
    """`ingest` text and --json: lots_revised as before (every stored lot given a new revision), and of
    them lots_added_to and lots_changed."""
    runner = CliRunner()
    tested = folder(tmp_path, "tested", tablets=TABLETS)
    out = runner.invoke(cli, ["ingest", str(tested), "--store", str(store.path)])
    assert out.exit_code == 0, out.output
    assert "Revised lots (2): A, B" in out.output and "added to, no stored value changed (2): A, B" in out.output
    fixed = folder(tmp_path, "fixed", tablets=TABLETS.replace("A,10,,81.0", "A,10,85,79.0"))
    refused = runner.invoke(cli, ["ingest", str(fixed), "--store", str(store.path)])
    assert refused.exit_code == 2 and "dissolution_pct 81 -> 79" in refused.stderr
    data = json.loads(runner.invoke(cli, ["ingest", str(fixed), "--store", str(store.path), "--json",
                                          "--reason", "DEV-9"]).stdout)
    assert (data["lots_revised"], data["lots_added_to"], data["lots_changed"]) == (["A"], [], ["A"])
    assert data["lots_unchanged"] == ["B"] and data["lots_new"] == []


def test_a_plans_lots_get_their_results_without_a_reason(store, tmp_path):
    """`linkage plan --new` writes the planned lots' process.csv (planned settings, blank manufactured_at);
    ingested with the ribbon of the lots made, then the lots' run (the same settings, the date filled) and
    more ribbon replicates: additions. A setting the run did not keep is a change (covered above). The plan's
    folder alone, its lots not made, is refused (tests/test_read_planned.py)."""
    out = CliRunner().invoke(cli, ["plan", "--new", "--lots", "3", "--range", "roll_force_kn_per_cm=3:14",
                                   "--set", "roll_gap_mm=2", "--set", "roll_speed_rpm=5", "--set",
                                   "screw_speed_rpm=30", "--set", "mill_screen_mm=1", "--product", "P1",
                                   "--out", str(tmp_path / "plan")])
    assert out.exit_code == 0, out.output
    (tmp_path / "plan" / "ribbon.csv").write_text("lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n"
                                                   + "".join(f"PLAN-00{k},1,1.05,1.50\n" for k in (1, 2, 3)),
                                                   encoding="utf-8")
    planned = _ingest(store, tmp_path / "plan")
    lots = planned.lots_new
    assert len(lots) == 3
    made = (tmp_path / "plan" / "process.csv").read_text(encoding="utf-8").splitlines()
    header = made[0].split(",")
    at = header.index("manufactured_at")
    rows = [line.split(",") for line in made[1:]]
    for k, row in enumerate(rows):
        row[at] = f"2026-12-0{k + 1}T08:00:00"
    ribbon = "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n" + "".join(
        f"{lot},{k},1.05,1.50\n" for lot in lots for k in (1, 2))
    result = _ingest(store, folder(tmp_path, "made", process="\n".join([made[0]] + [",".join(r) for r in rows]),
                                   ribbon=ribbon))
    assert result.lots_added_to == lots and result.lots_changed == []


_VALUE = st.one_of(st.none(), st.sampled_from([0.0, -0.0, 1.05, 1.5, 2.0]))


@st.composite
def _lot_rows(draw, table: str):
    """One lot's rows of ``table`` as the store keeps them: missing cells left out, keys unique."""
    key, value = ("sample", "envelope_density_g_cm3") if table == "ribbon" else ("sieve_um", "retained_g")
    keys = draw(st.lists(st.sampled_from(["1", "2", "3"] if table == "ribbon" else [0.0, 250.0, 500.0]),
                         unique=True, max_size=3))
    rows = []
    for k in keys:
        row = {"lot": "A", key: k}
        for name, cell in ((value, draw(_VALUE)), ("blend_note", draw(st.sampled_from([None, "2", 2.0, "dry"])))):
            if cell is not None:
                row[name] = cell
        rows.append(row)
    return rows


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data(), table=st.sampled_from(["ribbon", "granules"]))
def test_the_quick_test_of_an_addition_agrees_with_the_differences_history_shows(data, table):
    """The ingest tells an addition from a change in one pass that stops at the first change
    (linkage.store._only_adds); `history` writes every difference out (_diff). Drawn pairs of a lot's stored and
    sent rows (-0.0 against 0.0, an extra column's '2' against 2.0, blank cells, rows added and left out) get
    the same verdict both ways. The reference is the written-out differences, judged by adds_only."""
    old = data.draw(st.one_of(st.none(), _lot_rows(table)))
    new = data.draw(_lot_rows(table))
    assert _only_adds(table, old, new) == adds_only(_diff(table, old, new))
