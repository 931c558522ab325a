"""The faster ingest and read back of issue 20 (item 1) keep the store's texts and hashes byte for byte.

What was made faster, and the reference each is compared with here (outside the code that was changed):
- each lot table's row hash and row-number hash, now computed with its rows (``LotTable.rows_sha256``,
  ``source_rows_sha256``): against SHA-256 (FIPS 180-4, through hashlib) of the texts the seal module
  documents, written out here: the rows' JSON texts joined by U+001E, and ``json.dumps`` (RFC 8259) of the
  row numbers without spaces; the rows themselves against ``json.dumps`` applied row by row (the encoder
  before issue 8, written out in tests/test_store_bulk.py);
- an ingest's seal, now computed from the values the ingest wrote: against
  :func:`linkage.seal.ingest_content`, which reads the record back from the store with SQL (what
  ``linkage verify`` recomputes);
- reading a few lot tables out of a large row_blocks record (the plausibility rule's history): against
  ``str.split`` of the whole record;
- the plausibility rule's vectorised first pass: against the lookup written value by value;
- the row hash and row-number hash of many lot tables at once (``linkage.seal.rows_sha256_spans``,
  ``source_rows_sha256_spans``, the one definition the seal, the encoder and the read-back check share):
  against hashlib's SHA-256 of the documented texts, span by span.
"""

from __future__ import annotations

import hashlib
import json
import math
import sqlite3
from contextlib import closing

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from linkage import plausible, seal
from linkage.read import read_folder
from linkage.store import LotStore, _ingest_sha256
from linkage.store_rows import encode_table, read_row_texts
from linkage.synthetic import make_lots
from tests.test_store_bulk import _assert_same_encoding, _cell_by_cell


def _reference_rows(table: str, df: pd.DataFrame) -> dict[str, dict]:
    """Per lot: each row through json.dumps and its row numbers (tests/test_store_bulk.py's reference encoder),
    and the two hashes by the seal's documented texts, written out here."""
    out = {lot: {"rows": ref["rows"], "source_rows": ref["source_rows"]}
           for lot, ref in _cell_by_cell(table, df).items()}
    for lot in out.values():
        lot["rows_sha256"] = hashlib.sha256("\x1e".join(lot["rows"]).encode("utf-8")).hexdigest()
        lot["source_rows_sha256"] = hashlib.sha256(json.dumps(lot["source_rows"], separators=(",", ":"))
                                                   .encode("utf-8")).hexdigest()
    return out


def _assert_hashes_as_documented(table: str, df: pd.DataFrame) -> None:
    mine, reference = encode_table(table, df), _reference_rows(table, df)
    assert list(mine) == list(reference)
    for lot, lt in mine.items():
        got = {"rows": lt.rows, "source_rows": lt.source_rows, "rows_sha256": lt.rows_sha256,
               "source_rows_sha256": lt.source_rows_sha256}
        assert got == reference[lot], (table, lot)
        # and the seal module's own functions, which `linkage verify` uses, agree
        assert lt.rows_sha256 == seal.rows_sha256(lt.rows)
        assert lt.source_rows_sha256 == seal.source_rows_sha256(lt.source_rows)


def test_row_hashes_of_seeded_lots_are_the_documented_ones(tmp_path):
    lots = make_lots(40, seed=11, with_units=0.5, with_vessels=0.5, raw_materials=True, product="P")
    lots.write_csv(tmp_path / "a")
    for name, df in read_folder(tmp_path / "a").tables.items():
        for frame in (df, df.iloc[::-1].reset_index(drop=True)):  # lots in blocks, and not
            _assert_hashes_as_documented(name, frame)


_FLOATS = st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=False),
                    st.sampled_from([0.0, -0.0, 0.1 + 0.2, 1 / 3, 123456789.12345679, 5e-324, 1e300, 2.0 ** 53 + 1]))
_TEXTS = st.one_of(st.none(), st.text(st.characters(blacklist_categories=("Cs",)), max_size=6),
                   st.sampled_from(["é", "日本", "a\"b\\c", "\u2028", "\x1e", "\n", "1.50", "NaN", "-0.0"]))


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data(), n=st.integers(1, 8))
def test_row_hashes_of_edge_case_rows_are_the_documented_ones(data, n):
    """NaN and None, text outside ASCII (and a record separator, a line break), floats with many digits,
    -0.0, ints next to floats in an extra column, a column every row leaves empty; row numbers with gaps."""
    lots = data.draw(st.lists(st.sampled_from(["L1", "L2", "é-3"]), min_size=n, max_size=n))
    df = pd.DataFrame({
        "lot": lots,
        "sample": pd.Series(data.draw(st.lists(_TEXTS, min_size=n, max_size=n)), dtype=object),
        "envelope_density_g_cm3": pd.Series(data.draw(st.lists(_FLOATS, min_size=n, max_size=n)), dtype=float),
        "extra_mixed": pd.Series(data.draw(st.lists(st.one_of(_FLOATS, _TEXTS, st.integers(-10**6, 10**6)),
                                                    min_size=n, max_size=n)), dtype=object),
        "never": [np.nan] * n,
    })
    df.attrs["source_rows"] = sorted(data.draw(st.lists(st.integers(2, 10**7), min_size=n, max_size=n,
                                                        unique=True)))
    _assert_hashes_as_documented("ribbon", df)


def _seals(path) -> dict[int, str]:
    with closing(sqlite3.connect(path)) as con:
        return {ref: content for ref, content in con.execute(
            "SELECT ref_id, content_sha256 FROM seals WHERE kind = 'ingest' ORDER BY id")}


def test_an_ingest_seals_the_record_the_store_reads_back(tmp_path, monkeypatch):
    """New lots, a revision that changes some tables of some lots (a reason given), lots without a product,
    a table built in memory (no file): each ingest's seal is the hash of what seal.ingest_content reads."""
    from linkage import store as store_module

    from_memory = []
    real = store_module._ingest_sha256
    monkeypatch.setattr(store_module, "_ingest_sha256", lambda *a: from_memory.append(real(*a)) or from_memory[-1])
    store = tmp_path / "s.db"
    make_lots(30, seed=3, product="P").write_csv(tmp_path / "a")
    make_lots(10, seed=4, lot_prefix="Q").write_csv(tmp_path / "b")  # no product
    with LotStore(store) as s:
        s.ingest(read_folder(tmp_path / "a", known_lots=[]), accept_unusual=True, reason="seeded")
        s.ingest(read_folder(tmp_path / "b", known_lots=s.lot_ids()), accept_unusual=True, reason="seeded")
        revised = read_folder(tmp_path / "a", known_lots=s.lot_ids())
        tablets = revised.tables["tablets"].copy()
        tablets.loc[::3, "breaking_force_n"] += 1.5
        revised.tables = {"tablets": tablets}
        revised.sources = {}  # as if built in memory: the store names it "(tablets, not from a file)"
        result = s.ingest(revised, reason="re-measured", accept_unusual=True)
        assert result.lots_revised and result.lots_unchanged
        s.check_seals(full=True)
    with closing(sqlite3.connect(store)) as con:
        for ingest_id, content in _seals(store).items():
            assert content == seal.ingest_content(con, ingest_id), ingest_id
    assert len(from_memory) == 3 and None not in from_memory  # each sealed from memory, none read back


def test_an_ingest_value_of_another_type_is_sealed_from_the_store():
    """A value SQLite would give back as another type (an int lot is stored as text): no hash from memory."""
    head = [1, "2026-12-04T00:00:00.000+00:00", "me", None, 1, 0, 0, "[]", None]
    assert _ingest_sha256(head, [], ["L1"], [], [], []) is not None
    assert _ingest_sha256(head, [], [7], [], [], []) is None
    assert _ingest_sha256([1, "t", 5, *head[3:]], [], ["L1"], [], [], []) is None  # a user that is no str


def test_a_few_lot_tables_read_out_of_a_record_equal_its_split(tmp_path, monkeypatch):
    from linkage import store_rows

    taken_out = []
    real = store_rows._lines_of
    monkeypatch.setattr(store_rows, "_lines_of", lambda *a: taken_out.append(1) or real(*a))
    store = tmp_path / "s.db"
    lots = make_lots(60, seed=8, product="P")
    lots.tables["ribbon"]["sample"] = [f"é{k}日" for k in range(len(lots.tables["ribbon"]))]  # not ASCII
    lots.write_csv(tmp_path / "a")
    with LotStore(store) as s:
        s.ingest(read_folder(tmp_path / "a", known_lots=[]), accept_unusual=True, reason="seeded")
    with closing(sqlite3.connect(store)) as con:
        every_tid, every_text, _ = read_row_texts(con)
        ids = sorted(set(every_tid.tolist()))
        for few in ([ids[0]], ids[5:9], [ids[-1], ids[len(ids) // 2]], ids[::40]):
            tids, texts, _ = read_row_texts(con, few)
            keep = np.isin(every_tid, few)
            assert tids.tolist() == every_tid[keep].tolist()
            assert texts.tolist() == every_text[keep].tolist()
    assert taken_out  # the lines were taken out of the records, not split from them


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_the_first_pass_of_the_plausibility_rule_is_the_lookup_value_by_value(seed):
    rng = np.random.default_rng(seed)
    lots = [f"L{k}" for k in rng.integers(0, 30, size=400)] + [None]
    product_of = {f"L{k}": (None if k % 7 == 0 else f"P{k % 3}") for k in range(25)}  # L25-L29: unknown
    references = {"P0": (1.0, 0.05), "P1": (2.0, 0.2), None: (0.5, 0.1)}
    values = np.exp(rng.normal(0.0, 3.0, size=len(lots)))
    values[::17] = np.nan
    got = plausible._far(values, lots, references, product_of)
    refs = [references.get(product_of.get(lot)) for lot in lots]  # the definition, value by value
    m = np.array([np.nan if r is None else r[0] for r in refs])
    s = np.array([np.nan if r is None else r[1] for r in refs])
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.abs(np.log10(np.where(values > 0, values, np.nan)) - m)
    expected = (d > math.log10(plausible.RATIO_LIMIT) - plausible._SLACK) & \
        (d > min(plausible.Z_ANY, plausible.Z_EXPLAINED) * s - plausible._SLACK)
    assert got.tolist() == expected.tolist()
    assert expected.any() and not expected.all()


def test_row_hashes_of_many_lot_tables_at_once_are_the_documented_ones():
    """linkage.seal.rows_sha256_spans and source_rows_sha256_spans, the one definition that the seal, the
    encoder's per-lot hashes and the read-back check all use, against SHA-256 written out here through
    hashlib on the documented texts (rows joined by U+001E; the row numbers as ``json.dumps`` without
    spaces, RFC 8259), span by span: empty, one row, many rows, text outside ASCII, empty texts."""
    # FIPS 180-4 (NIST 2015), the SHA-256 example "abc" (its appendix of examples; the digest from memory):
    # one row is hashed as its own text
    assert seal.rows_sha256(["abc"]) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    rng = np.random.default_rng(20)
    alphabet = ["a", "é", "日本", "\"", "\\", "\u2028", " ", "{", "1.5"]
    texts = ["".join(rng.choice(alphabet, size=int(rng.integers(0, 6)))) for _ in range(300)]
    sizes = rng.integers(0, 5, size=120).tolist()
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]).tolist()
    assert starts[-1] + sizes[-1] <= len(texts)
    got = seal.rows_sha256_spans(texts, starts, sizes)
    expected = [hashlib.sha256("\x1e".join(texts[a:a + n]).encode("utf-8")).hexdigest()
                for a, n in zip(starts, sizes)]
    assert got == expected
    assert got == [seal.rows_sha256(texts[a:a + n]) for a, n in zip(starts, sizes)]
    numbers = [None if k % 7 == 0 else int(k) for k in rng.integers(2, 10 ** 6, size=300).tolist()]
    got = seal.source_rows_sha256_spans(numbers, starts, sizes)
    expected = [hashlib.sha256(json.dumps(numbers[a:a + n], separators=(",", ":")).encode("utf-8")).hexdigest()
                for a, n in zip(starts, sizes)]
    assert got == expected


def test_named_edge_values_are_written_as_json_dumps_writes_them():
    """0.1 + 0.2, 1e-7, -0.0, 5e-324, 2**53 + 1, missing numbers (NaN: left out of the row), text outside ASCII,
    big integers in an extra column: the stored rows and both hashes as the reference (json.dumps row by
    row); an infinite number is refused as json.dumps(allow_nan=False) refuses it (ValueError)."""
    values = [0.1 + 0.2, 1e-7, -0.0, 5e-324, float(2 ** 53 + 1), math.nan, 1e22, 123456789.12345679]
    n = len(values)
    df = pd.DataFrame({
        "lot": ["L1", "L1", "L2", "é-3", "L2", "L1", "é-3", "L2"],
        "compression_force_kn": values,
        "breaking_force_n": values[::-1],
        "note": pd.Series(["Öl – 5 µm", "“quoted”", None, "x\\y", "日本", "\u2028", "", "1e-7"], dtype=object),
        "big": pd.Series([2 ** 70, -(2 ** 64), 10 ** 30, None, 0, 7, 2 ** 53 + 1, 1], dtype=object),
    })
    df.attrs["source_rows"] = list(range(2, n + 2))
    _assert_hashes_as_documented("tablets", df)
    for frame in (df, df.iloc[::-1].reset_index(drop=True)):
        _assert_same_encoding("tablets", frame)
    infinite = df.assign(compression_force_kn=[math.inf] + values[1:])
    with pytest.raises(ValueError):
        json.dumps(math.inf, allow_nan=False)
    with pytest.raises(ValueError):
        encode_table("tablets", infinite)
