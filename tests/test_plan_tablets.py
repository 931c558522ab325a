"""``plan --out`` writes ``tablets.csv`` when the plan sets *or holds* the compression force: a campaign's plan
holds it at the window's value, and the lab presses the planned lots at it. README said "only when the plan sets
the compression force (--set ...)"; the code's behaviour is kept and README made true to it. Regression test (no
outside source): the written files against README's sentence."""

from __future__ import annotations

import csv
from pathlib import Path

from linkage.decide.plan import Plan, PlannedLot, write_plan

ROOT = Path(__file__).resolve().parents[1]


def _plan(held: dict) -> Plan:
    lots = [PlannedLot(f"PLAN-00{i}", i, {"roll_force_kn_per_cm": 4.0 + i, **held}, "test") for i in (1, 2)]
    return Plan(kind="augment", method="test", seed=0, ranges={"roll_force_kn_per_cm": (3.0, 14.0)}, held=held,
                lots=lots)


def test_a_held_compression_force_writes_tablets_and_readme_says_so(tmp_path):
    written = {p.name for p in write_plan(_plan({"compression_force_kn": 13.97}), tmp_path / "held")}
    assert "tablets.csv" in written
    with open(tmp_path / "held" / "tablets.csv", newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert [float(r["compression_force_kn"]) for r in rows] == [13.97, 13.97]
    assert "tablets.csv" not in {p.name for p in write_plan(_plan({}), tmp_path / "none")}
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert "`tablets.csv` only when the plan sets or holds the compression force" in readme
    assert "only when the plan sets the compression force (`--set" not in readme
