"""The lot store's raw rows: the one JSON encoder of a lot table's rows (the
text stored and the content hash), and where the rows are kept: one
``row_blocks`` record per ingest and table (schema 3), or ``raw_rows``, one
SQLite row per raw row (stores written before). :mod:`linkage.store` is the
store itself; this module holds no connection of its own (functions take
one).
"""

from __future__ import annotations

import hashlib
import importlib
import json
import math
from dataclasses import dataclass
from itertools import chain

from linkage import seal as _seal
from linkage.exceptions import StoreIntegrityError
from linkage.schema import DATETIME, NUMBER, TABLES, TEXT

#: values per "IN (...)" list (SQLite before 3.32 allows 999 parameters a statement)
_IN_CHUNK = 500


class OnFirstUse:
    """A module imported when one of its names is first used. Opening a store
    and appending to its audit trail (what ``linkage predict`` does) needs
    neither numpy nor pandas; ingesting and reading tables do."""

    def __init__(self, name: str):
        self._name = name
        self._module = None

    def __getattr__(self, attr: str):  # called only for names not set in __init__
        if self._module is None:
            self._module = importlib.import_module(self._name)
        return getattr(self._module, attr)


np = OnFirstUse("numpy")
pd = OnFirstUse("pandas")


# --------------------------------------------------------------------------- row encoding


def _cell_out(kind: str, value):
    """A DataFrame cell as a JSON value, or None when missing."""
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NaT:
        return None
    if kind == DATETIME:
        return pd.Timestamp(value).isoformat()
    if kind == NUMBER:
        return float(value)
    if kind == TEXT:
        return str(value)
    return float(value) if isinstance(value, float) else str(value)


def canon_row(table: str, row: dict) -> dict:
    """A row as compared between revisions: -0.0 is 0.0, and in extra columns
    a number written as text is the number (an extra column turns text when
    one lot has a word in it)."""
    names = _TEMPLATE_NAMES[table]
    return {c: v + 0.0 if isinstance(v, float) else v if c in names else _canon(v) for c, v in row.items()}


#: each table's template columns, once (canon_row runs per row)
_TEMPLATE_NAMES = {name: frozenset(tdef.names) for name, tdef in TABLES.items()}


def _canon(value):
    if isinstance(value, str):
        try:
            f = float(value)
        except ValueError:
            return value
        if math.isfinite(f) and value.strip() == value and not any(c in value for c in "_ ,"):
            return f + 0.0
    return value


@dataclass
class LotTable:
    rows: list[str]  # each row as its stored JSON text
    source_rows: list[int]
    columns: list[str]
    sha256: str
    n_filled: int
    # the seal's hashes, computed with the rows (encode_table); required, so that no lot table can reach the
    # store without them (the store writes them as given)
    rows_sha256: str  # linkage.seal.rows_sha256(rows)
    source_rows_sha256: str  # linkage.seal.source_rows_sha256(source_rows)
    columns_json: str = ""  # _json(columns), written once per table


# The one JSON encoder of a lot table's rows. Each row is a JSON object written two ways from the same
# pieces: as stored (the table's columns in order) and as its content hash takes it (keys sorted; -0.0 as
# 0.0; in extra columns a number written as text is the number; rows sorted stably by str() of their key
# values). Both are the text json.dumps writes (", " and ": " separators, float.__repr__, json's string
# encoder, missing cells left out): each column becomes '"name": value' pieces, vectorised where the column
# allows it (float64 numbers, text, dates to the second) and cell by cell through json.dumps otherwise, and a
# row is its pieces joined. tests/test_store_bulk.py compares it with json.dumps row by row.

_encode_text = json.encoder.encode_basestring  # what json.dumps(..., ensure_ascii=False) writes for a str


@dataclass
class _Column:
    """One column encoded: per row '"name": json' as stored (``data``) and as hashed (``canon``), None where
    the cell is missing; ``key``: str() of the canonical value ('None' when missing), the hash's sort key
    (None when not asked for)."""

    data: list
    canon: list
    key: list | None
    missing: np.ndarray


def _cells(name: str, values: list, template: bool, want_key: bool = True) -> _Column:
    """Any column, cell by cell: ``values`` are JSON values (None: missing); ``template``: a column of the
    template (an extra column's text that reads as a number is hashed as the number)."""
    head = _encode_text(name) + ": "
    n = len(values)
    data: list = [None] * n
    canon: list = [None] * n
    key = ["None"] * n
    missing = np.ones(n, dtype=bool)
    for k, value in enumerate(values):
        if value is None:
            continue
        same = value + 0.0 if isinstance(value, float) else value if template else _canon(value)
        missing[k] = False
        data[k] = head + json.dumps(value, ensure_ascii=False, allow_nan=False)
        canon[k] = head + json.dumps(same, ensure_ascii=False)
        key[k] = str(same)
    return _Column(data, canon, key if want_key else None, missing)


def _floats(name: str, v: np.ndarray, want_key: bool) -> _Column | None:
    """float64 numbers, NaN missing; None where a value is infinite (json refuses it: cell by cell raises)."""
    if np.isinf(v).any():
        return None
    head = _encode_text(name) + ": "
    missing = np.isnan(v)
    if np.any((v == 0) & np.signbit(v)):  # -0.0: written as it is, hashed as 0.0
        data = _pieces(head, list(map(repr, v.tolist())), missing)  # float.__repr__, as json writes floats
        reprs = list(map(repr, (v + 0.0).tolist()))
        return _Column(data, _pieces(head, reprs, missing), _missing_as_none(reprs, missing), missing)
    # each distinct value written once (lab values repeat: sieve sizes, settings, rounding); factorize tells
    # -0.0 from nothing else, and there is none here
    codes, uniques = pd.factorize(v)  # missing (NaN) -> -1
    reprs = list(map(repr, uniques.tolist()))
    data = np.array([head + r for r in reprs] + [None], dtype=object)[codes].tolist()
    key = np.array(reprs + ["None"], dtype=object)[codes].tolist() if want_key else None
    return _Column(data, data, key, missing)


def _texts(name: str, col: pd.Series, want_key: bool) -> _Column | None:
    """Text, each distinct value encoded once; None unless every value present is a str."""
    missing = col.isna().to_numpy()
    codes, uniques = pd.factorize(col)  # missing -> -1
    uniques = np.asarray(uniques, dtype=object).tolist()  # not list(): an extension array's __iter__ is per item
    if set(map(type, uniques)) - {str} or not np.array_equal(codes < 0, missing):
        return None
    head = _encode_text(name) + ": "
    data = np.array([head + _encode_text(u) for u in uniques] + [None], dtype=object)[codes].tolist()
    key = np.array(uniques + ["None"], dtype=object)[codes].tolist() if want_key else None
    return _Column(data, data, key, missing)


def _datetimes(name: str, col: pd.Series) -> _Column | None:
    """Dates and times without a zone, to the second, years 1000-9999 (the text Timestamp.isoformat writes,
    vectorised); None for anything else (fractions of a second: cell by cell)."""
    if not (pd.api.types.is_datetime64_dtype(col) and getattr(col.dtype, "tz", None) is None):
        return None
    ticks = col.to_numpy()
    missing = np.isnat(ticks)
    whole = ticks[~missing]
    seconds = whole.astype("datetime64[s]")
    years = seconds.astype("datetime64[Y]").astype(np.int64) + 1970
    if np.any(seconds.astype(whole.dtype) != whole) or np.any((years < 1000) | (years > 9999)):
        return None
    iso = np.full(len(ticks), "", dtype=object)
    iso[~missing] = np.datetime_as_string(seconds, unit="s").astype(object)
    iso = iso.tolist()
    data = _pieces(_encode_text(name) + ": ", list(map(_encode_text, iso)), missing)
    return _Column(data, data, _missing_as_none(iso, missing), missing)


def _encode_column(name: str, kind: str, col: pd.Series, want_key: bool) -> _Column:
    """A DataFrame column: vectorised where :func:`_floats`, :func:`_texts` or :func:`_datetimes` take it,
    else cell by cell (:func:`_cell_out`, then :func:`_cells`)."""
    out = None
    if col.dtype == np.float64 and kind in (NUMBER, "extra"):
        out = _floats(name, col.to_numpy(), want_key)
    elif kind == TEXT:
        out = _texts(name, col, want_key)
    elif kind == DATETIME:
        out = _datetimes(name, col)
    if out is None:
        out = _cells(name, [_cell_out(kind, v) for v in col.tolist()], kind != "extra", want_key)
    return out


def encode_table(tname: str, df: pd.DataFrame) -> dict[str, LotTable]:
    """One table's rows, per lot (in order of first appearance): their JSON texts, spreadsheet rows, content
    hash and number of filled template cells."""
    tdef = TABLES[tname]
    kinds = {c.name: c.kind for c in tdef.columns}
    columns = list(df.columns)
    n = len(df)
    if n == 0:
        return {}
    if "lot" not in columns or df["lot"].isna().any():
        raise ValueError(f"table {tname}: every row needs a lot to be stored")
    encoded = {c: _encode_column(c, kinds.get(c, "extra"), df[c], c in tdef.key) for c in columns}
    filled = np.zeros(n, dtype=np.int64)
    for c in columns:
        if c in kinds and c != "lot":
            filled += ~encoded[c].missing
    complete = not any(e.missing.any() for e in encoded.values())
    row_json = _join_rows([encoded[c].data for c in columns], complete)
    hash_json = _join_rows([encoded[c].canon for c in sorted(columns)], complete)
    keys = [encoded[c].key if c in encoded else ["None"] * n for c in tdef.key if c != "lot"]
    del encoded
    source_rows = list(map(int, df.attrs.get("source_rows", list(range(2, n + 2)))))
    codes, lots = pd.factorize(df["lot"])  # lots in order of first appearance, as the rows name them
    return _per_lot(tname, columns, codes, lots.tolist(), row_json, hash_json, keys, source_rows, filled)


def _per_lot(tname: str, columns: list[str], codes: np.ndarray, lots: list, row_json: list[str],
             hash_json: list[str], keys: list[list[str]], source_rows: list[int],
             filled: np.ndarray) -> dict[str, LotTable]:
    """Split a table's encoded rows by lot (``codes``: each row's lot number) and hash each lot's rows."""
    n = len(codes)
    order = np.argsort(codes, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(np.bincount(codes, minlength=len(lots)))]).tolist()
    per_lot_filled = np.bincount(codes, weights=filled, minlength=len(lots)).astype(np.int64).tolist()
    # the hash takes each lot's rows sorted by str() of their key values (stably, as sorted() does): the
    # rank of each key string among all of them, then one stable sort by lot and those ranks
    ranks = [pd.factorize(np.array(k, dtype=object), sort=True)[0] for k in keys]
    by_key = np.lexsort([*ranks[::-1], codes]) if ranks else order
    hash_json = np.array(hash_json, dtype=object)[by_key].tolist()
    if not np.array_equal(order, np.arange(n)):  # lots not in blocks: put each lot's rows together
        order = order.tolist()
        row_json, source_rows = [row_json[k] for k in order], [source_rows[k] for k in order]
    sha256 = hashlib.sha256
    starts, sizes = bounds[:-1], np.diff(bounds).tolist()
    # the seal's hashes of each lot's rows and row numbers (linkage.seal's definitions, for every lot at once)
    row_digests = _seal.rows_sha256_spans(row_json, starts, sizes)
    source_digests = _seal.source_rows_sha256_spans(source_rows, starts, sizes)
    if len(lots) == n:  # one row a lot
        digests = [sha256(("[" + h + "]").encode()).hexdigest() for h in hash_json]
        return {lot: LotTable([row_json[j]], [source_rows[j]], columns, digests[j], per_lot_filled[j],
                              rows_sha256=row_digests[j], source_rows_sha256=source_digests[j])
                for j, lot in enumerate(lots)}
    spans = list(zip(bounds, bounds[1:]))
    digests = [sha256(("[" + ", ".join(hash_json[a:b]) + "]").encode()).hexdigest() for a, b in spans]
    return {lot: LotTable(row_json[a:b], source_rows[a:b], columns, digest, filled_j, rows_sha256=row_digest,
                          source_rows_sha256=source_digest)
            for lot, (a, b), digest, filled_j, row_digest, source_digest
            in zip(lots, spans, digests, per_lot_filled, row_digests, source_digests)}


def _pieces(head: str, texts: list[str], missing: np.ndarray) -> list:
    """'"name": text' per row, None where the cell is missing."""
    out = list(map(head.__add__, texts))
    if missing.any():
        for k in np.flatnonzero(missing).tolist():
            out[k] = None
    return out


def _missing_as_none(texts: list, missing: np.ndarray) -> list:
    """The sort key of the hash: str(value), 'None' for a missing cell."""
    if not missing.any():
        return texts
    out = list(texts)
    for k in np.flatnonzero(missing).tolist():
        out[k] = "None"
    return out


def _join_rows(pieces: list[list], complete: bool) -> list[str]:
    """'{piece, piece, ...}' per row, leaving out missing (None) pieces."""
    if not pieces:
        return []
    if complete:
        return ["{" + ", ".join(t) + "}" for t in zip(*pieces)]
    return ["{" + ", ".join([p for p in t if p is not None]) + "}" for t in zip(*pieces)]


def content_hash(table: str, rows: list[dict]) -> str:
    """SHA-256 of a lot's rows of one table as stored (JSON values), independent of row order: the same
    encoder as an ingest's (:func:`_cells`, column by column)."""
    names = TABLES[table].names
    columns = sorted(set(chain.from_iterable(rows)))
    encoded = {c: _cells(c, [r.get(c) for r in rows], c in names) for c in columns}
    none = ["None"] * len(rows)
    keys = [encoded[c].key if c in encoded else none for c in TABLES[table].key]
    order = sorted(range(len(rows)), key=lambda k: tuple(key[k] for key in keys))
    texts = _join_rows([encoded[c].canon for c in columns], False) if columns else ["{}"] * len(rows)
    return hashlib.sha256(("[" + ", ".join(texts[k] for k in order) + "]").encode()).hexdigest()


# --------------------------------------------------------------------------- raw rows: row_blocks and raw_rows


def write_row_blocks(c, ingest_id: int, written: list[tuple]) -> None:
    """One row_blocks record per table of an ingest: the JSON texts of the rows of its lot tables (``written``:
    id, lot, table, LotTable, source, in id order), one per line, and their spreadsheet row numbers.

    Why one record, not one raw_rows row per measurement (schema 2): at site scale an ingest writes millions
    of rows, and SQLite's cost is per row (a b-tree insert into the table and its key index, ~2 microseconds
    each), so a 25,000-lot ingest spent most of its time there; one record per table is written and read
    in one step. The rows keep their JSON text, so each lot table's row hash (linkage.seal.rows_sha256, sealed
    in the ingest's seal) and content hash are those of schema 2, and a row changed in the record is found as
    a row changed in raw_rows was. A JSON text has no raw line break (json escapes it), so lines are rows."""
    by_table: dict[str, list[tuple[int, LotTable]]] = {}
    for tid, _, tname, lt, _ in written:
        by_table.setdefault(tname, []).append((tid, lt))
    for tname, lot_tables in by_table.items():
        texts = list(chain.from_iterable(lt.rows for _, lt in lot_tables))
        if not texts:
            continue
        layout = _seal.canonical([[tid, len(lt.rows)] for tid, lt in lot_tables])
        sources = _seal.canonical(list(chain.from_iterable(lt.source_rows for _, lt in lot_tables)))
        c.execute("INSERT INTO row_blocks (ingest_id, tbl, n_rows, lot_tables_json, source_rows_json, rows_text) "
                  "VALUES (?, ?, ?, ?, ?, ?)", (ingest_id, tname, len(texts), layout, sources, "\n".join(texts)))


def _has_table(c, name: str) -> bool:
    """Whether the store has table ``name`` (row_blocks from schema 3 on; raw_rows before it)."""
    return c.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?", (name,)).fetchone() is not None


def read_row_texts(c, lot_table_ids=None, *, sources: bool = False, exact: bool = True,
                   block_keys: set[tuple[int, str]] | None = None, store: str = "the lot store"):
    """The raw rows' JSON texts of the lot tables ``lot_table_ids`` (every lot table when None): three arrays
    sorted by lot table id and then as stored, (lot table id, text, source row; the last None unless
    ``sources``). With ``exact=False`` they may hold other lot tables' rows too (a record holds a whole
    ingest's table). Rows written before schema 3 come from raw_rows, later ones from row_blocks.
    ``block_keys``: the (ingest id, table) of the lot tables when the caller knows them (saves a query)."""
    wanted = None if lot_table_ids is None else sorted(set(int(t) for t in lot_table_ids))
    parts = []
    blocks = _block_keys(c, wanted, block_keys) if _has_table(c, "row_blocks") else []
    few = np.array(wanted, dtype=np.int64) if exact and wanted is not None and not sources else None
    for ingest_id, tbl in blocks:
        parts.append(_read_block(c, ingest_id, tbl, sources, store, few))
    if _has_table(c, "raw_rows") and c.execute("SELECT MAX(rowid) FROM raw_rows").fetchone()[0] is not None:
        parts.append(_read_raw_rows(c, wanted, sources))
    if not parts:
        empty = np.zeros(0, dtype=object)
        return np.zeros(0, dtype=np.int64), empty, (empty if sources else None)
    tids = np.concatenate([p[0] for p in parts])
    texts = np.concatenate([p[1] for p in parts])
    source_rows = np.concatenate([p[2] for p in parts]) if sources else None
    if len(parts) > 1 or not _is_sorted(tids):
        order = np.argsort(tids, kind="stable")  # each lot table's rows are in one part, in order
        tids, texts = tids[order], texts[order]
        source_rows = source_rows[order] if sources else None
    if exact and wanted is not None:
        keep = np.isin(tids, np.array(wanted, dtype=np.int64))
        tids, texts = tids[keep], texts[keep]
        source_rows = source_rows[keep] if sources else None
    return tids, texts, source_rows


def _is_sorted(values: np.ndarray) -> bool:
    return bool(len(values) < 2 or np.all(values[1:] >= values[:-1]))


def _block_keys(c, wanted: list[int] | None, known: set | None = None) -> list[tuple[int, str]]:
    """(ingest id, table) of the row_blocks records that hold any of the ``wanted`` lot tables."""
    stored = [tuple(r) for r in c.execute("SELECT ingest_id, tbl FROM row_blocks ORDER BY ingest_id, tbl")]
    if wanted is None or not stored:
        return stored
    if known is not None:
        return [k for k in stored if k in known]
    keys: set[tuple[int, str]] = set()
    for start in range(0, len(wanted), _IN_CHUNK):
        chunk = wanted[start:start + _IN_CHUNK]
        keys.update(tuple(r) for r in c.execute(f"SELECT DISTINCT ingest_id, tbl FROM lot_tables WHERE id IN "
                                                 f"({', '.join('?' * len(chunk))})", chunk))
    return [k for k in stored if k in keys]


def _read_block(c, ingest_id: int, tbl: str, sources: bool, store: str, wanted: np.ndarray | None = None) -> tuple:
    """One row_blocks record as (lot table id per row, text per row, source row per row or None). ``wanted``:
    the lot tables asked for, when only they are needed; when they are a few of the record's, only their
    lines are taken out of it (the rest is counted, not split)."""
    n_rows, layout_json, source_json, text = c.execute(
        "SELECT n_rows, lot_tables_json, source_rows_json, rows_text FROM row_blocks WHERE ingest_id = ? AND tbl = ?",
        (ingest_id, tbl)).fetchone()
    try:
        layout = np.array(json.loads(layout_json), dtype=np.int64).reshape(-1, 2)
    except ValueError:
        layout = np.zeros((0, 2), dtype=np.int64)
    if wanted is not None and text.count("\n") + 1 == n_rows == int(layout[:, 1].sum()):
        keep = np.isin(layout[:, 0], wanted)
        if 4 * int(keep.sum()) < len(layout):
            return _lines_of(text, layout, keep)
    texts = np.array(text.split("\n"), dtype=object)
    del text
    if len(texts) != n_rows or int(layout[:, 1].sum()) != n_rows:
        ends = np.cumsum(layout[:, 1])
        k = min(int(np.searchsorted(ends, len(texts), side="right")), len(layout) - 1) if len(layout) else -1
        which = f"lot table {int(layout[k, 0])} should have {int(layout[k, 1])} raw rows and has " \
                f"{len(texts) - int(ends[k] - layout[k, 1])}" if k >= 0 else f"no lot tables for {len(texts)} raw rows"
        raise StoreIntegrityError(f"{store} is damaged: {which} (ingest {ingest_id}, table {tbl}: {len(texts)} raw "
                                  f"rows stored for {n_rows}); run `linkage verify`")
    tids = np.repeat(layout[:, 0], layout[:, 1])
    source_rows = np.array(json.loads(source_json), dtype=object) if sources else None
    if sources and len(source_rows) != n_rows:
        raise StoreIntegrityError(f"{store} is damaged: ingest {ingest_id}, table {tbl} has {len(source_rows)} "
                                  f"row numbers for {n_rows} raw rows; run `linkage verify`")
    return tids, texts, source_rows


def _lines_of(text: str, layout: np.ndarray, keep: np.ndarray) -> tuple:
    """The lines of the lot tables ``keep`` marks, out of a record's text whose line count matches its layout:
    found by the offsets of the line breaks in its UTF-8 bytes (a break is byte 10 there and nowhere else)."""
    data = text.encode("utf-8")
    breaks = np.flatnonzero(np.frombuffer(data, dtype=np.uint8) == 10)
    line_start = np.concatenate([[0], breaks + 1]).tolist()
    line_end = np.concatenate([breaks, [len(data)]]).tolist()
    ends = np.cumsum(layout[:, 1])
    tids: list[int] = []
    texts: list[str] = []
    for k in np.flatnonzero(keep).tolist():
        first, last = int(ends[k] - layout[k, 1]), int(ends[k])
        if last > first:
            texts += data[line_start[first]:line_end[last - 1]].decode("utf-8").split("\n")
            tids += [int(layout[k, 0])] * (last - first)
    return np.array(tids, dtype=np.int64), np.array(texts, dtype=object), None


def _read_raw_rows(c, wanted: list[int] | None, sources: bool) -> tuple:
    """Rows kept in raw_rows (stores written before schema 3), fetched in chunks (a list of a million
    tuples costs more memory than the arrays)."""
    columns = "lot_table_id, data_json" + (", source_row" if sources else "")
    if wanted is None or 2 * len(wanted) >= (c.execute("SELECT COUNT(*) FROM lot_tables").fetchone()[0] or 0):
        queries = [(f"SELECT {columns} FROM raw_rows ORDER BY lot_table_id, seq", [])]
    else:
        queries = [(f"SELECT {columns} FROM raw_rows WHERE lot_table_id IN ({', '.join('?' * len(chunk))}) "
                    "ORDER BY lot_table_id, seq", chunk)
                   for chunk in (wanted[k:k + _IN_CHUNK] for k in range(0, len(wanted), _IN_CHUNK))]
    tids: list[np.ndarray] = []
    texts: list[str] = []
    source_rows: list = []
    for sql, params in queries:
        cursor = c.execute(sql, params)
        while chunk := cursor.fetchmany(65536):
            columns_of = list(zip(*chunk))
            tids.append(np.array(columns_of[0], dtype=np.int64))
            texts.extend(columns_of[1])
            if sources:
                source_rows.extend(columns_of[2])
    return (np.concatenate(tids) if tids else np.zeros(0, dtype=np.int64), np.array(texts, dtype=object),
            np.array(source_rows, dtype=object) if sources else None)


