"""How the sheet and the report say what a spec's judge does: in words without brackets inside brackets (the sheet
wrote "stages (the compendial stages, simulated unit by unit (USP <711> Table 1 …))"), with the same facts.
Regression tests of a text: they need no outside source (the facts checked are the sheet's own, not a standard's
content)."""

from __future__ import annotations

import html
import re
from pathlib import Path

DEMO_SPEC = Path(__file__).resolve().parents[2] / "data_demo" / "lots" / "spec.toml"


def _deepest(text: str) -> int:
    """How deep round brackets nest in ``text`` (0: none, 1: brackets, 2: brackets inside brackets)."""
    depth = deepest = 0
    for char in text:
        depth += {"(": 1, ")": -1}.get(char, 0)
        deepest = max(deepest, depth)
    assert depth == 0, text  # every bracket closed
    return deepest


def _judge_cells(page: str) -> list[str]:
    """The judge column's cells of the sheet's spec table: a cell that begins with a judge's name."""
    cells = [html.unescape(re.sub(r"<[^>]+>", "", c)).strip() for c in re.findall(r"<td[^>]*>(.*?)</td>", page, re.S)]
    return [c for c in cells if c.startswith(("mean (", "stages ("))]


def test_the_sheets_judge_cells_hold_no_brackets_inside_brackets():
    from linkage.report.sheet import spec_table_html
    from linkage.spec import read_spec

    spec = read_spec(DEMO_SPEC).describe()  # the demo's spec: dissolution by stages, the rest by the lot mean
    cells = _judge_cells(spec_table_html(spec))
    assert {c.split(" ")[0] for c in cells} == {"mean", "stages"}
    assert all(_deepest(c) == 1 for c in cells), cells
    stages = next(c for c in cells if c.startswith("stages"))
    mean = next(c for c in cells if c.startswith("mean"))
    for fact in ("compendial stages", "USP <711> Table 1", "dissolution", "Q = the minimum", "unit by unit"):
        assert fact in stages, (fact, stages)
    for fact in ("lot value", "a lot mean", "against the limits"):
        assert fact in mean, (fact, mean)


def test_the_reports_judge_legend_has_the_same_words_and_no_nesting():
    """The report's line 'Judge "stages": …' takes the same words (one text, linkage.report.sheet.JUDGE_TEXT)."""
    from linkage.report.sheet import JUDGE_TEXT

    assert set(JUDGE_TEXT) == {"mean", "stages"}
    for text in JUDGE_TEXT.values():
        assert _deepest(text) == 0 and _deepest(f"x ({text})") == 1, text
    for package in ("report", "decide"):  # no other copy of the old words, with or without brackets
        for path in (Path(__file__).resolve().parents[2] / "linkage" / package).rglob("*"):
            if path.suffix in (".py", ".j2", ".js"):
                assert "simulated unit by unit (" not in path.read_text(encoding="utf-8"), path
