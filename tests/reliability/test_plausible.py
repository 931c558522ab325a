"""Plausibility against history (issue 15 item 3): the unit mistakes a site makes, each inside the template's
broad physical bounds, refused with the likely mistake named; a deliberate unusual value taken with
--accept-unusual --reason and recorded.

The robust reference is the median and 1.4826 x MAD of the base-10 logarithms (Rousseeuw & Croux 1993,
J. Am. Stat. Assoc. 88:1273, eq. 1), checked here against scipy.stats.median_abs_deviation(scale="normal"),
the reference implementation. The limits (a factor of 3, 4 robust SDs explained, 10 unexplained) are common
practice, no source.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from linkage.plausible import FLOOR_DECADES, RATIO_LIMIT, Z_ANY, is_unusual, likely_mistake, robust_reference
from linkage.synthetic import make_lots

from .helpers import run_cli


def test_the_robust_reference_is_scipys_normal_scaled_mad_of_the_logs():
    rng = np.random.default_rng(4)
    values = list(rng.lognormal(np.log(85.0), 0.2, size=40))
    m, s = robust_reference(values)
    logs = np.log10(values)
    assert m == pytest.approx(np.median(logs))
    assert s == pytest.approx(stats.median_abs_deviation(logs, scale="normal"), rel=1e-4)  # 1.4826 = 1/Phi^-1(.75)
    assert robust_reference(values[:9]) is None  # too few lots to judge
    assert robust_reference([1.0] * 20) == (0.0, FLOOR_DECADES)  # one shared setting: the floor


def test_the_rule_needs_a_factor_and_either_an_explanation_or_a_large_distance():
    m, s = np.log10(8.0), 0.15  # roll forces of a design spanning about 4 to 14 kN/cm
    assert not is_unusual(2.0, m, s, explained=False)         # a quarter of the usual force: a design point
    assert not is_unusual(20.0, m, s, explained=True)         # explained but within a factor of 3
    assert is_unusual(32.0, m, s, explained=True)             # a factor of 4 and 4 SDs, explained: a slip
    assert not is_unusual(32.0, m, s, explained=False)        # the same distance unexplained: not refused
    assert is_unusual(8.0 * 10 ** (Z_ANY * s + 0.01), m, s, explained=False)
    assert RATIO_LIMIT == 3.0


@pytest.mark.parametrize("x, words", [(0.856, "hundred times too small"), (8.5e3, "hundred times too large"),
                                      (0.0856, "thousand times too small")])
def test_the_likely_mistake_is_named(x, words):
    assert words in likely_mistake(x, np.log10(85.6), 0.02, "dissolution_pct")


def test_a_total_roll_force_is_named_as_such():
    assert "total roll force" in likely_mistake(32.0, np.log10(8.0), 0.1, "roll_force_kn_per_cm", roll_width_mm=40.0)


def _history_and_new_lot(tmp_path: Path, edit) -> tuple[Path, Path, Path]:
    history, new = tmp_path / "history", tmp_path / "new"
    lots = make_lots(31, seed=1, lot_prefix="H")
    lots.write_csv(history)
    new.mkdir()
    for f in history.iterdir():  # the last lot goes in a folder of its own, edited
        header, *rows = f.read_text().splitlines()
        (history / f.name).write_text("\n".join([header, *[r for r in rows if not r.startswith("H-031,")]]) + "\n")
        (new / f.name).write_text("\n".join([header, *[edit(f.stem, header, r) for r in rows
                                                         if r.startswith("H-031,")]]) + "\n")
    store = tmp_path / "s.db"
    assert run_cli(["ingest", history, "--store", store]).exit_code == 0
    return history, new, store


def _set(table: str, column: str, fn):
    def edit(stem, header, row):
        if stem != table:
            return row
        cells = row.split(",")
        k = header.split(",").index(column)
        cells[k] = fn(float(cells[k]))
        return ",".join(cells)
    return edit


@pytest.mark.parametrize("table, column, fn, words", [
    ("tablets", "dissolution_pct", lambda v: f"{v / 100:.4f}", "hundred times too small"),
    ("process", "roll_force_kn_per_cm", lambda v: f"{v * 4:.2f}", "total roll force"),
    ("tablets", "breaking_force_n", lambda v: f"{v / 1000:.4f}", "thousand times too small"),  # kN for N
])
def test_a_unit_mistake_is_refused_with_file_row_and_the_mistake(tmp_path, table, column, fn, words, counts):
    _, new, store = _history_and_new_lot(tmp_path, _set(table, column, fn))
    before = store.read_bytes()
    result = run_cli(["ingest", new, "--store", store])
    assert result.exit_code == 2, result.output
    assert f"{table}.csv" in result.stderr and f"column '{column}'" in result.stderr and "row 2" in result.stderr
    assert words in result.stderr and "--accept-unusual" in result.stderr
    assert store.read_bytes() == before
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_an_unusual_value_is_refused_beside_another_files_hard_error(tmp_path, counts):
    """All of a folder's problems at once (a user test: a hard error in ribbon.csv hid a roll force far from
    history in process.csv until the next round). The tables read whole are judged against history beside the
    other problems, in one refusal (exit 2, nothing written), by the ingest and its preview alike;
    ``--accept-unusual`` leaves only the hard error."""
    force, density = _set("process", "roll_force_kn_per_cm", lambda v: f"{v * 4:.2f}"), \
        _set("ribbon", "envelope_density_g_cm3", lambda v: "-1")
    _, new, store = _history_and_new_lot(tmp_path, lambda stem, header, row: density(stem, header,
                                                                                     force(stem, header, row)))
    before = store.read_bytes()
    for extra in ([], ["--preview"]):
        result = run_cli(["ingest", new, "--store", store, *extra])
        assert result.exit_code == 2, result.output
        said = result.stderr
        assert "ribbon.csv" in said and "column 'envelope_density_g_cm3'" in said and "outside the range" in said
        assert "process.csv, row 2, column 'roll_force_kn_per_cm'" in said and "total roll force" in said
        assert store.read_bytes() == before
        counts["files refused"] += 1
    taken = run_cli(["ingest", new, "--store", store, "--accept-unusual", "--reason", "DEV-10"])
    assert taken.exit_code == 2 and "roll_force_kn_per_cm" not in taken.stderr and "ribbon.csv" in taken.stderr
    assert store.read_bytes() == before


def test_a_usual_new_lot_is_taken(tmp_path):
    _, new, store = _history_and_new_lot(tmp_path, lambda stem, header, row: row)
    assert run_cli(["ingest", new, "--store", store]).exit_code == 0


def test_a_store_that_fails_the_history_comparison_leaves_the_folders_refusal_standing(tmp_path, monkeypatch):
    """A store whose history pages cannot be read (a damaged page: 'database disk image is malformed') made the
    comparison beside a refused folder replace the folder's refusal: exit 5 and none of the folder's problems
    (a review). The folder's problems stand, exit 2, with a line saying the comparison could not be made and
    pointing to 'linkage verify'. A regression test of a refusal (no outside source)."""
    from linkage.exceptions import StoreError
    from linkage.store import LotStore

    density = _set("ribbon", "envelope_density_g_cm3", lambda v: "-1")
    _, new, store = _history_and_new_lot(tmp_path, density)

    def unreadable(self, *args, **kwargs):
        raise StoreError("database disk image is malformed")

    monkeypatch.setattr(LotStore, "unusual_beside", unreadable)
    before = store.read_bytes()
    for extra in ([], ["--preview"]):
        result = run_cli(["ingest", new, "--store", store, *extra])
        assert result.exit_code == 2, result.output
        assert "column 'envelope_density_g_cm3'" in result.stderr and "outside the range" in result.stderr
        assert "could not be compared with the store's history" in result.stderr
        assert "linkage verify" in result.stderr and store.read_bytes() == before


def test_an_unusual_value_taken_deliberately_is_recorded(tmp_path):
    _, new, store = _history_and_new_lot(tmp_path, _set("tablets", "dissolution_pct", lambda v: f"{v / 100:.4f}"))
    no_reason = run_cli(["ingest", new, "--store", store, "--accept-unusual"])
    assert no_reason.exit_code == 2 and "--reason" in no_reason.stderr
    taken = run_cli(["ingest", new, "--store", store, "--accept-unusual", "--reason", "DEV-9: fraction is right"])
    assert taken.exit_code == 0, taken.output
    audit = json.loads(run_cli(["audit", "--store", store, "--json"]).stdout)
    entry = [a for a in audit if a["action"] == "ingest"][-1]
    assert entry["inputs"]["reason"] == "DEV-9: fraction is right"
    [record] = entry["inputs"]["accepted_unusual"]
    assert record["lot"] == "H-031" and record["column"] == "dissolution_pct" and record["value"] < 1.0


def test_a_small_value_of_a_widely_spread_attribute_is_not_explained_by_a_slip():
    """Found by the crash test's synthetic lots: friability 0.07 % against a usual 0.285 % (a factor of 4, and
    0.7 after x10 is no nearer in proportion); a slip must account for most of the distance."""
    m, s = np.log10(0.285), 0.15
    assert likely_mistake(0.07, m, s, "friability_pct") is None
    assert not is_unusual(0.07, m, s, explained=False)
    assert likely_mistake(0.0285, m, s, "friability_pct") is not None  # a true factor of ten still is


def _sieve_in_mm(stem, header, row):
    """The new lot's sieve apertures written in mm (1.4 for 1400 um)."""
    if stem != "granules":
        return row
    cells = row.split(",")
    k = header.split(",").index("sieve_um")
    cells[k] = f"{float(cells[k]) / 1000:g}"
    return ",".join(cells)


def test_sieve_apertures_in_mm_are_refused_as_a_stack(tmp_path, counts):
    """A sieve stack written in mm (1.4, 1.0, ..., 0 for the pan) for one lot: judged on the lot's median
    aperture, a thousand times too small; a normal stack, spanning the pan to 1400 um, passes."""
    _, new, store = _history_and_new_lot(tmp_path, _sieve_in_mm)
    result = run_cli(["ingest", new, "--store", store])
    assert result.exit_code == 2 and "granules.csv" in result.stderr and "sieve_um" in result.stderr
    assert "thousand times too small" in result.stderr
    counts["fuzz cases tried"] += 1
    counts["files refused"] += 1


def test_a_sieve_stack_in_mm_is_reported_as_the_lots_median_with_a_length_hint(tmp_path):
    """The stack is judged on the lot's median aperture: the refusal and the audit record name that median and
    the lot's rows, not the first row's aperture as if it were the value judged, and the hint is a length's
    (mm for µm), not a mass's or a force's. A regression test of a message; the median is numpy's of the rows
    written (no outside source needed)."""
    _, new, store = _history_and_new_lot(tmp_path, _sieve_in_mm)
    lines = (new / "granules.csv").read_text().splitlines()
    k = lines[0].split(",").index("sieve_um")
    apertures = {row: float(ln.split(",")[k]) for row, ln in enumerate(lines[1:], start=2)}
    positive = [row for row, v in apertures.items() if v > 0]
    stack_median = float(np.median([apertures[r] for r in positive]))
    assert apertures[positive[0]] != pytest.approx(stack_median)  # the first row is not the value judged

    refused = run_cli(["ingest", new, "--store", store])
    assert refused.exit_code == 2
    [line] = [ln for ln in refused.stderr.splitlines() if "sieve_um" in ln]
    assert f"value {stack_median!r}" in line and f"row {positive[0]}," not in line
    assert f"rows {positive[0]}-{positive[-1]}" in line and "median" in line
    assert "mm for µm" in line and "g for mg" not in line and "kN for N" not in line

    taken = run_cli(["ingest", new, "--store", store, "--accept-unusual", "--reason", "stack in mm, checked"])
    assert taken.exit_code == 0, taken.output
    audit = json.loads(run_cli(["audit", "--store", store, "--json"]).stdout)
    [record] = [a for a in audit if a["action"] == "ingest"][-1]["inputs"]["accepted_unusual"]
    assert {"file", "row", "lot", "column", "value", "typical", "robust_sd_log10"} <= set(record)  # the keys kept
    assert record["value"] == pytest.approx(stack_median) and record["rows"] == positive
    assert record["row"] == positive[0] and "median" in record["judged"]


def test_the_slip_named_fits_the_columns_unit():
    """A length is never 'g for mg'; a mass in mg keeps its own slip. Regression test of the words; the
    factors are the SI prefixes (BIPM, The International System of Units, 9th ed. 2019)."""
    assert "(mm for µm?)" in likely_mistake(0.3, np.log10(300.0), 0.02, "sieve_um")
    assert "(g for mg?)" in likely_mistake(0.25, np.log10(250.0), 0.02, "weight_mg")
    assert "(kN for N?)" in likely_mistake(0.08, np.log10(80.0), 0.02, "breaking_force_n")
    assert "(cm for mm?)" in likely_mistake(0.42, np.log10(4.2), 0.02, "thickness_mm")


def _lots_and_one_more(tmp_path: Path, n: int) -> tuple[Path, Path]:
    """``n`` synthetic lots (seed 1, no product column): the first n - 1 ingested, the last in a folder of its own."""
    history, new = tmp_path / "history", tmp_path / "new"
    make_lots(n, seed=1, lot_prefix="H").write_csv(history)
    new.mkdir()
    last = f"H-{n:03d},"
    for f in history.iterdir():
        header, *rows = f.read_text().splitlines()
        (history / f.name).write_text("\n".join([header, *[r for r in rows if not r.startswith(last)]]) + "\n")
        (new / f.name).write_text("\n".join([header, *[r for r in rows if r.startswith(last)]]) + "\n")
    store = tmp_path / "s.db"
    assert run_cli(["ingest", history, "--store", store]).exit_code == 0
    return new, store


def test_a_product_with_too_little_history_is_said_not_judged_once(tmp_path):
    """A regression test of the ingest's note (no outside source; the 10 lots needed are common practice, no
    source): with fewer than MIN_HISTORY_LOTS earlier lots the unit-slip check cannot judge, and the ingest and its
    preview say so in one line for the product, instead of letting a unit mistake through without a word."""
    from linkage.plausible import MIN_HISTORY_LOTS

    new, store = _lots_and_one_more(tmp_path / "few", 6)
    expected = f"Note: plausibility not judged for lots without a product: only 5 earlier lots with values " \
               f"({MIN_HISTORY_LOTS} needed)"
    preview = run_cli(["ingest", new, "--store", store, "--preview"])
    assert preview.exit_code == 0 and preview.stdout.count(expected) == 1, preview.stdout
    real = run_cli(["ingest", new, "--store", store, "--json"])
    assert real.exit_code == 0 and json.loads(real.stdout)["notes"] == [expected[len("Note: "):]]
    new, store = _lots_and_one_more(tmp_path / "enough", MIN_HISTORY_LOTS + 2)
    judged = run_cli(["ingest", new, "--store", store])
    assert judged.exit_code == 0 and "plausibility not judged" not in judged.stdout


def test_a_first_ingest_says_no_earlier_lots(tmp_path):
    """The note on a first ingest says "no earlier lots", not "only 0 earlier lots" (a regression test of a label:
    no outside source)."""
    first = run_cli(["ingest", Path(__file__).resolve().parents[1] / "data" / "template-example",
                     "--store", tmp_path / "s.db"])
    assert first.exit_code == 0
    assert "plausibility not judged for lots without a product: no earlier lots with values" in first.stdout
    assert "only 0" not in first.stdout
