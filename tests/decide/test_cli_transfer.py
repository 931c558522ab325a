"""``linkage transfer`` through the command line, on the demo lots ingested into a store.

The numbers come from linkage.decide.transfer (tested against the synthetic truth in test_transfer.py); here the
command's options, JSON keys, caution, exit codes and the equality of its answer with the library's are checked.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from linkage import CAUTION
from linkage.cli.main import cli
from linkage.demo import DEMO_DATA

ROLLS = ["--roll-diameter-mm", "400", "--roll-width-mm", "150", "--gap-mm", "2.5"]


def run(*args):
    result = CliRunner().invoke(cli, [str(a) for a in args])
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return result


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("transfer") / "lots.db"
    assert run("ingest", DEMO_DATA / "lots", "--store", path).exit_code == 0
    return path


def test_help_has_an_example():
    result = run("transfer", "--help")
    assert result.exit_code == 0 and "linkage transfer" in result.output and "roll speed" in result.output


def test_porosity_json_matches_the_library(store):
    from linkage.api import assemble
    from linkage.decide.transfer import fit_ribbon_physics, transfer

    result = run("transfer", *ROLLS, "--porosity", "0.26", "--store", store, "--json")
    assert result.exit_code == 0, result.output
    out = json.loads(result.output)
    assert out["caution"] == CAUTION and "roll speed" in out["leaves_out"]
    assert set(out["targets"][0]) >= {"ribbon_porosity", "roll_force_kn_per_cm", "roll_force_kn",
                                      "force_interval_kn_per_cm", "force_confidence_kn_per_cm", "peak_pressure_mpa",
                                      "nip_angle_deg", "inside_lots_pressure_range"}
    assert set(out["model"]["compactors"]) == {"pilot", "production"}
    lib = transfer(fit_ribbon_physics(assemble(store)), roll_diameter_mm=400, roll_width_mm=150, roll_gap_mm=2.5,
                   porosity=0.26).targets[0]
    assert out["targets"][0]["roll_force_kn_per_cm"] == pytest.approx(lib["roll_force_kn_per_cm"])
    lo, hi = out["targets"][0]["force_interval_kn_per_cm"]
    assert lo < out["targets"][0]["roll_force_kn_per_cm"] < hi


def test_window_text_has_both_ends_and_the_caution(store):
    result = run("transfer", *ROLLS, "--window", "0.22:0.30", "--store", store)
    assert result.exit_code == 0, result.output
    assert "porosity window 0.220-0.300" in result.output and CAUTION in result.output
    assert "Leaves out:" in result.output


@pytest.mark.parametrize("args, message", [
    ([], "give either --porosity or --window"),
    (["--porosity", "0.3", "--window", "0.2:0.3"], "give either --porosity or --window"),
    (["--window", "0.3:0.2"], "0 < LOW < HIGH < 1"),
    (["--window", "abc"], "expected LOW:HIGH"),
    (["--porosity", "0.3", "--wall-friction-deg", "45"], "cannot exceed --internal-friction-deg"),
])
def test_refusals_exit_2_and_say_why(store, args, message):
    result = run("transfer", *ROLLS, *args, "--store", store)
    assert result.exit_code == 2
    assert message in result.output


def test_the_command_leaves_an_audit_entry(store):
    from linkage.api import audit

    assert run("transfer", *ROLLS, "--porosity", "0.27", "--store", store).exit_code == 0
    entries = audit(store)
    assert "transfer" in set(entries["action"])


def test_rolls_without_a_nip_exit_2_with_the_reason(store):
    """The user test's case: a 15 mm gap on 20 mm rolls. Exit 2 with the reason, no NaN in any output
    (regression: "nan kN/cm", JSON nulls, a numpy RuntimeWarning). A refusal: no outside source."""
    for extra in ([], ["--json"]):
        result = run("transfer", "--roll-diameter-mm", 20, "--roll-width-mm", 40, "--gap-mm", 15, "--porosity", 0.28,
                     "--store", store, *extra)
        assert result.exit_code == 2, result.output
        assert "no nip angle in Johanson's rolling theory" in result.stderr and "the gap must be below" in result.stderr
        assert result.stdout == "" and "nan" not in result.output.lower()
