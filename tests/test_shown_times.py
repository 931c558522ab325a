"""The text tables write a recorded time as every other text of linkage does (``YYYY-MM-DD HH:MM:SS UTC``,
``linkage.exceptions.shown_time``: the set-aside messages, the report's heading, the what-if page and sheet), while
``--json`` keeps the recorded ISO 8601 text (a contract). Before, ``lots``, ``history``, ``audit`` and ``models``
printed the recorded text (``2026-12-05T16:50:54.123456+00:00``).

Regression tests of a display form: no outside source is needed. The expected text is computed here from the
recorded time with the standard library (``datetime.fromisoformat``, ``astimezone(timezone.utc)``), not by the
function under test."""

from __future__ import annotations

import json
import re
from datetime import datetime, timezone
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage import api
from linkage.cli.main import cli

EXAMPLE = Path(__file__).resolve().parent / "data" / "template-example"
REASON = "DEV-2026-014: blend error"
#: the recorded form (ISO 8601 with a 'T' and an offset), which the text tables no longer show
RECORDED = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d")


def _shown(recorded: str) -> str:
    return datetime.fromisoformat(recorded).astimezone(timezone.utc).strftime("%Y-%m-%d %H:%M:%S") + " UTC"


def _run(*args) -> str:
    result = CliRunner().invoke(cli, [str(a) for a in args], env={"LINKAGE_STORE": None}, catch_exceptions=False)
    assert result.exit_code == 0, result.output
    return result.stdout


@pytest.fixture()
def store(tmp_path) -> Path:
    path = tmp_path / "site.db"
    api.ingest(EXAMPLE, path)
    api.set_aside("EX-001", path, reason=REASON)
    return path


def test_lots_writes_when_a_lot_was_set_aside_as_the_set_aside_message_does(store):
    [row] = [r for r in json.loads(_run("lots", "--store", store, "--json")) if r["lot"] == "EX-001"]
    assert RECORDED.match(row["set_aside_at"])  # --json: as recorded
    text = _run("lots", "--store", store)
    assert f"(by {row['set_aside_by']}, {_shown(row['set_aside_at'])})" in text, text
    assert not RECORDED.search(text), text


def test_history_writes_its_revisions_and_decisions_to_the_second_in_utc(store):
    revisions = json.loads(_run("history", "EX-001", "--store", store, "--json"))
    text = _run("history", "EX-001", "--store", store)
    times = [rev["at"] for rev in revisions] + [e["at"] for rev in revisions for e in rev.get("set_aside_events", [])]
    assert len(times) == 2 and all(RECORDED.match(t) for t in times)  # one revision, one decision; --json unchanged
    for at in times:
        assert f", {_shown(at)}, by " in text, (at, text)
    assert not RECORDED.search(text), text


def test_audit_writes_each_entry_to_the_second_in_utc(store):
    entries = json.loads(_run("audit", "--store", store, "--json"))
    assert {e["action"] for e in entries} >= {"ingest", "set-aside"}
    assert all(RECORDED.match(e["at"]) for e in entries)  # --json: as recorded
    lines = _run("audit", "--store", store).splitlines()
    assert lines[0].split()[:3] == ["id", "at", "user"]
    for entry in entries:
        [line] = [ln for ln in lines if ln.split()[:1] == [str(entry["id"])]]
        assert line.split(None, 1)[1].startswith(_shown(entry["at"])), line
    assert not RECORDED.search("\n".join(lines))


def test_models_writes_the_training_time_in_utc_whatever_its_recorded_offset():
    """A time recorded with another offset (a registry written elsewhere) is turned to UTC, not cut at 19
    characters as before (which kept the local clock time under the header 'created (UTC)')."""
    from linkage.cli.model_cmds import format_models

    recorded = "2026-12-05T18:50:54.123456+02:00"
    rows = [{"model_id": "m-20261205T165054Z-1a2b3c4d", "created_at": recorded, "n_lots": 48, "status": "ok",
             "role": "champion", "latest": True, "in_service": True, "targets": {}},
            {"model_id": "m-foreign", "created_at": None, "n_lots": None, "status": "foreign", "role": None}]
    text = format_models(rows)
    assert "2026-12-05 16:50:54 UTC" in text and "18:50" not in text, text
    assert not RECORDED.search(text.replace("m-20261205T165054Z", "")), text
    [header, first, second] = text.splitlines()[:3]
    assert header.index("lots") + len("lots") == first.index("48") + len("48")  # right-aligned under its header
    assert "None" not in second


def test_the_reports_set_aside_decisions_write_their_time_as_the_other_texts_do():
    """A user test read "(by root, 2026-12-05T17:17:52.782+00:00)" in the report's lots section: the decision's
    time is written as every other text writes a recorded time."""
    from types import SimpleNamespace

    from linkage.report.html import _Builder, _set_aside_part

    recorded = "2026-12-05T19:17:52.782+02:00"  # another offset: turned to UTC
    chain = SimpleNamespace(training={"lots": ["EX-002"]}, model_id="m-20261205T165054Z-1a2b3c4d")
    b = _Builder(parallel=False)
    try:
        _set_aside_part(b, chain, {"EX-001": {"reason": REASON, "user": "root", "at": recorded}})
    finally:
        b.close()
    text = "".join(b.parts)
    assert f"EX-001: {REASON} (by root, {_shown(recorded)})" in text, text
    assert _shown(recorded) == "2026-12-05 17:17:52 UTC" and not RECORDED.search(text), text


def test_the_readmes_recorded_example_has_the_stores_precision(store):
    """The README gave the recorded ISO text of `lots`, `history` and `audit --json` as '…54.123456+00:00'; the
    store records to the millisecond ('.782+00:00'). The README's example for them has the digits the store
    writes (a documentation regression: no outside source)."""
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    line = next(x for x in readme.splitlines() if x.startswith("- Changed (times in the text tables)"))
    recorded = json.loads(_run("audit", "--store", store, "--json"))[0]["at"]
    digits = len(re.search(r"\.(\d+)", recorded).group(1))
    said = re.search(r"`lots`, `history` and `audit --json`: `([^`]+)`", line)
    assert said, line
    assert len(re.search(r"\.(\d+)", said.group(1)).group(1)) == digits == 3, (said.group(1), recorded)
