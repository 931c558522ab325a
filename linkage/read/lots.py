"""Lot identity: one lot, one spelling; invisible characters refused."""

from __future__ import annotations

import re
import unicodedata

from linkage.exceptions import Problem

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


def lot_id_rule(lot: str) -> str | None:
    """The rule a lot id breaks, or None. Refused: control characters
    (Unicode category Cc) and format characters (Cf: a byte-order mark
    U+FEFF, zero-width spaces and joiners, direction marks), which print as
    nothing and would make a second lot that looks like the first."""
    found = [ch for ch in lot if unicodedata.category(ch) in ("Cc", "Cf")]
    if not found:
        return None
    names = ", ".join(sorted({f"U+{ord(ch):04X} {unicodedata.name(ch, 'control character')}" for ch in found}))
    return (f"lot id holds an invisible character ({names}), which would make a second lot that prints like "
            "the first (two exports pasted together?); remove it")


def _visible(lot: str) -> str:
    """A lot id with its invisible and non-ASCII characters written as escapes, for a message."""
    return lot.encode("ascii", "backslashreplace").decode("ascii")


def _lot_id_problems(lots: list, label: str, sheet_rows: list[int], header: str, bad: set) -> list[Problem]:
    """Invisible characters in a lot id, and two spellings of one lot in a file (same :func:`lot_key`)."""
    distinct = set(lots) - {None}
    joined = "".join(distinct)
    if joined.isascii() and joined.isprintable() and len({lot.lower() for lot in distinct}) == len(distinct):
        return []  # the common case, decided on the distinct ids: for printable ASCII the key is lower()
    problems: list[Problem] = []
    spelled: dict[str, tuple[str, int]] = {}  # key -> (first spelling, its sheet row)
    for k, lot in enumerate(lots):
        if lot is None or (k, "lot") in bad:
            continue
        rule = lot_id_rule(lot)
        if rule is not None:
            problems.append(Problem(label, rule, row=sheet_rows[k], column=header, value=_visible(lot)))
            bad.add((k, "lot"))
            continue
        key = lot_key(lot)
        first = spelled.setdefault(key, (lot, sheet_rows[k]))
        if first[0] != lot:
            problems.append(Problem(label, f"lot {_visible(lot)!r} is lot {_visible(first[0])!r} of row {first[1]} "
                                           "written another way (case, dash or compatibility form); one lot has "
                                           "one spelling: correct one of them", row=sheet_rows[k], column=header,
                                    value=_visible(lot)))
            bad.add((k, "lot"))
    return problems
