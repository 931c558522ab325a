"""The bytes of a CSV file as a raw sheet: encoding, separator, records, size limits."""

from __future__ import annotations

import csv
import io

from linkage import read as package
from linkage.exceptions import InputError, Problem
from linkage.read.raw import _Raw, _too_many_columns, _too_many_rows

def _read_csv(data: bytes, label: str) -> _Raw:
    if data.startswith(b"PK\x03\x04"):
        raise InputError(Problem(label, "this is a zipped workbook (.xlsx), not a CSV text file; "
                                        "give it the .xlsx suffix"))
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(Problem(label, "UTF-16 text; save the file as 'CSV UTF-8'"))
    n_rows = _line_count(data) - 1
    if n_rows > package.MAX_ROWS:
        raise InputError(_too_many_rows(label, n_rows))
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InputError(Problem(label, f"not UTF-8 text (byte 0x{data[exc.start]:02x} at offset {exc.start}); "
                                        "save the file as 'CSV UTF-8'", row=line)) from None
    if "\x00" in text:
        raise InputError(Problem(label, "contains NUL bytes: not a text CSV file"))
    found = _header_separators(text)
    if len(found) <= 1:
        sep = found[0] if found else ","
    else:
        fits = [s for s in found if _fits(_records(text, s, label))]
        if len(fits) != 1:
            shown = " and ".join("tab" if s == "\t" else repr(s) for s in found)
            raise InputError(Problem(label, f"cannot tell the separator: the header holds {shown} outside quotes "
                                            "and the rows do not settle it; quote header names that hold a "
                                            "separator", row=1))
        sep = fits[0]
    records = _records(text, sep, label)
    if not records or not any(c.strip() for c in records[0]):
        raise InputError(Problem(label, "the header must be on row 1 (row 1 is empty)", row=1))
    if len(records[0]) > package.MAX_COLUMNS:
        raise InputError(_too_many_columns(label, len(records[0])))
    header = list(records[0])
    raw = _Raw(label, header, [], sep)
    n = len(header)
    body = records[1:]
    if set(map(len, body)) <= {n} and all(map(str.strip, map("".join, body))):
        raw.rows = list(zip(range(2, len(body) + 2), body))  # every row complete, none blank
        return raw
    join = "".join
    for i, rec in enumerate(body, start=2):
        if not join(rec).strip():  # every cell blank
            continue
        if len(rec) > n and not any(c.strip() for c in rec[n:]):
            rec = rec[:n]
        if len(rec) != n:
            shown = ("tab" if sep == "\t" else sep).join(rec)
            hint = (" (an unquoted decimal comma or a stray separator?)" if len(rec) > n
                    else " (a missing separator?)")
            raw.problems.append(Problem(label, f"row has {len(rec)} fields but the header has {n}{hint}",
                                        row=i, value=shown[:120]))
            continue
        raw.rows.append((i, rec))
    return raw


def _header_separators(text: str) -> list[str]:
    counts = dict.fromkeys([",", ";", "\t"], 0)
    quoted = False
    for ch in text:
        if ch == '"':
            quoted = not quoted
        elif not quoted:
            if ch in "\r\n":
                break
            if ch in counts:
                counts[ch] += 1
    return [s for s, k in counts.items() if k]


def _records(text: str, sep: str, label: str) -> list[list[str]]:
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep, quotechar='"', skipinitialspace=True)
    records: list[list[str]] = []
    try:
        records.extend(reader)  # the records before a failing one stay in the list
    except csv.Error as exc:  # a cell longer than csv.field_size_limit(); NUL bytes are refused before
        limit = csv.field_size_limit()
        rule = (f"a cell is longer than {limit:,} characters (a damaged or binary file?)"
                if "field limit" in str(exc) else f"cannot be read as CSV: {exc}")
        raise InputError(Problem(label, rule, row=len(records) + 1)) from None
    return records


def _line_count(data: bytes) -> int:
    """Lines of a text file from its bytes, without decoding: CRLF, LF and CR
    each end a line; line ends at the very end of the file are not counted."""
    body = data.rstrip(b"\r\n")
    if not body:
        return 0
    return body.count(b"\n") + body.count(b"\r") - body.count(b"\r\n") + 1


def _fits(records: list[list[str]]) -> bool:
    if not records or len(records[0]) < 2:
        return False
    n = len(records[0])
    return all(len(r) == n or (len(r) > n and not any(c.strip() for c in r[n:])) or not any(c.strip() for c in r)
               for r in records[1:])
