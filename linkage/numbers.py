"""How a number is written: the one rule for text that becomes a number.

The ingest (:mod:`linkage.read`) and the what-if (``--set NAME=VALUE``,
``--from-csv``) read numbers by the same rule, so a value the store refuses
is not taken by a prediction either. Python's ``float()`` is wider than a lab
export: it takes ``1_0`` (10), ``inf``, ``nan`` and digits of any script
(Arabic-Indic ``١٠``). Here a number is an optional sign, ASCII digits 0–9
with at most one ``.``, and an optional exponent (``1.5e-3``), finite.

Pure standard library: the what-if imports this without pandas or numpy.
"""

from __future__ import annotations

import math
import re

#: a plain decimal number with '.' as the decimal mark (ASCII digits only: re.ASCII makes \d mean [0-9])
PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)
#: the same with ',' as the decimal mark
COMMA_NUMBER = re.compile(r"[+-]?(?:\d+,\d*|,\d+)(?:[eE][+-]?\d+)?", re.ASCII)


def parse_plain_number(text: str) -> float | str:
    """``text`` as a finite float by the rule above, or the rule it breaks (a str)."""
    s = str(text).strip()
    if not PLAIN_NUMBER.fullmatch(s):
        if s.lower().lstrip("+-") in ("nan", "inf", "infinity"):
            return "not a finite number"
        if any(ch.isdigit() and not ch.isascii() for ch in s):
            return "not a number: digits other than 0-9 (another script's digits)"
        if "," in s:
            return "not a number: write '.' as the decimal mark and no thousands separator"
        return "not a number"
    v = float(s)
    return v if math.isfinite(v) else "not a finite number"


def percent_text(fraction: float) -> str:
    """A confidence or assurance given as a fraction, as a percent with the digits it was given with: 0.9 ->
    '90%', 0.975 -> '97.5%', 0.9999 -> '99.99%' (a whole-percent rounding said 100% there, a certainty nobody
    asked for). Up to four decimals of a percent."""
    return f"{round(100 * float(fraction), 4):g}%"


def points_text(difference: float) -> str:
    """A difference of two proportions (fractions) in percentage points: 0.173 -> '17.3 percentage points'
    (a user test read "misses the nominal 90% by 17.3%" for 73 % against 90 %: a relative 17.3 % it is not)."""
    return f"{100 * float(difference):.1f} percentage points"
