"""The report's own words open no bracket inside another. A user test read "(held at the training mean (no setting
given to condition on))" in the figure captions, "Settings used" and "Held for the roll force range", "(… 47
training lots (the ARL averages over such estimates))" in the watch's design, "(… coefficient × centred
(log-)input)" in the contributions' captions and the map's caption with the held rule's brackets inside its own.
Same facts, other punctuation. Wording regressions: no outside source."""

from __future__ import annotations

from tests.brackets import nested_brackets
from tests.report.demo_sections import sections


def test_no_section_of_the_report_opens_a_bracket_inside_another(report):
    found = {key: nested_brackets(s["text"]) for key, s in sections(report.html).items()}
    assert {key: v for key, v in found.items() if v} == {}
    # the sections whose words were mended are there to be read
    text = " ".join(s["text"] for s in sections(report.html).values())
    assert "held at the training" in text and "Held for the roll force range" in text, text[:2000]


def test_the_contribution_methods_are_said_without_brackets_of_their_own():
    from linkage.explain import METHODS

    assert [m for m in METHODS.values() if "(" in m] == []
    assert METHODS["linear_select"] == "exact linear terms, coefficient × centred input or log-input"
