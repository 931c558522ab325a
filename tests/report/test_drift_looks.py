"""The report's drift section lists the watch's other looks as ``linkage watch`` says them (a new-user test: the
report said only "No alarm" where ``watch`` listed per-attribute, porosity and domain flags, shown in the report
only as unexplained rings).

The case is the synthetic raw-material change of tests/decide/test_watch.py (its ``drift`` fixture, whose alarms
and flags are checked there against the known change). Here the check is that the report and ``watch``'s text give
the same looks, in the same words and order: a regression test of the texts, no outside source.
"""

from __future__ import annotations

import html
import re

from linkage.decide.watch import watch
from linkage.report.html import _Builder, _watch_section
from linkage.results import Watched, other_looks

from tests.decide.test_watch import drift  # noqa: F401  (the fixture: lots, table, chain, lot order)


def _visible(parts: list[str]) -> list[str]:
    """The section's visible lines: one per paragraph, list item and heading (tags dropped, entities decoded)."""
    page = "".join(parts)
    page = re.sub(r"</?(p|li|h2|h3|ul)[^>]*>", "\n", page)
    return [line.strip() for line in html.unescape(re.sub(r"<[^>]+>", "", page)).splitlines() if line.strip()]


def _watch_looks(text: str) -> list[str]:
    """The "Other looks" block of ``linkage watch``'s text: its head line and its items, the marks dropped."""
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("Other looks ("))
    block = [lines[start]]
    for line in lines[start + 1:]:
        if not line.startswith("  "):
            break
        block.append(line.strip().removeprefix("- "))
    return block


def test_the_drift_section_lists_the_looks_watch_lists(drift):  # noqa: F811
    lots, table, chain, order = drift
    result = watch(chain, table)
    assert result.other_signals  # the change is flagged by the single charts too (tests/decide/test_watch.py)
    expected = _watch_looks(Watched(result=result, n_lots=len(table)).text())
    b = _Builder(parallel=False)
    _watch_section(b, chain, table, None, result)
    shown = _visible(b.parts)
    start = shown.index(expected[0])
    assert shown[start:start + len(expected)] == expected
    assert f"({len(result.other_signals)} signal(s); for diagnosis, not designed to a false-alarm rate)" in expected[0]
    assert shown[start - 1] == "Flags of the single charts, the porosity and the domain"  # the sub-heading
    # and what it leaves out: the looks at each ribbon sample, which the report's watch is not given (a review)
    assert any(line.startswith("These are the looks at lot values; linkage watch also looks at each ribbon sample")
               for line in shown[start + len(expected):])
    # the intro says which EWMA is which: the single charts' (λ = 0.2, for diagnosis), the alarm's (λ = 0.1, T²)
    intro = " ".join(shown[:3])
    assert "per-attribute charts' EWMA (λ = 0.2) is for diagnosis" in intro
    assert f"multivariate EWMA (λ = {result.mewma['design']['lambda']:g})" in intro and "T² against the limit h" in intro


def test_the_looks_are_capped_with_the_count_of_the_rest(drift):  # noqa: F811
    """Both texts list at most ``shown`` looks and count the rest (``linkage watch`` lists 40)."""
    lots, table, chain, order = drift
    others = watch(chain, table).other_signals
    looks = other_looks(others, shown=5)
    assert len(looks["items"]) == 5 and looks["more"] == f"... and {len(others) - 5} more"
    assert other_looks([]) is None
