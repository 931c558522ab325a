"""The store commands through the command line: exit codes, messages, output.

Exit codes are the project's contract (linkage/exceptions.py): 0 success,
2 bad input or usage (a --store that names no lot store included), 3 store busy,
5 a damaged lot store (tests/test_cli_exit_codes.py covers every code).
"""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli

# a copy of the shared template example (four invented lots), kept here so a clone alone runs these tests
TEMPLATE = Path(__file__).resolve().parent / "data" / "template-example"


@pytest.fixture
def lab(tmp_path):
    if not TEMPLATE.is_dir():
        pytest.skip(f"template example not found at {TEMPLATE}")
    folder = tmp_path / "lab"
    shutil.copytree(TEMPLATE, folder)
    return folder


def run(*args, env=None):
    result = CliRunner().invoke(cli, [str(a) for a in args], env=env)
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result


@pytest.mark.parametrize("command", ["ingest", "lots", "history", "assemble"])
def test_help_has_an_example(command):
    result = run(command, "--help")
    assert result.exit_code == 0
    assert "Example:" in result.output and f"linkage {command}" in result.output
    assert "--store" in result.output


def test_ingest_then_again(lab, tmp_path):
    db = tmp_path / "s.db"
    first = run("ingest", lab, "--store", db)
    assert first.exit_code == 0, first.output
    assert "New lots (4): EX-001, EX-002, EX-003, EX-004" in first.output
    assert "ribbon.csv" in first.output and "16 rows" in first.output  # ribbon.csv has 16 data lines
    second = run("ingest", lab, "--store", db, "--json")
    assert second.exit_code == 0
    data = json.loads(second.stdout)
    assert data["lots_new"] == [] and data["lots_unchanged"] == ["EX-001", "EX-002", "EX-003", "EX-004"]
    assert data["ingest_id"] == 2


def test_bad_input_exit_2_and_nothing_written(lab, tmp_path):
    db = tmp_path / "s.db"
    text = (lab / "ribbon.csv").read_text().replace("EX-002,2,1.0819,1.4687", "EX-002,2,1.5819,1.4687")
    (lab / "ribbon.csv").write_text(text)
    (lab / "tablets.csv").write_text((lab / "tablets.csv").read_text().replace("75.7", "abc"))
    result = run("ingest", lab, "--store", db)
    assert result.exit_code == 2
    err = result.stderr
    assert "2 problems found; nothing was written." in err
    assert "ribbon.csv, row 7, column 'envelope_density_g_cm3', value 1.5819" in err
    assert "tablets.csv, row 3, column 'dissolution_pct', value 'abc': not a number" in err
    assert not db.exists()  # a failed first ingest creates no store


def test_failed_ingest_leaves_an_existing_store_unchanged(lab, tmp_path):
    db = tmp_path / "s.db"
    assert run("ingest", lab, "--store", db).exit_code == 0
    before = db.read_bytes()
    extra = tmp_path / "more"
    extra.mkdir()
    (extra / "tablets.csv").write_text("lot,compression_force_kn\nEX-009,12\n")
    result = run("ingest", extra, "--store", db)
    assert result.exit_code == 2
    assert "tablets.csv, row 2, column 'lot', value 'EX-009': lot 'EX-009' has no process record" in result.stderr
    assert db.read_bytes() == before


def test_store_from_environment(lab, tmp_path):
    db = tmp_path / "env.db"
    assert run("ingest", lab, env={"LINKAGE_STORE": str(db)}).exit_code == 0
    assert db.exists()
    result = run("lots", "--json", env={"LINKAGE_STORE": str(db)})
    assert [r["lot"] for r in json.loads(result.stdout)] == ["EX-001", "EX-002", "EX-003", "EX-004"]


def test_lots_text_and_json(lab, tmp_path):
    db = tmp_path / "s.db"
    run("ingest", lab, "--store", db)
    text = run("lots", "--store", db)
    assert text.exit_code == 0
    lines = text.output.splitlines()
    assert lines[0].split() == ["lot", "product", "rev", "process", "ribbon", "granules", "tablets", "state"]
    # EX-002: 5 ribbon replicates and 11 sieve rows in the template files
    assert lines[2].split()[:2] == ["EX-002", "-"] and "5 (" in lines[2] and "11 (100%)" in lines[2]
    rows = json.loads(run("lots", "--store", db, "--json").stdout)
    assert rows[0]["ribbon_rows"] == 4 and rows[0]["product"] is None
    assert "no lots of product X" in run("lots", "--store", db, "--product", "X").output


def test_history(lab, tmp_path):
    db = tmp_path / "s.db"
    run("ingest", lab, "--store", db)
    (lab / "tablets.csv").write_text((lab / "tablets.csv").read_text().replace("81.0", "79.5"))
    refused = run("ingest", lab, "--store", db)  # a revision without its reason (issue 15 item 5)
    assert refused.exit_code == 2 and "--reason" in refused.stderr and "EX-001" in refused.stderr
    assert "Revised lots (1): EX-001" in run("ingest", lab, "--store", db, "--reason", "DEV-7: re-tested").output
    result = run("history", "EX-001", "--store", db)
    assert result.exit_code == 0
    assert "Lot EX-001: 2 revisions" in result.output
    assert "tablets: dissolution_pct 81 -> 79.5" in result.output
    assert "(unchanged, from ingest 1)" in result.output
    assert "reason: DEV-7: re-tested" in result.output
    revs = json.loads(run("history", "EX-001", "--store", db, "--json").stdout)
    assert revs[1]["changes"][0]["old"] == 81.0 and revs[1]["changes"][0]["new"] == 79.5
    missing = run("history", "EX-01", "--store", db)
    assert missing.exit_code == 2 and "lot 'EX-01' is not in the store" in missing.stderr


def test_commands_on_a_missing_or_foreign_store(tmp_path):
    result = run("lots", "--store", tmp_path / "none.db")
    assert result.exit_code == 2 and "no lot store at" in result.stderr
    assert not (tmp_path / "none.db").exists()
    foreign = tmp_path / "foreign.db"
    foreign.write_text("not a database")
    result = run("history", "A", "--store", foreign)
    assert result.exit_code == 2 and "not a SQLite file" in result.stderr


def test_assemble(lab, tmp_path):
    pytest.importorskip("linkage.assemble")
    db = tmp_path / "s.db"
    run("ingest", lab, "--store", db)
    out = tmp_path / "table.csv"
    result = run("assemble", "--store", db, "--out", out, "--spec", lab / "spec.toml")
    assert result.exit_code == 0, result.output
    with open(out, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["lot"] for r in rows] == ["EX-001", "EX-002", "EX-003", "EX-004"]
    assert "dissolution at 30 min" in result.output
    # dissolution_pct in tablets.csv: 81.0, 75.7, 74.0, 77.1 -> one lot meets min = 80
    assert "dissolution_pct >= 80: 1/4" in result.output
    summary = run("assemble", "--store", db)
    assert summary.exit_code == 0 and "ribbon_porosity" in summary.output and "4/4" in summary.output


def test_assemble_out_makes_a_missing_folder(lab, tmp_path):
    """``assemble --out`` into folders that do not exist yet makes them, as report --out, predict --html,
    plan --out and space --png do (regression: it printed the table's size, then failed on its temporary
    file with exit code 5). A behaviour of this project, no outside source."""
    pytest.importorskip("linkage.assemble")
    db = tmp_path / "s.db"
    run("ingest", lab, "--store", db)
    out = tmp_path / "new" / "deeper" / "lots.csv"
    result = run("assemble", "--store", db, "--out", out)
    assert result.exit_code == 0, result.output
    with open(out, newline="") as fh:
        assert [r["lot"] for r in csv.DictReader(fh)] == ["EX-001", "EX-002", "EX-003", "EX-004"]
    assert [p.name for p in out.parent.iterdir()] == ["lots.csv"]  # no temporary file left


def test_assemble_empty_store(tmp_path):
    pytest.importorskip("linkage.assemble")
    from linkage.store import LotStore

    LotStore(tmp_path / "e.db").close()
    result = run("assemble", "--store", tmp_path / "e.db")
    assert result.exit_code == 2 and "holds no lots" in result.stderr


def test_a_product_with_no_lot_is_refused_naming_the_stores_products(lab, tmp_path):
    """A user test found 'watch --product nope' answered with 'the process table is required and has no rows'.
    A product named that has no lot in the store is refused (exit 2, nothing computed), with the close names of
    the store's products (difflib) or, without one, what the store holds. No outside reference: a refusal."""
    db = tmp_path / "s.db"
    path = lab / "process.csv"
    rows = list(csv.reader(path.open(encoding="utf-8")))
    rows = [rows[0] + ["product"]] + [r + ["QZ-417 200 mg"] for r in rows[1:]]
    with path.open("w", encoding="utf-8", newline="") as f:
        csv.writer(f, lineterminator="\n").writerows(rows)
    assert run("ingest", lab, "--store", db).exit_code == 0
    result = run("assemble", "--store", db, "--product", "QZ-417 20 mg")
    assert result.exit_code == 2
    assert "no lot of product 'QZ-417 20 mg' in the store" in result.output
    assert "did you mean 'QZ-417 200 mg'?" in result.output
    far = run("assemble", "--store", db, "--product", "other")
    assert far.exit_code == 2 and "its products: 'QZ-417 200 mg'" in far.output
    assert run("assemble", "--store", db, "--product", "QZ-417 200 mg").exit_code == 0


def test_audit_of_a_lot_not_in_the_store_is_refused(lab, tmp_path):
    """``audit --lot`` with an id the store does not hold and no entry names: exit 2 with the nearest ids,
    as ``history`` says (regression: "No audit entries", exit 0). A lot only predicted for, never ingested,
    keeps its entries. A refusal: no outside source."""
    import linkage.api
    from linkage.exceptions import UsageError
    from linkage.store import LotStore

    db = tmp_path / "s.db"
    run("ingest", lab, "--store", db)
    typo = run("audit", "--store", db, "--lot", "EX-0O1")
    assert typo.exit_code == 2, typo.output
    assert f"lot 'EX-0O1' is not in the store {db}; did you mean EX-001" in typo.stderr
    with pytest.raises(UsageError, match="not in the store"):
        linkage.api.audit(db, lot="EX-0O1")
    stored = run("audit", "--store", db, "--lot", "EX-001", "--json")
    assert stored.exit_code == 0 and [e["action"] for e in json.loads(stored.stdout)] == ["ingest"]
    with LotStore(db) as s:
        s.log("predict", lot="PLANNED-1", model_id="m-1", inputs={}, outputs={})
    planned = run("audit", "--store", db, "--lot", "PLANNED-1", "--json")
    assert planned.exit_code == 0 and [e["lot"] for e in json.loads(planned.stdout)] == ["PLANNED-1"]


def test_every_option_of_every_command_says_what_it_does():
    """Each option of each command has a help text (regression: watch's --model and --product, and --seed of
    six commands, had none). No outside source."""
    import click

    from linkage.cli.main import COMMANDS

    ctx = click.Context(cli)
    bare = [(name, p.opts[0]) for name in COMMANDS for p in cli.get_command(ctx, name).params
            if isinstance(p, click.Option) and not (p.help or "").strip()]
    assert bare == []
    watch = " ".join(run("watch", "--help").output.split())
    assert "--model TEXT Model id from 'linkage models', or 'latest'." in watch
    assert "--product TEXT Watch only the lots of this product." in watch


def test_history_and_audit_take_a_lot_with_spaces_as_predict_does(lab, tmp_path):
    """A second user test: `predict --lot ' q26-005 '` found the stored lot, but `history ' ex-001 '` and
    `audit --lot ' ex-001 '` said "not in the store". The id is now read as the reader reads a text cell
    (surrounding spaces dropped, inner runs one space; linkage.lotid.reader_spelling) before the lot identity.
    A regression test of a refusal: no outside source."""
    db = tmp_path / "s.db"
    run("ingest", lab, "--store", db)
    history = run("history", " ex-001 ", "--store", db)
    assert history.exit_code == 0, history.output
    assert history.stdout.startswith("Lot EX-001: 1 revision")
    audit = run("audit", "--store", db, "--lot", " ex-001 ", "--json")
    assert audit.exit_code == 0, audit.output
    assert [e["action"] for e in json.loads(audit.stdout)] == ["ingest"]


def test_verify_counts_one_of_a_kind_in_the_singular(lab, tmp_path):
    """A user test read "1 predictions" in verify's text. Each count says one thing in the singular and any other
    number in the plural; --json keeps its keys (plural) and numbers. A wording regression: no outside source."""
    import json

    store = tmp_path / "s.db"
    assert run("ingest", lab, "--store", store).exit_code == 0  # one ingest of the four lots
    counts = json.loads(run("verify", "--store", store, "--json").stdout)["store_checked"]
    assert counts["ingests"] == 1 and counts["predictions"] == 0, counts
    text = run("verify", "--store", store).stdout
    assert "1 ingest," in text and "1 ingests" not in text, text
    assert "0 predictions" in text and f"{counts['lot tables']} lot tables" in text, text
    from linkage.integrity import counted

    assert [counted(n, "audit entries") for n in (0, 1, 2)] == ["0 audit entries", "1 audit entry", "2 audit entries"]
    assert counted(1, "models") == "1 model" and counted(3, "models") == "3 models"


@pytest.fixture
def alarm_store(lab, tmp_path):
    """The template's four lots, and audit entries that name some as flagged by the watch's alarm:
    ``linkage audit --lot X`` lists the entries that name X as flagged by the watch's alarm, and the watch's entry
    names its alarmed lots (a user test: ``audit --lot Q28-003`` listed only the lot's ingest, not the watch that
    alarmed on it nor the retrain and promote entries that name it as flagged; the watch's line "6 alarm(s) on 16
    lot(s)" named no lot). ``history`` of a lot the store does not hold points to ``audit --lot`` when entries name it.

    Regression tests of what the audit trail lists and says: they need no outside source."""
    from linkage.store import LotStore

    db = tmp_path / "s.db"
    assert run("ingest", lab, "--store", db).exit_code == 0
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


def test_audit_of_a_lot_lists_the_watch_retrain_and_promote_entries_that_flag_it(alarm_store):
    assert _listed(alarm_store, "EX-002") == [("ingest", None), ("watch", "m-1"), ("promote", "m-2")]
    # under another spelling of the lot (letter case, a Unicode dash), as the lot's own entries are found
    assert _listed(alarm_store, "ex‐002") == _listed(alarm_store, "EX-002")
    assert _listed(alarm_store, "EX-003") == [("ingest", None), ("watch", "m-1")]
    assert _listed(alarm_store, "EX-004") == [("ingest", None), ("watch", "m-2")]  # new, not alarmed, in m-1's watch
    assert _listed(alarm_store, "EX-001") == [("ingest", None)]
    # the JSON keeps every key it had
    entry = json.loads(run("audit", "--store", alarm_store, "--lot", "EX-003", "--json").stdout)[1]
    assert set(entry) == {"id", "at", "user", "action", "lot", "model_id", "inputs", "outputs"}


def test_audit_of_a_lot_without_sqlites_json_functions_lists_the_same_entries(alarm_store):
    """Regression (a review: SQLite before 3.38 may be built without its JSON functions, and the query of the
    entries that flag a lot would then fail as "no such function", exit 5, read as store damage); no outside
    source needed: the reference is the same store read with the functions."""
    import sqlite3

    from linkage.store import LotStore

    class WithoutJson:  # the store's connection as such a build answers: json_valid/json_each unknown
        def __init__(self, conn):
            self._conn = conn

        def execute(self, sql, *args):
            if "json_each" in sql:
                raise sqlite3.OperationalError("no such function: json_valid")
            return self._conn.execute(sql, *args)

        def __getattr__(self, name):
            return getattr(self._conn, name)

    with LotStore(alarm_store, create=False) as s:
        expected = {lot: [(e["action"], e["model_id"]) for e in s.audit(lot)] for lot in ("EX-002", "ex‐003")}
        s._conn = WithoutJson(s._conn)
        try:
            found = {lot: [(e["action"], e["model_id"]) for e in s.audit(lot)] for lot in ("EX-002", "ex‐003")}
        finally:
            s._conn = s._conn._conn
    assert found == expected and expected["EX-002"] == [("watch", "m-1"), ("promote", "m-2")]  # ingests: --lot's


def test_the_watch_entry_names_its_alarmed_lots(alarm_store):
    from linkage.results import _audit_outcome

    text = run("audit", "--store", alarm_store, "--lot", "EX-003").output
    assert "2 alarm(s) on 3 lot(s) since training: lot(s) EX-002, EX-003" in text
    many = {"action": "watch", "outputs": {"alarms": ["…"] * 7, "alarmed_lots": [f"L{i}" for i in range(7)],
                                           "new_lots": [f"L{i}" for i in range(9)]}}
    assert _audit_outcome(many)[0] == "7 alarm(s) on 9 lot(s) since training: lot(s) L0, L1, L2, L3, L4 and 2 more"
    # an entry written before the lots were recorded says what it said
    older = {"action": "watch", "outputs": {"alarms": ["…"] * 2, "new_lots": ["A", "B", "C"]}}
    assert _audit_outcome(older)[0] == "2 alarm(s) on 3 lot(s) since training"


def test_history_of_a_lot_not_stored_points_to_its_audit_entries(alarm_store):
    named = run("history", "Q29-001", "--store", alarm_store)
    assert named.exit_code == 2
    assert "lot 'Q29-001' is not in the store" in named.stderr
    assert "the audit trail has entries naming it: linkage audit --lot Q29-001" in named.stderr
    unnamed = run("history", "Q29-999", "--store", alarm_store)
    assert unnamed.exit_code == 2 and "linkage audit --lot" not in unnamed.stderr
