"""One way of writing a percent and an angle in what the tool prints and writes (a user test).

A user test found "90 %" in some texts and "90%" in others, and angles as "deg" in the terminal but "°" in the
report. A percent is written without a space ("90%", as :func:`linkage.numbers.percent_text` and every
probability write it, the form most used), an angle with the degree sign ("40°", as the texts write µm, ≥ and T²;
only the options' names, ``--wall-friction-deg``, and their help's unit ``[deg]`` spell it out). A regression test of wording, on the texts themselves
(no outside source: which form is a house rule, common practice, no source); JSON keys, column names and options
are not touched.
"""

from __future__ import annotations

import re

import pytest

from linkage.decide.compendial import judge_text
from linkage.decide.transfer import fit_ribbon_physics, transfer
from linkage.exceptions import SpecError
from linkage.report.html import _Builder
from linkage.report.transfer_section import transfer_section
from linkage.spec import Limit, Spec, read_spec
from linkage.synthetic_rolling import make_transfer_lots

#: a number, a space, then a percent sign: the form left behind
SPACED_PERCENT = re.compile(r"\d %")


@pytest.fixture(scope="module")
def lots():
    return make_transfer_lots(seed=2)


def test_transfer_prints_percent_unspaced_and_the_nip_angle_in_degrees(lots):
    physics = fit_ribbon_physics(lots)
    text = transfer(physics, roll_diameter_mm=400.0, roll_width_mm=100.0, roll_gap_mm=3.0,
                    window=(0.28, 0.34)).text()
    assert "95% interval for one lot" in text, text
    assert re.search(r"nip angle \d+\.\d°", text), text
    assert not SPACED_PERCENT.search(text), text
    assert " deg" not in text


def test_the_reports_transfer_section_writes_degrees_and_unspaced_percent(lots):
    b = _Builder()
    transfer_section(b, lots)
    page = "".join(b.parts)
    assert "friction angles held at 40° (internal) and 25° (wall)" in page
    assert "95% interval [kN/cm]" in page and "95% interval for one lot" in page
    assert " deg" not in page
    assert not SPACED_PERCENT.search(page)


def test_judges_and_spec_refusals_write_percent_unspaced(tmp_path):
    spec = Spec(limits={"dissolution_pct": Limit(80.0, None)}, dissolution_judge="stages")
    assert judge_text(spec)["dissolution_pct"].startswith("USP <711> stages on simulated units, Q = 80%, ")
    path = tmp_path / "spec.toml"
    path.write_text("[ribbon_porosity]\nmin = 20\n[dissolution_pct]\nmin = 101\njudge = \"stages\"\n",
                    encoding="utf-8")
    with pytest.raises(SpecError) as info:
        read_spec(path)
    text = str(info.value)
    assert "write 0.20 for 20%" in text and "Q = min must lie in 0 to 100% of label claim" in text, text
    assert not SPACED_PERCENT.search(text), text
