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
        raise UsageError(f"lot {_visible(text)!r}: {rule}")
    return text
