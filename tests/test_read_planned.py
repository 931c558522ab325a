"""A plan's lots are ingested once made, not as planned (user test, 2026-12-05).

`linkage plan --out` writes the planned lots' process.csv (planned settings) and plan.json. Ingested as
written, the planned lots stood in the store as made lots: in `lots`, in `assemble` and in the watch's count
("58 lots, 10 since training"), with planned settings stored as if run. A folder holding plan.json is now
refused for the plan's lots it gives no ribbon measurement for and the store does not hold. Regression tests
of a refusal: no outside source needed.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.decide.plan import start_design, write_plan
from linkage.exceptions import InputError
from linkage.read import read_folder

RIBBON_HEADER = "lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3\n"


def _plan(folder, n=4):
    plan = start_design({"roll_force_kn_per_cm": (3.0, 14.0), "roll_gap_mm": (1.5, 3.5)}, n, seed=3)
    write_plan(plan, folder)
    return [lot.lot for lot in plan.lots]


def test_a_plans_folder_as_written_is_refused_naming_its_lots(tmp_path):
    lots = _plan(tmp_path / "plan")
    with pytest.raises(InputError) as caught:
        read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    (problem,) = [p for p in caught.value.problems if "planned lot" in p.rule]
    assert problem.file == "process.csv" and problem.row == 2 and problem.column == "lot"
    assert problem.value == lots[0] and "4 planned lots" in problem.rule and "rows 2-5 (4 rows)" in problem.rule
    assert "not made yet" in problem.rule and "plan.json" in problem.rule


def test_only_the_lots_not_made_are_refused_and_made_ones_pass(tmp_path):
    lots = _plan(tmp_path / "plan")
    ribbon = tmp_path / "plan" / "ribbon.csv"
    ribbon.write_text(RIBBON_HEADER + "".join(f"{lot},1,1.05,1.50\n" for lot in lots[:3]), encoding="utf-8")
    with pytest.raises(InputError) as caught:
        read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    (problem,) = [p for p in caught.value.problems if "planned lot" in p.rule]
    assert problem.value == lots[3] and "1 planned lot " in problem.rule and "row 5" in problem.rule
    # the fourth lot made too, or already in the store: nothing refused
    read_folder(tmp_path / "plan", known_lots=["OLD-001", lots[3]])
    ribbon.write_text(RIBBON_HEADER + "".join(f"{lot},1,1.05,1.50\n" for lot in lots), encoding="utf-8")
    assert set(read_folder(tmp_path / "plan", known_lots=["OLD-001"]).lots()) == set(lots)


def test_a_plan_json_that_is_no_plan_or_lots_renamed_are_not_judged(tmp_path):
    lots = _plan(tmp_path / "plan")
    process = tmp_path / "plan" / "process.csv"
    text = process.read_text(encoding="utf-8")
    process.write_text(text.replace("PLAN-", "Q26-"), encoding="utf-8")  # the lab gave the lots their own ids
    read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    process.write_text(text, encoding="utf-8")
    (tmp_path / "plan" / "plan.json").write_text(json.dumps({"something": "else"}), encoding="utf-8")
    read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    assert lots[0].startswith("PLAN-")


def test_the_cli_refuses_with_exit_2_and_writes_nothing(tmp_path):
    _plan(tmp_path / "plan", n=2)
    store = tmp_path / "lots.db"
    out = CliRunner().invoke(cli, ["ingest", str(tmp_path / "plan"), "--store", str(store)])
    assert out.exit_code == 2 and "not made yet" in out.stderr
    assert not store.exists()


def test_a_plan_lot_under_another_spelling_or_with_a_refused_ribbon_cell_is_judged_as_itself(tmp_path):
    """Review of the first version: a planned lot written 'plan-002' slipped through (plans matched by exact
    spelling, the reader's one lot identity is linkage.lotid.lot_key), and a ribbon file refused for one cell
    made every planned lot 'not made yet' (only tables read whole were looked at)."""
    lots = _plan(tmp_path / "plan", n=2)
    process = tmp_path / "plan" / "process.csv"
    process.write_text(process.read_text(encoding="utf-8").replace(lots[1], lots[1].lower()), encoding="utf-8")
    with pytest.raises(InputError) as caught:
        read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    (problem,) = [p for p in caught.value.problems if "planned lot" in p.rule]
    assert "2 planned lots" in problem.rule and lots[1].lower() in problem.rule
    process.write_text(process.read_text(encoding="utf-8").replace(lots[1].lower(), lots[1]), encoding="utf-8")
    (tmp_path / "plan" / "ribbon.csv").write_text(  # both measured, one skeletal density refused (negative)
        RIBBON_HEADER + f"{lots[0]},1,1.05,-1.50\n{lots[1]},1,1.05,1.50\n", encoding="utf-8")
    with pytest.raises(InputError) as caught:
        read_folder(tmp_path / "plan", known_lots=["OLD-001"])
    rules = [p.rule for p in caught.value.problems]
    assert any("skeletal" in (p.column or "") for p in caught.value.problems)
    assert not any("planned lot" in r for r in rules)

