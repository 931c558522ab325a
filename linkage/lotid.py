"""One lot, one spelling: the identity of a lot id (numpy and pandas free).

The reader (:mod:`linkage.read.lots`) compares every lot id of an ingest by
:func:`lot_key`; the store finds a lot given on the command line (``history``,
``audit --lot``, ``predict --lot``) and the watch matches recorded what-ifs to
lots by the same key, so that ``VX25-001``, ``vx25-001`` and ``VX25–001`` are
one lot everywhere. :func:`reader_spelling` is the spelling the reader would
give an id typed by a person (spaces collapsed, invisible characters refused).
"""

from __future__ import annotations

import re
import unicodedata

_DASHES = re.compile(r"[\u2010-\u2015\u2212\u2e3a\u2e3b\ufe58\ufe63\uff0d\u058a\u05be\u1400\u1806\u2e17\u2e1a"
                     r"\u2e40\u301c\u3030\u30a0\ufe31\ufe32]")


def lot_key(lot: str) -> str:
    """The identity of a lot id: two ids with the same key are one lot.

    Unicode NFKC normalisation (compatibility forms: full-width letters,
    ligatures; Unicode Standard Annex #15), every dash-like character as
    ``-``, then case folding (``str.casefold``, Unicode's full case folding).
    ``Q-100`` and ``Q‑100`` (U+2011), ``VX25-001`` and ``vx25-001``, ``Ａ1``
    and ``A1`` have one key. Control and format characters are refused before
    (:func:`lot_id_rule`), so they never reach a key.
    """
    if lot.isascii():  # NFKC leaves ASCII as it is, no ASCII character is a dash to fold, casefold() is lower()
        return lot.lower()
    return _DASHES.sub("-", unicodedata.normalize("NFKC", lot)).casefold()


#: Unicode categories of the characters a lot id may not hold: control (Cc) and format (Cf)
_INVISIBLE = ("Cc", "Cf")


def _without_invisible(lot: str) -> str:
    """A lot id with its control and format characters taken out (what it was probably meant to be)."""
    return "".join(ch for ch in lot if unicodedata.category(ch) not in _INVISIBLE)


def lot_id_rule(lot: str) -> str | None:
    """The rule a lot id breaks, or None. Refused: control characters
    (Unicode category Cc) and format characters (Cf: a byte-order mark
    U+FEFF, zero-width spaces and joiners, direction marks), which print as
    nothing and would make a second lot that looks like the first."""
    found = [ch for ch in lot if unicodedata.category(ch) in _INVISIBLE]
    if not found:
        return None
    names = ", ".join(sorted({f"U+{ord(ch):04X} {unicodedata.name(ch, 'control character')}" for ch in found}))
    return (f"lot id holds an invisible character ({names}), which would make a second lot that prints like "
            "the first (two exports pasted together?); remove it")


def _visible(lot: str) -> str:
    """A lot id with its invisible and non-ASCII characters written as escapes, for a message."""
    return lot.encode("ascii", "backslashreplace").decode("ascii")


def reader_spelling(lot: str) -> str | None:
    """``lot`` as the reader would read it from a text cell (surrounding
    spaces dropped, inner runs of white space one space; ``linkage.read.cells``),
    or None when nothing is left. An id with an invisible character is
    refused (:func:`lot_id_rule`) with a :class:`~linkage.exceptions.UsageError`."""
    from linkage.exceptions import UsageError

    text = " ".join(str(lot).split())
    if not text:
        return None
    rule = lot_id_rule(text)
    if rule is not None:
        raise UsageError(f"lot '{_visible(text)}': {rule}")  # escaped once (repr would double the backslash)
    return text


def _lot_id_problems(lots: list, label: str, sheet_rows: list[int], header: str, bad: set) -> list:
    """Invisible characters in a lot id, and two spellings of one lot in a file (same :func:`lot_key`).

    Of the spellings of one lot, the one on the most rows is taken as the lot's (on a tie, the first in the
    file) and the rows of every other spelling are refused: one row spelt apart from the rest is the odd one
    out, whichever comes first."""
    distinct = set(lots) - {None}
    joined = "".join(distinct)
    if joined.isascii() and joined.isprintable() and len({lot.lower() for lot in distinct}) == len(distinct):
        return []  # the common case, decided on the distinct ids: for printable ASCII the key is lower()
    from linkage.exceptions import Problem

    problems: list[Problem] = []
    spelled: dict[str, dict[str, list[int]]] = {}  # key -> spelling -> row indices, in file order
    for k, lot in enumerate(lots):
        if lot is None or (k, "lot") in bad:
            continue
        rule = lot_id_rule(lot)
        if rule is not None:
            problems.append(Problem(label, rule, row=sheet_rows[k], column=header, value=_visible(lot)))
            bad.add((k, "lot"))
            continue
        spelled.setdefault(lot_key(lot), {}).setdefault(lot, []).append(k)
    for spellings in spelled.values():
        if len(spellings) < 2:
            continue
        usual = max(spellings, key=lambda lot: len(spellings[lot]))  # max keeps the first of equals
        where = row_span([sheet_rows[k] for k in spellings[usual]])
        for lot, ks in spellings.items():
            if lot == usual:
                continue
            for k in ks:
                problems.append(Problem(label, f"lot {_visible(lot)!r} is lot {_visible(usual)!r} written another "
                                               f"way (case, dash or compatibility form); this file spells it "
                                               f"{_visible(usual)!r} on {where}, and one lot has one spelling: "
                                               f"write it {_visible(usual)!r}", row=sheet_rows[k], column=header,
                                        value=_visible(lot)))
                bad.add((k, "lot"))
    return problems


def row_span(rows: list[int]) -> str:
    """Sheet rows for a message, as runs of consecutive rows: ``row 7``, ``rows 7-10 (4 rows)``, ``rows 6, 8-10
    (4 rows)``; with more than 4 runs, first to last: ``rows 7-40 (12 rows, not all between)``. A range never
    hides a row left out of it (a row spelt apart from the rest of its lot sits between the others)."""
    rows = sorted(set(rows))
    if len(rows) == 1:
        return f"row {rows[0]}"
    runs: list[list[int]] = []
    for r in rows:
        if runs and r == runs[-1][-1] + 1:
            runs[-1].append(r)
        else:
            runs.append([r])
    if len(runs) > 4:
        return f"rows {rows[0]}-{rows[-1]} ({len(rows)} rows, not all between)"
    return "rows " + ", ".join(f"{run[0]}" if len(run) == 1 else f"{run[0]}-{run[-1]}" for run in runs) + \
        f" ({len(rows)} rows)"
