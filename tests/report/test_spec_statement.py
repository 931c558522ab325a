"""The report states what it judged (issue 13, items 3 and 4): the spec
file's name and SHA-256 (hashlib, the reference implementation of FIPS
180-4), each attribute's judge and time point, the model's dissolution time
point, and in its headline every spec attribute the model cannot judge.
"""

from __future__ import annotations

import hashlib
from dataclasses import replace

import pytest

from linkage.exceptions import SpecError
from linkage.spec import read_spec

SPEC_TEXT = ("[dissolution_pct]\nmin = 80\ntime_min = 30\n\n[breaking_force_n]\nmin = 120\n\n"
             "[weight_rsd_pct]\nmax = 2.0\n")


@pytest.fixture(scope="module")
def spec_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("spec") / "site-spec-v3.toml"
    path.write_text(SPEC_TEXT, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def old_chain(chain):
    """The session's chain as a model trained before breaking force was a target."""
    stages = [replace(st, targets={k: v for k, v in st.targets.items() if k != "breaking_force_n"})
              for st in chain.stages]
    return replace(chain, stages=stages, targets={k: v for k, v in chain.targets.items() if k != "breaking_force_n"})


@pytest.mark.slow
def test_the_report_states_the_spec_and_names_what_it_does_not_judge(old_chain, table, spec_file):
    from linkage.report.html import render_report

    spec = read_spec(spec_file)
    html = render_report(old_chain, table, spec=spec, curve_draws=100).html
    sha = hashlib.sha256(spec_file.read_bytes()).hexdigest()
    glance = html[html.find('<h2 id="glance">'):html.find('<h2 id="data">')]
    assert "site-spec-v3.toml" in glance and sha in glance
    assert "<b>Not judged</b> (not predicted from porosity by this model): breaking_force_n" in glance
    assert "every specification except breaking_force_n" in glance
    assert "Dissolution modelled at 30 min" in glance
    window = html[html.find('<h2 id="window">'):html.find('<h2 id="domain">')]
    assert "every specification except breaking_force_n" in window
    assert "site-spec-v3.toml" in window and sha in window
    assert "<td>dissolution_pct</td>" in window
    row = window[window.find("<td>dissolution_pct</td>"):]
    row = row[:row.find("</tr>")]
    assert "<td>mean</td>" in row and "30 min" in row
    row = window[window.find("<td>breaking_force_n</td>"):]
    row = row[:row.find("</tr>")]
    assert "<b>not judged</b>" in row
    card = html[html.find('<h2 id="card">'):html.find('<h2 id="cautions">')]
    assert "dissolution time point modelled" in card and sha in card


def test_a_spec_at_another_time_point_is_refused_by_the_report(chain, table, tmp_path):
    from linkage.report.html import render_report

    path = tmp_path / "s15.toml"
    path.write_text("[dissolution_pct]\nmin = 75\ntime_min = 15\n", encoding="utf-8")
    with pytest.raises(SpecError, match="at 15 min.*at 30 min"):
        render_report(chain, table, spec=read_spec(path), curve_draws=100)


def test_a_lower_bound_in_words_never_reads_at_least_below_or_above_a_rounding_edge():
    """A user test found 'P(pass) at least < 0.1%'. The bound is said as a reader would (no outside reference:
    wording): ordinary values 'at least 97.9%' (one decimal of a percent), a bound that rounds to nothing
    'under 0.1% at its lower bound', one that would round to a certainty '> 99.9%'."""
    from linkage.report.sheet import at_least

    assert at_least(0.979) == "at least 97.9%"
    assert at_least(0.0004) == "under 0.1% at its lower bound"
    assert at_least(0.9995) == "> 99.9%"
