"""Reading input: two gaps a review of the reader found.

1. A sieve stack written in mm (0.063 ... 1.4 where 63 ... 1400 µm were meant) was caught only against the
   store's history, so a first ingest took it silently and the granule d50 came out a thousand times too
   small. It is now refused without history: no woven-wire test sieve has an aperture below 20 µm (ISO
   3310-1:2016, Test sieves - Technical requirements and testing - Part 1: Test sieves of metal wire cloth,
   clause 1 Scope: apertures from 125 mm down to 20 µm, the series of ISO 565), and a roller compactor's
   granules are sieved well above it (USP <786> / Ph. Eur. 2.9.38: mechanical sieving suits particles larger
   than about 75 µm).
2. A process row with one field too many (an unquoted decimal comma) was refused, and then every result row
   of its lot was reported as well, as having no process record: three messages that only followed from the
   first.
3. ``--accept-unusual`` without ``--reason``, on a first ingest, left an empty store behind.

The limit is the source's; the rest are regression tests of refusals and of what a message names, with the
expected rows, medians and counts read off the edited files themselves (numpy's median, the files' lines),
so they need no further outside source.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.exceptions import InputError
from linkage.lotid import row_span
from linkage.plausible import SMALLEST_SIEVE_UM
from linkage.read import read_folder
from linkage.synthetic import make_lots

TEMPLATE = Path(__file__).resolve().parent / "data" / "template-example"
DEMO = Path(__file__).resolve().parent.parent / "data_demo" / "lots"


def run_cli(args: list):
    """The command line in-process; an exception other than the exit is a bug, never a refusal."""
    result = CliRunner().invoke(cli, [str(a) for a in args])
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    assert "Traceback" not in result.output
    return result


def _copy(tmp_path: Path, name: str = "lots") -> Path:
    folder = tmp_path / name
    folder.mkdir()
    for f in TEMPLATE.glob("*.csv"):
        shutil.copy(f, folder / f.name)
    return folder


def _granules_in_mm(folder: Path, lots: set[str] | None = None, header: str | None = None) -> None:
    """The sieve apertures of ``lots`` (every lot by default) divided by 1000: the stack written in mm."""
    path = folder / "granules.csv"
    head, *rows = path.read_text().splitlines()
    out = []
    for line in rows:
        lot, sieve, mass = line.split(",")
        if lots is None or lot in lots:
            sieve = f"{float(sieve) / 1000:g}"
        out.append(f"{lot},{sieve},{mass}")
    if header is not None:
        head = head.replace("sieve_um", header)
    path.write_text("\n".join([head, *out]) + "\n")


def _stack(folder: Path, lot: str) -> tuple[list[int], list[float]]:
    """The sheet rows and values of a lot's positive apertures, as the file has them."""
    lines = (folder / "granules.csv").read_text().splitlines()
    found = [(row, float(ln.split(",")[1])) for row, ln in enumerate(lines[1:], start=2) if ln.startswith(lot + ",")]
    return [r for r, v in found if v > 0], [v for _, v in found if v > 0]


def _problems(folder: Path) -> list:
    with pytest.raises(InputError) as exc:
        read_folder(folder, known_lots=set())
    return exc.value.problems


# --------------------------------------------------------------------------- 1. a sieve stack in mm


def test_the_limit_is_the_smallest_woven_wire_test_sieve():
    """ISO 3310-1:2016 clause 1: test sieves of metal wire cloth have apertures from 125 mm down to 20 µm."""
    assert SMALLEST_SIEVE_UM == 20.0


def test_a_sieve_stack_in_mm_is_refused_on_a_first_ingest(tmp_path):
    """The whole template example with its stacks in mm, into a new store: every lot refused at once, each with
    the file, the column, its rows as runs, its median aperture as the value, the rule and the mm-for-µm cause;
    exit code 2 and no store. Before, it went in and every granule d50 was a thousand times too small."""
    folder = _copy(tmp_path)
    _granules_in_mm(folder)
    store = tmp_path / "new.db"
    result = run_cli(["ingest", folder, "--store", store])
    assert result.exit_code == 2, result.output
    assert not store.exists() and not Path(f"{store}.seal").exists()  # nothing written
    lines = [ln for ln in result.stderr.splitlines() if "sieve_um" in ln]
    assert len(lines) == 4  # one a lot, all at once
    for lot, line in zip(["EX-001", "EX-002", "EX-003", "EX-004"], lines):
        rows, values = _stack(folder, lot)
        median = float(np.median(values))
        assert line.startswith(f"  - granules.csv, column 'sieve_um', value {median!r}: "), line
        assert f"lot {lot!r}" in line and row_span(rows) in line and "median" in line
        assert "smallest aperture of a woven-wire test sieve (ISO 3310-1)" in line
        assert "thousand times too small (mm for µm?)" in line
        assert f"{min(values) * 1000:g} to {max(values) * 1000:g} µm" in line  # what x 1000 would make of it
        assert "--accept-unusual" in line


def test_a_sieve_stack_in_mm_is_listed_with_the_other_problems_even_in_a_refused_file(tmp_path):
    """Every problem at once: a stack in mm in a granules.csv refused for another cell (a retained mass that is
    no number), and a negative roll gap in process.csv, are reported in one refusal."""
    folder = _copy(tmp_path)
    _granules_in_mm(folder, {"EX-002"})
    path = folder / "granules.csv"
    lines = path.read_text().splitlines()
    bad_row = next(row for row, ln in enumerate(lines[1:], start=2) if ln.startswith("EX-001,"))
    lines[bad_row - 1] = lines[bad_row - 1].rsplit(",", 1)[0] + ",abc"
    path.write_text("\n".join(lines) + "\n")
    process = folder / "process.csv"
    head, first, *rest = process.read_text().splitlines()
    k = head.split(",").index("roll_gap_mm")
    cells = first.split(",")
    cells[k] = "-3.0"
    process.write_text("\n".join([head, ",".join(cells), *rest]) + "\n")

    found = {(p.file, p.row, p.column) for p in _problems(folder)}
    rows, values = _stack(folder, "EX-002")
    assert ("process.csv", 2, "roll_gap_mm") in found
    assert ("granules.csv", bad_row, "retained_g") in found
    sieve = [p for p in _problems(folder) if p.column == "sieve_um"]
    assert len(sieve) == 1 and "'EX-002'" in sieve[0].rule and row_span(rows) in sieve[0].rule
    assert sieve[0].value == pytest.approx(float(np.median(values)))


def test_one_aperture_in_mm_within_a_stack_in_um_is_named_by_its_row(tmp_path):
    """One sieve of a lot written in mm (0.71 for 710 µm) among apertures in µm: that row is named, with the
    value and what it would be in µm."""
    folder = _copy(tmp_path)
    path = folder / "granules.csv"
    lines = path.read_text().splitlines()
    row = next(r for r, ln in enumerate(lines[1:], start=2) if ln.startswith("EX-003,710,"))
    lines[row - 1] = lines[row - 1].replace("EX-003,710,", "EX-003,0.71,")
    path.write_text("\n".join(lines) + "\n")
    [problem] = _problems(folder)
    assert (problem.file, problem.column, problem.value) == ("granules.csv", "sieve_um", 0.71)
    assert f"row {row})" in problem.rule and "'EX-003'" in problem.rule and "710 µm" in problem.rule


def test_a_stack_in_mm_taken_deliberately_is_stored_and_recorded(tmp_path):
    """--accept-unusual --reason takes the stack as written, and the audit trail records each lot's median,
    rows and the limit it was judged by (the keys of a history refusal's record, and more)."""
    folder = _copy(tmp_path)
    _granules_in_mm(folder, {"EX-004"})
    store = tmp_path / "s.db"
    taken = run_cli(["ingest", folder, "--store", store, "--accept-unusual", "--reason", "DEV-7: checked"])
    assert taken.exit_code == 0, taken.output
    audit = json.loads(run_cli(["audit", "--store", store, "--json"]).stdout)
    [record] = [a for a in audit if a["action"] == "ingest"][-1]["inputs"]["accepted_unusual"]
    rows, values = _stack(folder, "EX-004")
    assert {"file", "row", "lot", "column", "value", "typical", "robust_sd_log10"} <= set(record)
    assert (record["lot"], record["column"], record["rows"], record["row"]) == ("EX-004", "sieve_um", rows, rows[0])
    assert record["value"] == pytest.approx(float(np.median(values))) and record["limit"] == SMALLEST_SIEVE_UM


def test_accept_unusual_without_a_reason_creates_no_store(tmp_path):
    """--accept-unusual without --reason is refused before a first ingest creates the store (it left an empty,
    sealed store behind while saying that nothing was written)."""
    folder = _copy(tmp_path)
    _granules_in_mm(folder)
    store = tmp_path / "new.db"
    for reason in ([], ["--reason", "  "]):
        result = run_cli(["ingest", folder, "--store", store, "--accept-unusual", *reason])
        assert result.exit_code == 2 and "--reason" in result.stderr, result.output
        assert not store.exists() and not Path(f"{store}.seal").exists()


def test_a_header_in_mm_mapped_with_its_unit_is_read_in_um(tmp_path):
    """A header that says mm ('Sieve (mm)') mapped in columns.toml with unit = "mm" is converted on read and
    passes; mapped without the unit it is refused, and the hint names the header and the unit to add."""
    folder = _copy(tmp_path)
    _granules_in_mm(folder, header="Sieve (mm)")
    (folder / "columns.toml").write_text('[granules.columns]\n"Sieve (mm)" = { column = "sieve_um", unit = "mm" }\n')
    ingest = read_folder(folder, known_lots=set())
    rows, values = _stack(folder, "EX-001")
    got = ingest.tables["granules"]
    assert got.loc[got["lot"] == "EX-001", "sieve_um"].max() == pytest.approx(max(values) * 1000)

    (folder / "columns.toml").write_text('[granules.columns]\n"Sieve (mm)" = "sieve_um"\n')
    problems = _problems(folder)
    assert len(problems) == 4 and {p.column for p in problems} == {"Sieve (mm)"}
    assert all("the header 'Sieve (mm)' says mm" in p.rule and 'unit = "mm"' in p.rule for p in problems)


@pytest.mark.parametrize("folder", [TEMPLATE, DEMO], ids=["template-example", "demo"])
def test_the_template_example_and_the_demo_lots_are_still_read(folder):
    """Stacks in µm pass: the template example (63-1400 µm) and the demo's lots."""
    ingest = read_folder(folder, known_lots=set())
    assert ingest.tables["granules"]["sieve_um"].gt(0).any()


def test_synthetic_lots_are_still_read(tmp_path):
    """The synthetic lots (tests, benchmarks, the demo) sieve on 63-1400 µm and pass."""
    make_lots(12, seed=3).write_csv(tmp_path / "lots")
    assert len(read_folder(tmp_path / "lots", known_lots=set()).tables["granules"]) > 0


# --------------------------------------------------------------------------- 2. a ragged process row


def _decimal_comma(folder: Path, lot: str) -> int:
    """The lot's process row with its roll force written with an unquoted decimal comma (one field too many);
    returns its sheet row."""
    path = folder / "process.csv"
    lines = path.read_text().splitlines()
    k = lines[0].split(",").index("roll_force_kn_per_cm")
    row = next(r for r, ln in enumerate(lines[1:], start=2) if ln.startswith(lot + ","))
    cells = lines[row - 1].split(",")
    cells[k] = cells[k].replace(".", ",")
    assert "," in cells[k]
    lines[row - 1] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")
    return row


def test_a_ragged_process_row_is_reported_once(tmp_path):
    """A decimal comma in EX-003's roll force: the one problem is that row (file, row, field count, its lot);
    EX-003's ribbon, granules and tablets rows are not reported as having no process record (before: three more
    messages that only followed from the first)."""
    folder = _copy(tmp_path)
    row = _decimal_comma(folder, "EX-003")
    n = len((folder / "process.csv").read_text().splitlines()[0].split(","))
    problems = _problems(folder)
    assert [(p.file, p.row, p.column) for p in problems] == [("process.csv", row, None)]
    assert f"row has {n + 1} fields but the header has {n}" in problems[0].rule
    assert "its lot field reads 'EX-003'" in problems[0].rule
    assert not any("no process record" in p.rule for p in problems)


def test_a_ragged_process_row_does_not_hide_a_lot_without_a_record(tmp_path):
    """The lots a ragged row may hold are spared; a result of another lot with no process record anywhere is
    still reported beside it."""
    folder = _copy(tmp_path)
    row = _decimal_comma(folder, "EX-003")
    tablets = folder / "tablets.csv"
    lines = tablets.read_text().splitlines()
    lines.append(lines[-1].replace("EX-004", "EX-009", 1))
    tablets.write_text("\n".join(lines) + "\n")
    problems = _problems(folder)
    assert [(p.file, p.row, p.value) for p in problems] == [("process.csv", row, problems[0].value),
                                                            ("tablets.csv", len(lines), "EX-009")]
    assert "no process record in this folder or in the store" in problems[1].rule


def test_a_ragged_row_with_the_lot_after_the_stray_field_names_it_in_the_follow_on_messages(tmp_path):
    """With the lot column second, a stray separator in the first field shifts the lot, so the row's lot field
    is not taken as read; the results of the lot the row holds say that they follow from that row."""
    folder = _copy(tmp_path)
    path = folder / "process.csv"
    lines = []
    for line in path.read_text().splitlines():
        cells = line.split(",")
        cells[0], cells[1] = cells[1], cells[0]  # compactor, lot, ...
        if cells[1] == "EX-002":
            cells[0] = "pilot, line 2"  # an unquoted separator in the first field
        lines.append(",".join(cells))
    path.write_text("\n".join(lines) + "\n")
    problems = _problems(folder)
    assert (problems[0].file, problems[0].row) == ("process.csv", 3) and "lot field" not in problems[0].rule
    follow = problems[1:]
    assert {p.file for p in follow} == {"ribbon.csv", "granules.csv", "tablets.csv"}
    assert all(p.value == "EX-002" and "process.csv row 3" in p.rule and "follows from that row" in p.rule
               and "add it to process" not in p.rule for p in follow)
