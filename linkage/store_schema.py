"""The lot store's file layout: its schema version and application id, the tables, indexes and view of a new
store (its DDL), and the triggers that keep its records append-only; with the time a connection waits for
another writer. :mod:`linkage.store` creates a store with :func:`_statements` and upgrades one written by an
earlier linkage (:meth:`linkage.store.LotStore._upgrade`: schema 1 or 2 to :data:`SCHEMA_VERSION`); the seal
tables are :mod:`linkage.seal`'s. Not :mod:`linkage.schema`, the tables and columns of the input template.
:mod:`linkage.store` re-exports every name of this module.
"""

from __future__ import annotations

from linkage import seal as _seal

#: 2: seals (tamper evidence, linkage/seal.py), lot_table_hashes and ingests.reason;
#: 3: row_blocks (an ingest's raw rows of a table in one record, see the module notes). An earlier store is
#: upgraded by the first command that writes to it; a command that records nothing reads it as it is (schema 2) or
#: from an upgraded temporary copy (schema 1), and so does every command where the store cannot be written.
SCHEMA_VERSION = 3
#: PRAGMA application_id of a linkage store ("LNKG").
APPLICATION_ID = 0x4C4E4B47
BUSY_TIMEOUT_S = 10.0

#: Tables whose rows are never updated or deleted.
#: (A store written before schema 3 also has raw_rows, append-only likewise: its triggers stay.)
APPEND_ONLY = ("schema_version", "ingests", "ingest_files", "lots", "lot_tables", "row_blocks", "revisions",
               "revision_tables", "audit", "predictions", *_seal.APPEND_ONLY)

#: schema 3: the raw rows one ingest wrote for one table, in one record (see :func:`write_row_blocks`): each
#: row's JSON text as raw_rows held it before, one row per line, in the order of their lot tables' ids and
#: then as the file had them; ``lot_tables_json`` lists those lot tables as [id, rows] pairs. A store written
#: before schema 3 keeps its rows in raw_rows (schema 1 and 2), read as before.
_ROW_BLOCKS_DDL = """CREATE TABLE row_blocks (
    ingest_id INTEGER NOT NULL REFERENCES ingests(id),
    tbl TEXT NOT NULL,
    n_rows INTEGER NOT NULL,
    lot_tables_json TEXT NOT NULL,
    source_rows_json TEXT NOT NULL,
    rows_text TEXT NOT NULL,
    PRIMARY KEY (ingest_id, tbl)
)"""

_DDL = """
CREATE TABLE schema_version (version INTEGER NOT NULL, applied_at TEXT NOT NULL);
CREATE TABLE ingests (
    id INTEGER PRIMARY KEY,
    at TEXT NOT NULL,
    user TEXT NOT NULL,
    folder TEXT,
    lots_new INTEGER NOT NULL,
    lots_revised INTEGER NOT NULL,
    lots_unchanged INTEGER NOT NULL,
    warnings_json TEXT NOT NULL,
    reason TEXT
);
CREATE TABLE ingest_files (
    ingest_id INTEGER NOT NULL REFERENCES ingests(id),
    tbl TEXT,
    file TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    rows INTEGER
);
CREATE TABLE lots (
    lot TEXT PRIMARY KEY,
    first_ingest_id INTEGER NOT NULL REFERENCES ingests(id)
);
-- one table's rows of one lot, as one ingest sent them
CREATE TABLE lot_tables (
    id INTEGER PRIMARY KEY,
    lot TEXT NOT NULL REFERENCES lots(lot),
    tbl TEXT NOT NULL,
    ingest_id INTEGER NOT NULL REFERENCES ingests(id),
    file TEXT NOT NULL,
    file_sha256 TEXT NOT NULL,
    content_sha256 TEXT NOT NULL,
    columns_json TEXT NOT NULL,
    n_rows INTEGER NOT NULL,
    n_filled INTEGER NOT NULL
);
{row_blocks};
CREATE TABLE revisions (
    id INTEGER PRIMARY KEY,
    lot TEXT NOT NULL REFERENCES lots(lot),
    revision INTEGER NOT NULL,
    ingest_id INTEGER NOT NULL REFERENCES ingests(id),
    product TEXT,
    UNIQUE (lot, revision)
);
CREATE TABLE revision_tables (
    revision_id INTEGER NOT NULL REFERENCES revisions(id),
    tbl TEXT NOT NULL,
    lot_table_id INTEGER NOT NULL REFERENCES lot_tables(id),
    PRIMARY KEY (revision_id, tbl)
);
CREATE TABLE audit (
    id INTEGER PRIMARY KEY,
    at TEXT NOT NULL,
    user TEXT NOT NULL,
    action TEXT NOT NULL,
    lot TEXT,
    model_id TEXT,
    inputs_json TEXT,
    outputs_json TEXT
);
CREATE TABLE predictions (
    id INTEGER PRIMARY KEY,
    at TEXT NOT NULL,
    user TEXT NOT NULL,
    model_id TEXT NOT NULL,
    lot TEXT,
    inputs_json TEXT NOT NULL,
    outputs_json TEXT NOT NULL
);
CREATE INDEX lot_tables_lot ON lot_tables(lot);
CREATE INDEX revisions_lot ON revisions(lot);
CREATE INDEX audit_lot ON audit(lot);
CREATE INDEX predictions_lot ON predictions(lot);
CREATE VIEW current_revisions AS
    SELECT r.* FROM revisions r
    WHERE r.revision = (SELECT MAX(revision) FROM revisions WHERE lot = r.lot);
"""


def _statements() -> list[str]:
    """The DDL of a new store, one statement each, append-only triggers last."""
    out = [s.strip() for s in _DDL.format(row_blocks=_ROW_BLOCKS_DDL).split(";") if s.strip()]
    return out + list(_seal.DDL) + _triggers(APPEND_ONLY)


def _triggers(tables) -> list[str]:
    return [f"CREATE TRIGGER {table}_no_{op.lower()} BEFORE {op} ON {table} BEGIN "
            f"SELECT RAISE(ABORT, 'linkage store: {table} is append-only ({op} refused)'); END"
            for table in tables for op in ("UPDATE", "DELETE")]
