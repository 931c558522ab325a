"""Tamper evidence for the lot store: a hash chain over its records.

Every record the store keeps is sealed in the same transaction that writes
it, by one row of the append-only ``seals`` table:

- an **ingest**: the ingest row (with its reason), its files, the lots it
  created, its lot tables (each with the SHA-256 of its raw rows as stored,
  ``rows_sha256``, and of their spreadsheet row numbers) and the revisions it
  made. The rows are JSON texts, in ``raw_rows`` (schema 1 and 2) or as the
  lines of the ingest's ``row_blocks`` record of the table (schema 3): the
  same texts and the same hash either way;
- an **audit** entry and a recorded **prediction**: the whole row.

A seal holds the SHA-256 of its record's content and a link hash,
``sha256 = SHA-256(prev_sha256 | kind | ref_id | content_sha256)``, where
``prev_sha256`` is the link hash of the seal before it (64 zeros for the
first). This is the hash chain of Haber & Stornetta (1991, "How to
time-stamp a digital document", J. Cryptology 3:99–111): changing, removing
or inserting any sealed record breaks either its content hash or every link
after it.

What it detects, and what it cannot
-----------------------------------
- An edit of a raw row, an audit entry (its user or time) or a recorded
  prediction, made with any SQLite tool behind linkage's back (dropping the
  append-only triggers and recreating them), or bytes changed in the file:
  the content no longer matches its seal.
- Removing the newest records: the **anchor**, a small file beside the store
  (``<store>.seal``, JSON: the newest seal's id and hash, written after each
  commit), names a seal that is gone or differs. Writers finishing together
  write it in turn under a lock (``<store>.seal.lock``), each with the
  newest seal read again, never an older one than it names
  (:func:`advance_anchor`), so it always ends at the newest seal.
- A store that holds seals but no anchor file (the anchor deleted with the
  newest records, or a store copied without it) cannot show that its
  newest records are all there: every command that reads it says so on
  stderr, and every command that would write to it is refused
  (:class:`StoreIntegrityError`), since a write would anchor whatever the
  store now holds and hide the gap. ``linkage verify --reanchor --reason``
  checks the whole store and anchors it again deliberately, with an audit
  entry ``reanchor`` (who, when, why, and the newest seal the check found), so
  that a later reader sees where the anchor's history was broken.
- Without a secret key, someone who rewrites every seal after an edit *and*
  the anchor file is not detected by the store alone. ``linkage verify``
  prints the newest seal's hash: recorded outside the store (in the batch
  record, a signed document), it makes even that rewrite evident. This is
  the limit of any keyless hash chain, stated rather than hidden.

When the checks run
-------------------
- Every command that opens the store checks the chain's links, the anchor,
  and the content of every audit entry and recorded prediction (small rows),
  and every command that reads lot tables checks their raw rows against
  ``rows_sha256`` as it reads them.
- ``linkage verify`` checks everything: additionally each ingest's sealed
  content (its lot tables, revisions, files) and every lot table's raw rows,
  row numbers and content hash (``content_sha256``), stored or not current.

A store written by an earlier version (schema 1) is sealed as it stands when
it is first opened for writing by this one (an ``upgrade`` seal records
that); changes made before that cannot be detected.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from linkage.exceptions import StoreIntegrityError

GENESIS = "0" * 64
#: seal kinds
INGEST, AUDIT, PREDICTION, UPGRADE = "ingest", "audit", "prediction", "upgrade"

DDL = [
    """CREATE TABLE seals (
        id INTEGER PRIMARY KEY,
        kind TEXT NOT NULL,
        ref_id INTEGER NOT NULL,
        content_sha256 TEXT NOT NULL,
        prev_sha256 TEXT NOT NULL,
        sha256 TEXT NOT NULL
    )""",
    """CREATE TABLE lot_table_hashes (
        lot_table_id INTEGER PRIMARY KEY REFERENCES lot_tables(id),
        rows_sha256 TEXT NOT NULL,
        source_rows_sha256 TEXT NOT NULL
    )""",
    "CREATE INDEX seals_ref ON seals(kind, ref_id)",
    # an ingest's content is read back to seal it: by ingest, not by a scan of every lot
    "CREATE INDEX lots_first_ingest ON lots(first_ingest_id)",
    "CREATE INDEX lot_tables_ingest ON lot_tables(ingest_id)",
    "CREATE INDEX revisions_ingest ON revisions(ingest_id)",
]
#: tables of the seal that are append-only like the records
APPEND_ONLY = ("seals", "lot_table_hashes")


# --------------------------------------------------------------------------- pure hashing


def sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def canonical(value) -> str:
    """The one JSON text of a record that its hash covers (keys sorted, no spaces, NaN refused)."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def link(prev_sha256: str, kind: str, ref_id: int, content_sha256: str) -> str:
    """A seal's link hash: SHA-256 of the previous link, the record's kind, id and content hash."""
    return sha256_text(f"{prev_sha256}|{kind}|{int(ref_id)}|{content_sha256}")


def rows_sha256(texts) -> str:
    """SHA-256 of a lot table's raw rows as stored (their JSON texts, in order, separated by U+001E)."""
    texts = list(texts)
    return rows_sha256_spans(texts, [0], [len(texts)])[0]


def rows_sha256_spans(texts: list[str], starts, sizes) -> list[str]:
    """:func:`rows_sha256` of ``texts[a:a + n]`` for each ``a, n`` of ``starts, sizes`` (the definition: the
    texts joined by U+001E, UTF-8, SHA-256; one text is its own join), for many lot tables at once."""
    sha256 = hashlib.sha256
    return [sha256(texts[a].encode("utf-8") if n == 1 else "\x1e".join(texts[a:a + n]).encode("utf-8")).hexdigest()
            for a, n in zip(starts, sizes)]


def source_rows_sha256(source_rows) -> str:
    """SHA-256 of a lot table's spreadsheet row numbers, in order: of their :func:`canonical` JSON list, written
    out here (an int's JSON is its decimal text, None's is null), which is faster per lot table."""
    source_rows = list(source_rows)
    return source_rows_sha256_spans(source_rows, [0], [len(source_rows)])[0]


def source_rows_sha256_spans(source_rows: list, starts, sizes) -> list[str]:
    """:func:`source_rows_sha256` of ``source_rows[a:a + n]`` for each ``a, n`` of ``starts, sizes``."""
    numbers = ["null" if r is None else str(int(r)) for r in source_rows]
    sha256 = hashlib.sha256
    return [sha256(("[" + ",".join(numbers[a:a + n]) + "]").encode("utf-8")).hexdigest()
            for a, n in zip(starts, sizes)]


# --------------------------------------------------------------------------- record contents (read from the store)


def audit_content(c, audit_id: int) -> str | None:
    row = c.execute("SELECT id, at, user, action, lot, model_id, inputs_json, outputs_json FROM audit WHERE id = ?",
                    (audit_id,)).fetchone()
    return None if row is None else sha256_text(canonical(list(row)))


def prediction_content(c, prediction_id: int) -> str | None:
    row = c.execute("SELECT id, at, user, model_id, lot, inputs_json, outputs_json FROM predictions WHERE id = ?",
                    (prediction_id,)).fetchone()
    return None if row is None else sha256_text(canonical(list(row)))


def ingest_content(c, ingest_id: int) -> str | None:
    """The content hash of one ingest, from what the store holds for it."""
    head = c.execute("SELECT id, at, user, folder, lots_new, lots_revised, lots_unchanged, warnings_json, reason "
                     "FROM ingests WHERE id = ?", (ingest_id,)).fetchone()
    if head is None:
        return None
    return ingest_record_sha256(
        head,
        files=c.execute("SELECT tbl, file, sha256, rows FROM ingest_files WHERE ingest_id = ? ORDER BY rowid",
                        (ingest_id,)),
        lots=[r[0] for r in c.execute("SELECT lot FROM lots WHERE first_ingest_id = ? ORDER BY rowid", (ingest_id,))],
        lot_tables=c.execute(
            "SELECT lt.id, lt.lot, lt.tbl, lt.file, lt.file_sha256, lt.content_sha256, lt.columns_json, lt.n_rows, "
            "lt.n_filled, h.rows_sha256, h.source_rows_sha256 FROM lot_tables lt "
            "LEFT JOIN lot_table_hashes h ON h.lot_table_id = lt.id WHERE lt.ingest_id = ? ORDER BY lt.id",
            (ingest_id,)),
        revisions=c.execute("SELECT id, lot, revision, product FROM revisions WHERE ingest_id = ? ORDER BY id",
                            (ingest_id,)),
        revision_tables=c.execute(
            "SELECT rt.revision_id, rt.tbl, rt.lot_table_id FROM revision_tables rt JOIN revisions r "
            "ON r.id = rt.revision_id WHERE r.ingest_id = ? ORDER BY rt.revision_id, rt.tbl", (ingest_id,)))


def ingest_record_sha256(head, *, files, lots, lot_tables, revisions, revision_tables) -> str:
    """The content hash of one ingest from its parts, each as the store holds it and in the order
    :func:`ingest_content` reads it: the ingest row; its files (tbl, file, sha256, rows); the lots it created;
    its lot tables (id, lot, tbl, file, file_sha256, content_sha256, columns_json, n_rows, n_filled,
    rows_sha256, source_rows_sha256) by id; its revisions (id, lot, revision, product) by id; their revision
    tables (revision_id, tbl, lot_table_id) by revision and table. An ingest seals what it has just written
    from these values in memory (the same values: see LotStore._seal_ingest) instead of reading them back."""
    record = {"ingest": list(head), "files": [list(r) for r in files], "lots": list(lots),
              "lot_tables": [list(r) for r in lot_tables], "revisions": [list(r) for r in revisions],
              "revision_tables": [list(r) for r in revision_tables]}
    return sha256_text(canonical(record))


def upgrade_content(c) -> str:
    """What an upgrade seal covers: the store's schema versions at the upgrade."""
    return sha256_text(canonical([list(r) for r in c.execute("SELECT version, applied_at FROM schema_version "
                                                             "ORDER BY rowid")]))


CONTENT = {INGEST: ingest_content, AUDIT: audit_content, PREDICTION: prediction_content}


# --------------------------------------------------------------------------- writing


def head(c) -> tuple[int, str]:
    row = c.execute("SELECT id, sha256 FROM seals ORDER BY id DESC LIMIT 1").fetchone()
    return (0, GENESIS) if row is None else (int(row[0]), str(row[1]))


def seal(c, kind: str, ref_id: int, content_sha256: str | None = None) -> tuple[int, str]:
    """Append one seal (inside the caller's write transaction); returns its id and link hash."""
    if content_sha256 is None:
        content_sha256 = upgrade_content(c) if kind == UPGRADE else CONTENT[kind](c, ref_id)
    _, prev = head(c)
    digest = link(prev, kind, ref_id, content_sha256)
    cur = c.execute("INSERT INTO seals (kind, ref_id, content_sha256, prev_sha256, sha256) VALUES (?, ?, ?, ?, ?)",
                    (kind, int(ref_id), content_sha256, prev, digest))
    return int(cur.lastrowid), digest


# --------------------------------------------------------------------------- the anchor file


def anchor_path(store_path: Path) -> Path:
    return Path(f"{store_path}.seal")


def write_anchor(store_path: Path, seal_id: int, digest: str) -> bool:
    """Record the newest seal beside the store (atomic); False where the folder is not writable."""
    from linkage.export import write_atomic

    try:
        write_atomic(anchor_path(store_path), (canonical({"seal_id": seal_id, "sha256": digest}) + "\n").encode())
    except OSError:
        return False
    return True


def anchor_lock_path(store_path: Path) -> Path:
    """The lock file beside the store (``<store>.seal.lock``) that :func:`advance_anchor` locks; empty, kept."""
    return Path(f"{store_path}.seal.lock")


#: how long :func:`advance_anchor` waits for the anchor lock before it writes without it (seconds)
ANCHOR_LOCK_TIMEOUT_S = 10.0


def advance_anchor(store_path: Path, c) -> bool:
    """After a commit, make the anchor name the store's newest seal, and never an older seal than it names.

    Two writers that commit one after the other both write the anchor after their commit, outside SQLite's
    write lock; unordered, the first could replace the second's anchor with its older seal. So the newest seal
    is read again (``c`` in autocommit: every commit so far) and the anchor written, atomically, only when that
    seal is newer than the one the anchor names, all under an exclusive lock on :func:`anchor_lock_path`
    (``fcntl.flock``). Every writer takes the lock after its commit, so the last to take it reads the newest
    seal of all, and no anchor goes back: whatever the order, the anchor ends at the newest seal.

    Without ``fcntl`` (Windows), or where the lock file cannot be opened (a folder this account cannot write:
    the anchor cannot be written either), where ``flock`` fails other than by waiting (``ENOLCK``: a network drive
    without locks; the commit is made, so the write must not fail for it) or the lock is not had within
    :data:`ANCHOR_LOCK_TIMEOUT_S` (a holder stopped), the same is done without the lock (as before it existed):
    the anchor is read before it is replaced, but two writers finishing together may leave it a seal behind
    (weaker evidence until the next write; :func:`check` does not take it for a removal). Returns whether the
    anchor names the newest seal read, its id and hash (False where it could not be written, or where it names
    that seal under another hash: a mismatch, left as it is for :func:`check` to report)."""
    with _anchor_lock(store_path):
        seal_id, digest = head(c)
        anchor = read_anchor(store_path)
        if anchor is not None and anchor["seal_id"] >= seal_id:  # another writer anchored this seal, or a later one
            # this seal under another hash is a mismatch (the anchor or the chain was changed): left for check to name
            return anchor["seal_id"] == seal_id and anchor["sha256"] == digest
        return write_anchor(store_path, seal_id, digest)


@contextmanager
def _anchor_lock(store_path: Path) -> Iterator[bool]:
    """Hold the exclusive ``flock`` of :func:`anchor_lock_path`; yields whether it is held (see
    :func:`advance_anchor` for when it is not)."""
    try:
        import fcntl
    except ImportError:  # Windows: no flock
        yield False
        return
    try:
        fd = os.open(anchor_lock_path(store_path), os.O_RDWR | os.O_CREAT, 0o666)
    except OSError:
        yield False
        return
    try:
        deadline = time.monotonic() + ANCHOR_LOCK_TIMEOUT_S
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                held = True
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    held = False
                    break
                time.sleep(0.002)
            except OSError:  # no locking here (ENOLCK on a network drive...): the commit is made, go on without
                held = False
                break
        yield held
    finally:
        os.close(fd)  # closing the file releases its lock


def unanchored_caution(store_path: Path, seal_id: int, digest: str) -> str:
    """What a store with seals but no anchor file cannot show (``linkage verify``'s caution, and the one line
    every command that reads such a store prints on stderr)."""
    return (f"no anchor file {anchor_path(store_path)}: the removal of the newest records cannot be detected from "
            f"the store alone; compare the newest seal's hash (seal {seal_id}, sha256 {digest}) with the one "
            "recorded outside the store (the batch record)")


def unanchored_refusal(store_path: Path, seal_id: int, digest: str) -> str:
    """Why a store with seals but no anchor file is not written to, and how to go on deliberately."""
    return (f"lot store {store_path} holds sealed records (newest seal {seal_id}, sha256 {digest}) but its anchor "
            f"file {anchor_path(store_path)} is missing: the removal of the newest records cannot be ruled out, so "
            "nothing is written to it (commands that only read still work, with a caution). Put the anchor file "
            "back from where the store came from (its backup, the folder it was copied from); or compare the "
            "newest seal's hash above with the one recorded outside the store (the batch record) and, if they "
            f"agree, anchor the store again deliberately: linkage verify --store {store_path} --reanchor --reason "
            "TEXT (checks the whole store and records the re-anchoring, who, when and why, in the audit trail). "
            "Nothing was written.")


def read_anchor(store_path: Path) -> dict | None:
    path = anchor_path(store_path)
    if not path.exists():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        return {"seal_id": int(data["seal_id"]), "sha256": str(data["sha256"])}
    except (OSError, ValueError, KeyError, TypeError):
        return {"seal_id": -1, "sha256": "unreadable"}


# --------------------------------------------------------------------------- checking


def check(c, store_path: Path, *, anchor: dict | None, full: bool = False) -> tuple[list[str], dict]:
    """Every mismatch found, and counts of what was checked.

    Always: each seal's link, every audit entry and prediction against its
    seal (and none without one), the anchor. With ``full``: also each
    ingest's content, and every lot table's raw rows, row numbers and content
    hash (see the module notes).

    ``anchor``: the anchor as read (:func:`read_anchor`) *before* the read
    transaction on ``c`` began. A writer commits and then writes the anchor,
    so an anchor read first never names a seal the snapshot lacks; one read
    inside the snapshot may, when another process commits meanwhile (a false
    "records removed").
    """
    problems: list[str] = []
    counts = {"seals": 0, "audit entries": 0, "predictions": 0, "ingests": 0, "lot tables": 0, "raw rows": 0}
    prev = GENESIS
    sealed: dict[str, set[int]] = {INGEST: set(), AUDIT: set(), PREDICTION: set()}
    last_id = 0
    for seal_id, kind, ref_id, content, prev_sha, digest in c.execute(
            "SELECT id, kind, ref_id, content_sha256, prev_sha256, sha256 FROM seals ORDER BY id"):
        counts["seals"] += 1
        last_id = seal_id
        if prev_sha != prev or link(prev_sha, kind, ref_id, content) != digest:
            problems.append(f"seal {seal_id} ({kind} {ref_id}) does not follow from the seal before it: the seal "
                            "chain was cut or rewritten")
        prev = digest
        if kind in sealed:
            sealed[kind].add(int(ref_id))
        if kind == AUDIT or kind == PREDICTION or (full and kind == INGEST):
            now = CONTENT[kind](c, ref_id)
            counts[{AUDIT: "audit entries", PREDICTION: "predictions", INGEST: "ingests"}[kind]] += 1
            if now is None:
                problems.append(f"{kind} record {ref_id} was removed (its seal {seal_id} remains)")
            elif now != content:
                problems.append(f"{kind} record {ref_id} was changed after it was sealed (seal {seal_id})")
    for kind, table in ((AUDIT, "audit"), (PREDICTION, "predictions"), (INGEST, "ingests")):
        unsealed = [r[0] for r in c.execute(f"SELECT id FROM {table} ORDER BY id") if r[0] not in sealed[kind]]
        if unsealed:
            shown = ", ".join(map(str, unsealed[:5])) + (" ..." if len(unsealed) > 5 else "")
            problems.append(f"{len(unsealed)} {table} record(s) without a seal (id {shown}): added outside linkage")
    if anchor is not None and (anchor["seal_id"], anchor["sha256"]) != (0, GENESIS):  # 0: written when empty
        row = c.execute("SELECT sha256 FROM seals WHERE id = ?", (anchor["seal_id"],)).fetchone()
        if row is None or row[0] != anchor["sha256"]:
            problems.append(f"the newest records were removed or the seals rewritten: the anchor "
                            f"{anchor_path(store_path).name} names seal {anchor['seal_id']}, which the store "
                            + ("does not hold" if row is None else "holds with another hash")
                            + f" (newest seal: {last_id})")
    if full:
        problems += _check_lot_tables(c, counts)
    return problems, counts


def _check_lot_tables(c, counts: dict) -> list[str]:
    from linkage.store_rows import content_hash, read_row_texts  # the store's own definitions

    problems: list[str] = []
    meta = {tid: (lot, tbl, content, rows_h, src_h) for tid, lot, tbl, content, rows_h, src_h in c.execute(
        "SELECT lt.id, lt.lot, lt.tbl, lt.content_sha256, h.rows_sha256, h.source_rows_sha256 FROM lot_tables lt "
        "LEFT JOIN lot_table_hashes h ON h.lot_table_id = lt.id")}
    texts: dict[int, list[str]] = {}
    sources: dict[int, list] = {}
    try:
        tids, row_texts, source_rows = read_row_texts(c, sources=True)
    except StoreIntegrityError as exc:
        return [str(exc)]
    for tid, text, source_row in zip(tids.tolist(), row_texts.tolist(), source_rows.tolist()):
        texts.setdefault(tid, []).append(text)
        sources.setdefault(tid, []).append(source_row)
        counts["raw rows"] += 1
    for tid, (lot, tbl, content, rows_h, src_h) in meta.items():
        counts["lot tables"] += 1
        mine = texts.get(tid, [])
        what = f"lot {lot}, table {tbl} (lot table {tid})"
        if rows_h is None:
            problems.append(f"{what}: no row hash (sealed content removed)")
            continue
        if rows_sha256(mine) != rows_h or source_rows_sha256(sources.get(tid, [])) != src_h:
            problems.append(f"{what}: its raw rows were changed after they were stored")
            continue
        try:
            parsed = [json.loads(t) for t in mine]
        except ValueError:
            problems.append(f"{what}: a raw row is not valid JSON")
            continue
        if content_hash(tbl, parsed) != content:
            problems.append(f"{what}: its content hash does not match its rows")
    return problems
