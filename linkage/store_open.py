"""Opening the lot store without changing it: a store written by an earlier linkage (schema 1 or 2), and a
store this account cannot write.

A command that records nothing opens the store with :func:`reading` (or :func:`open_to_read`): a store of the
current schema as before, a schema 2 store as it is (``LotStore(upgrade=False)``), a schema 1 store, which must
be upgraded to be read, from an upgraded temporary copy (:func:`upgraded_copy`, copied by :func:`backup_copy`).
A command that records at the end of its work refuses an unanchored store before that work
(:func:`refuse_unanchored`) and reads what it needs with :func:`open_to_record`; only its record opens the store
for writing, which upgrades it (:meth:`linkage.store.LotStore._upgrade`, said in :func:`store_upgraded_text`).
Here too: what :class:`~linkage.store.LotStore` opens a store with (:func:`can_write`, :func:`_reading_uri`,
:func:`_wal_beside`, :func:`_damage_of`) and the caution of a store read without its upgrade
(:func:`older_schema_caution`, :data:`NEXT_RECORD_UPGRADES`). Its refusals of an opening that must not write
(:class:`~linkage.exceptions.EmptyStoreFile`, :class:`~linkage.exceptions.StoreNeedsUpgrade`) are in
:mod:`linkage.exceptions`, which :mod:`linkage.store` raises them from, and importable from here too.

:mod:`linkage.store` imports this module and re-exports every name of it. The two need each other: the functions
here that open a :class:`~linkage.store.LotStore` import it from :mod:`linkage.store` when they are called (a
function-level import), and the constants both use come from :mod:`linkage.store_schema`. A name re-exported
is bound twice: to replace one in a test, patch it where its user looks it up (:class:`~linkage.store.LotStore`
looks up :func:`can_write`, :func:`_reading_uri`, :func:`_wal_beside`, :func:`_damage_of` and
:func:`older_schema_caution` in :mod:`linkage.store`; the functions here look up their own, except
:class:`~linkage.store.LotStore` and :func:`backup_copy`, which they take from :mod:`linkage.store` when called).
"""

from __future__ import annotations

import os
import sqlite3
from contextlib import ExitStack, closing, contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Iterator

# the refusals of an opening that must not write live in linkage.exceptions (re-exported here and by linkage.store)
from linkage.exceptions import (EmptyStoreFile, StoreBusyError, StoreError, StoreIntegrityError, StoreNeedsUpgrade,
                                StorePathError)
from linkage.store_schema import BUSY_TIMEOUT_S, SCHEMA_VERSION

if TYPE_CHECKING:
    from linkage.store import LotStore


#: the modules a warning of the store's opening passes over to name the place that opened the store
#: (:func:`caller_stacklevel`); ``with reading(...)`` enters through contextlib
_OPENING_MODULES = frozenset({"linkage.store", "linkage.store_open", "contextlib"})


def caller_stacklevel() -> int:
    """The ``stacklevel`` for a ``warnings.warn`` made by the function that calls this that names the first place
    outside the store's modules (:data:`_OPENING_MODULES`): the line that opened the store, however deep inside
    :class:`~linkage.store.LotStore`, :func:`reading`, :func:`open_to_read` or :func:`upgraded_copy` the warning is
    made (a fixed stacklevel named a line of this module where a store was opened through it). Python 3.12's
    ``skip_file_prefixes`` would do it; linkage runs on 3.11."""
    import sys

    level, frame = 1, sys._getframe(1)
    while frame.f_back is not None and frame.f_globals.get("__name__") in _OPENING_MODULES:
        frame, level = frame.f_back, level + 1
    return level


def can_write(path) -> bool:
    """Whether this account can write the store at ``path``: its file and its folder (where SQLite keeps the
    -wal and -shm files beside it)."""
    path = Path(path)
    return os.access(path, os.W_OK) and os.access(path.parent, os.W_OK)


def _wal_beside(path: Path) -> bool:
    """Whether a -wal file is beside the store: a writer is at work, or one crashed before its last close."""
    return Path(f"{path}-wal").exists()


def _reading_uri(path: Path, writable: bool) -> str:
    """The URI of a connection that reads the store and writes nothing of it (sqlite.org, "URI filenames"):
    where this account cannot write it, ``immutable=1`` (SQLite neither writes its -shm file nor expects another
    writer); else ``mode=ro``, for a store beside a -wal file, whose committed transactions it reads: a read-only
    connection neither copies the -wal into the store (a checkpoint) nor deletes it when it closes, as the last
    connection that could write does (sqlite.org, "Write-Ahead Logging"); SQLite still keeps its -shm index (no
    content of the store) beside it. Not used where no -wal is there: a read-only connection then leaves an
    empty -wal and a -shm behind, where a query-only one leaves nothing."""
    uri = Path(path).resolve().as_uri()
    return f"{uri}?mode=ro&immutable=1" if not writable else f"{uri}?mode=ro"


def _damage_of(exc: BaseException | None) -> sqlite3.Error | None:
    """The SQLite error that ``exc`` is, or was raised while handling, when it says the file is damaged
    (SQLITE_CORRUPT, SQLITE_NOTADB: sqlite.org, "Result and Error Codes"); else None."""
    for _ in range(4):
        if exc is None:
            return None
        if isinstance(exc, sqlite3.Error):
            return exc if (getattr(exc, "sqlite_errorcode", 0) or 0) & 0xFF in (11, 26) else None
        exc = exc.__context__
    return None


def backup_copy(path: Path, to: Path) -> None:
    """Copy the store at ``path`` to the new file ``to`` with SQLite's online backup (sqlite.org, "Online Backup
    API": a consistent copy, pages read in one read transaction), read through a query-only connection that
    closes as a writer closes (no -wal or -shm left beside the store); a store this account cannot write (a
    read-only file system) is read immutable, as :class:`LotStore` reads it there. For an ingest's preview,
    and the commands that only read, of a store that must be upgraded first: the copy is upgraded, the store
    is not."""
    path = Path(path)
    writable = can_write(path)
    try:
        with closing(sqlite3.connect(path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
                     if writable and not _wal_beside(path) else
                     sqlite3.connect(_reading_uri(path, writable), uri=True, timeout=BUSY_TIMEOUT_S,
                                     isolation_level=None)) as source, \
                closing(sqlite3.connect(to, isolation_level=None)) as copy:
            source.execute("PRAGMA query_only = ON")
            source.backup(copy)
    except sqlite3.Error as exc:
        if _damage_of(exc) is not None:  # the store's pages, as verify's integrity check would find them
            raise StoreIntegrityError(f"lot store {path} is damaged: {exc} (found while copying it to read it; the "
                                      "store was not changed)") from None
        raise StoreError(f"cannot copy the lot store {path} to {to}: {exc}") from None


#: when a store written by an earlier linkage is upgraded, as the cautions of the commands that leave it as it is say
NEXT_RECORD_UPGRADES = ("the next command that records in it (an ingest, a training, a recorded what-if or window, "
                        "...) upgrades it")


def older_schema_caution(path, version: int, *, copy: bool = False) -> str:
    """The caution of a store written by an earlier linkage that a command read without upgrading it
    (:attr:`LotStore.older_schema`); ``copy``: read from an upgraded temporary copy (schema 1)."""
    if copy:
        return (f"{path} was written by an earlier linkage (store schema {version}, before seals); read from an "
                "upgraded temporary copy, the store itself not upgraded nor changed (an earlier linkage still reads "
                f"it); {NEXT_RECORD_UPGRADES} and seals its records as they then stand")
    return (f"{path} was written by an earlier linkage (store schema {version}); read as it is, not upgraded nor "
            f"changed (an earlier linkage still reads it); {NEXT_RECORD_UPGRADES}")


def store_upgraded_text(path, version: int) -> str:
    """What a command that upgraded the store at ``path`` from schema ``version`` says (:meth:`LotStore._upgrade`,
    a :class:`~linkage.exceptions.StoreUpgraded` warning)."""
    sealed = "; its records sealed as they stood" if version < 2 else ""
    return (f"the lot store {path} was written by an earlier linkage (store schema {version}) and was upgraded to "
            f"schema {SCHEMA_VERSION} to record in it{sealed}; an earlier linkage no longer reads it (\"written by "
            "a newer linkage\")")


@contextmanager
def _upgrade_unsaid() -> Iterator[None]:
    """Leave out the :class:`~linkage.exceptions.StoreUpgraded` warning of an upgrade made inside: a temporary
    copy's (:func:`upgraded_copy`), which is not the store's."""
    import warnings

    from linkage.exceptions import StoreUpgraded

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StoreUpgraded)
        yield


def upgraded_copy(stack: ExitStack, path: Path, version: int = 1) -> LotStore:
    """The store at ``path`` (of schema ``version``, which must be upgraded to be read: schema 1) copied with
    :func:`backup_copy` into a temporary folder, upgraded there, opened and entered on ``stack`` (which removes
    the folder when it closes); the store and its folder are not touched. The copy answers as the store would
    (:attr:`LotStore.path` names the store, its anchor file is the copy's own), refuses every write, and says
    that it is a copy (:attr:`LotStore.older_schema`, :attr:`LotStore.from_copy`, :meth:`LotStore.cautions`,
    warned as a :class:`~linkage.exceptions.StoreCaution`). For an ingest's preview and the commands that only
    read (:func:`reading`).

    A copy that is no longer of schema 1 (a writer upgraded the store after it was found to need it): the store
    itself, opened for reading only (``LotStore(read_only=True)``). An error while the copy is read or upgraded
    names the store, not the copy; damage found in it (SQLite's "malformed") is damage of the store
    (:class:`~linkage.exceptions.StoreIntegrityError`, exit code 6), as :meth:`LotStore.check_seals` finds it."""
    import tempfile

    # backup_copy as linkage.store names it (a test replaces it there to upgrade the store while it is copied)
    from linkage.store import LotStore, backup_copy

    path = Path(path)
    scratch = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="linkage-read-")))
    copied = scratch / path.name
    backup_copy(path, copied)
    try:
        with closing(sqlite3.connect(copied, isolation_level=None)) as con:
            now = con.execute("SELECT MAX(version) FROM schema_version").fetchone()[0]
        with _upgrade_unsaid():  # the copy's upgrade, not the store's: not said as one
            copy = None if (now or 1) >= 2 else stack.enter_context(LotStore(copied, create=False))
    except (sqlite3.Error, StoreError, StoreBusyError) as exc:
        raise _as_the_store(exc, copied, path) from None
    if copy is None:  # upgraded meanwhile by a writer: the store itself is read, as any store of its schema is
        return stack.enter_context(LotStore(path, create=False, read_only=True))
    # answers for the store: its name, and whether this account could write it (an ingest's preview refuses alike)
    copy.path, copy.read_only = path, True
    copy.writable = can_write(path)
    copy.older_schema, copy.from_copy = version, True
    copy._warn_cautions()
    return copy


def _as_the_store(exc: BaseException, copied: Path, path: Path) -> BaseException:
    """An error met while a temporary copy (``copied``) of the store at ``path`` was read or upgraded, said of the
    store: its words name the store, and damage is the store's (:class:`StoreIntegrityError`, as
    :meth:`LotStore.check_seals` says it)."""
    damage = _damage_of(exc)
    if damage is not None and not isinstance(exc, StoreIntegrityError):
        return StoreIntegrityError(f"lot store {path} is damaged: {damage} (found in a temporary copy of it, made "
                                   "to read it without upgrading it; the store was not changed)")
    text = str(exc).replace(str(copied), str(path))
    if isinstance(exc, sqlite3.Error):
        return StoreError(f"lot store {path}: {text}")
    out = type(exc)(text)
    out.__dict__.update(exc.__dict__)
    return out


def open_to_read(stack: ExitStack, path) -> LotStore:
    """The store at ``path`` for a command that records nothing in it, entered on ``stack``: opened as before
    when it is of the current schema; an older one read as it is (``LotStore(upgrade=False)``, schema 2) or
    from an upgraded temporary copy (:func:`upgraded_copy`, schema 1), so that neither the store nor its folder
    changes by a byte. Refusals as ``LotStore(path, create=False)``'s."""
    from linkage.store import LotStore

    try:
        return stack.enter_context(LotStore(path, create=False, upgrade=False))
    except StoreNeedsUpgrade as exc:
        version = exc.version
    return upgraded_copy(stack, Path(path), version)


@contextmanager
def reading(path) -> Iterator[LotStore]:
    """:func:`open_to_read` as a context manager: ``with reading(store) as s: ...``."""
    with ExitStack() as stack:
        yield open_to_read(stack, path)


def refuse_unanchored(path) -> None:
    """Refuse (:class:`StoreIntegrityError`, exit code 6) the store at ``path`` when it holds seals but no
    anchor file, as its first write would be refused (:meth:`LotStore._write`): for a command that writes to
    the store only at the end of its work, called before that work. No store (no file, an empty one), nothing
    to refuse. A folder is refused (:class:`StorePathError`, exit code 2), as opening it would be, so that the
    work is not done before the record is refused."""
    if path is not None and Path(path).is_dir():
        raise StorePathError(f"{path} is a folder, not a lot store file; nothing was written")
    if path is None or not Path(path).is_file() or Path(path).stat().st_size == 0:
        return
    import warnings

    from linkage.exceptions import StoreCaution
    from linkage.store import LotStore

    # a check, not a read: the store's cautions are said by the command's reads; an older store is not upgraded
    # here (a command refused after this check leaves it as it was): its record at the end upgrades it
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StoreCaution)
        try:
            LotStore(path, create=False, for_writing=True, upgrade=False).close()
        except EmptyStoreFile:
            return  # an SQLite file without a table: no store yet, so no anchor to miss (as an empty file)
        except StoreNeedsUpgrade:
            if not can_write(path):
                raise  # the record could neither upgrade nor write it: refused now, as its opening for writing is
            # schema 1, before seals: no anchor to miss (its upgrade at the record seals it and anchors it)


def open_to_record(stack: ExitStack, path) -> LotStore:
    """The store at ``path``, entered on ``stack``, for what a command that records in it at the end of its work
    reads before that work (``train``'s lots): refused at once where it holds seals without its anchor file, as
    :func:`refuse_unanchored` refuses it; opened as ``LotStore(path, create=False, for_writing=True)`` opens a
    store of the current schema, and never upgraded: an older one is read as :func:`open_to_read` reads it (as it
    is, or from an upgraded temporary copy), so that a command refused on what it reads leaves it as it was. The
    record at the end opens it for writing, which upgrades it (and says so)."""
    from linkage.store import LotStore

    try:
        return stack.enter_context(LotStore(path, create=False, for_writing=True, upgrade=False))
    except StoreNeedsUpgrade as exc:
        if not can_write(path):
            raise  # the record could neither upgrade nor write it: refused now, as its opening for writing is
        return upgraded_copy(stack, Path(path), exc.version)
