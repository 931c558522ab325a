"""A mistyped setting name (``--set roll_forse=8``) is refused with the nearest valid name suggested, as the
readers do for headers. Regression tests of a refusal's message (no outside source); the suggestion is
difflib's ratio (Python standard library), checked here against difflib itself."""

from __future__ import annotations

import difflib

import pytest

from linkage.decide.plan import start_design
from linkage.exceptions import UsageError
from linkage.nearest import CUTOFF, PREFIX_CUTOFF, did_you_mean, nearest
from linkage.schema import QUALITY_ATTRIBUTES

SETTINGS = ["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm"]


def test_a_name_typed_without_its_unit_is_matched_by_its_beginning():
    # the whole-name ratio of 'roll_forse' to 'roll_force_kn_per_cm' is 2*9/30 = 0.6, at the edge; the beginning
    # of the same length, 'roll_force', is 0.9 (difflib, Python standard library)
    assert difflib.SequenceMatcher(None, "roll_forse", "roll_force").ratio() == pytest.approx(0.9)
    assert 0.9 >= PREFIX_CUTOFF
    assert nearest("roll_forse", SETTINGS) == "roll_force_kn_per_cm"
    assert did_you_mean("roll_forse", SETTINGS) == " (did you mean 'roll_force_kn_per_cm'?)"


def test_a_whole_name_mistyped_is_difflibs_closest():
    for typed in ("rol_gap_mm", "roll_force_kn_per_m", "screw_sped_rpm"):
        assert nearest(typed, SETTINGS) == difflib.get_close_matches(typed, SETTINGS, n=1, cutoff=CUTOFF)[0]


def test_nothing_near_suggests_nothing():
    assert nearest("zzz", SETTINGS) is None and did_you_mean("zzz", SETTINGS) == ""


def test_the_readers_and_the_spec_suggest_a_whole_name_only_as_difflib_does():
    """The readers' and the spec's suggestions (their ``_suggest``, now :func:`did_you_mean` without matching
    beginnings) are difflib's closest whole name at the cutoff 0.6, as they were before they shared it: 'screw' is
    near 'screw_speed_rpm' by its beginning only (whole ratio 2*5/20 = 0.5), so they suggest nothing for it."""
    from linkage.read.mapping import _suggest as reader_suggest
    from linkage.spec import _suggest as spec_suggest

    def difflib_text(typed, choices):
        near = difflib.get_close_matches(typed, list(choices), n=1, cutoff=0.6)
        return f" (did you mean '{near[0]}'?)" if near else ""

    assert nearest("screw", SETTINGS) == "screw_speed_rpm" and reader_suggest("screw", SETTINGS) == ""
    for typed in ("screw", "rol_gap_mm", "screw_sped_rpm", "zzz", "roll_forse"):
        assert reader_suggest(typed, SETTINGS) == difflib_text(typed, SETTINGS)
        assert did_you_mean(typed, SETTINGS, by_beginning=False) == difflib_text(typed, SETTINGS)
    for typed in ("tensile", "dissolution", "porosity_pc", "zzz"):
        assert spec_suggest(typed) == difflib_text(typed, sorted(QUALITY_ATTRIBUTES))


def test_plan_set_suggests_the_nearest_setting():
    with pytest.raises(UsageError) as caught:
        start_design({"roll_force_kn_per_cm": (3.0, 14.0)}, 4, held={"roll_gap_m": 2.0})
    assert "--set roll_gap_m: not a setting of the template (did you mean 'roll_gap_mm'?)" in str(caught.value)
