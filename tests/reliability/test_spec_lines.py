"""A problem of spec.toml is placed on the line of the key that breaks the rule, and the problems are listed in
the order of the file's lines (a user test: a value's problem named its table's header line, and the problems
came in the order they were checked). TOML v1.0.0 (toml.io): a key/value pair is on its own line below its
table's header; the line numbers here are counted by hand from the file written."""

from __future__ import annotations

import pytest

from linkage.exceptions import SpecError
from linkage.spec import read_spec

SPEC = """[ribbon_porosity]
min = 0.2
max = 0.4

[dissolution_pct]
min = 80
time_min = 30
judge = "stage"

[friability_pct]
# the lab's limit
max = "one"
"""


def test_each_problem_names_the_line_of_its_key_in_the_files_order(tmp_path):
    path = tmp_path / "spec.toml"
    path.write_text(SPEC, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        read_spec(path)
    problems = info.value.problems
    placed = [(p.row, p.key) for p in problems]
    assert placed == [(8, "judge"), (12, "max")], placed  # judge = "stage" on line 8, max = "one" on line 12
    text = str(info.value)
    assert "spec.toml, line 8, table [dissolution_pct], key 'judge'" in text
    assert "spec.toml, line 12, table [friability_pct], key 'max', value 'one'" in text
    assert text.index("line 8") < text.index("line 12")
