"""The lot store: one SQLite file that keeps every measurement, revision and record.

Default ``linkage.db`` in the working folder; the CLI's ``--store`` and the
``LINKAGE_STORE`` variable choose another.

Here: :class:`LotStore` (opening, creating and upgrading a store, the ingest and its revisions, lots set
aside, the audit trail, recorded predictions) and the texts the commands say of it. Beside it:
:mod:`linkage.store_open`, opening a store without changing it (a store written by an earlier linkage read as it
is or from an upgraded temporary copy, and what a command that records at the end checks and reads before its
work); :mod:`linkage.store_schema`, the file's layout (schema version, tables, append-only triggers);
:mod:`linkage.store_rows`, the raw rows' encoding and where they are kept. Every name of ``store_open`` and
``store_schema`` is importable from this module too.

What it keeps
-------------
- Raw rows, not lot means: every ribbon replicate, every sieve row, every
  tablet and vessel, with its extra columns, as JSON per row (floats are
  written with Python's shortest round-trip ``repr``, so they read back
  exactly). Missing cells are left out of a row's JSON. Since schema 3 an
  ingest keeps all its rows of one table in one ``row_blocks`` record (the
  rows' JSON texts, one per line; see :func:`write_row_blocks` for why);
  a store written before keeps its rows in ``raw_rows``, one SQLite row per
  raw row, read as before.
- Schema 3 migration: a schema 1 or 2 store is upgraded in place, in one
  transaction, by the first command that records in it (an ingest, a
  set-aside, a recorded window or what-if...; ``row_blocks`` added, its
  append-only triggers, one ``upgrade`` seal), in the opening that writes
  the record, and said (a :class:`~linkage.exceptions.StoreUpgraded`
  warning); its existing rows are not moved or rewritten, so their seals
  and row hashes stay valid. What such a command reads before its record,
  and every refusal, leaves it as it is (:func:`open_to_record`,
  :func:`refuse_unanchored`; an ingest is decided on the store as it is
  first). A command that records nothing (``lots``, ``history``,
  ``audit``, ``assemble``, ``report``, ``verify``, ``space``,
  ``window``/``predict --no-record``: :func:`reading`) leaves it as it is,
  byte for byte: schema 2 is read as it is, schema 1 (before seals) from
  an upgraded temporary copy (:func:`upgraded_copy`). A store on a
  read-only file system is read the same way.
- A lot's *revision* covers all its rows in all tables. An ingest that
  changes any of a lot's rows makes a new revision of that lot only; the
  tables the ingest does not carry over unchanged from the previous revision
  (a folder with just ``tablets.csv`` is a partial update). A table's rows of
  a lot are compared by content (key order, row order and all-missing
  columns do not count), so sending the same data again is a no-op: no new
  revision, and the lot is reported unchanged. The ingest itself is still
  logged (who, when, which files).
- A revision that only adds to the stored lot (a table it did not have,
  rows with new keys, blank cells filled: results arriving in stages) needs
  no reason; one that changes or removes a stored value needs one (a table
  sent replaces the lot's stored table, so a stored row left out of it is
  removed). A sieve row added to a stored sieve analysis is a change: each
  row's share is of the analysis's total (:data:`WHOLE_TABLES`). Both kinds
  are revisions alike, recorded and sealed alike; the ingest reports which
  lots were added to (:func:`adds_only`).
- Each ingest is one transaction (``BEGIN IMMEDIATE``): it records the
  source files with their SHA-256 and row counts, the time and the user, and
  either all of it lands or none (a killed process leaves the store as it
  was: SQLite's write-ahead log).
- Records are append-only: triggers refuse UPDATE and DELETE on every table
  that holds data (ingests, lots, revisions, rows, the audit log, recorded
  predictions).
- A lot is never deleted; one that should not be used is *set aside*
  (:meth:`LotStore.set_aside`, ``linkage set-aside``), and put back in use by
  :meth:`LotStore.restore`: each decision is an audit entry of the lot
  (:data:`SET_ASIDE`, :data:`RESTORE`, with its reason), sealed like every
  entry, and a lot's state is its newest decision. :meth:`LotStore.current_tables`
  leaves set-aside lots out and names them (:class:`LotTables`). No table of
  its own: a store of any schema takes decisions as it is.

Concurrency
-----------
WAL mode lets readers run while one process writes; a writer waits up to
``busy_timeout_s`` (10 s) for another and then raises
:class:`~linkage.exceptions.StoreBusyError` ("store busy ...").
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import operator
import os
import sqlite3
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from itertools import chain
from pathlib import Path
from typing import TYPE_CHECKING, Iterator

from linkage import plausible as _plausible
from linkage import seal as _seal
from linkage.exceptions import (EmptyStoreFile, InputError, Problem, StoreBusyError, StoreError, StoreIntegrityError,
                                StoreNeedsUpgrade, StorePathError, UsageError, shown_time)
from linkage.lotid import lot_key, reader_spelling
from linkage.schema import DATETIME, NUMBER, TABLES
# opening a store without changing it (older schemas, copies) and the file's layout have modules of their own;
# every name of them is importable from here too (re-exported), as callers and tests import it
from linkage.store_open import (NEXT_RECORD_UPGRADES, _as_the_store, _damage_of, _reading_uri, _upgrade_unsaid,
                                 _wal_beside, backup_copy, caller_stacklevel, can_write, older_schema_caution,
                                 open_to_read, open_to_record, reading, refuse_unanchored, store_upgraded_text,
                                 upgraded_copy)
from linkage.store_rows import LotTable, OnFirstUse, canon_row, encode_table, read_row_texts, write_row_blocks
from linkage.store_schema import (_DDL, _ROW_BLOCKS_DDL, APPEND_ONLY, APPLICATION_ID, BUSY_TIMEOUT_S, SCHEMA_VERSION,
                                  _statements, _triggers)

if TYPE_CHECKING:
    from linkage.read import Ingest


np = OnFirstUse("numpy")
pd = OnFirstUse("pandas")
_read = OnFirstUse("linkage.read")

#: lot tables written per pair of statements during an ingest
_BATCH = 5000
#: values per "IN (...)" list (SQLite before 3.32 allows 999 parameters a statement)
_IN_CHUNK = 500
_TABLE_NUMBER = {name: k for k, name in enumerate(TABLES)}


def current_user() -> str:
    """The operating-system account running linkage, by its user id (POSIX:
    the password database, ``pwd.getpwuid(os.getuid())``), never the
    ``LOGNAME``/``USER`` variables that anyone can set. Where the platform
    has no user ids (Windows), the login name the system reports."""
    try:
        import pwd

        return pwd.getpwuid(os.getuid()).pw_name
    except (ImportError, KeyError, OSError):
        pass
    try:
        return os.getlogin()
    except OSError:
        return f"uid {os.getuid()}" if hasattr(os, "getuid") else "unknown"


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="milliseconds")


def _json(value) -> str:
    return json.dumps(_plain(value), ensure_ascii=False, allow_nan=False)


def _plain(value):
    """JSON-ready: numpy scalars and arrays, Timestamps, Paths; NaN -> None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set)):
        return [_plain(v) for v in value]
    if hasattr(value, "tolist") and not isinstance(value, (str, bytes)):
        return _plain(value.tolist())
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (dt.datetime, dt.date)):  # a pandas Timestamp is a datetime
        return value.isoformat()
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, (int, str, bool)) or value is None:
        return value
    if hasattr(value, "item"):
        return _plain(value.item())
    return str(value)


@dataclass
class IngestResult:
    """What one ingest did: lots new, revised and unchanged, and its id. Of the revised lots,
    ``lots_added_to`` are those whose revision only adds (a table, rows, blank cells filled; no reason
    needed) and ``lots_changed`` those whose stored values changed or were removed (the reason required)."""

    lots_new: list[str]
    lots_revised: list[str]
    lots_unchanged: list[str]
    ingest_id: int
    warnings: list[str] = field(default_factory=list)
    lots_added_to: list[str] = field(default_factory=list)
    lots_changed: list[str] = field(default_factory=list)
    #: the unusual values taken deliberately (``accept_unusual``), as the audit trail records them
    accepted_unusual: list[dict] = field(default_factory=list)
    #: True for a preview (``LotStore.ingest(..., preview=True)``): nothing was written, ``ingest_id`` is None
    preview: bool = False
    #: a preview's differences of its first :data:`PREVIEW_LOTS` revised lots, in their order: lot ->
    #: {"revision": "added to" or "changed", "changes": the first :data:`PREVIEW_CHANGES` differences
    #: (:func:`_diff`), "more": how many more}
    changes: dict[str, dict] = field(default_factory=dict)
    #: a preview's revised lots whose differences are not listed in ``changes``
    more_lots: int = 0
    #: the ingest's revised or unchanged lots that are set aside: they stay so (``linkage restore`` puts them back)
    lots_set_aside: list[str] = field(default_factory=list)
    #: a preview's: why the ingest it previews would be refused for want of --reason (None: it would not be)
    needs_reason: str | None = None
    #: notes: each product whose values were not judged for plausibility for want of history, one line each
    notes: list[str] = field(default_factory=list)
    #: per file (as ``sources`` names it), the extra columns it kept, not in the template, in file order:
    #: ``{"column", "near", "declared"}`` (:func:`linkage.read.table.extra_columns`); said, never stored
    extra_columns: dict[str, list[dict]] = field(default_factory=dict)
    #: per file (as ``sources`` names it), the blank cells of its required columns that may be blank, read as
    #: missing values: ``{"column", "header", "rows", "lots", "means"}`` (:func:`linkage.read.folder.blank_required`),
    #: every row and lot; :meth:`to_dict` lists the first few of each, with their counts
    #: (:func:`linkage.read.folder.blank_shown`)
    blank_required: dict[str, list[dict]] = field(default_factory=dict)

    @property
    def changed(self) -> bool:
        return bool(self.lots_new or self.lots_revised)

    def to_dict(self) -> dict:
        """Every field; ``changes``, ``more_lots`` and ``needs_reason`` only for a preview; of each column's blank
        cells (``blank_required``) the first rows and lots, with the counts of all."""
        from linkage.read.folder import blank_shown

        out = asdict(self)
        if not self.preview:
            del out["changes"], out["more_lots"], out["needs_reason"]
        out["blank_required"] = {file: [blank_shown(col) for col in columns]
                                 for file, columns in self.blank_required.items()}
        return out


#: a preview lists the differences of at most this many revised lots, and of each at most
#: :data:`PREVIEW_CHANGES` (a listing a person reads; the counts say how many more)
PREVIEW_LOTS = 20
PREVIEW_CHANGES = 10


def _rows_of_lots(df: pd.DataFrame, lots: set) -> pd.DataFrame:
    """The rows of a table read whose lot is one of ``lots``, with their sheet rows (``attrs["source_rows"]``)."""
    keep = df["lot"].isin(list(lots)).to_numpy()
    rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
    out = df.loc[keep].reset_index(drop=True)
    out.attrs = {**df.attrs, "source_rows": [r for r, k in zip(rows, keep) if k]}
    return out


class _IngestPlan:
    """What an ingest would write: made by :meth:`LotStore._plan` from the ingest and the stored lots (under
    the write lock for an ingest, in one read snapshot for a preview), then written by
    :meth:`LotStore._commit`, so that a preview and an ingest decide alike. Made here, the part that needs no
    store: each lot's tables encoded, the sources, the products sent."""

    def __init__(self, ingest: Ingest, reason: str | None):
        self.ingest, self.reason = ingest, given_reason(reason)
        self.prepared = _prepare(ingest)
        self.sources = {t: ingest.sources.get(t) or _memory_source(t, df) for t, df in ingest.tables.items()}
        self.products = self.products_of(ingest)
        # decided by LotStore._plan: the stored lots' current revisions, the lots by kind, the tables each new
        # or revised lot writes, the differences kept (lot -> _diff), the unusual values taken, the warnings
        self.current: dict = {}
        self.new, self.revised, self.unchanged, self.added_to, self.changed = [], [], [], [], []
        self.changes: dict[str, list[str]] = {}
        self.shown: dict[str, list[dict]] = {}
        self.unusual_records: list[dict] = []
        self.warnings: list[str] = []
        self.set_aside: list[str] = []  # the ingest's stored lots that are set aside (they stay so)
        self.needs_reason: str | None = None  # the refusal of stored values changed without a reason
        self.notes: list[str] = []  # what the ingest says besides warnings (plausibility not judged)

    @staticmethod
    def products_of(ingest: Ingest) -> dict[str, str | None]:
        """The product of each lot of the ingest's process table (None: not named)."""
        process = ingest.tables.get("process")
        if process is None:
            return {}
        return {lot: None if isinstance(product, float) else product
                for lot, product in zip(process["lot"].tolist(), process["product"].tolist())}

    def result(self, ingest_id: int | None, *, preview: bool = False) -> IngestResult:
        out = IngestResult(self.new, self.revised, self.unchanged, ingest_id, self.warnings, self.added_to,
                           self.changed, self.unusual_records, preview, lots_set_aside=self.set_aside,
                           notes=self.notes, extra_columns=self.ingest.extra_columns,
                           blank_required=getattr(self.ingest, "blank_required", {}))
        if preview:
            out.needs_reason = self.needs_reason
            listed = [lot for lot in self.revised if lot in self.shown][:PREVIEW_LOTS]
            changed = set(self.changed)
            out.changes = {lot: {"revision": "changed" if lot in changed else "added to",
                                 "changes": self.shown[lot][:PREVIEW_CHANGES],
                                 "more": max(len(self.shown[lot]) - PREVIEW_CHANGES, 0)} for lot in listed}
            out.more_lots = len(self.revised) - len(listed)
        return out


def _prepare(ingest: Ingest) -> dict[str, dict[str, LotTable]]:
    """lot -> table -> its rows as JSON text, with a content hash."""
    out: dict[str, dict[str, LotTable]] = {}
    for tname, df in ingest.tables.items():
        per_lot = encode_table(tname, df)
        columns_json = _json(list(df.columns))
        for lot, lt in per_lot.items():
            lt.columns_json = columns_json
            out.setdefault(lot, {})[tname] = lt
    return out


def _memory_source(table: str, df: pd.DataFrame) -> dict:
    """Where a table built in memory (not read from a file) is said to come from."""
    digest = hashlib.sha256(df.to_csv(index=False).encode("utf-8")).hexdigest()
    return {"file": f"({table}, not from a file)", "sha256": digest, "rows": len(df)}


def _classify(prepared: dict, order: list[str], current: dict) -> tuple[list, list, list, dict[str, list[str]]]:
    """The ingest's lots as new, revised and unchanged (a table is changed when its content hash differs from
    the stored one's), and per new or revised lot the tables it writes."""
    new, revised, unchanged = [], [], []
    changes: dict[str, list[str]] = {}
    for lot in order:
        if lot not in current:
            new.append(lot)
            changes[lot] = list(prepared[lot])
            continue
        links = current[lot]["tables"]
        changed = [t for t, lt in prepared[lot].items() if t not in links or links[t][1] != lt.sha256]
        if changed:
            revised.append(lot)
            changes[lot] = changed
        else:
            unchanged.append(lot)
    return new, revised, unchanged, changes


#: tables whose rows of a lot are parts of one whole: a sieve analysis's masses are read as shares of their
#: total (linkage.assemble), so a row added to a stored one changes what every stored row says (a change that
#: needs a reason, not an addition)
WHOLE_TABLES = frozenset({"granules"})


def adds_only(changes: list[dict]) -> bool:
    """Whether cell-level differences (:func:`_diff`) only add to the stored rows: a table added, a row with
    a new key (not in a table of :data:`WHOLE_TABLES`), a blank cell filled. Any other change, and any removal,
    changes a stored value."""
    return all(_is_addition(ch) for ch in changes)


def _only_adds(table: str, old: list[dict] | None, new: list[dict]) -> bool:
    """``adds_only(_diff(table, old, new))`` without writing the differences out: it stops at the first
    change (a large revision is told from an addition at the cost of one pass)."""
    if old is None:
        return True
    key_cols = [c for c in TABLES[table].key if c != "lot"]
    after = {tuple(r.get(c) for c in key_cols): r for r in new}
    for row in old:
        now = after.get(tuple(row.get(c) for c in key_cols))
        if now is None:
            return False  # a row removed
        if now != row:
            was, now = canon_row(table, row), canon_row(table, now)
            if any(value is not None and now.get(col) != value for col, value in was.items()):
                return False  # a stored value changed or cleared
    return table not in WHOLE_TABLES or len(after) == len(old)  # every stored key is in ``after``


def _is_addition(ch: dict) -> bool:
    if ch["change"] == "table added":
        return True
    if ch["change"] == "row added":
        return ch["table"] not in WHOLE_TABLES
    return ch["change"] == "value changed" and ch["old"] is None


# --------------------------------------------------------------------------- the store


def given_reason(reason) -> str | None:
    """A reason as given (``--reason TEXT``), stripped; None when none is given: None, not text, or blank or
    whitespace only. The one test of "needs a reason" (--accept-unusual, --reanchor, a forced promotion)."""
    return reason.strip() if isinstance(reason, str) and reason.strip() else None


#: the refusal of --accept-unusual without --reason (the API checks it before the store is created, the store again)
ACCEPT_NEEDS_REASON = ("--accept-unusual takes unusual values deliberately: give --reason TEXT to say why. "
                       "Nothing was written.")


#: the refusal of a re-anchoring without a reason
REANCHOR_NEEDS_REASON = ("--reanchor anchors the lot store again deliberately and records it in the audit trail: "
                         "give --reason TEXT to say why (e.g. the anchor file lost in a copy, and the newest seal's "
                         "hash compared with the batch record). Nothing was written.")


#: the audit actions of a lot's set-aside decisions (``linkage set-aside``, ``linkage restore``): each decision is an
#: audit entry of the lot, sealed like every entry (linkage/seal.py), so an edited or removed decision fails the
#: store's check; the state of a lot is its newest decision
SET_ASIDE, RESTORE = "set-aside", "restore"
#: a lot's state, as ``linkage lots`` shows it
IN_USE, SET_ASIDE_STATE = "in use", "set aside"


def set_aside_needs_reason(action: str, ending: str = " Nothing was written.", reason=None) -> str:
    """The refusal of a set-aside or restore decision without a reason (``ending``: what follows it); ``reason``:
    the reason as given, so that a given but blank one (``--reason ""``) is named as empty, not as missing."""
    what = ("sets lots aside (left out of fitting and judging)" if action == SET_ASIDE
            else "puts set-aside lots back in use")
    empty = "the reason given is empty; " if isinstance(reason, str) else ""
    return (f"'linkage {action}' {what} on the record: {empty}give --reason TEXT to say why (for example the deviation "
            "number and the assignable cause)" + ("." + ending if ending else ""))


def decision_shown(decision: dict) -> str:
    """The set-aside decision in force of a lot, as a refusal names it: 'since <time> UTC, by <user>: <reason>'."""
    reason = one_line(decision.get("reason")) if decision.get("reason") else "no reason recorded"
    return f"since {shown_time(decision.get('at'))}, by {decision.get('user') or 'unknown'}: {reason}"


def one_line(text) -> str:
    """``text`` on one line, as a table cell or a one-line message shows it: each line break (CR LF, LF, CR, and
    the other Unicode line separators) shown as ' ⏎ '; the stored text is unchanged."""
    if text is None:
        return ""
    return " ⏎ ".join(part.strip() for part in str(text).splitlines()) if text else str(text)


#: audit actions that only the store's own decisions write, each under its rules (a reason, a stored lot, a checked
#: store...): :meth:`LotStore.log` and ``linkage.api.record_entry`` refuse them, naming the command to use
RESERVED_ACTIONS = {SET_ASIDE: "linkage set-aside LOT --reason TEXT (LotStore.set_aside)",
                    RESTORE: "linkage restore LOT --reason TEXT (LotStore.restore)",
                    "reanchor": "linkage verify --reanchor --reason TEXT (LotStore.reanchor)",
                    "ingest": "linkage ingest FOLDER (LotStore.ingest)"}


def reserved_action_refusal(action) -> str | None:
    """Why an audit entry of ``action`` is not written by :meth:`LotStore.log` (None: it may be): a decision
    written there would bypass its rules, and the audit trail keeps it for good."""
    command = RESERVED_ACTIONS.get(str(action).strip().lower())
    if command is None:
        return None
    return (f"the audit action '{action}' is a decision with its own rules, recorded only by its command: use "
            f"{command}. Nothing was written.")


def _decision_reason(inputs_json) -> str | None:
    """The reason of a set-aside or restore decision from its stored inputs (``inputs_json``); None where they
    hold none, or are not a JSON object (an entry written through ``log`` before it refused these actions)."""
    if not inputs_json:
        return None
    try:
        inputs = json.loads(inputs_json)
    except (TypeError, ValueError):
        return None
    reason = inputs.get("reason") if isinstance(inputs, dict) else None
    return None if reason is None else str(reason)


def _set_aside_state(c) -> dict[str, dict]:
    """The lots set aside now (their newest decision is a set-aside), in the order they were set aside: lot (as
    stored) -> the decision in force, ``{"audit_id", "at", "user", "reason"}``. An entry naming no lot is no
    decision (only one written through ``log`` before it refused these actions could)."""
    state: dict[str, dict] = {}
    for audit_id, at, user, action, lot, inputs in c.execute(
            "SELECT id, at, user, action, lot, inputs_json FROM audit WHERE action IN (?, ?) ORDER BY id",
            (SET_ASIDE, RESTORE)).fetchall():
        if lot is None:
            continue
        state.pop(lot, None)
        if action == SET_ASIDE:
            state[lot] = {"audit_id": audit_id, "at": at, "user": user, "reason": _decision_reason(inputs)}
    return state


#: how many lot ids a set-aside text names before "and N more"
LOTS_NAMED = 12


def lots_named(lots, limit: int = LOTS_NAMED) -> str:
    """The first ``limit`` lot ids, and how many more: 'A, B, C and 3 more' (the set-aside texts, the report's)."""
    lots = [str(lot) for lot in lots]
    more = len(lots) - limit
    return ", ".join(lots[:limit]) + (f" and {more} more" if more > 0 else "")


def id_runs(ids, shown: int = 6) -> str:
    """Whole numbers (audit entry ids) as runs: '3–51' for 3, 4, ..., 51; '3, 5–7, 9'; the first ``shown`` runs
    and how many more ids ('3–5, 8, ... and 40 more')."""
    runs: list[list[int]] = []
    for i in ids:
        if runs and i == runs[-1][1] + 1:
            runs[-1][1] = i
        else:
            runs.append([i, i])
    text = [f"{a}" if a == b else f"{a}, {b}" if b == a + 1 else f"{a}–{b}" for a, b in runs[:shown]]
    more = sum(b - a + 1 for a, b in runs[shown:])
    return ", ".join(text) + (f" and {more} more" if more else "")


def set_aside_note(set_aside, what: str = "left out") -> str | None:
    """What a command that leaves set-aside lots out says: how many, which, and where to look (None: none)."""
    lots = list(set_aside)
    if not lots:
        return None
    shown = lots_named(lots)
    return (f"{len(lots)} lot{'' if len(lots) == 1 else 's'} set aside in the store "
            f"{'is' if len(lots) == 1 else 'are'} {what}: {shown} "
            "('linkage lots' shows why; 'linkage restore LOT --reason TEXT' puts one back in use)")


def set_aside_trained_note(set_aside, training_lots, model_id: str, *,
                           replaced: bool = False) -> tuple[list[str], str | None]:
    """The set-aside lots that were in a model's training set (the model was trained before they were set
    aside, or they were restored then), and what the watch and retrain say of them. A model on the same lots
    less these is not promoted by the retrain's rule without new lots to judge it: the note points to what
    replaces the model now ('linkage retrain --force', 'linkage train'). ``replaced``: the model was the champion
    until this run, which promoted a challenger fitted without them (said in the past)."""
    trained = {str(lot) for lot in training_lots or []}
    lots = [lot for lot in set_aside if lot in trained]
    if not lots:
        return [], None
    one = len(lots) == 1
    it = "it" if one else "them"
    head = f"{len(lots)} lot{'' if one else 's'} now set aside {'was' if one else 'were'} in the training set of "
    if replaced:
        return lots, (f"{head}model {model_id}, the champion until this retrain: {lots_named(lots)}; the "
                      f"challenger promoted now was fitted without {it}")
    return lots, (f"{head}model {model_id}: {lots_named(lots)}; the model was fitted on {it}. 'linkage retrain' "
                  f"promotes a challenger without {it} only when new lots judge it better; 'linkage retrain "
                  "--force --reason TEXT' or 'linkage train' replaces the model now")


def set_aside_notes(set_aside: dict, chain, notes: list[str], what: str, *,
                    replaced: bool = False) -> tuple[list[str], list[str]]:
    """Add to ``notes`` what a command says of the set-aside lots it leaves out (:func:`set_aside_note`, ``what``:
    "not watched") and of those of them in ``chain``'s training set (:func:`set_aside_trained_note`,
    ``replaced``: ``chain`` was the champion until this run); returns both lists of lots (watch, retrain)."""
    in_training, trained_note = set_aside_trained_note(set_aside, chain.training.get("lots"), chain.model_id,
                                                       replaced=replaced)
    notes += [n for n in (set_aside_note(set_aside, what), trained_note) if n]
    return list(set_aside), in_training


def restored_since_training(chain, new_lots, notes: list[str], what: str = "since training") -> list[str]:
    """The lots among ``new_lots`` (those a model was not trained on) that were set aside when ``chain`` was trained
    (its ``training.set_aside_lots``) and are in use again: restored since, not new lots. A note naming them is added
    to ``notes`` (watch, retrain; ``what``: how the command calls the new lots); returns them."""
    aside_then = {str(lot) for lot in (chain.training.get("set_aside_lots") or [])}
    lots = [str(lot) for lot in new_lots if str(lot) in aside_then]
    if lots:
        one = len(lots) == 1
        notes.append(f"{len(lots)} of the lots {what} {'was' if one else 'were'} set aside when model "
                     f"{chain.model_id} was trained and {'has' if one else 'have'} been restored since: "
                     f"{lots_named(lots)}; {'it is' if one else 'they are'} counted with the lots {what} because the "
                     f"model was fitted without {'it' if one else 'them'}, not because {'it is' if one else 'they are'}"
                     " new ('linkage history LOT' shows the decisions)")
    return lots


class LotTables(dict):
    """What :meth:`LotStore.current_tables` returns: table -> DataFrame of the lots in use, and ``set_aside``: the
    lots of the same scope (product) left out because they are set aside (lot -> the decision in force, as
    :meth:`LotStore.set_aside_lots` gives it), in the order the lots came."""

    def __init__(self, tables=(), set_aside: dict | None = None):
        super().__init__(tables)
        self.set_aside: dict[str, dict] = dict(set_aside or {})


class LotStore:
    """The SQLite lot store. Use as a context manager, or call :meth:`close`.

    ``create=False`` refuses a path where no store exists yet (for commands
    that only read).

    A store that holds seals but no anchor file beside it (``<store>.seal``,
    :mod:`linkage.seal`) is read with a caution (a
    :class:`~linkage.exceptions.StoreCaution` warning; :attr:`unanchored`
    holds its newest seal) and never written to: every write is refused
    (:class:`StoreIntegrityError`, exit code 6) until :meth:`reanchor`.
    ``for_writing=True`` (a command that will write) refuses such a store at
    once, before the command does any work.

    ``read_only=True`` opens an existing store for reading only although its
    file could be written (an ingest's preview, a set-aside's checks): SQLite
    refuses every change (``PRAGMA query_only``), and a store of an earlier
    schema is read as it is, not upgraded (schema 1, before seals, is refused:
    :class:`StoreNeedsUpgrade`).

    ``upgrade=False`` (a command that records nothing in the store: ``lots``,
    ``history``, ``audit``, ``assemble``, ``report``, ``verify``, ...; see
    :func:`reading`): a store of the current schema opens as before; one of an
    earlier schema is opened as ``read_only`` is, read as it is and never
    upgraded, so that neither it nor its folder changes (no anchor file, no
    table, no seal) and an earlier linkage still reads it. :attr:`older_schema`
    holds its schema, and :meth:`cautions` says so.
    """

    def __init__(self, path: Path | str = "linkage.db", *, create: bool = True,
                 busy_timeout_s: float = BUSY_TIMEOUT_S, for_writing: bool = False, read_only: bool = False,
                 upgrade: bool = True):
        self.path = Path(path)
        self.busy_timeout_s = busy_timeout_s
        self.upgrade = upgrade
        #: the newest seal ({"id", "sha256"}) of a store with seals but no anchor file; None otherwise
        self.unanchored: dict | None = None
        #: the schema of a store written by an earlier linkage and read without its upgrade (as it is, or from an
        #: upgraded temporary copy: :attr:`from_copy`); None for a store of the current schema or one upgraded
        self.older_schema: int | None = None
        #: read from an upgraded temporary copy of the store (:func:`upgraded_copy`; schema 1), not from the store
        self.from_copy = False
        #: the schema this opening upgraded the store from (1 or 2; said as a StoreUpgraded warning); None: not upgraded
        self.upgraded_from: int | None = None
        #: the store whose anchor file is checked: this one (a copy's own, where :attr:`path` names the store copied)
        self._anchored = self.path
        if self.path.is_dir():
            raise StorePathError(f"{self.path} is a folder, not a lot store file")
        exists = self.path.exists() and self.path.stat().st_size > 0
        if not exists and not create:
            raise StorePathError(f"no lot store at {self.path}; run `linkage ingest FOLDER` first, or point --store "
                             "(or LINKAGE_STORE) at the store")
        if not exists and not self.path.parent.is_dir():
            raise StorePathError(f"cannot create the lot store {self.path}: folder {self.path.parent} does not exist")
        if exists:
            with open(self.path, "rb") as fh:
                if fh.read(16) != b"SQLite format 3\x00":
                    raise StorePathError(f"{self.path} is not a SQLite file, so not a lot store")
        #: a store on a read-only file system (or a file this account cannot write) is opened for reading only:
        #: immutable, so SQLite neither writes its -shm file nor expects another writer (sqlite.org, "URI
        #: filenames": immutable=1); every command that only reads works, and a write is refused clearly
        writable = can_write(self.path)
        #: whether this account can write the store (its file and its folder), whatever ``read_only`` asked; a
        #: store this opening creates is
        self.writable = writable or not exists
        self.read_only = exists and (read_only or not writable)
        #: opened to read only (``read_only``, or ``upgrade=False`` until the schema is known) beside a -wal file
        #: that a writer left (one that crashed, or one at work): a read-only connection (:func:`_reading_uri`)
        self._wal_read = exists and writable and (read_only or not upgrade) and _wal_beside(self.path)
        self._conn = self._connect()
        try:
            self._setup()
            if self.unanchored is not None and for_writing:
                raise StoreIntegrityError(self._unanchored_refusal())
        except BaseException:
            self._conn.close()
            raise
        self._warn_cautions()

    def _connect(self) -> sqlite3.Connection:
        try:
            if self.read_only and not self.writable or self._wal_read:
                conn = sqlite3.connect(_reading_uri(self.path, self.writable), uri=True,
                                       timeout=self.busy_timeout_s, isolation_level=None)
            else:
                conn = sqlite3.connect(self.path, timeout=self.busy_timeout_s, isolation_level=None)
                if self.read_only:  # a writable file read only: closed as a writer closes it (no -wal left)
                    conn.execute("PRAGMA query_only = ON")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open the lot store {self.path}: {exc}") from None
        # the reader's lot identity (linkage.lotid.lot_key) in SQL: a lot given on the command line finds its entries
        # whatever their spelling (case, dash, compatibility form), as an ingest finds the stored lot
        conn.create_function("lot_key", 1, lambda lot: None if lot is None else lot_key(str(lot)), deterministic=True)
        return conn

    def _warn_cautions(self) -> None:
        """Each of :meth:`cautions` as a :class:`~linkage.exceptions.StoreCaution` warning (the command line
        prints it once, as a ``caution, store:`` line on stderr), at the line that opened the store
        (:func:`caller_stacklevel`)."""
        import warnings

        from linkage.exceptions import StoreCaution

        cautions, stacklevel = self.cautions(), caller_stacklevel()
        for k, caution in enumerate(cautions):
            warning = StoreCaution(caution)
            if self.older_schema is not None and k == len(cautions) - 1:
                # the store of this caution: a command that then upgrades it to record (StoreUpgraded) says that
                # instead (the command line leaves this caution out then: "not upgraded" would no longer hold)
                warning.older_schema_of = str(self.path)
            warnings.warn(warning, stacklevel=stacklevel)

    def cautions(self) -> list[str]:
        """What this store cannot show, as the caution every reading command prints on stderr (``caution,
        store: ...``): the missing anchor file of a sealed store; a store written by an earlier linkage read
        without its upgrade (:attr:`older_schema`); empty when there is nothing to say. A document made from
        the store (the report) states them too."""
        out = []
        if self.unanchored is not None:
            out.append(_seal.unanchored_caution(self.path, self.unanchored["id"], self.unanchored["sha256"]))
        if self.older_schema is not None:
            out.append(older_schema_caution(self.path, self.older_schema, copy=self.from_copy))
        return out

    # ---- opening

    def _setup(self) -> None:
        c = self._conn
        try:
            self._pragmas(c)
            # the tables first, then the id: _create commits both in one transaction, so a schema seen
            # here always comes with its id, and a store another process creates between the two reads
            # shows as (LNKG, no tables) or (0, no tables), which _create re-checks under the write lock
            names = [r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
            app_id = c.execute("PRAGMA application_id").fetchone()[0]
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None
        if app_id == APPLICATION_ID:
            try:
                version = c.execute("SELECT MAX(version) FROM schema_version").fetchone()[0]
            except sqlite3.DatabaseError as exc:
                raise self._error(exc) from None
            if version is None or version > SCHEMA_VERSION:
                raise StorePathError(f"{self.path} was written by a newer linkage (store schema {version}; "
                                 f"this version reads {SCHEMA_VERSION})")
        elif app_id == 0 and not names:
            if self.read_only or not self.upgrade:  # making the store in it would write it: refused as no store is
                raise EmptyStoreFile(f"no lot store at {self.path} (an SQLite file without a table: nothing was ever "
                                     "stored in it; left as it is); run `linkage ingest FOLDER` first, or point "
                                     "--store (or LINKAGE_STORE) at the store")
            self._create()
            version = SCHEMA_VERSION
        else:
            shown = ", ".join(names[:6]) or "none"
            raise StorePathError(f"{self.path} is an SQLite file but not a linkage lot store (tables: {shown})")
        if self._wal_read and not self.read_only and version == SCHEMA_VERSION:
            # a store of the current schema that a command recording nothing opens: opened as before (a read-only
            # connection closes without a checkpoint, which is kept for the older stores only)
            self._conn.close()
            self._wal_read = False
            self._conn = c = self._connect()
            try:
                self._pragmas(c)
            except sqlite3.DatabaseError as exc:
                raise self._error(exc) from None
        if not self.read_only and not self.upgrade and version < SCHEMA_VERSION:
            # a command that records nothing: an older store read as it is, never upgraded (nor anything written)
            c.execute("PRAGMA query_only = ON")
            self.read_only = True
        if self.read_only:
            if version < 2:
                exc = StoreNeedsUpgrade(f"{self.path} was written by an earlier linkage (store schema {version}) and "
                                        "is read-only here: open it once with write access to upgrade and seal it")
                exc.version = version
                raise exc
            self.older_schema = version if version < SCHEMA_VERSION else None
            self.check_seals()
            self.unanchored = self._missing_anchor(c)
            return
        self._journal_wal(c)
        c.execute("PRAGMA synchronous = FULL")
        # an upgrade writes (and anchors) the store: not one whose anchor is missing, which is read as it is
        if version < SCHEMA_VERSION and (version < 2 or self._missing_anchor(c) is None):
            self._upgrade()
        self.check_seals()
        self.unanchored = self._missing_anchor(c)

    def _pragmas(self, c) -> None:
        c.execute(f"PRAGMA busy_timeout = {int(self.busy_timeout_s * 1000)}")
        c.execute("PRAGMA foreign_keys = ON")

    def _missing_anchor(self, c) -> dict | None:
        """The newest seal ({"id", "sha256"}) when the store holds seals but no anchor file; else None (an
        anchored store; a store without seals, which a first write anchors as it always has)."""
        if not c.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'seals'").fetchone():
            return None
        seal_id, digest = _seal.head(c)
        if seal_id == 0 or _seal.read_anchor(self._anchored) is not None:
            return None
        return {"id": seal_id, "sha256": digest}

    def _read_only_refusal(self) -> str:
        if self.older_schema is not None and self.writable:
            return (f"the lot store {self.path} was written by an earlier linkage (store schema {self.older_schema}) "
                    "and is read here by a command that records nothing in it: not upgraded, not changed; nothing "
                    "was written")
        return (f"the lot store {self.path} is read-only here (a read-only file system, or a file this account "
                "cannot write): it can be read, not changed; nothing was written. To record nothing, 'linkage "
                "window', 'predict' and 'running' take --no-record")  # a user test: the way out was not said

    def _unanchored_refusal(self, newest: dict | None = None) -> str:
        newest = newest or self.unanchored
        return _seal.unanchored_refusal(self.path, newest["id"], newest["sha256"])

    def _journal_wal(self, c) -> None:
        """The WAL journal. Setting it takes a moment alone with the file, and SQLite can answer "database is
        locked" at once, without waiting its busy timeout, while another process creates or opens the same
        new store (seen in tests/reliability/test_concurrency.py); so it is tried again until the busy timeout,
        and then refused as busy (exit code 3, try again), never a traceback."""
        import time

        deadline = time.monotonic() + self.busy_timeout_s
        while True:
            try:
                c.execute("PRAGMA journal_mode = WAL")
                return
            except sqlite3.OperationalError as exc:
                text = str(exc).lower()
                if time.monotonic() >= deadline or not ("locked" in text or "busy" in text):
                    raise self._error(exc) from None
                time.sleep(0.05)

    def check_seals(self, *, full: bool = False) -> dict:
        """Check the records against their seals (:mod:`linkage.seal`); raises
        :class:`StoreIntegrityError` listing every mismatch. ``full`` adds
        every ingest's content and every lot table's raw rows. Returns what
        was checked, with the newest seal."""
        try:
            anchor = _seal.read_anchor(self._anchored)  # before the snapshot begins (see seal.check)
            with self._snapshot():
                problems = []
                if full:  # SQLite's own check of every page and index (linear in the store's size)
                    damage = [r[0] for r in self._conn.execute("PRAGMA integrity_check(20)")]
                    problems += [] if damage == ["ok"] else [f"SQLite integrity_check: {d}" for d in damage]
                found, counts = _seal.check(self._conn, self._anchored, full=full, anchor=anchor)
                problems += found
                counts["newest seal"] = dict(zip(("id", "sha256"), _seal.head(self._conn)))
        except sqlite3.DatabaseError as exc:
            raise StoreIntegrityError(f"lot store {self.path} is damaged: {exc}") from None
        if problems:
            raise StoreIntegrityError(f"lot store {self.path} failed its integrity check; nothing was read or "
                                      "written. Restore the store from a backup, and find out who changed it:\n"
                                      + "\n".join(f"  - {p}" for p in problems))
        return counts

    def _upgrade(self) -> None:
        """Schema 1 or 2 -> 3, in one transaction sealed by one ``upgrade`` seal (see linkage.seal). 1 -> 2:
        the seal tables, and every record sealed as it stands. 2 -> 3: the row_blocks table; the rows stored
        so far stay in raw_rows, where they are read as before, with the same row hashes."""
        with self._write() as c:
            version = c.execute("SELECT MAX(version) FROM schema_version").fetchone()[0]
            if version >= SCHEMA_VERSION:
                return  # another process upgraded it while we waited
            self.upgraded_from = version
            if version < 2:
                self._seal_records(c)
                c.execute("INSERT INTO schema_version VALUES (?, ?)", (2, _now()))
            c.execute(_ROW_BLOCKS_DDL)
            for stmt in _triggers(["row_blocks"]):
                c.execute(stmt)
            c.execute("INSERT INTO schema_version VALUES (?, ?)", (SCHEMA_VERSION, _now()))
            _seal.seal(c, _seal.UPGRADE, SCHEMA_VERSION)
        self._warn_upgraded()

    def _warn_upgraded(self) -> None:
        """Say that this opening upgraded the store (:attr:`upgraded_from`): a
        :class:`~linkage.exceptions.StoreUpgraded` warning, which the command line prints as a ``caution, store:``
        line and adds to a command's ``--json`` (``store_upgraded``). An upgrade is never silent: after it an
        earlier linkage refuses the store."""
        import warnings

        from linkage.exceptions import StoreUpgraded

        warnings.warn(StoreUpgraded(store_upgraded_text(self.path, self.upgraded_from), path=self.path,
                                    version_from=self.upgraded_from, version_to=SCHEMA_VERSION),
                      stacklevel=caller_stacklevel())  # the line that opened the store

    @staticmethod
    def _seal_records(c) -> None:
        """Schema 1 -> 2: the seal tables, each lot table's row hashes, and a seal for every record."""
        c.execute("ALTER TABLE ingests ADD COLUMN reason TEXT")
        for stmt in [*_seal.DDL, *_triggers(_seal.APPEND_ONLY)]:
            c.execute(stmt)
        hashes, texts, sources, current = [], [], [], None
        for tid, source_row, text in c.execute("SELECT lot_table_id, source_row, data_json FROM raw_rows "
                                               "ORDER BY lot_table_id, seq").fetchall() + [(None, None, None)]:
            if tid != current and current is not None:
                hashes.append((current, _seal.rows_sha256(texts), _seal.source_rows_sha256(sources)))
                texts, sources = [], []
            current = tid
            texts.append(text)
            sources.append(source_row)
        c.executemany("INSERT INTO lot_table_hashes VALUES (?, ?, ?)", hashes)
        c.executemany("INSERT INTO lot_table_hashes SELECT id, ?, ? FROM lot_tables WHERE id NOT IN "
                      "(SELECT lot_table_id FROM lot_table_hashes)",
                      [(_seal.rows_sha256([]), _seal.source_rows_sha256([]))])
        for kind, table in ((_seal.INGEST, "ingests"), (_seal.AUDIT, "audit"), (_seal.PREDICTION, "predictions")):
            for (ref,) in c.execute(f"SELECT id FROM {table} ORDER BY id").fetchall():
                _seal.seal(c, kind, ref)

    def _create(self) -> None:
        with self._write() as c:
            names = [r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
            if names:  # another process created it while we waited
                return
            for stmt in _statements():
                c.execute(stmt)
            c.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            c.execute("INSERT INTO schema_version VALUES (?, ?)", (SCHEMA_VERSION, _now()))

    def _error(self, exc: sqlite3.Error) -> Exception:
        text = str(exc).lower()
        if "locked" in text or "busy" in text:
            return StoreBusyError(f"store busy: another process has held the lot store {self.path} for more "
                                  f"than {self.busy_timeout_s:g} s; try again when it has finished")
        return StoreError(f"lot store {self.path}: {exc}")

    @contextmanager
    def _write(self, *, reanchoring: bool = False) -> Iterator[sqlite3.Connection]:
        """One write transaction: all of it or nothing. Refused, under the write lock, where the store holds
        seals but no anchor file: the anchor written after the commit would vouch for whatever the store now
        holds (only :meth:`reanchor` writes to such a store, ``reanchoring``)."""
        if self.read_only:
            raise StoreError(self._read_only_refusal())
        c = self._conn
        try:
            c.execute("BEGIN IMMEDIATE")
            missing = None if reanchoring else self._missing_anchor(c)
        except sqlite3.DatabaseError as exc:
            if c.in_transaction:
                c.execute("ROLLBACK")
            raise self._error(exc) from None
        if missing is not None:
            c.execute("ROLLBACK")
            self.unanchored = missing
            raise StoreIntegrityError(self._unanchored_refusal(missing))
        try:
            yield c
            c.execute("COMMIT")
        except BaseException as exc:
            if c.in_transaction:
                c.execute("ROLLBACK")
            if isinstance(exc, sqlite3.DatabaseError):
                raise self._error(exc) from None
            raise
        if c.execute("SELECT 1 FROM sqlite_master WHERE name = 'seals'").fetchone():
            _seal.advance_anchor(self.path, c)  # the newest seal, never an older one (writers finishing together)

    def _read(self, sql: str, params: tuple = ()) -> list[tuple]:
        try:
            return self._conn.execute(sql, params).fetchall()
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None

    @property
    def connection(self) -> sqlite3.Connection:
        """The open connection, for read queries; the triggers refuse changes to records."""
        return self._conn

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> LotStore:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ---- ingest

    def lot_ids(self) -> list[str]:
        """Every lot in the store, in the order they first came."""
        return [r[0] for r in self._read("SELECT lot FROM lots ORDER BY rowid")]

    def product_counts(self, *, in_use: bool = False) -> dict[str | None, int]:
        """The number of lots of each product (their current revision's), None for lots without a product name;
        ``in_use``: the lots in use only (set-aside lots left out, as :meth:`current_tables` leaves them)."""
        aside = set(self.set_aside_lots()) if in_use else set()
        counts: dict[str | None, int] = {}
        for lot, product in self._read("SELECT lot, product FROM current_revisions"):
            if lot not in aside:
                key = product if isinstance(product, str) and product.strip() else None
                counts[key] = counts.get(key, 0) + 1
        return counts

    def other_products(self, product: str | None) -> list[tuple[str | None, int]]:
        """The counts of the lots in use of the products other than ``product`` (None last: lots without a
        product name); none when ``product`` is None (:func:`linkage.products.other_counts`). Set-aside lots are
        not counted: they are left out for being set aside, whatever their product."""
        from linkage.products import other_counts

        return other_counts(self.product_counts(in_use=True), product)

    def stored_spelling(self, lot: str) -> str | None:
        """The stored lot that ``lot`` is under the reader's lot identity
        (:func:`linkage.lotid.lot_key`: case, dashes, compatibility forms),
        in the store's spelling; None when the store holds no such lot."""
        exact = self._read("SELECT lot FROM lots WHERE lot = ?", (lot,))
        if exact:
            return exact[0][0]
        found = self._read("SELECT lot FROM lots WHERE lot_key(lot) = ? ORDER BY rowid", (lot_key(lot),))
        return found[0][0] if len(found) == 1 else None  # two stored lots of one identity (an older store): neither

    def ingest(self, ingest: Ingest, user: str | None = None, reason: str | None = None, *,
               accept_unusual: bool = False, preview: bool = False) -> IngestResult:
        """Store a checked folder as one transaction; see the module notes.

        Raises InputError (nothing written) when results name a lot with no
        process record in the folder or the store, or when an empty store
        gets a folder without every required table.

        ``preview``: decide everything the ingest would (the same checks,
        comparisons with the stored lots and refusals, raised alike) in one
        read snapshot, and write nothing; the result has ``preview`` True, no
        ``ingest_id``, and the differences of the revised lots (``changes``).
        """
        with _read.bulk():
            if preview:
                return self._preview(ingest, reason, accept_unusual)
            return self._ingest(ingest, user, reason, accept_unusual)

    def unusual_beside(self, read: Ingest, judged: list[dict] = ()) -> list[Problem]:
        """The values far from history (:func:`linkage.plausible.unusual_values`, as :meth:`_plan` judges them) of
        the tables of a folder that were read whole while the folder is refused for other problems
        (``InputError.read``, :func:`linkage.read.read_folder`), so that one refusal names both. Only the lots
        whose product is known are judged: from the folder's process table when it was read, else the store's;
        the others wait for the ingest that reads their process rows. A lot's column the reader judged without
        history (``judged``, records as :func:`linkage.plausible.sieve_apertures` gives them: a sieve stack in mm)
        is not named again. Nothing written, one read snapshot."""
        products = _IngestPlan.products_of(read)
        try:
            with self._snapshot():
                c = self._conn
                stored = self._current_links(c, [lot for lot in read.lots() if lot not in products])
                problems, records = self._unusual(c, read, products, stored)
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None
        said = {(r["file"], r["lot"], r["column"]) for r in judged}
        return [p for p, r in zip(problems, records) if (r["file"], r["lot"], r["column"]) not in said]

    def _ingest(self, ingest: Ingest, user: str | None, reason: str | None, accept_unusual: bool) -> IngestResult:
        plan = _IngestPlan(ingest, reason)  # before the write lock: it needs no store
        with self._write() as c:
            self._plan(c, plan, accept_unusual)
            if plan.needs_reason:
                raise UsageError(plan.needs_reason)
            result = self._commit(c, plan, user or current_user())
        return result

    def _preview(self, ingest: Ingest, reason: str | None, accept_unusual: bool) -> IngestResult:
        """What :meth:`_ingest` would do, decided by the same :meth:`_plan` in one read snapshot; nothing
        written (a store opened ``read_only`` cannot be). A store this account cannot write is refused as
        :meth:`_write` refuses the ingest, before the plan."""
        if not self.writable:
            raise StoreError(self._read_only_refusal())
        plan = _IngestPlan(ingest, reason)
        try:
            with self._snapshot():
                self._plan(self._conn, plan, accept_unusual, show=PREVIEW_LOTS)
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None
        result = plan.result(None, preview=True)
        if plan.needs_reason:  # refused as the ingest is, with the preview's whole result on the refusal
            exc = UsageError(plan.needs_reason)
            exc.preview = result
            raise exc
        return result

    def _plan(self, c, plan: _IngestPlan, accept_unusual: bool, *, show: int = 0) -> None:
        """Decide the ingest against the stored lots: the checks across the folder and the store, each lot new,
        revised (added to or changed) or unchanged, and the refusals (:meth:`_refuse`); fills ``plan``.
        ``show``: the differences of at least this many revised lots are kept in ``plan.shown`` (a preview's)."""
        ingest, order = plan.ingest, plan.ingest.lots()
        known = {r[0] for r in c.execute("SELECT lot FROM lots")}
        problems = _read.cross_check(ingest, known)
        if problems:
            raise InputError(problems)
        current = plan.current = self._current_links(c, [lot for lot in order if lot in known])
        plan.new, plan.revised, plan.unchanged, plan.changes = _classify(plan.prepared, order, current)
        plan.added_to, plan.changed, plan.shown = self._split_revised(c, plan.revised, plan.changes, current,
                                                                      plan.prepared, show)
        products = plan.products
        first = {lot: plan.shown[lot] for lot in plan.changed[:3]}  # the refusal names the first few changed lots
        found = self._unusual(c, ingest, products, current, plan.notes)
        plan.unusual_records = self._refuse(ingest, found, plan.reason, accept_unusual)
        if plan.changed and plan.reason is None:  # refused, after the refusals above (a preview says it last)
            plan.needs_reason = _needs_reason(plan.changed, first)
        plan.warnings = list(ingest.warnings)
        aside = _set_aside_state(c)
        plan.set_aside = [lot for lot in order if lot in aside]
        for lot in plan.revised:
            old = current[lot]["product"]
            if lot in products and products[lot] != old:
                plan.warnings.append(f"lot {lot}: product changes from {old or '(none)'} to "
                                     f"{products[lot] or '(none)'}")

    def _commit(self, c, plan: _IngestPlan, user: str) -> IngestResult:
        """Write what :meth:`_plan` decided (inside the write transaction that decided it): the ingest, its
        files, lots, lot tables, revisions, its seal and its audit entry."""
        ingest, sources, reason = plan.ingest, plan.sources, plan.reason
        new, revised, unchanged = plan.new, plan.revised, plan.unchanged
        at, folder, warnings_json = _now(), None if ingest.folder is None else str(ingest.folder), _json(plan.warnings)
        head = [at, user, folder, len(new), len(revised), len(unchanged), warnings_json, reason]
        ingest_id = c.execute("INSERT INTO ingests (at, user, folder, lots_new, lots_revised, lots_unchanged, "
                              "warnings_json, reason) VALUES (?, ?, ?, ?, ?, ?, ?, ?)", head).lastrowid
        files = [(tname, src["file"], src["sha256"], src["rows"]) for tname, src in sources.items()]
        files += [(None, src["file"], src["sha256"], None) for src in ingest.other_sources.values()]
        c.executemany("INSERT INTO ingest_files VALUES (?, ?, ?, ?, ?)", [(ingest_id, *f) for f in files])
        c.executemany("INSERT INTO lots VALUES (?, ?)", [(lot, ingest_id) for lot in new])
        written, revisions, revision_tables = self._write_revisions(c, ingest_id, new + revised, plan.changes,
                                                                    plan.current, plan.prepared, sources,
                                                                    plan.products)
        _seal.seal(c, _seal.INGEST, ingest_id,
                   _ingest_sha256([ingest_id, *head], files, new, written, revisions, revision_tables))
        self._log(c, "ingest", user, None, None,
                  {"folder": folder, "files": {t: s["file"] for t, s in sources.items()}, "reason": reason,
                   "accepted_unusual": plan.unusual_records},
                  {"ingest_id": ingest_id, "new": new, "revised": revised, "unchanged": len(unchanged),
                   "added_to": plan.added_to, **({"set_aside": plan.set_aside} if plan.set_aside else {})})
        return plan.result(ingest_id)

    def _split_revised(self, c, lots: list[str], changes: dict[str, list[str]], current: dict,
                       prepared: dict, show: int = 0) -> tuple[list[str], list[str], dict[str, list[dict]]]:
        """The revised ``lots`` as those only added to and those whose stored values change (:func:`adds_only`
        of the differences between each lot's stored revision and what the ingest sends, over the tables it
        changes), and the differences (:func:`_diff`, as ``history`` shows them) of the first three changed
        lots, for the refusal, and of the first ``show`` revised lots (a preview's). Only those lot tables'
        stored rows are read, checked against their row hashes."""
        stored_ids = {(lot, t): current[lot]["tables"][t][0] for lot in lots for t in changes[lot]
                      if t in current[lot]["tables"]}
        stored = self._stored_rows(c, list(stored_ids.values()))
        sent = _parse_rows({(lot, tname): prepared[lot][tname].rows for lot in lots for tname in changes[lot]})
        added_to, changed, shown = [], [], {}
        for lot in lots:
            pairs = [(tname, stored[stored_ids[lot, tname]] if (lot, tname) in stored_ids else None, sent[lot, tname])
                     for tname in changes[lot]]
            adds = all(_only_adds(*pair) for pair in pairs)
            (added_to if adds else changed).append(lot)
            if (not adds and len(changed) <= 3) or len(shown) < show:
                shown[lot] = [ch for pair in pairs for ch in _diff(*pair)]
        return added_to, changed, shown

    def _unusual(self, c, ingest: Ingest, products: dict, current: dict, notes: list[str] | None = None
                 ) -> tuple[list[Problem], list[dict]]:
        """The values of ``ingest`` far from history and the same as records (:func:`linkage.plausible
        .unusual_values`): of each lot whose product is known, from the ingest's process table (``products``,
        :meth:`_IngestPlan.products_of`), else the store's (``current``: the stored lots' links,
        :meth:`_current_links`), judged against its product's recent stored lots, none of the ingest's
        (:meth:`_history`). A lot of neither (only in a folder refused for it: an ingest refuses a result without
        a process record, :func:`linkage.read.cross_check`) is not judged. ``notes`` gets the products whose
        values were not judged for want of history (:func:`linkage.plausible.history_note`)."""
        lots = ingest.lots()
        product_of = {lot: products[lot] if lot in products else current[lot]["product"]
                      for lot in lots if lot in products or lot in current}
        judged = ingest
        if len(product_of) < len(lots):  # only the rows of the lots whose product is known
            judged = _read.Ingest({t: _rows_of_lots(df, set(product_of)) for t, df in ingest.tables.items()},
                                  ingest.sources)
        history = self._history(c, set(product_of.values()), set(product_of))
        return _plausible.unusual_values(judged, history, product_of, notes)

    @staticmethod
    def _refuse(ingest: Ingest, found: tuple[list[Problem], list[dict]], reason: str | None,
                accept_unusual: bool) -> list[dict]:
        """Raise for the unusual values ``found`` (:meth:`_unusual`) not taken deliberately, and for unusual values
        taken without a reason (stored values changed without one: :meth:`_plan`); returns the unusual values taken
        (for the audit trail)."""
        unusual, unusual_records = found
        if accept_unusual and reason is None:
            raise UsageError(ACCEPT_NEEDS_REASON)
        if unusual and not accept_unusual:
            raise InputError(unusual)
        # taken deliberately at reading (judged without history, linkage.plausible.sieve_apertures): recorded too,
        # once for a lot and column that history judged as well
        judged = {(r["file"], r["lot"], r["column"]) for r in unusual_records}
        unusual_records = unusual_records + [r for r in getattr(ingest, "unusual", [])
                                             if (r["file"], r["lot"], r["column"]) not in judged]
        return unusual_records

    def _write_revisions(self, c, ingest_id: int, lots: list[str], changes: dict[str, list[str]], current: dict,
                         prepared: dict, sources: dict, products: dict) -> tuple[list, list, list]:
        """The new and revised ``lots``' lot tables (their rows in row_blocks), revisions and revision tables;
        returns what was written: lot tables (id, lot, table, LotTable, source), revisions and revision tables
        (the rows inserted).
        Lot tables and revisions get their ids here, as SQLite would give them (largest id + 1; the write
        transaction holds the store), so that they are written in a few statements."""
        next_tid = c.execute("SELECT COALESCE(MAX(id), 0) + 1 FROM lot_tables").fetchone()[0]
        next_rid = c.execute("SELECT COALESCE(MAX(id), 0) + 1 FROM revisions").fetchone()[0]
        revisions, revision_tables, written = [], [], []
        for lot in lots:
            links = {t: v[0] for t, v in current.get(lot, {"tables": {}})["tables"].items()}
            for tname in changes[lot]:
                written.append((next_tid, lot, tname, prepared[lot][tname], sources[tname]))
                links[tname] = next_tid
                next_tid += 1
            number = current[lot]["revision"] + 1 if lot in current else 1
            product = products[lot] if lot in products else current[lot]["product"]
            revisions.append((next_rid, lot, number, ingest_id, product))
            revision_tables += [(next_rid, t, links[t]) for t in TABLES if t in links]
            next_rid += 1
        for start in range(0, len(written), _BATCH):  # in id order: the rows as one by one would write them
            self._insert_lot_tables(c, ingest_id, written[start:start + _BATCH])
        write_row_blocks(c, ingest_id, written)
        c.executemany("INSERT INTO revisions (id, lot, revision, ingest_id, product) VALUES (?, ?, ?, ?, ?)",
                      revisions)
        c.executemany("INSERT INTO revision_tables VALUES (?, ?, ?)", revision_tables)
        return written, revisions, revision_tables

    def _history(self, c, products: set, exclude: set) -> dict[str, dict]:
        """The stored rows of each product's recent lots (at most ``plausible.HISTORY_LOTS`` a product, newest
        first, none of ``exclude``), by table, product and lot: what an ingest's values are compared with
        (linkage/plausible.py). The newest lots are read in batches until every product has its share or
        ``8 x HISTORY_LOTS`` lots were looked at, so an ingest reads a bounded number of lots whatever the
        store's size (one batch in a store of one product)."""
        n = _plausible.HISTORY_LOTS
        taken: dict = dict.fromkeys(products, 0)
        wanted: dict[int, tuple[str, str, object]] = {}
        offset = 0
        while offset < 8 * n and any(k < n for k in taken.values()):
            batch = [r[0] for r in c.execute("SELECT lot FROM lots ORDER BY rowid DESC LIMIT ? OFFSET ?",
                                             (n + len(exclude), offset))]
            offset += len(batch)
            recent = [lot for lot in batch if lot not in exclude]
            # newest first, a chunk of lots at a time, until every product has its share (the batch holds the
            # ingest's own lots' worth more: 25,000 lots read to take 50)
            for start in range(0, len(recent), _IN_CHUNK):
                if all(k >= n for k in taken.values()):
                    break
                chunk = recent[start:start + _IN_CHUNK]
                links = self._current_links(c, chunk)
                for lot in chunk:
                    product = links[lot]["product"] if lot in links else None
                    if lot not in links or product not in taken or taken[product] >= n:
                        continue
                    taken[product] += 1
                    for tbl, (tid, _) in links[lot]["tables"].items():
                        if tbl in _plausible.TABLES_JUDGED:
                            wanted[tid] = (tbl, lot, product)
            if len(batch) < n + len(exclude):
                break  # the oldest lot was reached
        history: dict[str, dict] = {}
        tids, texts, _ = read_row_texts(c, list(wanted), store=f"lot store {self.path}")
        for tid, text in zip(tids.tolist(), texts.tolist()):
            tbl, lot, product = wanted[tid]
            history.setdefault(tbl, {}).setdefault(product, {}).setdefault(lot, []).append(json.loads(text))
        return history

    @staticmethod
    def _insert_lot_tables(c, ingest_id: int, batch: list[tuple]) -> None:
        """Write lot tables (id, lot, table, LotTable, source) and their row hashes (the rows themselves go
        into row_blocks)."""
        c.executemany("INSERT INTO lot_tables (id, lot, tbl, ingest_id, file, file_sha256, content_sha256, "
                      "columns_json, n_rows, n_filled) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                      [(tid, lot, tname, ingest_id, src["file"], src["sha256"], lt.sha256, lt.columns_json,
                        len(lt.rows), lt.n_filled) for tid, lot, tname, lt, src in batch])
        c.executemany("INSERT INTO lot_table_hashes VALUES (?, ?, ?)",
                      [(tid, lt.rows_sha256, lt.source_rows_sha256) for tid, _, _, lt, _ in batch])

    @staticmethod
    def _current_links(c, lots: list[str]) -> dict[str, dict]:
        """The latest revision of each of ``lots`` that the store holds, with
        its tables (id and content hash); only those lots are read, so an
        ingest costs the same however many other lots the store holds."""
        out: dict[str, dict] = {}
        by_revision: dict[int, dict] = {}
        for start in range(0, len(lots), _IN_CHUNK):
            chunk = lots[start:start + _IN_CHUNK]
            marks = ", ".join("?" * len(chunk))
            for rid, lot, revision, product in c.execute(
                    f"SELECT id, lot, revision, product FROM current_revisions WHERE lot IN ({marks})", chunk):
                out[lot] = by_revision[rid] = {"revision": revision, "product": product, "tables": {}}
        rids = list(by_revision)
        for start in range(0, len(rids), _IN_CHUNK):
            chunk = rids[start:start + _IN_CHUNK]
            marks = ", ".join("?" * len(chunk))
            for rid, tbl, tid, sha in c.execute(
                    "SELECT rt.revision_id, rt.tbl, lt.id, lt.content_sha256 FROM revision_tables rt "
                    f"JOIN lot_tables lt ON lt.id = rt.lot_table_id WHERE rt.revision_id IN ({marks})", chunk):
                by_revision[rid]["tables"][tbl] = (tid, sha)
        return out

    # ---- reading

    def current_tables(self, product: str | None = None, *, include_set_aside: bool = False) -> LotTables:
        """The latest revision of every lot in use, one DataFrame a table.

        Same columns and dtypes as :func:`linkage.read.read_table` (extra
        columns of any lot included). Tables without rows are left out, as in
        a folder that lacks them. ``product`` keeps the lots of one product.
        A lot set aside (``linkage set-aside``) is left out, unless
        ``include_set_aside``: this is the one place every command that fits or
        judges lots reads them, so all agree; the result's ``set_aside`` names
        the lots left out (:class:`LotTables`).
        """
        params = (product,) if product is not None else ()
        # the lots in the order they came (CROSS JOIN keeps lots the outer loop: no sort), each with its
        # latest revision, as the current_revisions view picks it, and that revision's lot tables
        links_sql = ("SELECT rt.tbl, rt.lot_table_id, lt.n_rows, lt.columns_json, h.rows_sha256, l.lot, lt.ingest_id "
                     "FROM lots l "
                     "CROSS JOIN revisions cr CROSS JOIN revision_tables rt CROSS JOIN lot_tables lt "
                     "LEFT JOIN lot_table_hashes h ON h.lot_table_id = lt.id "
                     "WHERE cr.lot = l.lot AND cr.revision = (SELECT MAX(revision) FROM revisions WHERE lot = l.lot) "
                     "AND rt.revision_id = cr.id AND lt.id = rt.lot_table_id "
                     + ("AND cr.product = ? " if product is not None else "") + "ORDER BY l.rowid")
        with _read.bulk(), self._snapshot():
            links = self._read(links_sql, params)
            aside = {} if include_set_aside else self.set_aside_lots()
            left_out = {lot: aside[lot] for lot in dict.fromkeys(link[5] for link in links) if lot in aside}
            links = [link for link in links if link[5] not in left_out]
            by_table: dict[str, list[tuple]] = {}
            for link in links:
                by_table.setdefault(link[0], []).append(link)
            out = {}
            for mine in (by_table[t] for t in TABLES if t in by_table):  # one table's rows in memory at a time
                try:
                    tids, texts, _ = read_row_texts(self._conn, [link[1] for link in mine], exact=False,
                                                  block_keys={(link[6], link[0]) for link in mine},
                                                  store=f"lot store {self.path}")
                except sqlite3.DatabaseError as exc:
                    raise self._error(exc) from None
                out.update(self._current_tables(mine, tids, texts))
                del tids, texts
            return LotTables(out, left_out)

    def set_aside_lots(self) -> dict[str, dict]:
        """The lots set aside now, in the order they were set aside: lot (as stored) -> the decision in force,
        ``{"audit_id", "at", "user", "reason"}`` (see :data:`SET_ASIDE`)."""
        try:
            return _set_aside_state(self._conn)
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None

    def set_aside_events(self, lot: str) -> list[dict]:
        """The set-aside and restore decisions of ``lot`` (as stored), oldest first: ``{"audit_id", "at",
        "user", "action", "reason"}``."""
        return [{"audit_id": i, "at": at, "user": u, "action": a, "reason": _decision_reason(ij)}
                for i, at, u, a, ij in self._read("SELECT id, at, user, action, inputs_json FROM audit "
                                                  "WHERE action IN (?, ?) AND lot = ? ORDER BY id",
                                                  (SET_ASIDE, RESTORE, lot))]

    def set_aside(self, lots, reason: str | None, *, user: str | None = None) -> list[dict]:
        """Set ``lots`` aside, on the record: their rows stay as stored, but every command that fits or judges
        lots leaves them out (:meth:`current_tables`) until :meth:`restore`. One audit entry ``set-aside`` per
        lot (who, when, ``reason``), sealed, in one transaction. Refused (:class:`UsageError`, nothing written)
        without a reason, for a lot the store does not hold (all of them named) and for a lot already set
        aside. Returns the decisions written."""
        return self._decide_set_aside(lots, reason, SET_ASIDE, user)

    def restore(self, lots, reason: str | None, *, user: str | None = None) -> list[dict]:
        """Put set-aside ``lots`` back in use, on the record (one audit entry ``restore`` per lot); refused as
        :meth:`set_aside` is, and for a lot that is not set aside."""
        return self._decide_set_aside(lots, reason, RESTORE, user)

    def decision_lots(self, lots, reason: str | None, action: str) -> list[str]:
        """The stored lots (their stored spelling, once each) that a set-aside or restore decision (``action``)
        of ``lots`` would be written for, or its refusal (:class:`UsageError`), every problem in one message: no
        reason, no lot, the lots the store does not hold (all of them named), the lots already set aside (each
        with the decision in force) or (restore) not set aside. Only reads: a store opened ``read_only`` answers as
        the write would (``linkage.api.set_aside`` asks it first, so that a refusal opens no older store for
        writing, which would upgrade it)."""
        problems = ([] if given_reason(reason) is not None
                    else [set_aside_needs_reason(action, ending="", reason=reason)])
        given = [reader_spelling(lot) for lot in ([lots] if isinstance(lots, str) else list(lots))]
        if not any(given):
            problems.append(f"'linkage {action}' needs at least one lot id")
            raise UsageError("; ".join(problems) + ". Nothing was written.")
        found = {lot: self.stored_spelling(lot) if lot else None for lot in given}
        unknown = [lot for lot, stored in found.items() if stored is None]
        if unknown:
            problems.append(self._not_stored_text([lot or "" for lot in unknown]))
        chosen = list(dict.fromkeys(stored for stored in found.values() if stored is not None))
        state = self.set_aside_lots()
        wrong = [lot for lot in chosen if (lot in state) == (action == SET_ASIDE)]
        if wrong and action == SET_ASIDE:
            problems += [f"{lot} is already set aside ({decision_shown(state[lot])})" for lot in wrong]
        elif wrong:
            problems.append(f"{lots_named(wrong)} {'is' if len(wrong) == 1 else 'are'} not set aside, so there is "
                            "nothing to restore")
        if problems:
            where = "; 'linkage lots' shows each lot's state" if wrong else ""
            raise UsageError(f"'linkage {action}' refused ({len(problems)} problem{'s' * (len(problems) > 1)}): "
                             + "; ".join(problems) + where + ". Nothing was written.")
        return chosen

    def _decide_set_aside(self, lots, reason: str | None, action: str, user: str | None) -> list[dict]:
        if given_reason(reason) is None:  # before the write lock (the API asked decision_lots first, all problems)
            raise UsageError(set_aside_needs_reason(action, reason=reason))
        reason = given_reason(reason)
        user = user or current_user()
        with self._write() as c:
            chosen = self.decision_lots(lots, reason, action)  # under the write lock: as the store is now
            out = []
            for lot in chosen:
                audit_id = self._log(c, action, user, lot, None, {"reason": reason},
                                     {"state": SET_ASIDE_STATE if action == SET_ASIDE else IN_USE})
                at = c.execute("SELECT at FROM audit WHERE id = ?", (audit_id,)).fetchone()[0]
                out.append({"audit_id": audit_id, "lot": lot, "action": action, "at": at, "user": user,
                            "reason": reason})
        return out

    def _current_tables(self, links: list[tuple], tids: np.ndarray, texts: np.ndarray) -> dict[str, pd.DataFrame]:
        """The frames from the current lot tables (table, id, rows, columns) in
        lot order and the raw rows (lot table id and JSON text of each) sorted
        by id and seq, which may hold other lot tables' rows too."""
        columns: dict[str, dict[str, None]] = {}
        seen_columns: set[tuple[str, str]] = set()
        for tbl, _, _, columns_json, _, _, _ in links:
            if (tbl, columns_json) not in seen_columns:  # most lots of a table share their columns
                seen_columns.add((tbl, columns_json))
                columns.setdefault(tbl, {}).update(dict.fromkeys(json.loads(columns_json)))
        link_tbl = np.array([_TABLE_NUMBER[link[0]] for link in links], dtype=np.int64)
        link_tid = np.array([link[1] for link in links], dtype=np.int64)
        n_rows = np.array([link[2] for link in links], dtype=np.int64)
        starts = np.searchsorted(tids, link_tid, side="left")
        counts = np.searchsorted(tids, link_tid, side="right") - starts
        if not np.array_equal(counts, n_rows):
            k = int(np.flatnonzero(counts != n_rows)[0])
            raise StoreIntegrityError(f"lot store {self.path} is damaged: lot table {int(link_tid[k])} should have "
                                      f"{int(n_rows[k])} raw rows and has {int(counts[k])}")
        stored, texts = texts, texts.tolist()  # slices of a list cost less than of an object array
        digests = _seal.rows_sha256_spans(texts, starts.tolist(), counts.tolist())
        changed = [(link[5], link[0], link[1]) for link, digest in zip(links, digests) if digest != link[4]]
        if changed:
            shown = "; ".join(f"lot {lot}, table {tbl} (lot table {tid})" for lot, tbl, tid in changed[:10])
            raise StoreIntegrityError(f"lot store {self.path} failed its integrity check: raw rows changed after "
                                      f"they were stored ({len(changed)} lot table(s): {shown}); nothing was read. "
                                      "Restore the store from a backup and run `linkage verify`.")
        out = {}
        for tbl in TABLES:
            mine = np.flatnonzero(link_tbl == _TABLE_NUMBER[tbl])
            first, size = starts[mine], counts[mine]
            if size.sum() == 0:
                continue
            ends = np.cumsum(size)
            at = np.repeat(first - (ends - size), size) + np.arange(ends[-1])  # each lot's rows, lots in order
            # one parse per table: the same values as row by row, without the per-call cost
            if len(at) == len(texts) and np.array_equal(at, np.arange(len(texts))):
                text = "[" + ",".join(texts) + "]"  # the rows read are this table's, in order (the usual case)
                texts = [None] * len(texts)
            else:
                at_list = at.tolist()
                text = "[" + ",".join([texts[k] for k in at_list]) + "]"
                for k in at_list:
                    texts[k] = None
            stored[at] = None  # each row's text is in ``text`` now (the caller's array let go of them too)
            del at
            rows = json.loads(text)
            del text
            out[tbl] = _frame(tbl, rows, list(columns[tbl]))
        return out

    @contextmanager
    def _snapshot(self) -> Iterator[None]:
        """Reads that see one state of the store (one read transaction)."""
        c = self._conn
        if c.in_transaction:
            yield
            return
        try:
            c.execute("BEGIN")
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None
        try:
            yield
        finally:
            if c.in_transaction:
                c.execute("COMMIT")

    def lots(self, product: str | None = None, *, in_use: bool = False) -> pd.DataFrame:
        """One row per lot: product, revision, last change, and per table the
        number of rows (``<table>_rows``) and the share of filled template
        cells (``<table>_filled_pct``, the lot column not counted); ``state``
        ("in use" or "set aside") and, for a lot set aside, the decision in
        force (``set_aside_reason``, ``set_aside_at``, ``set_aside_by``). ``in_use``: only the lots in use
        (those :meth:`current_tables` reads)."""
        sql = ("SELECT cr.lot, cr.product, cr.revision, cr.ingest_id, i.at, rt.tbl, lt.n_rows, lt.n_filled "
               "FROM current_revisions cr JOIN lots l ON l.lot = cr.lot JOIN ingests i ON i.id = cr.ingest_id "
               "LEFT JOIN revision_tables rt ON rt.revision_id = cr.id "
               "LEFT JOIN lot_tables lt ON lt.id = rt.lot_table_id ")
        params: tuple = ()
        if product is not None:
            sql += "WHERE cr.product = ? "
            params = (product,)
        sql += "ORDER BY l.rowid"
        records: dict[str, dict] = {}
        for lot, prod, rev, ingest_id, at, tbl, n_rows, n_filled in self._read(sql, params):
            rec = records.setdefault(lot, {"lot": lot, "product": prod, "revision": rev, "ingest_id": ingest_id,
                                           "updated_at": at,
                                           **{f"{t}_rows": 0 for t in TABLES},
                                           **{f"{t}_filled_pct": math.nan for t in TABLES}})
            if tbl is not None:
                cells = n_rows * (len(TABLES[tbl].columns) - 1)
                rec[f"{tbl}_rows"] = n_rows
                rec[f"{tbl}_filled_pct"] = 100.0 * n_filled / cells if cells else math.nan
        aside = self.set_aside_lots()
        for lot, rec in records.items():
            decision = aside.get(lot) or {}
            rec.update(state=SET_ASIDE_STATE if decision else IN_USE, set_aside_reason=decision.get("reason"),
                       set_aside_at=decision.get("at"), set_aside_by=decision.get("user"))
        columns = ["lot", "product", "revision", "ingest_id", "updated_at",
                   *(f"{t}_{what}" for t in TABLES for what in ("rows", "filled_pct")),
                   "state", "set_aside_reason", "set_aside_at", "set_aside_by"]
        df = pd.DataFrame(list(records.values()), columns=columns)
        df["lot"] = df["lot"].astype("str")
        # a lot without a product stays missing: pandas before 3 turns None into the text "None" under astype(str)
        df["product"] = df["product"].astype("str").where(df["product"].notna())
        for t in TABLES:
            df[f"{t}_rows"] = df[f"{t}_rows"].astype("int64")
            df[f"{t}_filled_pct"] = df[f"{t}_filled_pct"].astype("float64")
        df["revision"] = df["revision"].astype("int64")
        return df[df["state"] == IN_USE].reset_index(drop=True) if in_use else df

    def history(self, lot: str) -> list[dict]:
        """Every revision of ``lot``, oldest first, with what changed.

        Each item: ``revision``, ``ingest_id``, ``at``, ``user``, ``product``, ``reason`` (of the ingest),
        ``tables`` ({table: file, sha256, rows, ingest_id, changed}) and
        ``changes``: cell-level differences to the previous revision, each
        ``{table, change, key, column, old, new}`` with ``change`` one of
        "table added", "row added", "row removed", "value changed" (``old``
        None: a blank cell filled), and ``adds_only``: whether the revision only
        adds to the previous one (:func:`adds_only`; true for the first), so
        that it needed no reason; ``set_aside_events``: the lot's set-aside and
        restore decisions (:meth:`set_aside_events`) made after this revision
        and before the next, in time order.
        """
        lot = reader_spelling(lot) or lot  # spaces as the reader reads them, as predict --lot takes them
        lot = self.stored_spelling(lot) or lot  # one lot, one spelling: found as the reader finds it
        revs = self._read("SELECT r.id, r.revision, r.ingest_id, i.at, i.user, r.product, i.reason FROM revisions r "
                          "JOIN ingests i ON i.id = r.ingest_id WHERE r.lot = ? ORDER BY r.revision", (lot,))
        if not revs:
            refusal = self._not_stored(lot)
            if self.audit(lot):  # entries name it (a running lot, a what-if for it, a lot the watch flagged)
                import shlex

                refusal = UsageError(f"{refusal}; the audit trail has entries naming it: linkage audit --lot "
                                     f"{shlex.quote(lot)}")
            raise refusal
        out = []
        previous: dict[str, tuple[int, list[dict]]] = {}
        for rid, number, ingest_id, at, user, product, reason in revs:
            links = self._read("SELECT rt.tbl, lt.id, lt.file, lt.file_sha256, lt.n_rows, lt.ingest_id "
                               "FROM revision_tables rt JOIN lot_tables lt ON lt.id = rt.lot_table_id "
                               "WHERE rt.revision_id = ?", (rid,))
            tables, changes, now = {}, [], {}
            for tbl, tid, file, sha, n_rows, t_ingest in sorted(links, key=lambda r: list(TABLES).index(r[0])):
                changed = tbl not in previous or previous[tbl][0] != tid
                tables[tbl] = {"file": file, "sha256": sha, "rows": n_rows, "ingest_id": t_ingest,
                               "changed": changed}
                rows = self._rows(tid) if changed else previous[tbl][1]
                now[tbl] = (tid, rows)
                if changed and previous:
                    changes += _diff(tbl, previous.get(tbl, (None, None))[1], rows)
                elif changed:
                    changes.append({"table": tbl, "change": "table added", "key": None, "column": None,
                                    "old": None, "new": _n_rows(n_rows)})
            out.append({"lot": lot, "revision": number, "ingest_id": ingest_id, "at": at, "user": user,
                        "product": product, "reason": reason, "tables": tables, "changes": changes,
                        "adds_only": adds_only(changes), "set_aside_events": []})
            previous = now
        for event in self.set_aside_events(lot):  # under the revision in force when the decision was made
            rev = next((r for r in reversed(out) if r["at"] <= event["at"]), out[0])
            rev["set_aside_events"].append(event)
        return out

    def _rows(self, lot_table_id: int) -> list[dict]:
        try:
            return self._stored_rows(self._conn, [lot_table_id])[lot_table_id]
        except sqlite3.DatabaseError as exc:
            raise self._error(exc) from None

    def _stored_rows(self, c, lot_table_ids: list[int]) -> dict[int, list[dict]]:
        """The raw rows of lot tables (id -> rows), each lot table checked against its row hash."""
        if not lot_table_ids:
            return {}
        tids, texts, _ = read_row_texts(c, lot_table_ids, store=f"lot store {self.path}")
        by_id: dict[int, list[str]] = {tid: [] for tid in lot_table_ids}
        for tid, text in zip(tids.tolist(), texts.tolist()):
            by_id[tid].append(text)
        hashes: dict[int, str] = {}
        ids = list(by_id)
        for start in range(0, len(ids), _IN_CHUNK):
            chunk = ids[start:start + _IN_CHUNK]
            hashes.update(c.execute("SELECT lot_table_id, rows_sha256 FROM lot_table_hashes WHERE lot_table_id IN "
                                    f"({', '.join('?' * len(chunk))})", chunk).fetchall())
        bad = [tid for tid, rows in by_id.items() if hashes.get(tid) != _seal.rows_sha256(rows)]
        if bad:
            raise StoreIntegrityError(f"lot store {self.path} failed its integrity check: the raw rows of lot table "
                                      f"{', '.join(map(str, bad[:10]))} were changed after they were stored; run "
                                      "`linkage verify`")
        return _parse_rows(by_id)

    def ingests(self) -> list[dict]:
        """Every ingest, oldest first, with its files."""
        files: dict[int, list[dict]] = {}
        for ingest_id, tbl, file, sha, rows in self._read(
                "SELECT ingest_id, tbl, file, sha256, rows FROM ingest_files ORDER BY rowid"):
            files.setdefault(ingest_id, []).append({"table": tbl, "file": file, "sha256": sha, "rows": rows})
        return [{"id": i, "at": at, "user": user, "folder": folder, "lots_new": n, "lots_revised": r,
                 "lots_unchanged": u, "warnings": json.loads(w), "files": files.get(i, [])}
                for i, at, user, folder, n, r, u, w in self._read(
                    "SELECT id, at, user, folder, lots_new, lots_revised, lots_unchanged, warnings_json "
                    "FROM ingests ORDER BY id")]

    # ---- audit log and predictions

    def log(self, action: str, *, user: str | None = None, lot: str | None = None, model_id: str | None = None,
            inputs=None, outputs=None) -> int:
        """Append one entry to the audit log; returns its id. Refused (:class:`UsageError`, nothing written) for
        the actions of the store's own decisions (:data:`RESERVED_ACTIONS`: set-aside, restore, reanchor,
        ingest), which their commands record under their rules."""
        refusal = reserved_action_refusal(action)
        if refusal is not None:
            raise UsageError(refusal)
        with self._write() as c:
            return self._log(c, action, user or current_user(), lot, model_id, inputs, outputs)

    @staticmethod
    def _log(c, action, user, lot, model_id, inputs, outputs) -> int:
        audit_id = c.execute("INSERT INTO audit (at, user, action, lot, model_id, inputs_json, outputs_json) "
                             "VALUES (?, ?, ?, ?, ?, ?, ?)",
                             (_now(), user, action, lot, model_id, None if inputs is None else _json(inputs),
                              None if outputs is None else _json(outputs))).lastrowid
        _seal.seal(c, _seal.AUDIT, audit_id)
        return audit_id

    def reanchor(self, reason: str, *, user: str | None = None, checked: dict | None = None) -> dict:
        """Anchor again, deliberately and on the record, a store that holds seals but no anchor file (see
        :mod:`linkage.seal`): check the whole store (:meth:`check_seals` with ``full``), then, in one
        transaction, append the audit entry ``reanchor`` (who, when, ``reason``, the anchor file, and the newest
        seal the check found, ``checked_seal``: whether records after it were removed while the anchor was
        missing, the store cannot tell; the batch record can), and write the anchor at that entry's seal.
        Refused without a ``reason`` (:class:`UsageError`), for a store whose anchor file is there or that holds
        no seals (nothing to anchor again), and for a store that fails its check (:class:`StoreIntegrityError`:
        nothing written).

        ``checked``: what ``check_seals(full=True)`` on this store has just returned (``linkage verify`` made
        that check), instead of making it again; the newest seal must still be the one it names.

        Returns ``{"audit_id", "checked_seal", "anchor", "checked"}`` (the seals as ``{"id", "sha256"}``;
        ``anchor``: the seal the new anchor file names; ``checked``: what the check covered)."""
        reason = given_reason(reason)
        if reason is None:
            raise UsageError(REANCHOR_NEEDS_REASON)
        if self._missing_anchor(self._conn) is None:
            raise UsageError(self.nothing_to_reanchor())
        checked = dict(checked) if checked is not None else self.check_seals(full=True)
        found_head = checked.pop("newest seal")
        with self._write(reanchoring=True) as c:
            missing = self._missing_anchor(c)
            if missing is None:  # another process anchored it again while this one checked
                raise UsageError(self.nothing_to_reanchor())
            if missing != found_head:  # every write is refused meanwhile: only a write behind linkage's back
                raise StoreIntegrityError(f"lot store {self.path}: its newest seal changed while it was checked "
                                          f"(seal {found_head['id']} checked, now seal {missing['id']}), though no "
                                          "write is accepted without its anchor file; nothing was written. Find "
                                          "out who writes to it, then check it again")
            audit_id = self._log(c, "reanchor", user or current_user(), None, None,
                                 inputs={"reason": reason, "anchor_file": str(_seal.anchor_path(self.path))},
                                 outputs={"checked_seal": found_head, "checked": checked})
            anchor = dict(zip(("id", "sha256"), _seal.head(c)))
        self.unanchored = None
        written = _seal.read_anchor(self.path)  # this seal, or a later writer's newer one (seal.advance_anchor)
        if written is None or written["seal_id"] < anchor["id"]:
            raise StoreError(f"the re-anchoring of lot store {self.path} was recorded (audit entry {audit_id}), but "
                             f"its anchor file {_seal.anchor_path(self.path)} could not be written: make its folder "
                             "writable and anchor it again (a second audit entry records that)")
        return {"audit_id": audit_id, "checked_seal": found_head, "anchor": anchor, "checked": checked}

    def nothing_to_reanchor(self) -> str:
        """Why :meth:`reanchor` has nothing to do here (the anchor file is there, or the store holds no seals)."""
        if _seal.read_anchor(self.path) is not None:
            return (f"lot store {self.path} has its anchor file {_seal.anchor_path(self.path)}: nothing to anchor "
                    "again ('linkage verify' checks the store against it). Nothing was written.")
        return f"lot store {self.path} holds no seals yet: its next write anchors it. Nothing was written."

    def _not_stored(self, lot: str) -> UsageError:
        """The refusal of a lot the store does not hold, with the nearest stored ids (exit code 2)."""
        import difflib

        lots = self.lot_ids()
        near = difflib.get_close_matches(lot, lots, n=3, cutoff=0.6)
        hint = f"; did you mean {', '.join(near)}?" if near else (f"; it holds {len(lots)} lots" if lots
                                                                  else "; the store is empty")
        return UsageError(f"lot '{lot}' is not in the store {self.path}{hint}")

    def _not_stored_text(self, lots: list[str]) -> str:
        """What the refusal of lots :meth:`stored_spelling` does not find says, every one named: a lot the store
        does not hold with the nearest stored ids; a lot of which an older store holds two spellings of one id
        (``A1`` and ``a1``) as ambiguous, both spellings named."""
        import difflib

        stored = self.lot_ids()
        said, ambiguous = [], []
        for lot in lots:
            same = [r[0] for r in self._read("SELECT lot FROM lots WHERE lot_key(lot) = ? ORDER BY rowid",
                                             (lot_key(lot),))] if lot else []
            if len(same) > 1:
                ambiguous.append(f"{lot!r} is {' and '.join(map(repr, same))}")
                continue
            near = difflib.get_close_matches(lot, stored, n=3, cutoff=0.6)
            said.append(repr(lot) + (f" (did you mean {', '.join(near)}?)" if near else ""))
        parts = ([f"{len(said)} lot(s) not in the store {self.path}, which holds {len(stored)} lots: "
                  f"{'; '.join(said)}"] if said else [])
        parts += ([f"{len(ambiguous)} lot id(s) ambiguous in the store {self.path}, which holds two spellings of "
                   f"one id (written before one lot had one spelling): {'; '.join(ambiguous)}; give the exact "
                   "spelling"] if ambiguous else [])
        return ". ".join(parts)

    def audit(self, lot: str | None = None, *, with_ingests: bool = False, require_lot: bool = False) -> list[dict]:
        """Audit entries, oldest first; only those about ``lot`` when given,
        and with ``with_ingests`` also the ingests that created or revised
        it (their entry names no single lot; issue 19). ``lot`` is compared
        under the reader's lot identity (:func:`linkage.lotid.lot_key`, after
        :func:`linkage.lotid.reader_spelling`: surrounding spaces dropped, inner
        runs one space), so entries recorded under another spelling of the lot
        are its entries too.
        With ``require_lot``, a lot that is not in the store (under any
        spelling) and that no entry names (a mistyped id) is refused with
        :class:`UsageError` instead of giving no entries; a lot only predicted
        for, never ingested, keeps its entries."""
        sql = f"SELECT {_AUDIT_COLUMNS} FROM audit"
        if lot is not None:
            lot = reader_spelling(lot) or lot  # spaces as the reader reads them, as predict --lot takes them
        where, params = self._lot_clause(lot)
        rows = self._read(sql + where, params)
        if lot is not None:
            named = self._alarm_entries(sql, lot)
            if named:
                seen = {r[0] for r in rows}
                rows = sorted(list(rows) + [r for r in named if r[0] not in seen], key=lambda r: r[0])
        if lot is not None and with_ingests:
            ingests = self._read(sql + " WHERE action = 'ingest' AND lot IS NULL ORDER BY id", ())
            rows = sorted(list(rows) + [r for r in ingests if _ingest_touches(r[7], lot)], key=lambda r: r[0])
        if lot is not None and require_lot and not rows and lot_key(lot) not in {lot_key(x) for x in self.lot_ids()}:
            raise self._not_stored(lot)
        return _audit_dicts(rows)

    def decisions_of(self, model_id: str) -> list[dict]:
        """The ``promote`` and ``retrain`` entries naming ``model_id`` as their model, oldest first, as
        :meth:`audit` gives entries: how that model came into service (read in one query, not the whole trail)."""
        marks = ", ".join("?" * len(DECISION_ACTIONS))
        return _audit_dicts(self._read(f"SELECT {_AUDIT_COLUMNS} FROM audit WHERE action IN ({marks}) "
                                       "AND model_id = ? ORDER BY id", (*DECISION_ACTIONS, model_id)))

    def _alarm_entries(self, sql: str, lot: str) -> list[tuple]:
        """The entries (rows of ``sql``) that name ``lot`` as flagged by the watch's alarm though the entry is of
        no single lot: a ``watch`` whose ``outputs.alarmed_lots`` lists it, a ``retrain`` or ``promote`` whose
        ``inputs.alarmed_lots`` holds it (``{"lot", "signal"}`` items). Found in SQL (SQLite's ``json_each``) among
        those three actions only, so a long trail is not parsed in Python; the lot under the reader's lot identity,
        or its exact spelling where the store holds two lots of one identity (as :meth:`_lot_clause`)."""
        key = lot_key(lot)
        same = self._spellings(key)
        test, wanted = ("{} = ?", lot) if same > 1 else ("lot_key({}) = ?", key)
        watch = test.format("j.value")
        decision = test.format("json_extract(j.value, '$.lot')")
        where = (" WHERE (action = 'watch' AND json_valid(outputs_json) AND EXISTS (SELECT 1 FROM "
                 "json_each(outputs_json, '$.alarmed_lots') AS j WHERE j.type = 'text' AND " + watch + ")) "
                 "OR (action IN ('retrain', 'promote') AND json_valid(inputs_json) AND EXISTS (SELECT 1 FROM "
                 "json_each(inputs_json, '$.alarmed_lots') AS j WHERE j.type = 'object' AND " + decision + ")) "
                 "ORDER BY id")
        try:
            return self._conn.execute(sql + where, (wanted, wanted)).fetchall()
        except sqlite3.OperationalError as exc:  # an SQLite built without its JSON functions (optional before 3.38)
            if "no such function" not in str(exc):
                return self._read(sql + where, (wanted, wanted))  # raised as _read raises it
        named = (lambda x: x == lot) if same > 1 else (lambda x: lot_key(str(x)) == key)
        return [r for r in self._read(sql + " WHERE action IN ('watch', 'retrain', 'promote') ORDER BY id")
                if any(named(x) for x in _alarmed_in(r[3], r[6], r[7]))]

    def _lot_clause(self, lot: str | None) -> tuple[str, tuple]:
        """The WHERE clause (and its parameters) of the entries of ``lot``: under the reader's lot identity,
        unless the store holds two lots of that identity (a store written before the one-spelling rule may hold
        'A1' and 'a1'): then the exact spelling only, so one lot's entries are never another's."""
        if lot is None:
            return " ORDER BY id", ()
        key = lot_key(lot)
        if self._spellings(key) > 1:
            return " WHERE lot = ? ORDER BY id", (lot,)
        return " WHERE lot_key(lot) = ? ORDER BY id", (key,)

    def _spellings(self, key: str) -> int:
        """How many lots the store holds of the lot identity ``key`` (:func:`linkage.lotid.lot_key`): more than one
        in a store written before the one-spelling rule ('A1' and 'a1'), where a lot's entries go by exact spelling."""
        return self._read("SELECT COUNT(*) FROM lots WHERE lot_key(lot) = ?", (key,))[0][0]

    def record_prediction(self, model_id: str, inputs, outputs, *, lot: str | None = None,
                          user: str | None = None) -> int:
        """Keep one prediction (inputs and outputs as JSON); returns its id."""
        with self._write() as c:
            prediction_id = c.execute("INSERT INTO predictions (at, user, model_id, lot, inputs_json, outputs_json) "
                                      "VALUES (?, ?, ?, ?, ?, ?)",
                                      (_now(), user or current_user(), model_id, lot, _json(inputs),
                                       _json(outputs))).lastrowid
            _seal.seal(c, _seal.PREDICTION, prediction_id)
            return prediction_id

    def predictions(self, lot: str | None = None) -> list[dict]:
        """Recorded predictions, oldest first; only those for ``lot`` when
        given (under any spelling of it, :func:`linkage.lotid.lot_key`)."""
        sql = "SELECT id, at, user, model_id, lot, inputs_json, outputs_json FROM predictions"
        where, params = self._lot_clause(lot)
        rows = self._read(sql + where, params)
        return [{"id": i, "at": at, "user": u, "model_id": m, "lot": lt, "inputs": json.loads(ij),
                 "outputs": json.loads(oj)} for i, at, u, m, lt, ij, oj in rows]


def _ingest_sha256(head: list, files: list, lots: list, written: list, revisions: list,
                   revision_tables: list) -> str | None:
    """The ingest's content hash (linkage.seal.ingest_record_sha256) from the values it has just written, when
    each is of the type SQLite gives back for it (text a str, a number an int, NULL None): then the record is
    the one linkage.seal.ingest_content reads from the store, and `linkage verify` recomputes it from there.
    None otherwise (the seal then reads the record back)."""
    def all_of(values, *types) -> bool:
        return set(map(type, values)) <= set(types)

    none = type(None)
    lot_tables = [(tid, lot, tname, src["file"], src["sha256"], lt.sha256, lt.columns_json, len(lt.rows), lt.n_filled,
                   lt.rows_sha256, lt.source_rows_sha256)
                  for tid, lot, tname, lt, src in written]
    revision_rows = [(rid, lot, number, product) for rid, lot, number, _, product in revisions]
    columns = list(zip(*lot_tables)) or [()] * 11
    file_columns = list(zip(*files)) or [()] * 4
    revision_columns = list(zip(*revision_rows)) or [()] * 4
    typed = (all_of(head[:1], int) and all_of(head[1:3], str) and all_of(head[3:4], str, none)
             and all_of(head[4:7], int) and all_of(head[7:8], str) and all_of(head[8:], str, none)
             and all_of(file_columns[0], str, none) and all_of(file_columns[1] + file_columns[2], str)
             and all_of(file_columns[3], int, none) and all_of(lots, str)
             and all(all_of(col, int) for col in (columns[0], columns[7], columns[8]))
             and all(all_of(col, str) for col in columns[1:7] + columns[9:])
             and all_of(revision_columns[0] + revision_columns[2], int) and all_of(revision_columns[1], str)
             and all_of(revision_columns[3], str, none))
    if not typed:
        return None
    return _seal.ingest_record_sha256(head, files=files, lots=lots, lot_tables=lot_tables, revisions=revision_rows,
                                      revision_tables=sorted(revision_tables, key=lambda r: (r[0], r[1])))


def _parse_rows(texts: dict) -> dict:
    """Rows' JSON texts (name -> texts) as dicts, in one parse (the same values as row by row, without the
    per-call cost)."""
    spans, joined, start = {}, [], 0
    for name, rows in texts.items():
        spans[name] = (start, start + len(rows))
        joined += rows
        start += len(rows)
    parsed = json.loads("[" + ",".join(joined) + "]")
    return {name: parsed[a:b] for name, (a, b) in spans.items()}


#: the audit actions that decide how a model came into service (``linkage retrain``'s entries, the challenger's id
#: as their model id): what :meth:`LotStore.decisions_of` reads and :func:`linkage.report.html.model_origin` takes
DECISION_ACTIONS = ("promote", "retrain")

#: the columns of an audit entry as :func:`_audit_dicts` reads them
_AUDIT_COLUMNS = "id, at, user, action, lot, model_id, inputs_json, outputs_json"


def _audit_dicts(rows) -> list[dict]:
    """Audit rows (:data:`_AUDIT_COLUMNS`) as the entries :meth:`LotStore.audit` gives, their JSON parsed."""
    return [{"id": i, "at": at, "user": u, "action": a, "lot": lt, "model_id": m,
             "inputs": None if ij is None else json.loads(ij), "outputs": None if oj is None else json.loads(oj)}
            for i, at, u, a, lt, m, ij, oj in rows]


def _ingest_touches(outputs_json: str | None, lot: str) -> bool:
    """Whether an ingest's audit outputs list ``lot`` as new or revised."""
    if not outputs_json:
        return False
    out = json.loads(outputs_json)
    key = lot_key(lot)
    return any(lot_key(str(x)) == key for x in [*(out.get("new") or []), *(out.get("revised") or [])])


def _frame(table: str, rows: list[dict], columns: list[str]) -> pd.DataFrame:
    tdef = TABLES[table]
    kinds = {c.name: c.kind for c in tdef.columns}
    present = set().union(*rows)  # every key of any row
    extra_names = [c for c in columns if c not in kinds]
    if not present <= kinds.keys() | set(extra_names):  # a key outside the lots' column lists: in order of
        ordered = dict.fromkeys(chain.from_iterable(rows))  # first appearance, after those of the lists
        extra_names += [c for c in ordered if c not in kinds and c not in extra_names]
    template = {}
    values_of = _columns_of(rows, [name for name in [*kinds, *extra_names] if name in present])
    for name, kind in kinds.items():
        if name not in present:  # in no row: what the lines below make of a column of None, directly
            template[name] = np.full(len(rows), np.nan) if kind == NUMBER else [None] * len(rows)
            continue
        values = values_of.pop(name)
        if kind == NUMBER and set(map(type, values)) <= {float, type(None)}:
            template[name] = np.array(values, dtype=float)  # None -> NaN, as _series makes it
        elif kind == DATETIME:
            template[name] = [None if v is None else dt.datetime.fromisoformat(v) for v in values]
        else:
            template[name] = values  # text and numbers as the JSON gave them
    extra = {name: values_of.pop(name) if name in present else [None] * len(rows) for name in extra_names}
    return _read.frame_from_columns(table, template, extra, n_rows=len(rows))


def _columns_of(rows: list[dict], names: list[str]) -> dict[str, list]:
    """Each of ``names`` as a list of the rows' values, None where a row lacks it (as ``row.get``; a column
    that every row has is taken with operator.itemgetter, a little faster)."""
    out: dict[str, list] = {}
    for name in names:
        try:
            out[name] = list(map(operator.itemgetter(name), rows))
        except KeyError:  # a row without it
            out[name] = [row.get(name) for row in rows]
    return out


def _n_rows(n: int) -> str:
    return f"{n} row{'s' if n != 1 else ''}"


def _diff(table: str, old: list[dict] | None, new: list[dict]) -> list[dict]:
    """Cell-level differences between two versions of a lot's rows of one table."""
    if old is None:
        return [{"table": table, "change": "table added", "key": None, "column": None, "old": None,
                 "new": _n_rows(len(new))}]
    key_cols = [c for c in TABLES[table].key if c != "lot"]

    def keyed(rows):
        return {tuple(r.get(c) for c in key_cols): canon_row(table, r) for r in rows}

    before, after = keyed(old), keyed(new)
    out = []
    for key, row in after.items():
        shown = dict(zip(key_cols, (row.get(c) for c in key_cols)))
        if key not in before:
            out.append({"table": table, "change": "row added", "key": shown, "column": None, "old": None,
                        "new": row})
            continue
        prev = before[key]
        for col in list(dict.fromkeys([*prev, *row])):
            if prev.get(col) != row.get(col):
                out.append({"table": table, "change": "value changed", "key": shown, "column": col,
                            "old": prev.get(col), "new": row.get(col)})
    for key, row in before.items():
        if key not in after:
            out.append({"table": table, "change": "row removed", "key": dict(zip(key_cols, key)), "column": None,
                        "old": row, "new": None})
    return out


def _alarmed_in(action: str, inputs_json: str | None, outputs_json: str | None) -> list:
    """The lots an audit entry names as flagged by the watch's alarm, read in Python (where SQLite lacks its JSON
    functions: :meth:`LotStore._alarm_entries`): a ``watch``'s ``outputs.alarmed_lots`` (texts), a ``retrain``'s
    or ``promote``'s ``inputs.alarmed_lots`` (``{"lot", ...}`` objects); none for anything else or unreadable."""
    try:
        record = json.loads((outputs_json if action == "watch" else inputs_json) or "null")
    except ValueError:
        return []
    items = record.get("alarmed_lots") if isinstance(record, dict) else None
    if not isinstance(items, list):
        return []
    if action == "watch":
        return [x for x in items if isinstance(x, str)]
    return [x["lot"] for x in items if isinstance(x, dict) and x.get("lot") is not None]


def change_text(ch: dict) -> str:
    """One cell-level difference (:func:`_diff`) as a line: table [key]: what changed."""
    key = ", ".join(f"{k}={v}" for k, v in (ch["key"] or {}).items())
    where = f"{ch['table']}" + (f" [{key}]" if key else "")
    if ch["change"] == "value changed":
        return f"{where}: {ch['column']} {_value_text(ch['old'])} -> {_value_text(ch['new'])}"
    if ch["change"] == "table added":
        return f"{where}: table added ({ch['new']})"
    row = ch["new"] if ch["change"] == "row added" else ch["old"]
    return f"{where}: {ch['change']} " + ", ".join(f"{k}={_value_text(v)}" for k, v in row.items() if k != "lot")


def _value_text(v) -> str:
    return "(missing)" if v is None else repr(v) if isinstance(v, str) else f"{v:g}" if isinstance(v, float) \
        else str(v)


def _needs_reason(lots: list[str], shown: dict[str, list[dict]]) -> str:
    """The refusal of stored values changed without a reason: the lots, and the first changes (``shown``: the
    differences of the first few lots)."""
    names = ", ".join(lots[:10]) + (f" and {len(lots) - 10} more" if len(lots) > 10 else "")
    kept = [(lot, ch) for lot, chs in shown.items() for ch in chs if not _is_addition(ch)]
    said = "; ".join(f"{lot} {change_text(ch)}" for lot, ch in kept[:3]) + ("; and more" if len(kept) > 3 else "")
    hints = ""
    if any(ch["change"] == "row removed" for _, ch in kept):
        hints += (" A table in the folder replaces the lot's stored table: to add rows to it, send its stored rows "
                  "with them.")
    if any(ch["change"] == "row added" for _, ch in kept):
        hints += (" A row added to a stored sieve analysis changes it: each row is a share of the analysis's total "
                  "mass.")
    return (f"this ingest changes or removes stored values of {len(lots)} lot(s) ({names}): {said}. A change "
            "carries its reason: give --reason TEXT (for example the deviation or correction number). "
            "What only adds (a table, rows, blank cells filled) needs none." + hints + " Nothing was written.")


def current_tables_of(lot_store, product: str | None) -> LotTables:
    """The store's current tables (:meth:`linkage.store.LotStore.current_tables`) of ``product``'s lots in use
    (``set_aside``: those left out); a product named that has no lot in the store is refused, naming the store's
    products (else the next step would say only that the process table has no rows), and so is a scope whose
    every lot is set aside (:class:`~linkage.exceptions.InsufficientDataError`, exit code 2)."""
    tables = lot_store.current_tables(product)
    if not tables and tables.set_aside:
        from linkage.exceptions import InsufficientDataError

        of = f" of product {product!r}" if product is not None else ""
        raise InsufficientDataError(f"every lot{of} in the store {lot_store.path} is set aside; "
                                    + set_aside_note(tables.set_aside, "left out"))
    if product is not None and not tables:
        import difflib

        products = sorted({str(p) for p in lot_store.lots()["product"].dropna()})
        near = difflib.get_close_matches(product, products, n=3, cutoff=0.6)
        said = (f"; did you mean {', '.join(repr(p) for p in near)}?" if near else
                f"; its products: {', '.join(repr(p) for p in products)}" if products else "; it holds no product name")
        raise UsageError(f"no lot of product {product!r} in the store {lot_store.path}{said}")
    return tables
