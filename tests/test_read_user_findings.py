"""Reading input: problems a user test of the template example found (misspelt headers, a rename hint
pointing at a present column, the wrong row named for a lot's odd spelling, the errors of one file hiding
another's).

These are regression tests of refusals and of which rows and columns a message names: the expected
outcome is read off the edited files themselves (which header was misspelt, which row was respelt), so
they need no outside source. The closeness of a header to a template name is difflib's ratio
(Python standard library, ``difflib.SequenceMatcher.ratio``: 2*M/T, Ratcliff & Obershelp 1988), and
the cutoff is common practice, no source.
"""

from __future__ import annotations

import difflib
import shutil
from pathlib import Path

import pytest

from linkage.exceptions import InputError
from linkage.read import read_folder, read_table
from linkage.read.table import MISSPELLING_CUTOFF

TEMPLATE = Path(__file__).resolve().parent / "data" / "template-example"
DEMO = Path(__file__).resolve().parent.parent / "data_demo" / "lots"


def _copy(tmp_path: Path) -> Path:
    folder = tmp_path / "lots"
    folder.mkdir()
    for f in TEMPLATE.glob("*.csv"):
        shutil.copy(f, folder / f.name)
    return folder


def _edit(path: Path, line: int, old: str, new: str) -> None:
    """Replace ``old`` by ``new`` on one line (1 = the header) of a file."""
    lines = path.read_text().splitlines()
    assert old in lines[line - 1]
    lines[line - 1] = lines[line - 1].replace(old, new, 1)
    path.write_text("\n".join(lines) + "\n")


def _rows_of(path: Path, lot: str) -> list[int]:
    return [k for k, ln in enumerate(path.read_text().splitlines(), start=1) if ln.startswith(lot + ",")]


def _refused(folder: Path) -> list[tuple]:
    """(file, row, column) of every problem of the folder's refusal, in the order given."""
    with pytest.raises(InputError) as exc:
        read_folder(folder, known_lots=set())
    return [(p.file, p.row, p.column) for p in exc.value.problems]


# --------------------------------------------------------------------------- 1. misspelt optional columns


def test_misspelt_optional_columns_are_refused_in_every_file_at_once(tmp_path):
    """friability_pct (tablets) and roll_diameter_mm (process) misspelt: both refused in one error, each with
    its file, the header as written and the template name it was meant to be; before, both were kept as extra
    columns and the attribute read as empty."""
    folder = _copy(tmp_path)
    _edit(folder / "tablets.csv", 1, "friability_pct", "friabilty_pct")
    lines = (folder / "process.csv").read_text().splitlines()  # a roll diameter added, its header misspelt
    (folder / "process.csv").write_text("\n".join([lines[0] + ",roll_diamter_mm", *[ln + ",120" for ln in lines[1:]]])
                                        + "\n")
    with pytest.raises(InputError) as exc:
        read_folder(folder, known_lots=set())
    refused = {(p.file, p.column): p.rule for p in exc.value.problems}
    assert "did you mean 'friability_pct'?" in refused[("tablets.csv", "friabilty_pct")]
    assert "did you mean 'roll_diameter_mm'?" in refused[("process.csv", "roll_diamter_mm")]
    assert all(p.row == 1 for p in exc.value.problems)


def test_a_misspelt_header_kept_deliberately_through_the_mapping_is_an_extra_column(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder / "tablets.csv", 1, "friability_pct", "friabilty_pct")
    (folder / "columns.toml").write_text('[tablets.columns]\n"friabilty_pct" = { extra = true }\n')
    tablets = read_folder(folder, known_lots=set()).tables["tablets"]
    assert tablets["friability_pct"].isna().all() and tablets["friabilty_pct"].notna().all()


def test_extra_columns_far_from_every_template_name_are_kept(tmp_path):
    """Raw-material attributes and notes beside the template columns: not taken for misspellings, also where
    the file lacks the template column nearest to them ('operator' and 'compactor', 'sampled_by' and
    'sampled_at' below the cutoff, as difflib scores them)."""
    path = tmp_path / "process.csv"
    path.write_text("lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm,"
                    "blend_moisture_pct,api_d50_um,lubricant_pct,operator\n"
                    "A1,8,2,5,30,1,2.1,45,0.5,ann\n")
    df = read_table(path)
    assert df.loc[0, "api_d50_um"] == 45.0 and df.loc[0, "operator"] == "ann"
    for extra, template in (("operator", "compactor"), ("sampled_by", "sampled_at")):
        assert difflib.SequenceMatcher(None, extra, template).ratio() < MISSPELLING_CUTOFF
    ribbon = tmp_path / "ribbon.csv"
    ribbon.write_text("lot,sample,envelope_density_g_cm3,skeletal_density_g_cm3,sampled_by\nA1,1,1.0,1.4,ann\n")
    assert read_table(ribbon).loc[0, "sampled_by"] == "ann"


def test_the_demo_lots_still_ingest():
    ingest = read_folder(DEMO, known_lots=set())
    assert {"blend_moisture_pct", "api_d50_um", "lubricant_pct"} <= set(ingest.tables["process"].columns)


@pytest.mark.parametrize("name", ["friabilty_pct", "Friability", "dissolution_pc", "thicknes_mm"])
def test_every_one_slip_header_of_an_optional_tablet_column_is_refused(tmp_path, name):
    """A few slips (a letter left out, the unit part dropped): each scored at or above the cutoff by difflib
    against the template name and refused when the file lacks that column."""
    head = "lot,compression_force_kn," + name
    path = tmp_path / "tablets.csv"
    path.write_text(f"{head}\nA1,10,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    [problem] = exc.value.problems
    assert problem.column == name and "did you mean" in problem.rule


# --------------------------------------------------------------------------- 2. rename hints


def test_a_rename_hint_never_names_a_template_column_present_in_the_file(tmp_path):
    """screw_speed_rpm missing: roll_speed_rpm (a required column, present) is no rename candidate."""
    path = tmp_path / "process.csv"
    path.write_text("lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,mill_screen_mm\nA1,8,2,5,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    [problem] = exc.value.problems
    assert problem.column == "screw_speed_rpm" and "roll_speed_rpm" not in problem.rule


def test_a_rename_hint_still_names_an_extra_column(tmp_path):
    path = tmp_path / "process.csv"
    path.write_text("lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_sped,mill_screen_mm\nA1,8,2,5,30,1\n")
    with pytest.raises(InputError) as exc:
        read_table(path)
    [problem] = exc.value.problems  # one message: the hint of the missing column, not a second one for the header
    assert problem.column == "screw_speed_rpm" and "found 'screw_sped'" in problem.rule


# --------------------------------------------------------------------------- 3. a lot spelt two ways in a file


@pytest.mark.parametrize("odd, spelling", [(0, "ex-002"), (2, "Ex-002")])
def test_the_row_spelt_apart_from_the_rest_of_its_lot_is_the_one_named(tmp_path, odd, spelling):
    """EX-002 on rows 6-10 of ribbon.csv, one of them respelt: that row is refused, naming the rows of the
    usual spelling; before, with the first row respelt, rows 7-10 (the correct spelling) were flagged."""
    folder = _copy(tmp_path)
    ribbon = folder / "ribbon.csv"
    rows = _rows_of(ribbon, "EX-002")
    _edit(ribbon, rows[odd], "EX-002", spelling)
    with pytest.raises(InputError) as exc:
        read_folder(folder, known_lots=set())
    [problem] = exc.value.problems
    assert (problem.file, problem.row, problem.value) == ("ribbon.csv", rows[odd], spelling)
    usual = [r for r in rows if r != rows[odd]]  # the others: consecutive runs, the odd row left out
    before, after = usual[:odd], usual[odd:]
    runs = [f"{part[0]}-{part[-1]}" if len(part) > 1 else str(part[0]) for part in (before, after) if part]
    assert f"on rows {', '.join(runs)} ({len(usual)} rows)" in problem.rule


# --------------------------------------------------------------------------- 5. every file's problems at once



def test_a_refused_cell_in_process_does_not_hide_an_unknown_lot_in_ribbon(tmp_path):
    """A negative roll gap in process.csv and a ribbon row of a lot with no process record: both in one
    refusal (before, the unknown lot showed only on the next run)."""
    folder = _copy(tmp_path)
    process, ribbon = folder / "process.csv", folder / "ribbon.csv"
    gap_row = _rows_of(process, "EX-002")[0]
    _edit(process, gap_row, "EX-002,pilot,8.37,2.0,", "EX-002,pilot,8.37,-2.0,")  # roll_gap_mm, the 4th column
    last = _rows_of(ribbon, "EX-004")[-1]
    _edit(ribbon, last, "EX-004", "EX-009")
    assert set(_refused(folder)) == {("process.csv", gap_row, "roll_gap_mm"), ("ribbon.csv", last, "lot")}


def test_an_unknown_lot_in_a_file_refused_for_another_cell_is_reported_too(tmp_path):
    folder = _copy(tmp_path)
    ribbon = folder / "ribbon.csv"
    first, last = _rows_of(ribbon, "EX-001")[0], _rows_of(ribbon, "EX-004")[-1]
    _edit(ribbon, first, "EX-001,1,", "EX-001,1,x")  # envelope density not a number
    _edit(ribbon, last, "EX-004", "EX-009")
    assert set(_refused(folder)) == {("ribbon.csv", first, "envelope_density_g_cm3"), ("ribbon.csv", last, "lot")}


def test_a_process_file_without_its_lot_column_does_not_make_every_lot_unknown(tmp_path):
    """Nothing was read of the process lots: the checks across files are left out, not run against nothing."""
    folder = _copy(tmp_path)
    process = folder / "process.csv"
    process.write_text("\n".join(ln.split(",", 1)[1] for ln in process.read_text().splitlines()) + "\n")
    assert _refused(folder) == [("process.csv", 1, "lot")]


def test_a_refused_process_lot_cell_does_not_make_its_results_unknown(tmp_path):
    """A zero-width space (U+200B, a Unicode format character) in process.csv's lot EX-001: that cell is
    refused, and the ribbon, granule and tablet rows of EX-001 are not reported again as lots without a
    process record (the one fix, in process.csv, settles both)."""
    folder = _copy(tmp_path)
    process = folder / "process.csv"
    row = _rows_of(process, "EX-001")[0]
    _edit(process, row, "EX-001", "EX-001\u200b")
    assert _refused(folder) == [("process.csv", row, "lot")]


# --------------------------------------------------------------------------- 1b. a word added is no misspelling

_PROCESS_HEAD = "lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm"


def _one_extra(tmp_path: Path, name: str) -> Path:
    """A process or tablets file with one extra column ``name``, the template column it is near left out."""
    if name in ("compactor_id", "roll_diamter_mm"):
        path, head, row = tmp_path / "process.csv", _PROCESS_HEAD, "A1,8,2,5,30,1"
    else:
        path, head, row = tmp_path / "tablets.csv", "lot,compression_force_kn", "A1,10"
    path.write_text(f"{head},{name}\n{row},1\n")
    return path


@pytest.mark.parametrize("name, template", [("compactor_id", "compactor"),
                                            ("breaking_force_sd_n", "breaking_force_n"),
                                            ("dissolution_pct_15", "dissolution_pct"),
                                            ("weight_sd_pct", "weight_rsd_pct")])
def test_real_extra_columns_near_a_template_name_are_kept(tmp_path, name, template):
    """A second user test: real extra columns (the compactor's id, the SD of the breaking force, dissolution at
    15 min, the weight SD) were refused as misspellings of the template column the file lacked, difflib's
    ratio of the whole names being above the cutoff. A word added ('id', 'sd', '15') names another quantity,
    and SD is not RSD. A regression test of a refusal: no outside source."""
    assert difflib.SequenceMatcher(None, name, template).ratio() >= MISSPELLING_CUTOFF  # the case that was refused
    df = read_table(_one_extra(tmp_path, name))
    assert df.loc[0, name] == 1.0


@pytest.mark.parametrize("name, template", [("friabilty_pct", "friability_pct"),
                                            ("roll_diamter_mm", "roll_diameter_mm"),
                                            ("breaking_forse_n", "breaking_force_n"),
                                            ("weight_rsd_pc", "weight_rsd_pct")])
def test_slips_inside_the_words_of_a_template_name_are_refused(tmp_path, name, template):
    """The slips beside the real extra columns above: a letter left out or replaced inside one word, as many
    words as the template name. A regression test of a refusal: no outside source."""
    with pytest.raises(InputError) as exc:
        read_table(_one_extra(tmp_path, name))
    [problem] = exc.value.problems
    assert problem.column == name and f"did you mean '{template}'?" in problem.rule
