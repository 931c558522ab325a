"""Chain specification: defaults, the TOML round trip and every refusal."""

from __future__ import annotations

import pytest

from linkage.exceptions import InputError, SpecError
from linkage.models.chain import ChainSpec, StageSpec


def test_default_chain_is_the_issue_chain():
    c = ChainSpec.default()
    assert [s.name for s in c.stages] == ["ribbon", "granules", "tablets"]
    assert c.root_inputs() == ["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm",
                               "mill_screen_mm", "compression_force_kn"]
    assert c.targets() == ["ribbon_porosity", "granule_d50_um", "fines_pct", "tensile_strength_mpa",
                           "weight_rsd_pct", "friability_pct", "dissolution_pct", "breaking_force_n"]
    assert c.stage_of("fines_pct").name == "granules"
    assert c.stage_of("breaking_force_n").name == "tablets"  # issue 13: modelled directly


def test_toml_round_trip(tmp_path):
    c = ChainSpec.default()
    path = tmp_path / "chain.toml"
    path.write_text(c.to_toml(), encoding="utf-8")
    back = ChainSpec.from_toml(path)
    assert back == c
    assert back.stages[0].monotone == {"ribbon_porosity": {"roll_force_kn_per_cm": -1, "roll_gap_mm": 1}}


def test_extra_root_inputs_are_allowed():
    text = """
[[stage]]
name = "ribbon"
inputs = ["roll_force_kn_per_cm", "blend_moisture_pct"]
targets = ["ribbon_porosity"]

[[stage]]
name = "tablets"
inputs = ["ribbon_porosity", "compression_force_kn"]
targets = ["dissolution_pct"]
"""
    c = ChainSpec.from_toml_text(text)
    assert c.root_inputs() == ["roll_force_kn_per_cm", "blend_moisture_pct", "compression_force_kn"]


def test_every_problem_is_reported_at_once():
    text = """
colour = "blue"

[[stage]]
name = "tablets"
inputs = ["ribbon_porosity", "granule_d50_um"]
targets = ["dissolution_pct"]
speed = 3

[[stage]]
name = "granules"
inputs = ["ribbon_porosity", "mill_screen_mm"]
targets = ["granule_d50_um", "dissolution_pct"]

[stage.monotone.granule_d50_um]
roll_gap_mm = 1
"""
    with pytest.raises(SpecError) as exc:
        ChainSpec.from_toml_text(text, source="chain.toml")
    msg = str(exc.value)
    assert "unknown key 'colour'" in msg
    assert "stage 1: unknown key 'speed'" in msg
    assert "'dissolution_pct' is a target of stage 1 and again of stage 2" in msg
    assert "uses 'granule_d50_um', which stage 2 ('granules') produces" in msg
    assert "monotone.granule_d50_um names 'roll_gap_mm', which is not an input" in msg
    assert len(exc.value.problems) == 5
    assert all(p.file == "chain.toml" for p in exc.value.problems)


def test_cycle_within_a_stage_and_bad_names():
    with pytest.raises(SpecError, match="both an input and a target of the same stage"):
        ChainSpec([StageSpec("s", ["a", "b"], ["b"])])
    with pytest.raises(SpecError, match="not a numeric column"):
        ChainSpec([StageSpec("s", ["lot"], ["b"])])
    with pytest.raises(SpecError, match="used twice"):
        ChainSpec([StageSpec("s", ["a"], ["b"]), StageSpec("s", ["b"], ["c"])])
    with pytest.raises(SpecError, match="must be -1, 0 or 1"):
        ChainSpec([StageSpec("s", ["a"], ["b"], {"b": {"a": 2}})])


def test_bad_toml_and_missing_file(tmp_path):
    with pytest.raises(SpecError, match="not valid TOML"):
        ChainSpec.from_toml_text("[[stage]\nname=")
    with pytest.raises(SpecError, match="no \\[\\[stage\\]\\] table"):
        ChainSpec.from_toml_text("")
    with pytest.raises(InputError, match="chain file not found"):
        ChainSpec.from_toml(tmp_path / "nope.toml")
