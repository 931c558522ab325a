"""Issue 20: the report's sections are the same on the demo whatever the report's code does to be fast.

The fixture ``data/demo_sections.json`` holds each section's text and number
of figures as the report code before issue 20 rendered them on the demo
(regression fixture, made by ``python -m tests.report.demo_sections``; no
outside reference: the check is that a refactoring changed nothing).
"""

from __future__ import annotations

import json

import pytest

from tests.report.demo_sections import FIXTURE, render_demo, sections

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    return render_demo(tmp_path_factory.mktemp("demo"))


def test_the_sections_and_their_figures_are_those_of_the_stored_demo_report(demo_report):
    expected = json.loads(FIXTURE.read_text(encoding="utf-8"))
    found = sections(demo_report)
    assert list(found) == list(expected)  # the same sections in the same order
    for key, want in expected.items():
        assert found[key]["figures"] == want["figures"], key
        assert found[key]["text"] == want["text"], key
    assert sum(s["figures"] for s in found.values()) == sum(s["figures"] for s in expected.values()) == 28


def test_the_normalising_replaces_only_what_varies_between_runs():
    from tests.report.demo_sections import normalise

    text = ("Model m-20261204T191929Z-da230cb0 trained 2026-12-04T19:19:29+00:00, "
            "SHA-256 " + "ab" * 32 + " of /tmp/x/demo-lots.db; window 0.209 – 0.434")
    assert normalise(text) == ("Model <model id> trained <time>, SHA-256 <sha256> of <path>/demo-lots.db; "
                               "window 0.209 – 0.434")
