"""Brackets inside brackets in a text: what the texts' tests look for (a user test read "(held at the training
mean (no setting given to condition on))"). Not a test module: a helper of the text tests."""

from __future__ import annotations


def nested_brackets(text: str, around: int = 60) -> list[str]:
    """Each place in ``text`` where a '(' is opened inside another '(' on the same line, with ``around``
    characters of context either side ([] when none)."""
    found = []
    for line in text.splitlines():
        depth = 0
        for i, c in enumerate(line):
            if c == "(":
                if depth:
                    found.append(line[max(0, i - around):i + around])
                depth += 1
            elif c == ")":
                depth = max(0, depth - 1)
    return found
