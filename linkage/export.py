"""Files linkage writes for people: CSV tables that a spreadsheet opens safely, written whole or not at all.

Formula injection. A spreadsheet evaluates a CSV cell that begins with ``=``,
``+``, ``-``, ``@``, a tab or a carriage return as a formula. A lot id or a
product name is text the lab typed, so a text cell beginning with one of
those is written with a leading single quote, which a spreadsheet shows as
text (OWASP, "CSV Injection", the Open Worldwide Application Security
Project's guidance: prepend ``'`` to such cells). Numbers are written as
numbers: a negative number is a value, not a formula, and is left alone.

Atomic writes. The file is written to a temporary file in the same folder
and renamed over the target (``os.replace``, atomic on POSIX file systems),
so a full disk or a kill leaves either the old file or the new one, never a
part; the temporary file is removed on any failure.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from glob import escape as glob_escape
from pathlib import Path

#: first characters that make a spreadsheet read a cell as a formula (OWASP, CSV Injection)
FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")


def neutralise_cell(value):
    """``value`` with a leading ``'`` when it is text that a spreadsheet would evaluate as a formula."""
    if isinstance(value, str) and value.startswith(FORMULA_LEADS):
        return "'" + value
    return value


def safe_for_spreadsheet(table):
    """A copy of a DataFrame whose text cells cannot start a formula; number columns are unchanged."""
    out = table.copy()
    for name in out.columns:
        col = out[name]
        if col.dtype == object or str(col.dtype).startswith(("string", "str")):
            out[name] = col.map(neutralise_cell)
    return out


def write_atomic(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` whole or not at all (temporary file in the same folder, then rename).
    A missing folder on the way is made, as ``report --out`` and the other writers always did (the caller
    has refused, with :func:`linkage.cli.common.check_output`, a path that cannot be made)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    _remove_orphans(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".part", dir=path.parent or Path("."))
    try:
        os.fchmod(fd, _new_file_mode())  # mkstemp makes 0600; a written file gets the mode open() would give it
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(exc, OSError) and exc.filename is None:  # a refused write or fsync: name the file
            raise OSError(exc.errno, exc.strerror or str(exc), str(path)) from exc
        raise
    return path


def _remove_orphans(path: Path) -> None:
    """Remove temporary files of earlier writes of ``path`` whose process is gone (killed before its rename;
    the temporary file's name carries the writer's process id). A live writer's file is left alone."""
    for tmp in path.parent.glob(f".{glob_escape(path.name)}.*.part"):
        pid = tmp.name[len(path.name) + 2:].split(".", 1)[0]
        if pid.isdigit() and not _alive(int(pid)):
            with contextlib.suppress(OSError):
                tmp.unlink()


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)  # signal 0: only asks whether the process exists
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # it exists, under another account
    return True


def _new_file_mode() -> int:
    """0666 less the process's umask: the mode ``open(path, "w")`` gives a new file."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def write_table_csv(table, path) -> Path:
    """Write a table as CSV (UTF-8, ``\\n`` line ends) for a spreadsheet: formula-safe text, atomic."""
    text = safe_for_spreadsheet(table).to_csv(index=False, lineterminator="\n")
    return write_atomic(path, text.encode("utf-8"))
