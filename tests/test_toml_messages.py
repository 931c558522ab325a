"""A problem in a TOML file is placed as the file has it: line, table, key.

A user test found spec.toml's errors speaking of "row 2, column
'ribbon_porosity'", the words of a spreadsheet. A TOML file is made of lines
holding key/value pairs, grouped under ``[table]`` headers (and ``[[array]]``
tables): TOML v1.0.0, https://toml.io/en/v1.0.0, sections "Keyvalue Pair",
"Table" and "Array of Tables". The messages keep the file name, the value and
the rule; the exit code stays 2 (DEVELOPERS.md, "Exit codes").
"""

from __future__ import annotations

import re

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.exceptions import InputError, SpecError
from linkage.models.chain import ChainSpec
from linkage.read import read_mapping
from linkage.spec import read_spec

#: spreadsheet words that must not place a problem in a TOML file
SPREADSHEET_PLACE = re.compile(r", (row \d+|column ')")


def _refusal(path, text: str, read, error) -> str:
    """The text of the refusal ``read`` (a reader of ``path``) raises, as ``error`` with exit code 2, of a file
    holding ``text``; checked to place nothing by row or column."""
    path.write_text(text, encoding="utf-8")
    with pytest.raises(error) as info:
        read(path)
    assert info.value.exit_code == 2
    said = str(info.value)
    assert not SPREADSHEET_PLACE.search(said), said
    return said


def test_spec_errors_say_line_table_and_key(tmp_path):
    path = tmp_path / "spec.toml"
    # line 1 [ribbon_porosity], line 2 min = 20 (a percent); line 4 [fines_pct], line 5 a misspelt key
    text = _refusal(path, "[ribbon_porosity]\nmin = 20\n\n[fines_pct]\nmim = 2\nmax = 30\n", read_spec, SpecError)
    assert "spec.toml, line 2, table [ribbon_porosity], key 'min', value 20: [ribbon_porosity] min = 20 is outside" \
        in text  # the key's own line (a user test: a value's problem named its table's header line)
    assert "spec.toml, line 5, table [fines_pct], key 'mim', value 2: [fines_pct]: unknown key 'mim'" in text
    # the command line: the same words, exit code 2
    r = CliRunner().invoke(cli, ["window", "--spec", str(path), "--models-dir", str(tmp_path / "m"),
                                 "--no-record"])
    assert r.exit_code == 2, r.output
    assert "spec.toml, line 5, table [fines_pct], key 'mim', value 2" in r.output
    assert not SPREADSHEET_PLACE.search(r.output), r.output


def test_invalid_toml_says_its_line(tmp_path):
    path = tmp_path / "spec.toml"
    path.write_text("[dissolution_pct]\nmin = = 80\n", encoding="utf-8")
    with pytest.raises(SpecError) as info:
        read_spec(path)
    assert str(info.value.problems[0]).startswith("spec.toml, line 2: not valid TOML")
    with pytest.raises(SpecError) as info:
        ChainSpec.from_toml_text("[[stage]]\nname = = \"a\"\n", source="chain.toml")
    assert re.match(r"chain\.toml, line 2: not valid TOML", str(info.value.problems[0]))


def test_chain_file_errors_say_key(tmp_path):
    path = tmp_path / "chain.toml"
    text = _refusal(path, '[[stage]]\nname = "tablets"\ninputs = ["ribbon_porosity"]\ntargets = ["lot"]\ncolour = 1\n',
                    ChainSpec.from_toml, SpecError)
    assert f"{path}, key 'colour': stage 1: unknown key 'colour'" in text
    assert f"{path}, key 'targets', value 'lot': stage 1 ('tablets'): 'lot' is not a numeric column" in text


def test_mapping_file_errors_say_key(tmp_path):
    mapping = '[ribbon.columns]\n"Density" = { column = "sample", unit = "furlong" }\n'
    text = _refusal(tmp_path / "columns.toml", mapping, read_mapping, InputError)
    assert "columns.toml, key 'Density', value 'furlong': [ribbon.columns] \"Density\": unknown unit 'furlong'" \
        in text
