"""One cell, or a whole column of cells, as a number, a date or text; each rule's message."""

from __future__ import annotations

import datetime as dt
import math
import re
from typing import Iterable

import numpy as np
import pandas as pd

from linkage.exceptions import Problem
from linkage.numbers import COMMA_NUMBER, PLAIN_NUMBER
from linkage.read.raw import _is_missing
from linkage.schema import DATETIME, MISSING_TOKENS, NUMBER, TEXT, Column

_NUMBER = PLAIN_NUMBER  # one rule for the ingest and the what-if (linkage.numbers)
_COMMA_NUMBER = COMMA_NUMBER
_THOUSANDS_DOT = re.compile(r"[+-]?[1-9]\d{0,2}(?:\.\d{3})+", re.ASCII)


def _parse_number(cell: object, decimal: str, separator: str | None) -> float | str:
    """A float, or the rule the cell breaks (a str)."""
    if isinstance(cell, bool):
        return "TRUE/FALSE is not a number"
    if isinstance(cell, (int, float)):
        try:
            v = float(cell)
        except OverflowError:  # an integer of a workbook beyond float range (only a broken writer makes one)
            return "not a finite number"
        return v if math.isfinite(v) else "not a finite number"
    if isinstance(cell, (dt.datetime, dt.date, dt.time)):
        return "a date is not a number"
    s = str(cell).strip()
    if decimal == ",":
        if "." in s and (_NUMBER.fullmatch(s) or _COMMA_NUMBER.fullmatch(s.replace(".", ""))):
            return ("'.' in a number of a file whose decimal mark is ',' (thousands separator or mixed decimal "
                    "marks); write numbers like 1234,5")
        if not (_COMMA_NUMBER.fullmatch(s) or _NUMBER.fullmatch(s)):
            return "not a number"
        s = s.replace(",", ".")
    else:
        if "," in s:
            if _COMMA_NUMBER.fullmatch(s) or _NUMBER.fullmatch(s.replace(",", "")):
                where = "in a ','-separated file" if separator == "," else (
                    "in a tab-separated file" if separator == "\t" else "in a workbook text cell")
                return (f"a ',' inside a number {where} is ambiguous (decimal comma or thousands separator); "
                        "write the number with '.' as the decimal mark and no thousands separator")
            return "not a number"
        if not _NUMBER.fullmatch(s):
            return "not a number" + (": digits other than 0-9 (another script's digits)"
                                     if any(ch.isdigit() and not ch.isascii() for ch in s) else "")
        if separator == ";" and decimal == "?" and _THOUSANDS_DOT.fullmatch(s):
            return ("ambiguous in a ';'-separated file: '.' may be a decimal mark or a thousands separator "
                    "(1.234 or 1234); write decimals with ',' (1,234) or drop the thousands separator")
    v = float(s)
    return v if math.isfinite(v) else "not a finite number"


def _decimal_mark(cells: Iterable[object], separator: str | None) -> str:
    """'.' or ',' for the file, or '?' where only thousands-like '.' numbers show (see module notes)."""
    if separator != ";":
        return "."
    dot_shown = thousands_like = False
    for c in cells:
        if not isinstance(c, str):
            continue
        s = c.strip()
        if _COMMA_NUMBER.fullmatch(s):
            return ","
        if "." in s and _NUMBER.fullmatch(s):
            if _THOUSANDS_DOT.fullmatch(s):
                thousands_like = True
            else:
                dot_shown = True
    return "?" if thousands_like and not dot_shown else "."


def _parse_datetime(cell: object) -> dt.datetime | str:
    if isinstance(cell, dt.datetime):
        value = cell
    elif isinstance(cell, dt.date):
        value = dt.datetime(cell.year, cell.month, cell.day)
    elif isinstance(cell, (int, float)) and not isinstance(cell, bool):
        return "a number, not a date; format the cell as a date or write ISO 8601 (2024-03-05 14:30)"
    else:
        s = str(cell).strip()
        if not re.fullmatch(r"\d{4}-\d{2}-\d{2}([T ]\d{2}:\d{2}(:\d{2}(\.\d{1,6})?)?)?([+-]\d{2}:?\d{2}|Z)?", s):
            return "not an ISO 8601 date (write 2024-03-05 or 2024-03-05 14:30)"
        try:
            value = dt.datetime.fromisoformat(s)
        except ValueError:
            return "not a valid date (write 2024-03-05 or 2024-03-05 14:30)"
    if value.tzinfo is not None:
        return "time-zone offsets are not accepted; give local time without an offset"
    return value


def _text(cell: object) -> str:
    if isinstance(cell, bool):
        return "TRUE" if cell else "FALSE"
    if isinstance(cell, float) and cell.is_integer():
        return str(int(cell))
    if isinstance(cell, float):
        return repr(cell)
    if isinstance(cell, dt.datetime):
        return cell.isoformat(sep=" ")
    return " ".join(str(cell).split()) if isinstance(cell, str) else str(cell)


def _shown(cell: object) -> object:
    return cell.strip() if isinstance(cell, str) else cell


# ---- fast paths: whole columns at once where every cell is plain. Each one
# returns None (or False) whenever a cell needs the cell-by-cell rules, which
# then run exactly as before; so results and messages do not depend on them.

#: a missing-value token as a regular expression (any case)
_MISSING_TOKEN = "|".join(re.escape(t) for t in sorted(MISSING_TOKENS, key=len, reverse=True) if t)

#: one cell of a date column: ISO 8601 without a time-zone offset (a subset
#: of what _parse_datetime accepts)
_PLAIN_DATE = r"[ \t]*[0-9]{4}-[0-9]{2}-[0-9]{2}(?:[T ][0-9]{2}:[0-9]{2}(?::[0-9]{2}(?:\.[0-9]{1,6})?)?)?[ \t]*"
_PLAIN_DATES = re.compile(rf"{_PLAIN_DATE}(?:\n{_PLAIN_DATE})*")
_DATES_OR_MISSING = re.compile(rf"(?:{_PLAIN_DATE}|[ \t]*(?i:{_MISSING_TOKEN})?[ \t]*)"
                               rf"(?:\n(?:{_PLAIN_DATE}|[ \t]*(?i:{_MISSING_TOKEN})?[ \t]*))*")


def _fast_cells(col: Column, cells: list, decimal: str, separator: str | None, bad: set, target: str):
    """A NUMBER column as a float array (NaN = missing), a DATETIME column as
    a datetime64[us] array (NaT = missing), a TEXT column as a list (None =
    missing), when every cell is a text cell that the per-cell rules accept
    as it is; else None.

    Each distinct cell is read once (a column of 275,000 sieve masses holds
    a few thousand distinct ones) and the values are spread back to the rows."""
    if not cells or (bad and any((k, target) in bad for k in range(len(cells)))):
        return None
    codes, uniques = pd.factorize(np.asarray(cells, dtype=object))
    distinct = uniques.tolist()
    if (codes < 0).any() or set(map(type, distinct)) != {str}:  # a None or NaN cell is coded -1
        return None
    if col.kind == NUMBER:
        values = _plain_numbers(distinct, decimal, separator)
        return None if values is None else values[codes]
    if col.kind == DATETIME:
        dates = _plain_dates(distinct)
        # as frame_from_columns makes a date column, from the distinct values only
        return None if dates is None else pd.Series(dates, dtype="datetime64[us]").to_numpy()[codes]
    values = _plain_texts(distinct) if col.kind == TEXT else None
    if values is None:
        return None
    spread = np.empty(len(values), dtype=object)
    spread[:] = values
    return spread[codes].tolist()


def _plain_dates(cells: list[str]) -> list | None:
    """ISO 8601 dates and missing tokens as datetimes and None; None when a cell needs the per-cell rules."""
    text = "\n".join(cells)
    if text.count("\n") != len(cells) - 1:
        return None  # a cell holds a line break
    try:
        if _fixed_layout_dates(cells):
            return list(map(dt.datetime.fromisoformat, cells))  # no padding to trim
        if _PLAIN_DATES.fullmatch(text):
            return [dt.datetime.fromisoformat(c.strip()) for c in cells]
        if _DATES_OR_MISSING.fullmatch(text):
            return [None if _is_missing(c) else dt.datetime.fromisoformat(c.strip()) for c in cells]
    except ValueError:
        return None
    return None


#: the ISO 8601 layouts most files use, by width: d a digit 0-9, T the letter T or a space, else the character
_DATE_LAYOUTS = {10: "dddd-dd-dd", 16: "dddd-dd-ddTdd:dd", 19: "dddd-dd-ddTdd:dd:dd"}


def _fixed_layout_dates(cells: list[str]) -> bool:
    """Every cell in one of :data:`_DATE_LAYOUTS` (all of one width, no padding): a subset of what
    ``_PLAIN_DATES`` matches, checked a character position at a time over all the cells at once."""
    widths = set(map(len, cells))
    layout = _DATE_LAYOUTS.get(widths.pop()) if len(widths) == 1 else None
    if layout is None:
        return False
    chars = np.array(cells, dtype=f"U{len(layout)}").view(np.uint32).reshape(len(cells), len(layout))
    for position, want in enumerate(layout):
        char = chars[:, position]
        if want == "d":
            fits = (char >= ord("0")) & (char <= ord("9"))
        elif want == "T":
            fits = (char == ord("T")) | (char == ord(" "))
        else:
            fits = char == ord(want)
        if not fits.all():
            return False
    return True


def _plain_numbers(cells: list[str], decimal: str, separator: str | None) -> np.ndarray | None:
    """Plain decimal numbers ('.' mark, in a ',' or tab file) and missing tokens as floats and NaN; None when a
    cell needs the per-cell rules."""
    if decimal != "." or separator not in (",", "\t"):
        return None
    try:
        if not _NOT_NUMBER_CHAR.search("".join(cells)):
            values = np.array(list(map(float, cells)), dtype=float)
        else:
            missing = [_is_missing(c) for c in cells]
            present = [c for c, m in zip(cells, missing) if not m]
            if _NOT_NUMBER_CHAR.search("".join(present)):
                return None
            it = iter(map(float, present))
            values = np.array([math.nan if m else next(it) for m in missing], dtype=float)
    except ValueError:
        return None
    return values if np.all(np.isfinite(values) | np.isnan(values)) else None


def _plain_texts(cells: list[str]) -> list:
    """Text cells trimmed, runs of white space as one space, missing tokens as None."""
    if _WHITESPACE.search("".join(cells)):
        cells = [" ".join(c.split()) for c in cells]
    tokens = {c for c in set(cells) if c.lower() in MISSING_TOKENS}
    return [None if t in tokens else t for t in cells] if tokens else cells


#: a character no plain decimal number has. With only digits, '.', 'e', 'E',
#: signs, spaces and tabs in a cell, float() accepts exactly what the rule of
#: _parse_number accepts for the '.' mark (sign, digits with one optional '.',
#: optional exponent, padding); float() raises on anything else (a lone '-',
#: '1.2.3', '1e'), and then the cell-by-cell rules say what is wrong.
_NOT_NUMBER_CHAR = re.compile(r"[^0-9.eE+\- \t]")
#: any character str.split() splits on (re's \s is the same Unicode set)
_WHITESPACE = re.compile(r"\s")


def _as_list(values: np.ndarray) -> list:
    """A column read by a fast path as Python values, None for missing."""
    if values.dtype.kind == "M":
        return values.tolist()  # datetime64[us]: datetimes, NaT as None
    return [None if math.isnan(v) else v for v in values.tolist()]


def _column_clean(col: Column, values: np.ndarray, nonempty: bool) -> bool:
    """No missing value where one is refused and every value within bounds."""
    present = ~np.isnan(values)
    if nonempty and not present.all():
        return False
    v = values[present]
    if col.low is not None and (np.any(v < col.low) or (not col.low_inclusive and np.any(v == col.low))):
        return False
    if col.high is not None and (np.any(v > col.high) or (not col.high_inclusive and np.any(v == col.high))):
        return False
    return True


def _in_bounds(col: Column, v: float) -> bool:
    if col.low is not None and (v < col.low or (v == col.low and not col.low_inclusive)):
        return False
    if col.high is not None and (v > col.high or (v == col.high and not col.high_inclusive)):
        return False
    return True


#: unit slips a template column's bounds catch, by the column's unit: (the unit the value looks written in, as
#: columns.toml names it, what to divide it by for the column's unit, the least and the most a value so written
#: is taken for): a solid's density of 0.1-5 g/cm3 written in kg/m3 (100-5000), a compression force of 1-100 kN written
#: in N (1000-100000). The ranges are common practice, no source; a value between them and the bounds gets no
#: hint (6 g/cm3 is no density in kg/m3).
BOUND_SLIPS: dict[str, tuple[str, float, float, float]] = {
    "g/cm3": ("kg/m3", 1000.0, 100.0, 5000.0),
    "kN": ("N", 1000.0, 1000.0, 100_000.0),
}


def bound_slip(col: Column, v: float) -> str:
    """The unit slip a value outside ``col``'s bounds looks like, as the end of its refusal (``; it looks like
    kg/m3 ...``), or "" (:data:`BOUND_SLIPS`); for a value read in the column's own unit (no columns.toml unit)."""
    slip = BOUND_SLIPS.get(col.unit)
    if slip is None or _in_bounds(col, v):
        return ""
    unit, divisor, low, high = slip
    if not low <= v <= high or not _in_bounds(col, v / divisor):
        return ""
    return (f"; it looks like {unit}: {v:g} / {divisor:g} = {v / divisor:.4g} {col.unit}, and the column is in "
            f"{col.unit}: convert it, or map the header in columns.toml with unit = \"{unit}\"")


def total_force_slip(col: Column, v: float, roll_width_mm: float | None) -> str:
    """A specific roll force above its bounds that, divided by the row's roll width in cm, is within them, as
    the end of its refusal (the words of :func:`linkage.plausible.likely_mistake`), or ""."""
    if col.high is None or v <= col.high or roll_width_mm is None or not roll_width_mm > 0:
        return ""
    per_cm = v / (roll_width_mm / 10.0)
    if not _in_bounds(col, per_cm):
        return ""
    from linkage.plausible import total_force_words

    return f"; it looks like {total_force_words(roll_width_mm, per_cm, 'within the bounds')}"


def _extra_values(cells: list, decimal: str, separator: str | None) -> list:
    present = [c for c in cells if not _is_missing(c)]
    parsed = [_parse_number(c, decimal, separator) for c in present]
    if all(isinstance(p, float) for p in parsed):
        it = iter(parsed)
        return [None if _is_missing(c) else next(it) for c in cells]
    return [None if _is_missing(c) else _text(c) for c in cells]


_INFINITE_WORDS = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})


def _extra_non_finite(cells: list, values: list, decimal: str, separator: str | None, label: str,
                      sheet_rows: list[int], header: str) -> list[Problem]:
    """An extra column of numbers in which some cells are infinite (``inf``,
    ``1e999``): those cells are refused, as in a template column, rather than
    turning the whole column into text (a missing value is empty or ``NA``)."""
    if not any(isinstance(v, str) for v in values):
        return []  # every present cell a finite number (or the column empty)
    odd: list[int] = []
    for k, c in enumerate(cells):
        if _is_missing(c):
            continue
        parsed = _parse_number(c, decimal, separator)
        if parsed == "not a finite number" or (isinstance(c, str) and c.strip().lower() in _INFINITE_WORDS):
            odd.append(k)
        elif isinstance(parsed, str):
            return []  # a text column: kept as text
    return [Problem(label, "not a finite number; leave the cell empty or write NA for a missing value",
                    row=sheet_rows[k], column=header, value=_shown(cells[k])) for k in odd]
