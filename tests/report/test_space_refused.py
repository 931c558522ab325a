"""The design-space section when the map cannot be made (issue 16, and issue 20's one computation a
result): the report says why, once, and the map is computed once, wherever it ran."""

from __future__ import annotations

import pytest


@pytest.mark.slow
@pytest.mark.parametrize("parallel", [False, True])
def test_a_refused_map_is_computed_once_and_the_report_says_why(chain, table, spec, monkeypatch, tmp_path, parallel):
    import os

    import linkage.decide.space as space
    from linkage.exceptions import UsageError
    from linkage.report.html import render_report

    calls = tmp_path / "calls.txt"

    def refused(*args, **kwargs):
        with open(calls, "a", encoding="utf-8") as fh:  # a file: a forked child's call counts too
            fh.write(f"{os.getpid()}\n")
        raise UsageError("roll_gap_mm does not vary in the training lots")

    monkeypatch.setattr(space, "design_space", refused)
    report = render_report(chain, table, spec=spec, curve_draws=200, parallel=parallel)
    assert "No map: roll_gap_mm does not vary in the training lots" in report.html
    assert report.html.count("No map:") == 1
    assert len(calls.read_text().split()) == 1
    assert "space" not in report.computed
