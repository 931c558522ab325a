"""The lot store on many lots at once (issue 8): the column-by-column row
encoding, the batched writes and the bulk read of the current tables keep
every promise of the store.

References, all outside the store's own code:
- the current tables are checked against :func:`linkage.read.read_folder` of
  one folder that holds, for every lot and table, the rows of the latest file
  that carried them (the state the store should show), merged here with
  Python's csv module (RFC 4180) from the files as written;
- content hashes are recomputed here from the stored raw rows by the rule the
  store documents (canonical rows sorted by the text of their key values,
  JSON with sorted keys, SHA-256 of FIPS 180-4 through hashlib);
- the store's one row encoder (column by column, cell by cell where a
  column needs it) is compared byte for byte with the encoder it replaced,
  ``json.dumps`` applied row by row, written out here, on the synthetic
  folders and on varied values drawn by hypothesis;
- SQLite's own ``PRAGMA integrity_check`` and ``foreign_key_check``
  (sqlite.org/pragma.html), and its progress handler, which counts virtual
  machine instructions (sqlite.org/c3ref/progress_handler.html), to show that
  an ingest does not read the lots it does not touch.
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import json
import shutil
import sqlite3
from contextlib import closing
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from linkage import seal
from linkage.read import read_folder
from linkage.schema import DATETIME, NUMBER, TABLES, TEXT
from linkage.store import LotStore, _frame
from linkage.store_rows import content_hash, encode_table, read_row_texts
from linkage.synthetic import make_lots


def _read_csv(path: Path) -> tuple[list[str], list[list[str]]]:
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


def _write_csv(path: Path, header: list[str], rows: list[list[str]]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows(rows)


def _edit(path: Path, lots: set[str], column: str, change) -> None:
    """Rewrite ``path`` keeping only the rows of ``lots``, with ``column`` changed."""
    header, rows = _read_csv(path)
    j = header.index(column)
    kept = [r[:j] + [change(r[j])] + r[j + 1:] for r in rows if r[0] in lots]
    _write_csv(path, header, kept)


def _blank(path: Path, columns: list[str], every: int, offset: int = 0) -> None:
    """Empty ``columns`` in every ``every``-th row (missing values)."""
    header, rows = _read_csv(path)
    for k, r in enumerate(rows):
        if k % every == offset:
            for c in columns:
                r[header.index(c)] = ""
    _write_csv(path, header, rows)


def _add_column(path: Path, name: str, values) -> None:
    header, rows = _read_csv(path)
    _write_csv(path, header + [name], [r + [values(k)] for k, r in enumerate(rows)])


def _bump(text: str, by: float) -> str:
    return "" if text == "" else repr(float(text) + by)


@pytest.fixture(scope="module")
def folders(tmp_path_factory) -> list[Path]:
    """Three ingests: everything; re-measured lots (granules and tablets of
    some lots, nothing else: a partial update); new lots of another product
    with revised process records of old ones. Missing cells, extra columns
    (numeric, sometimes empty; an all-empty one; a -0.0), lots not in blocks."""
    root = tmp_path_factory.mktemp("bulk")
    a, b, c = root / "a", root / "b", root / "c"
    make_lots(50, seed=5, with_units=0.5, with_vessels=0.5, raw_materials=True, product="P").write_csv(a)
    _blank(a / "process.csv", ["blend_moisture_pct", "roll_width_mm", "manufactured_at", "compactor"], every=7)
    _blank(a / "ribbon.csv", ["sampled_at"], every=11, offset=3)
    _blank(a / "tablets.csv", ["friability_pct"], every=4, offset=1)
    _add_column(a / "ribbon.csv", "ribbon_moisture_pct", lambda k: "" if k % 5 == 0 else repr(1.0 + (k % 13) / 10))
    _add_column(a / "ribbon.csv", "never_filled", lambda k: "")
    _add_column(a / "granules.csv", "pan_tare_g", lambda k: "-0.0" if k % 17 == 0 else repr(float(k % 3)))
    header, rows = _read_csv(a / "granules.csv")  # lots not in blocks: every other row moved to the end
    _write_csv(a / "granules.csv", header, rows[::2] + rows[1::2])
    lots = [r[0] for r in _read_csv(a / "process.csv")[1]]

    b.mkdir()
    for name, column, by in (("granules", "retained_g", 0.25), ("tablets", "breaking_force_n", 1.5)):
        (b / f"{name}.csv").write_text((a / f"{name}.csv").read_text(encoding="utf-8"), encoding="utf-8")
        _edit(b / f"{name}.csv", set(lots[::3] if name == "granules" else lots[1::4]), column,
              lambda t, by=by: _bump(t, by))

    make_lots(12, seed=6, product="Q", lot_prefix="NEW").write_csv(c)
    header_c, rows_c = _read_csv(c / "process.csv")
    header_a, rows_a = _read_csv(a / "process.csv")
    gap = header_a.index("roll_gap_mm")
    revised = [[r[header_a.index(h)] if h != "roll_gap_mm" else _bump(r[gap], 0.1) for h in header_c]
               for r in rows_a[::6]]
    _write_csv(c / "process.csv", header_c, rows_c + revised)
    return [a, b, c]


def _final_state(folders: list[Path], into: Path) -> Path:
    """One folder with, per table, each lot's rows from the latest folder
    that had that table for that lot; lots in the order they first came
    (process lots of a folder first, as an ingest orders them)."""
    order: dict[str, None] = {}
    latest: dict[str, dict[str, tuple[list[str], list[list[str]]]]] = {}
    for folder in folders:
        for name in TABLES:
            path = folder / f"{name}.csv"
            if path.exists():
                header, rows = _read_csv(path)
                order.update(dict.fromkeys(r[header.index("lot")] for r in rows))
                for lot in dict.fromkeys(r[header.index("lot")] for r in rows):
                    latest.setdefault(name, {})[lot] = (header, [r for r in rows if r[header.index("lot")] == lot])
    for name, per_lot in latest.items():
        header = list(dict.fromkeys(h for lot in order if lot in per_lot for h in per_lot[lot][0]))
        rows = [[dict(zip(per_lot[lot][0], r)).get(h, "") for h in header]
                for lot in order if lot in per_lot for r in per_lot[lot][1]]
        _write_csv(into / f"{name}.csv", header, rows)
    return into


def _equal_tables(got: dict[str, pd.DataFrame], expected: dict[str, pd.DataFrame]) -> None:
    assert list(got) == [t for t in TABLES if t in expected]
    for name, df in got.items():
        pd.testing.assert_frame_equal(df, expected[name], check_exact=True)


@pytest.fixture(scope="module")
def filled(folders, tmp_path_factory):
    path = tmp_path_factory.mktemp("store") / "lots.db"
    with LotStore(path) as s:
        results = [s.ingest(read_folder(f), reason="a test revision") for f in folders]
    return path, results


def test_the_ingests_did_what_they_should(filled, folders):
    _, (first, second, third) = filled
    assert len(first.lots_new) == 50 and not first.lots_revised
    lots = first.lots_new
    assert second.lots_new == [] and sorted(second.lots_revised) == sorted(set(lots[::3]) | set(lots[1::4]))
    assert len(third.lots_new) == 12 and third.lots_revised == lots[::6]


def test_current_tables_are_the_latest_rows_of_every_lot(filled, folders, tmp_path):
    path, _ = filled
    expected = read_folder(_final_state(folders, tmp_path / "final")).tables
    new_lots = tmp_path / "new_lots"  # product Q: the new lots of the third folder, as it has them
    for name in TABLES:
        if (folders[2] / f"{name}.csv").exists():
            header, rows = _read_csv(folders[2] / f"{name}.csv")
            _write_csv(new_lots / f"{name}.csv", header, [r for r in rows if r[0].startswith("NEW")])
    with LotStore(path, create=False) as s:
        _equal_tables(s.current_tables(), expected)
        _equal_tables(s.current_tables(product="Q"), read_folder(new_lots).tables)
        assert s.current_tables(product="no such product") == {}


def test_reingesting_the_final_state_changes_nothing(filled, folders, tmp_path):
    """The hashes of the column-by-column encoder, on rows merged from three
    files, equal the stored ones, which came from those three ingests."""
    path, _ = filled
    copy = tmp_path / "copy.db"
    with closing(sqlite3.connect(path)) as src, closing(sqlite3.connect(copy)) as dst:
        src.backup(dst)
    shutil.copy(seal.anchor_path(path), seal.anchor_path(copy))  # a store is copied with its anchor, else not written
    with LotStore(copy) as s:
        result = s.ingest(read_folder(_final_state(folders, tmp_path / "final")), reason="a test revision")
    assert result.lots_new == [] and result.lots_revised == [] and len(result.lots_unchanged) == 62


def _expected_hash(table: str, rows: list[dict]) -> str:
    """The store's documented content hash, written out here: rows with -0.0
    as 0.0, sorted (stably) by the text of their key values, as JSON with
    sorted keys, SHA-256."""
    canon = [{k: v + 0.0 if isinstance(v, float) else v for k, v in r.items()} for r in rows]
    canon.sort(key=lambda r: tuple(str(r.get(c)) for c in TABLES[table].key))
    return hashlib.sha256(json.dumps(canon, sort_keys=True, ensure_ascii=False).encode()).hexdigest()


def test_stored_rows_verify_against_their_hashes(filled):
    path, _ = filled
    with closing(sqlite3.connect(path)) as c:
        tables = c.execute("SELECT id, tbl, content_sha256, n_rows FROM lot_tables ORDER BY id").fetchall()
        rows: dict[int, list[tuple[int, str]]] = {}
        for tid, text in zip(*(a.tolist() for a in read_row_texts(c)[:2])):  # schema 3: from row_blocks
            rows.setdefault(tid, []).append((len(rows.get(tid, [])), text))
        assert c.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert c.execute("PRAGMA foreign_key_check").fetchall() == []
    assert [t[0] for t in tables] == list(range(1, len(tables) + 1))  # ids as SQLite gives them
    for tid, table, sha, n_rows in tables:
        assert [seq for seq, _ in rows[tid]] == list(range(n_rows))
        assert _expected_hash(table, [json.loads(t) for _, t in rows[tid]]) == sha, (tid, table)


def test_a_store_mostly_history_reads_only_the_current_rows(folders, tmp_path):
    """Re-measured granules, ingested again and again: most raw rows are old
    revisions (the store then reads only the current lot tables' rows)."""
    path = tmp_path / "history.db"
    steps = [folders[0]]
    for k in range(1, 4):
        step = tmp_path / f"granules{k}"
        step.mkdir()
        (step / "granules.csv").write_text((folders[0] / "granules.csv").read_text(encoding="utf-8"),
                                           encoding="utf-8")
        lots = {r[0] for r in _read_csv(step / "granules.csv")[1]}
        _edit(step / "granules.csv", lots, "retained_g", lambda t, k=k: _bump(t, 0.01 * k))
        steps.append(step)
    with LotStore(path) as s:
        for step in steps:
            s.ingest(read_folder(step), reason="a test revision")
        stored = s.connection.execute("SELECT SUM(n_rows) FROM row_blocks").fetchone()[0]
        current = sum(len(df) for df in s.current_tables().values())
        assert stored > 2 * current  # the case this test is about
        _equal_tables(s.current_tables(), read_folder(_final_state(steps, tmp_path / "final")).tables)
        assert [h["revision"] for h in s.history(s.lot_ids()[0])] == [1, 2, 3, 4]


def test_a_damaged_store_is_reported_not_misread(filled, tmp_path):
    """A raw row missing from a lot table (only possible by editing the file
    around linkage) is reported by the bulk read, not silently skipped."""
    copy = tmp_path / "damaged.db"
    with closing(sqlite3.connect(filled[0])) as src, closing(sqlite3.connect(copy)) as dst:
        src.backup(dst)
        dst.execute("DROP TRIGGER row_blocks_no_update")  # schema 3: the newest record loses its last row
        rowid, text = dst.execute("SELECT rowid, rows_text FROM row_blocks ORDER BY rowid DESC LIMIT 1").fetchone()
        dst.execute("UPDATE row_blocks SET rows_text = ? WHERE rowid = ?", (text.rsplit("\n", 1)[0], rowid))
        dst.commit()
    from linkage.exceptions import StoreError

    with LotStore(copy, create=False) as s:
        with pytest.raises(StoreError, match="damaged: lot table .* should have"):
            s.current_tables()


def _cell_by_cell(table: str, df: pd.DataFrame) -> dict[str, dict]:
    """The store's encoder before issue 20, kept here as the reference: each cell as a JSON value (numbers as
    floats, text as str, dates by Timestamp.isoformat, extra columns float or str, missing left out), each row
    through ``json.dumps`` (Python's JSON encoder, RFC 8259), the content hash by :func:`_expected_hash`."""
    kinds = {c.name: c.kind for c in TABLES[table].columns}

    def cell(kind, value):
        if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NaT:
            return None
        if kind == DATETIME:
            return pd.Timestamp(value).isoformat()
        if kind == NUMBER:
            return float(value)
        if kind == TEXT:
            return str(value)
        return float(value) if isinstance(value, float) else str(value)

    source_rows = df.attrs.get("source_rows", list(range(2, len(df) + 2)))
    out: dict[str, dict] = {}
    for k, record in enumerate(df.to_dict("records")):
        row = {c: cell(kinds.get(c, "extra"), v) for c, v in record.items()}
        row = {c: v for c, v in row.items() if v is not None}
        lt = out.setdefault(record["lot"], {"rows": [], "source_rows": [], "dicts": [], "filled": 0})
        lt["rows"].append(json.dumps(row, ensure_ascii=False, allow_nan=False))
        lt["source_rows"].append(int(source_rows[k]))
        lt["dicts"].append(row)
        lt["filled"] += sum(1 for c in row if c in kinds and c != "lot")
    for lt in out.values():
        dicts = lt.pop("dicts")
        lt["sha256"] = _expected_hash(table, [{c: v if c in kinds else _canon_text(v) for c, v in r.items()}
                                              for r in dicts])
    return out


def _canon_text(value):
    """In an extra column a number written as text is hashed as the number (the store's documented rule)."""
    if isinstance(value, str):
        try:
            number = float(value)
        except ValueError:
            return value
        if np.isfinite(number) and value.strip() == value and not any(c in value for c in "_ ,"):
            return number
    return value


def _assert_same_encoding(table: str, df: pd.DataFrame) -> None:
    mine, reference = encode_table(table, df), _cell_by_cell(table, df)
    assert list(mine) == list(reference)
    for lot, lt in mine.items():
        assert {"rows": lt.rows, "source_rows": lt.source_rows, "filled": lt.n_filled, "sha256": lt.sha256} == \
            reference[lot], (table, lot)
        assert lt.columns == list(df.columns)


def test_column_by_column_encoding_equals_cell_by_cell(folders):
    for folder in folders:
        for name, df in read_folder(folder).tables.items():
            for frame in (df, df.iloc[::-1].reset_index(drop=True)):
                _assert_same_encoding(name, frame)


def test_hash_order_follows_the_text_of_the_keys():
    """Sieve sizes sort as text ('1000.0' < '125.0' < '90.0'), sample names
    by code point ('B' < 'a' < 'é'), ties keep their row order."""
    granules = pd.DataFrame({"lot": ["L1"] * 4 + ["L2"] * 3,
                             "sieve_um": [90.0, 1000.0, 125.0, 0.0, 1000.0, 90.0, 125.0],
                             "retained_g": [1.0, 2.0, 3.0, 4.0, 5.0, -0.0, 7.0]})
    ribbon = pd.DataFrame({"lot": ["L1"] * 4, "sample": ["é", "a", "B", "a"],
                           "envelope_density_g_cm3": [1.0, 1.1, 1.2, 1.3], "skeletal_density_g_cm3": [1.5] * 4})
    for name, df in (("granules", granules), ("ribbon", ribbon)):
        for lot, lt in encode_table(name, df).items():
            rows = [json.loads(t) for t in lt.rows]
            assert lt.sha256 == _expected_hash(name, rows) == content_hash(name, rows)
        _assert_same_encoding(name, df)


_FLOATS = st.one_of(st.floats(allow_nan=True, allow_infinity=False), st.sampled_from([0.0, -0.0, 1e-300, 1e300,
                                                                                     5e-324, 0.1, 125.0]))
_TEXTS = st.text(st.characters(blacklist_categories=("Cs",)), max_size=8) | st.sampled_from(
    ["1.5", " 2", "1_0", "-0.0", "1e3", "é", 'a"b\\c', "\n", "\u2028", "NaN", "inf"])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data(), n=st.integers(1, 9))
def test_the_one_encoder_writes_what_json_dumps_writes_on_varied_values(data, n):
    """Numbers (-0.0, subnormal, huge, missing), text with quotes, escapes, line separators and characters
    outside ASCII, dates with and without fractions of a second, extra columns of numbers, of text and of
    both mixed, every value missing: the stored rows and content hashes equal the reference's byte for byte."""
    lots = data.draw(st.lists(st.sampled_from(["L1", "L2", "é-3"]), min_size=n, max_size=n))
    stamps = st.one_of(st.none(), st.datetimes(min_value=dt.datetime(1990, 1, 1), max_value=dt.datetime(2030, 1, 1)))
    df = pd.DataFrame({
        "lot": lots,
        "sample": data.draw(st.lists(st.one_of(st.none(), _TEXTS), min_size=n, max_size=n)),
        "envelope_density_g_cm3": data.draw(st.lists(_FLOATS, min_size=n, max_size=n)),
        "sampled_at": pd.to_datetime(pd.Series(data.draw(st.lists(stamps, min_size=n, max_size=n)),
                                               dtype=object)),
        "extra_number": data.draw(st.lists(_FLOATS, min_size=n, max_size=n)),
        "extra_text": pd.Series(data.draw(st.lists(st.one_of(st.none(), _TEXTS), min_size=n, max_size=n)),
                                dtype=object),
        "extra_mixed": pd.Series(data.draw(st.lists(st.one_of(st.none(), _TEXTS, _FLOATS), min_size=n,
                                                    max_size=n)), dtype=object),
        "never": [np.nan] * n,
    })
    df.attrs["source_rows"] = list(range(5, 5 + n))
    _assert_same_encoding("ribbon", df)
    for lot, lt in encode_table("ribbon", df).items():
        assert content_hash("ribbon", [json.loads(t) for t in lt.rows]) == lt.sha256
        assert not any("\n" in t for t in lt.rows)  # a row_blocks record keeps one row a line


def test_frame_keeps_keys_outside_the_column_lists():
    """Rows with a key that no lot's column list names (not written by
    linkage, but readable): the key becomes an extra column after the listed
    ones, in order of first appearance."""
    rows = [{"lot": "A", "sample": "1", "envelope_density_g_cm3": 1.1, "skeletal_density_g_cm3": 1.5, "x": 2.0},
            {"lot": "B", "sample": "1", "envelope_density_g_cm3": 1.2, "skeletal_density_g_cm3": 1.5, "z": "t",
             "y": 1.0}]
    df = _frame("ribbon", rows, ["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3", "y"])
    assert list(df.columns)[-3:] == ["y", "x", "z"]
    assert df["x"].dtype == np.float64 and df["x"].tolist()[0] == 2.0 and np.isnan(df["x"].tolist()[1])
    assert df["z"].isna().tolist() == [True, False] and df["z"].tolist()[1] == "t"
    assert df["sampled_at"].isna().all() and df["ribbon_span_mm"].dtype == np.float64  # in no row


def _vm_steps(store: Path, folder: Path) -> int:
    """SQLite virtual machine instructions (in hundreds) of one ingest."""
    steps = [0]

    def tick():
        steps[0] += 1
        return 0

    with LotStore(store) as s:
        s.connection.set_progress_handler(tick, 100)
        s.ingest(read_folder(folder), reason="a test revision")
        s.connection.set_progress_handler(None, 0)
    return steps[0]


def test_an_ingest_does_not_read_the_lots_it_does_not_touch(tmp_path):
    """The same 10 lots (5 new, 5 revised) into a store of 60 and one of 600
    other lots: the work inside SQLite grows by a little (listing the lot ids
    is the only step that sees every lot), not tenfold."""
    make_lots(10, seed=2, lot_prefix="MINE").write_csv(tmp_path / "mine")
    mixed = tmp_path / "mixed"
    make_lots(15, seed=2, lot_prefix="MINE").write_csv(mixed)
    for name in TABLES:  # lots 1-5 re-measured (revised), 11-15 new
        path = mixed / f"{name}.csv"
        if path.exists():
            header, rows = _read_csv(path)
            _write_csv(path, header, [r for r in rows if int(r[0][-3:]) <= 5 or int(r[0][-3:]) > 10])
    _edit(mixed / "tablets.csv", {f"MINE-{i:03d}" for i in list(range(1, 6)) + list(range(11, 16))},
          "breaking_force_n", lambda t: _bump(t, 1.0))
    steps = {}
    for others in (60, 600):
        make_lots(others, seed=3, lot_prefix="OTHER").write_csv(tmp_path / f"others{others}")
        store = tmp_path / f"s{others}.db"
        with LotStore(store) as s:
            s.ingest(read_folder(tmp_path / f"others{others}"), reason="a test revision")
            s.ingest(read_folder(tmp_path / "mine"), reason="a test revision")
        steps[others] = _vm_steps(store, mixed)
    assert steps[600] < 1.3 * steps[60], steps
