"""The bytes of a CSV file as a raw sheet: encoding, separator, records, size limits."""

from __future__ import annotations

import csv
import functools
import io
import re

import numpy as np
import pandas as pd

from linkage import read as package
from linkage.exceptions import InputError, Problem
from linkage.read.raw import _Raw, _too_many_columns, _too_many_rows


def _read_csv(data: bytes, label: str) -> _Raw:
    text = _decode(data, label)
    sep = _separator(text, label)
    fast = _quote_free(text, sep, label)
    return fast if fast is not None else _from_records(text, sep, label)


def _decode(data: bytes, label: str) -> str:
    """The text of a CSV file; refused before decoding when it is a workbook,
    UTF-16 or longer than MAX_ROWS lines, and after when it is not UTF-8 or
    holds NUL characters."""
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
    return text


def _separator(text: str, label: str) -> str:
    """The separator, from the header line (module notes, rule 1)."""
    found = _header_separators(text)
    if len(found) <= 1:
        return found[0] if found else ","
    fits = [s for s in found if _fits(_records(text, s, label))]
    if len(fits) != 1:
        shown = " and ".join("tab" if s == "\t" else repr(s) for s in found)
        raise InputError(Problem(label, f"cannot tell the separator: the header holds {shown} outside quotes "
                                        "and the rows do not settle it; quote header names that hold a "
                                        "separator", row=1))
    return fits[0]


def _from_records(text: str, sep: str, label: str) -> _Raw:
    """The raw sheet through the csv module, record by record: every case,
    quotes, blank and ragged rows included."""
    records = _records(text, sep, label)
    if not any(c.strip() for r in records for c in r):  # a user test: a 0-byte file was told its row 1 is empty
        raise InputError(Problem(label, "the file is empty: no header and no rows; export the table again"))
    if not any(c.strip() for c in records[0]):
        raise InputError(Problem(label, "the header must be on row 1 (row 1 is empty)", row=1))
    if len(records[0]) > package.MAX_COLUMNS:
        raise InputError(_too_many_columns(label, len(records[0])))
    header = list(records[0])
    n = len(header)
    body = records[1:]
    if set(map(len, body)) <= {n} and all(map(str.strip, map("".join, body))):
        return _Raw.from_rows(label, header, list(zip(range(2, len(body) + 2), body)), sep)  # complete, none blank
    problems: list[Problem] = []
    ragged: list[tuple[int, list[str], Problem]] = []
    rows: list[tuple[int, list]] = []
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
            problems.append(Problem(label, f"row has {len(rec)} fields but the header has {n}{hint}",
                                    row=i, value=shown[:120]))
            ragged.append((i, rec, problems[-1]))
            continue
        rows.append((i, rec))
    return _Raw.from_rows(label, header, rows, sep, problems=problems, ragged=ragged)


def _quote_free(text: str, sep: str, label: str) -> _Raw | None:
    """The raw sheet of a file without a double quote through pandas' C
    reader, every cell as text; None when the file needs the record-by-record
    reader (:func:`_from_records`).

    Without quotes a record is a line, and a cell what lies between two
    separators, so the C reader (``quoting=QUOTE_NONE``, nothing read as
    missing or as a number) returns the cells the csv module does, but for
    the spaces the csv module drops at the start of a cell
    (``skipinitialspace``): every rule trims a cell before reading it. The
    fast reader is only taken where it cannot differ from the record-by-record
    one: no ``"`` in the file, every line holding the header's number of
    separators and something other than separators and spaces (no blank or
    ragged row to skip or report), no line longer than the csv module's cell
    limit."""
    if '"' in text:
        return None
    body = text.replace("\r\n", "\n").replace("\r", "\n")  # csv reads CR LF, LF and CR alike
    if body.endswith("\n"):
        body = body[:-1]  # the line end of the last record
    encoded = np.frombuffer(body.encode("utf-8"), dtype=np.uint8)
    ends = np.append(np.flatnonzero(encoded == ord("\n")), len(encoded))  # where each line stops
    if int((np.diff(ends, prepend=-1) - 1).max()) > csv.field_size_limit():
        return None  # a line (and perhaps a cell) longer than the limit in bytes: the csv module says which
    per_line = np.diff(np.searchsorted(np.flatnonzero(encoded == ord(sep)), ends), prepend=0)
    if (per_line != per_line[0]).any():
        return None  # a ragged row
    first_blank, later_blank = _blank_line(sep)
    if first_blank.match(body) or later_blank.search(body):
        return None
    n = int(per_line[0]) + 1
    if n > package.MAX_COLUMNS:
        raise InputError(_too_many_columns(label, n))
    frame = pd.read_csv(io.StringIO(body), sep=sep, header=None, index_col=False, dtype=object, na_filter=False,
                        keep_default_na=False, quoting=csv.QUOTE_NONE, skip_blank_lines=False, engine="c",
                        low_memory=False)
    columns = [frame[j].tolist() for j in frame.columns]
    header = [cells[0] for cells in columns]
    return _Raw(label, header, list(range(2, len(frame) + 1)), [cells[1:] for cells in columns], sep)


@functools.cache
def _blank_line(sep: str) -> tuple[re.Pattern, re.Pattern]:
    """A first line, and a later line (from its line end), that may be blank
    to the csv module: nothing on it but the separator and characters that
    are not visible ASCII (white space, control characters and, to be safe,
    any non-ASCII character). The later-line pattern starts with a line end,
    which the regular expression engine looks for as a literal (fast)."""
    blank = rf"(?:[^\n!-~]|{re.escape(sep)})*(?=\n|\Z)"
    return re.compile(blank), re.compile("\n" + blank)


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
