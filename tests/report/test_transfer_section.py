"""The report's transfer section (linkage.report.transfer_section) on the synthetic two-compactor campaign.

The forces shown are those of linkage.decide.transfer (checked against the known truth in
tests/decide/test_transfer.py); here the section's content, escaping and refusals are checked.
"""

from __future__ import annotations

import pytest

from linkage.decide.transfer import LEAVES_OUT, fit_ribbon_physics, transfer
from linkage.report.html import _Builder
from linkage.report.transfer_section import EXAMPLE_LABEL, SCALE_UP_ROLLS, transfer_section
from linkage.synthetic_rolling import make_transfer_lots

from .conftest import EVIL_COMPACTOR


@pytest.fixture(scope="module")
def lots():
    table = make_transfer_lots(seed=2)
    table["compactor"] = table["compactor"].replace({"pilot": EVIL_COMPACTOR})
    return table


def test_section_tabulates_each_compactor_and_the_example_rolls(lots):
    b = _Builder()
    transfer_section(b, lots)
    page = "".join(b.parts)
    assert ("transfer", "Transfer between compactors (Johanson rolling theory)") in b.toc
    assert len(b.figures) == 1
    assert EVIL_COMPACTOR not in page and "&lt;img" in page  # the compactor name is escaped
    assert EXAMPLE_LABEL in page and "roll speed" in page
    # the median porosity transferred to the illustrative example rolls, as the library computes it (2 decimals shown)
    physics = fit_ribbon_physics(lots)
    gap = float(lots["roll_gap_mm"].median())
    expected = transfer(physics, roll_diameter_mm=SCALE_UP_ROLLS[0], roll_width_mm=SCALE_UP_ROLLS[1], roll_gap_mm=gap,
                        porosity=float(lots["ribbon_porosity"].median())).targets[0]["roll_force_kn_per_cm"]
    assert f"{expected:.2f}" in page
    assert LEAVES_OUT.split(";")[0].replace("'", "&#x27;") in page


def test_section_says_why_without_roll_diameters(lots):
    b = _Builder()
    transfer_section(b, lots.drop(columns=["roll_diameter_mm"]))
    assert b.notes and "roll_diameter_mm" in b.notes[0] and not b.figures


def test_rolls_the_theory_gives_no_force_for_are_noted_and_the_report_goes_on(lots, monkeypatch):
    """Example rolls whose gap is too wide to nip (here 3 mm rolls at the lots' median gap: Johanson's nip angle
    exists only for S/D below the ratio linkage.physics.rolling.johanson_largest_gap_ratio gives) are refused by
    ``transfer``; the section says so in a note and still tabulates the compactors' own rolls (no outside
    reference: the report's handling of a refusal)."""
    import linkage.report.transfer_section as section

    monkeypatch.setattr(section, "SCALE_UP_ROLLS", (3.0, 40.0))
    b = _Builder()
    section.transfer_section(b, lots)
    page = "".join(b.parts)
    assert any(n.startswith(f"No force for the rolls {EXAMPLE_LABEL} (diameter 3 mm") for n in b.notes)
    assert len(b.figures) == 1 and "<table>" in page
