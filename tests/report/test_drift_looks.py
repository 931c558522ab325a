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
from linkage.decide.window import find_window
from linkage.report.html import _Builder, _watch_section, render_report
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
    # and what it leaves out when no ribbon table was given: the looks at each ribbon sample (a review)
    assert any(line.startswith("No ribbon samples were given: the looks at each ribbon sample that linkage watch")
               for line in shown[start + len(expected):])
    # the intro says which EWMA is which: the single charts' (λ = 0.2, for diagnosis), the alarm's (λ = 0.1, T²)
    intro = " ".join(shown[:3])
    assert "per-attribute charts' EWMA (λ = 0.2) is for diagnosis" in intro
    assert f"multivariate EWMA (λ = {result.mewma['design']['lambda']:g})" in intro and "T² against the limit h" in intro


def _drift_lines(page: str) -> list[str]:
    """The visible lines of a whole report's drift section (from its heading to the next section's)."""
    return _visible([page[page.index('id="drift"'):page.index('id="domain"')]])


def test_the_report_given_the_ribbon_lists_the_sample_looks_watch_lists(drift):  # noqa: F811
    """``linkage watch --spec`` also looks at each ribbon sample (against ±3 SD about its lot's running mean, and
    against the window found with the spec); the report, given the ribbon table, lists the same looks in the same
    words and order (a review: its watch had been run without the samples and the window). The window is found
    as :func:`linkage.api.watch` finds it (default arguments, the report's defaults too), its edges passed the same
    way. A regression test of the texts, no outside source."""
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SPEC

    lots, table, chain, order = drift
    spec = Spec(limits={name: Limit(min=lo, max=hi) for name, (lo, hi) in WINDOW_SPEC.items()})
    found = find_window(chain, spec)
    edges = (found.low.value, found.high.value) if found.found else None
    assert edges is not None  # the case has a window, so the samples are judged against it
    ribbon = lots.tables["ribbon"]
    result = watch(chain, table, ribbon=ribbon, window=edges)
    samples = [s for s in result.other_signals if s.startswith("ribbon sample ")]
    # both kinds of sample look are in the case: against the window, and against the lot's earlier samples
    assert any("outside the window" in s for s in samples) and any("within-lot SD" in s for s in samples)
    expected = _watch_looks(Watched(result=result, n_lots=len(table), window=edges).text())
    page = render_report(chain, table, spec=spec, ribbon=ribbon, curve_draws=50, parallel=False).html
    shown = _drift_lines(page)
    start = shown.index(expected[0])
    assert shown[start:start + len(expected)] == expected
    assert f"({len(result.other_signals)} signal(s);" in expected[0]
    assert not any(line.startswith("No ribbon samples were given") for line in shown)  # said only without them
    # which window the samples were judged against is said, since linkage watch finds its own (a review)
    said = f"Each ribbon sample is judged against this report's porosity window ({edges[0]:.3f}–{edges[1]:.3f} at 90%"
    assert any(line.startswith(said) for line in shown), said
    # what the ribbon table adds is the sample looks alone: the watch without it lists the others
    assert len(watch(chain, table).other_signals) == len(result.other_signals) - len(samples)


def test_the_looks_are_capped_with_the_count_of_the_rest(drift):  # noqa: F811
    """Both texts list at most ``shown`` looks and count the rest (``linkage watch`` lists 40)."""
    lots, table, chain, order = drift
    others = watch(chain, table).other_signals
    looks = other_looks(others, shown=5)
    assert len(looks["items"]) == 5 and looks["more"] == f"... and {len(others) - 5} more"
    assert other_looks([]) is None
