"""An ingest says which extra columns (not in the template) each file kept, and warns of a near-twin of a
template column the file also has (a user test: a second density column typed by mistake passed unheard of).

These are regression tests of what the ingest says: the expected outcome is read off the edited files
themselves (which headers were added, which one is a one-letter slip of a template column the file has), so
they need no outside source. The nearness is the misspelling refusal's own rule
(``linkage.read.table._misspelling_of``: difflib's ratio, Ratcliff & Obershelp 1988; the cutoffs are common
practice, no source), not a second one.
"""

from __future__ import annotations

import json
from pathlib import Path

from linkage import api
from linkage.read.table import _misspelling_of
from tests.reliability.helpers import run_cli
from tests.test_read_user_findings import _copy  # the template example's CSV files in a folder of their own

TWIN, MEANT = "envelope_densty_g_cm3", "envelope_density_g_cm3"  # a letter left out of a template name
NOTE = "Note: ribbon.csv: kept as extra columns, not in the template: "


def _user_test_ribbon(folder: Path) -> None:
    """The user test's ribbon.csv: the template's columns plus ``operator_mood`` (a note) and a second density
    column under a misspelt header, holding the density column's values (a copy)."""
    path = folder / "ribbon.csv"
    lines = [ln for ln in path.read_text().splitlines() if ln.strip()]
    header = lines[0].split(",")
    assert MEANT in header and TWIN not in header
    at = header.index(MEANT)
    out = [f"{lines[0]},operator_mood,{TWIN}"] + [f"{ln},calm,{ln.split(',')[at]}" for ln in lines[1:]]
    path.write_text("\n".join(out) + "\n")


def _ingest(folder: Path, store: Path, *extra: str):
    result = run_cli(["ingest", folder, "--store", store, *extra])
    assert result.exit_code == 0, result.output
    return result.output


def test_extra_columns_are_said_and_a_near_twin_of_a_present_template_column_is_warned_of(tmp_path):
    """The user test: before, ``operator_mood`` and the misspelt copy of the density column were kept with no
    word. Now the preview and the ingest name both, in file order, on one line, and the misspelt one with the
    template column it nearly names (which the file also has); ``--json`` gives the same as ``extra_columns``."""
    folder = _copy(tmp_path)
    _user_test_ribbon(folder)
    assert _misspelling_of(TWIN, MEANT) and not _misspelling_of("operator_mood", MEANT)  # the refusal's rule
    warned = (f"{NOTE}operator_mood, {TWIN} (a near-twin of the template column {MEANT}, which the file also "
              "has: check it is not a misspelt copy)")
    store = tmp_path / "x.db"
    for args in (["--preview"], []):
        lines = _ingest(folder, store, *args).splitlines()
        assert [ln for ln in lines if "kept as extra columns" in ln] == [warned]
    # a second ingest of the same folder (every lot unchanged) says it again
    payload = json.loads(_ingest(folder, store, "--json"))
    assert payload["lots_unchanged"] and payload["extra_columns"] == {"ribbon.csv": [
        {"column": "operator_mood", "near": None, "declared": False},
        {"column": TWIN, "near": MEANT, "declared": False}]}
    for key in ("lots_new", "lots_revised", "lots_unchanged", "ingest_id", "warnings", "store", "sources", "notes"):
        assert key in payload  # documented keys kept
    # Python: the result object the ingest returns carries the same
    assert api.ingest(folder, store, preview=True).result.extra_columns == payload["extra_columns"]


def test_a_column_declared_in_the_mapping_is_listed_without_the_warning(tmp_path):
    """A column kept on purpose through ``columns.toml`` (``{ extra = true }``) is named, said to be declared,
    and never warned of as a near-twin, although its header is the same slip as in the user test."""
    folder = _copy(tmp_path)
    _user_test_ribbon(folder)
    (folder / "columns.toml").write_text(f'[ribbon.columns]\n"{TWIN}" = {{ extra = true }}\n')
    out = _ingest(folder, tmp_path / "x.db")
    said = [ln for ln in out.splitlines() if "kept as extra columns" in ln]
    assert said == [f"{NOTE}operator_mood, {TWIN} (declared in columns.toml)"]
    assert "near-twin" not in out
    payload = json.loads(_ingest(folder, tmp_path / "x.db", "--json"))
    assert payload["extra_columns"]["ribbon.csv"][1] == {"column": TWIN, "near": None, "declared": True}


def test_a_folder_without_extra_columns_says_nothing_of_them(tmp_path):
    """The template example as it is: no file has an extra column, so no line names any, and ``extra_columns``
    is empty (a file with no extra column is not named)."""
    folder = _copy(tmp_path)
    out = _ingest(folder, tmp_path / "x.db", "--preview")
    assert "extra columns" not in out
    payload = json.loads(_ingest(folder, tmp_path / "x.db", "--json"))
    assert payload["lots_new"] and payload["extra_columns"] == {}
