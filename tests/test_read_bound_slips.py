"""A value outside its column's bounds that a unit slip explains is refused with the slip named (a user test: an
envelope density of 968.8, kg/m³ typed into a g/cm³ column, got only "outside the range 0 < ... <= 5").

The check outside the project: the unit a hint names is one ``columns.toml`` accepts, and mapping the column
with it, as the hint says, reads the file within bounds, each value the template's value to the last digit
(1 g/cm³ = 1000 kg/m³ and 1 kN = 1000 N: SI prefixes, BIPM, The International System of Units, 9th ed. 2019).
The plausible ranges of a slipped value (100-5000 kg/m³ for a solid's density, 1-100 kN in N) are common
practice, no source.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from linkage.exceptions import InputError
from linkage.read import UNITS, read_folder
from tests.test_read_user_findings import _copy  # the template example's CSV files in a folder of their own

DENSITY = "envelope_density_g_cm3"


def _scale(path: Path, column: str, factor: float, rows: set[int] | None = None) -> list[float]:
    """Multiply ``column`` by ``factor`` in the sheet rows ``rows`` (all when None); returns the values before."""
    with path.open(newline="") as fh:
        table = list(csv.reader(fh))
    at = table[0].index(column)
    before = []
    for number, row in enumerate(table[1:], start=2):
        if row and (rows is None or number in rows):
            before.append(float(row[at]))
            row[at] = f"{float(row[at]) * factor:g}"
    with path.open("w", newline="") as fh:
        csv.writer(fh).writerows(table)
    return before


def _refusal(folder: Path) -> list:
    with pytest.raises(InputError) as caught:
        read_folder(folder)
    return caught.value.problems


def test_a_density_in_kg_m3_is_refused_with_the_slip_and_the_mapping_it_names_reads_it(tmp_path):
    folder = _copy(tmp_path)
    before = _scale(folder / "ribbon.csv", DENSITY, 1000.0)
    problems = _refusal(folder)
    assert len(problems) == len(before)  # every row named, at once
    first = problems[0]
    assert first.column == DENSITY and first.row == 2
    assert "outside the range 0 < envelope_density_g_cm3 <= 5; it looks like kg/m3: " in first.rule
    assert f"= {before[0]:.4g} g/cm3" in first.rule and 'unit = "kg/m3"' in first.rule
    assert "kg/m3" in UNITS["g/cm3"]  # a unit columns.toml reads
    (folder / "columns.toml").write_text(f'[ribbon.columns]\n"{DENSITY}" = {{ column = "{DENSITY}", '
                                         'unit = "kg/m3" }\n')
    read = read_folder(folder).tables["ribbon"][DENSITY].tolist()
    assert read == pytest.approx(before, rel=1e-12)


def test_a_compression_force_in_n_is_refused_with_the_slip(tmp_path):
    folder = _copy(tmp_path)
    before = _scale(folder / "tablets.csv", "compression_force_kn", 1000.0, {2})
    (problem,) = _refusal(folder)
    assert problem.row == 2 and f"it looks like N: {before[0] * 1000:g} / 1000 = {before[0]:.4g} kN" in problem.rule
    assert "N" in UNITS["kN"]


def test_a_total_roll_force_is_refused_with_the_row_s_roll_width(tmp_path):
    """A roll force above 60 kN/cm that, divided by the row's roll width in cm, is within bounds: the words of
    the plausibility check's hint (linkage.plausible.likely_mistake). Without a roll width, no hint."""
    folder = _copy(tmp_path)
    path = folder / "process.csv"
    lines = path.read_text().splitlines()
    lines = [lines[0] + ",roll_width_mm"] + [ln + (",40" if k == 0 else ",") for k, ln in enumerate(lines[1:])]
    path.write_text("\n".join(lines) + "\n")
    force = "roll_force_kn_per_cm"
    before = _scale(path, force, 12.0, {2, 3})  # total forces of 40 mm rolls: above 60 kN/cm
    problems = {p.row: p.rule for p in _refusal(folder)}
    assert set(problems) == {2, 3}
    per_cm = before[0] * 12.0 / 4.0
    assert f"it looks like a total roll force in kN: divided by the roll width (40 mm) it is {per_cm:.3g} kN/cm" \
        in problems[2]
    assert "looks like" not in problems[3]  # no roll width in the row


@pytest.mark.parametrize("value", ["6", "99", "5001", "50000"])
def test_a_value_no_slip_explains_gets_no_hint(tmp_path, value):
    """Out of bounds but outside the range a slipped density takes (100-5000 kg/m³): refused as before."""
    folder = _copy(tmp_path)
    path = folder / "ribbon.csv"
    lines = path.read_text().splitlines()
    cells = lines[1].split(",")
    cells[lines[0].split(",").index(DENSITY)] = value
    lines[1] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")
    (problem,) = _refusal(folder)
    assert problem.rule == "outside the range 0 < envelope_density_g_cm3 <= 5"
