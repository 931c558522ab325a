"""One lot, one identity (issue 15 item 2).

Two lot ids that a person reads as the same lot must never become two lots:
ids are compared under Unicode NFKC normalisation (Unicode Standard Annex #15,
checked here against Python's ``unicodedata``, the reference implementation of
the Unicode Character Database), dash folding and full case folding
(``str.casefold``, Unicode Standard §3.13); ids holding control or format
characters (categories Cc and Cf, Unicode Standard §4.5: a byte-order mark,
zero-width space) are refused. Each case is counted as a file refused.
"""

from __future__ import annotations

import shutil
import unicodedata
from pathlib import Path

import pytest

from linkage.exceptions import InputError
from linkage.read import lot_id_rule, lot_key, read_folder
from linkage.store import LotStore

EXAMPLE = Path(__file__).resolve().parents[1] / "data" / "template-example"


def _folder(tmp_path: Path, name: str = "in") -> Path:
    d = tmp_path / name
    shutil.copytree(EXAMPLE, d)
    (d / "spec.toml").unlink(missing_ok=True)
    return d


def _replace(path: Path, old: str, new: str, count: int = 1) -> None:
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_text(text.replace(old, new, count), encoding="utf-8")


@pytest.mark.parametrize("a, b", [
    ("Q-100", "Q\u2011100"),   # non-breaking hyphen U+2011 (category Pd); NFKC maps it to U+2010, not '-'
    ("Q-100", "Q\u2013100"),   # en dash
    ("Q-100", "Q\u2212100"),   # minus sign U+2212
    ("Q200", "q200"),
    ("VX25-001", "vx25-001"),
    ("A1", "\uff21\uff11"),    # full-width A and 1: NFKC compatibility forms
    ("STRASSE-1", "stra\u00dfe-1"),  # full case folding: ß folds to 'ss' (str.casefold, not lower)
])
def test_spellings_of_one_lot_have_one_key(a, b):
    assert a != b
    assert lot_key(a) == lot_key(b)


def test_the_key_is_nfkc_then_casefold_for_plain_ids():
    # reference: Python's unicodedata and str.casefold, applied by hand
    for lot in ["EX-001", "Lot 7", "ﬁne-1", "Ⅻ-3"]:
        assert lot_key(lot) == unicodedata.normalize("NFKC", lot).casefold()


def test_different_lots_keep_different_keys():
    assert lot_key("Q-100") != lot_key("Q-1000")
    assert lot_key("Q-100") != lot_key("Q100")  # a dash is not dropped, only folded


@pytest.mark.parametrize("lot", ["\ufeffA24014", "A24\u200b014", "A24014\u200e", "A\x0724014"])
def test_invisible_characters_are_refused(lot):
    rule = lot_id_rule(lot)
    assert rule is not None and "U+" in rule
    assert lot_id_rule("A24014") is None


def test_a_bom_inside_a_lot_id_is_refused_with_row_and_escape(tmp_path, counts):
    d = _folder(tmp_path)
    _replace(d / "ribbon.csv", "\nEX-002,", "\n\ufeffEX-002,")  # two exports pasted together
    with pytest.raises(InputError) as info:
        read_folder(d)
    hits = [p for p in info.value.problems if "U+FEFF" in p.rule]
    assert hits and hits[0].file == "ribbon.csv" and hits[0].row is not None and hits[0].column == "lot"
    assert hits[0].value == "\\ufeffEX-002"  # shown as an escape, not as an invisible character
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_two_spellings_in_one_file_are_refused_naming_both_rows(tmp_path, counts):
    d = _folder(tmp_path)
    lines = (d / "ribbon.csv").read_text().splitlines()
    first = next(i for i, line in enumerate(lines) if line.startswith("EX-003,"))
    second = next(i for i, line in enumerate(lines) if i > first and line.startswith("EX-003,"))
    lines[second] = lines[second].replace("EX-003", "ex-003", 1)
    (d / "ribbon.csv").write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as info:
        read_folder(d)
    hit = next(p for p in info.value.problems if "written another way" in p.rule)
    assert hit.row == second + 1 and hit.value == "ex-003"
    # the rows of the usual spelling are named as runs, so the odd row between them is not inside a range
    named = hit.rule.split("'EX-003' on ")[1].split(", and one lot")[0]
    assert str(first + 1) in named and str(second + 1) not in named
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_a_result_table_spelling_a_process_lot_another_way_is_refused(tmp_path, counts):
    d = _folder(tmp_path)
    _replace(d / "tablets.csv", "\nEX-002,", "\nEX\u2011002,")
    with pytest.raises(InputError) as info:
        read_folder(d, known_lots=[])
    hit = next(p for p in info.value.problems if "written another way" in p.rule)
    assert hit.file == "tablets.csv" and "'EX-002'" in hit.rule and "process.csv" in hit.rule
    # not also reported as a lot without a process record: one problem, the right one
    assert not any("no process record" in p.rule for p in info.value.problems)
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_a_lot_resent_in_another_case_is_refused_and_the_store_is_unchanged(tmp_path, counts):
    store_path = tmp_path / "s.db"
    store = LotStore(store_path)
    store.ingest(read_folder(_folder(tmp_path, "first"), known_lots=store.lot_ids()), reason="a test revision")
    before = store_path.read_bytes()
    d = _folder(tmp_path, "again")
    for f in d.glob("*.csv"):
        f.write_text(f.read_text().replace("EX-001", "ex-001"))
    with pytest.raises(InputError) as info:
        # no known lots at read time: the store's own check refuses it
        store.ingest(read_folder(d), reason="a test revision")
    hits = [p for p in info.value.problems if "written another way" in p.rule]
    assert hits and all("'EX-001' in the store" in p.rule for p in hits)
    assert {p.file for p in hits} >= {"process.csv", "ribbon.csv"}
    assert sorted(store.lot_ids()) == ["EX-001", "EX-002", "EX-003", "EX-004"]
    assert store_path.read_bytes() == before
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_the_same_spelling_again_is_a_revision_not_a_refusal(tmp_path):
    store = LotStore(tmp_path / "s.db")
    store.ingest(read_folder(_folder(tmp_path, "first"), known_lots=store.lot_ids()), reason="a test revision")
    d = _folder(tmp_path, "again")
    _replace(d / "tablets.csv", "EX-001,10.44,80.0", "EX-001,10.44,81.0")
    result = store.ingest(read_folder(d, known_lots=store.lot_ids()), reason="a test revision")
    assert result.lots_revised == ["EX-001"]
