"""Texts a user test found wanting, on one small chain trained here (ribbon -> tablets, 12 synthetic lots with
vessel data, 20 bootstrap replicates or none: seconds). Each is a regression test of a text (no outside source):

- ``space`` and the report's design-space section judged lot means where the spec judges dissolution by the
  compendial stages, as the window does, without saying so; the window's roll force range (lot values only)
  said "every specification … through the whole chain".
- ``audit`` wrote a prediction as "predicted; P(all pass) 1.000": a certainty, neither bound nor point estimate.
- ``train``'s text opened brackets inside brackets ("(simplest within one SE of the lowest (weibull_release, …))",
  "0.003362 (pooled within-lot SD of the replicates (ribbon_porosity_sd) …)").
- the interval choice's reason wrote a difference of two coverages as "by 17.3%" for 73 % against 90 %.
- the window's text said "Judged:" twice.
- ``space --png`` wrote a map with acceptable ranges and a set point but no caution.
"""

from __future__ import annotations

import re
import warnings

import pytest

from linkage import CAUTION
from tests.brackets import nested_brackets

CHAIN = ('[[stage]]\nname = "ribbon"\ninputs = ["roll_force_kn_per_cm", "roll_gap_mm"]\n'
         'targets = ["ribbon_porosity"]\n'
         '[[stage]]\nname = "tablets"\ninputs = ["ribbon_porosity", "compression_force_kn"]\n'
         'targets = ["dissolution_pct", "tensile_strength_mpa"]\n')
LIMITS = {"dissolution_pct": (80.0, None), "tensile_strength_mpa": (1.7, None)}  # linkage.synthetic.WINDOW_SPEC


def _train(n_bootstrap: int):
    from linkage.assemble import assemble
    from linkage.models.chain import ChainSpec
    from linkage.models.train import train_chain
    from linkage.synthetic import make_lots

    table = assemble(make_lots(12, seed=0, with_vessels=True).tables)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return train_chain(table, ChainSpec.from_toml_text(CHAIN), seed=0, n_bootstrap=n_bootstrap)


@pytest.fixture(scope="module")
def chain():
    """With a few bootstrap replicates: a lower bound to state."""
    return _train(20)


@pytest.fixture(scope="module")
def without_bound():
    return _train(0)


def _spec(tmp_path, judge: str | None):
    from linkage.spec import read_spec
    from linkage.synthetic import spec_toml

    path = tmp_path / f"spec-{judge or 'mean'}.toml"
    path.write_text(spec_toml(LIMITS, dissolution_judge=judge), encoding="utf-8")
    return read_spec(path)


def test_train_text_opens_no_bracket_inside_another(chain):
    from linkage.results import train_text

    text = train_text(chain)
    # both texts the user test read are there (seed 0 selects a simpler candidate within one SE, and the
    # replicates give a noise floor), and neither opens a bracket inside another
    assert "(simplest within one SE of the lowest, " in text and ", pooled within-lot SD of the replicates (" in text
    assert nested_brackets(text) == [], nested_brackets(text)


def test_the_interval_choice_says_a_coverage_gap_in_percentage_points(chain):
    for name, target in chain.targets.items():
        choice = target.interval_choice
        gap = choice["by_method"]["CV+"]["worst_region_gap"]
        assert f"misses the nominal 90% by {100 * gap:.1f} percentage points" in choice["reason"], (name, choice)
        assert not re.search(r"misses the nominal \d+% by [\d.]+%", choice["reason"]), choice["reason"]


def test_the_audit_says_a_predictions_probability_as_predict_does(chain, without_bound, tmp_path):
    from linkage.decide.whatif import predict_whatif
    from linkage.jsonable import jsonable
    from linkage.report.sheet import at_least, probability_text
    from linkage.results import audit_text
    from linkage.store import LotStore

    spec = _spec(tmp_path, None)
    made = [predict_whatif(chain, {"ribbon_porosity": 0.3, "compression_force_kn": 14.0}, spec=spec),
            predict_whatif(without_bound, {"ribbon_porosity": 0.3, "compression_force_kn": 14.0}, spec=spec)]
    outputs = [jsonable(w.to_dict()) for w in made]
    with LotStore(tmp_path / "site.db") as s:
        for d in outputs:
            s.log("predict", model_id="m-small", outputs=d)
        rows = s.audit()
    lines = audit_text(rows).splitlines()[1:3]
    for d, line in zip(outputs, lines):
        assert f"P(all pass) {at_least(d['p_pass_all_bound']['low'])} with 90% assurance" in line \
            if d["promise"] else "P(all pass) not promised, " in line, line
        assert line.endswith(f"point estimate {probability_text(d['p_pass_all'])}"), line
        assert f"P(all pass) {d['p_pass_all']:.3f}" not in line, line
    assert outputs[0]["promise"] and not outputs[1]["promise"]  # both forms were said
    assert "not promised, no lower bound; point estimate" in lines[1], lines[1]  # the model without replicates


def test_the_window_says_judged_once_and_its_roll_force_range_judges_lot_values(chain, tmp_path):
    from linkage.decide.window import find_window
    from linkage.results import window_text

    text = window_text(find_window(chain, _spec(tmp_path, "stages"), settings={"compression_force_kn": 14.0}))
    assert text.count("Judged:") == 1, text
    assert re.search(r"^  dissolution_pct: USP <711> stages.*; at 30 min$", text, re.M), text
    w = find_window(chain, _spec(tmp_path, "stages"), settings={"compression_force_kn": 14.0})
    note = w.to_dict()["roll_force_kn_per_cm"]["lot_values_note"]
    assert "the roll force range rests on lot means" in note and "not the same judgement as the window's" in note
    if w.roll_force.get("low") is not None:
        assert "every specification, judged on lot values, at least" in text and note in text, text
    plain = find_window(chain, _spec(tmp_path, None), settings={"compression_force_kn": 14.0})
    assert "lot_values_note" not in plain.to_dict()["roll_force_kn_per_cm"]
    assert window_text(plain).count("Judged:") == 1


def test_space_says_its_ranges_rest_on_lot_means_where_the_spec_judges_stages(chain, tmp_path):
    from linkage.decide.space import design_space, space_text

    staged = design_space(chain, _spec(tmp_path, "stages"), n_grid=5)
    note = staged.to_dict()["lot_values_note"]
    assert "dissolution_pct by compendial stages" in note and "acceptable ranges and set point" in note
    assert "rest on lot means" in note and "not the same judgement as the window's" in note
    assert f"!! {note}" in space_text(staged) and nested_brackets(space_text(staged)) == []
    plain = design_space(chain, _spec(tmp_path, None), n_grid=5)
    assert plain.to_dict()["lot_values_note"] is None and "compendial stages on" not in space_text(plain)


def test_space_png_carries_the_caution(chain, tmp_path):
    from linkage.decide.space import design_space
    from linkage.report.space_section import plot_space

    result = design_space(chain, _spec(tmp_path, None), n_grid=5)
    fig = plot_space(result, caution=True).figure
    texts = " ".join(t.get_text().replace("\n", " ") for t in fig.texts)
    assert CAUTION in texts, texts
    assert not plot_space(result).figure.texts  # the report's figure: its caution is in the report's words


def test_the_plans_held_line_writes_settings_as_the_window_does(chain, tmp_path):
    """The plan's "Held" line wrote 13.8417 where the window's "Settings used" writes 13.84."""
    from linkage.decide.plan import start_design
    from linkage.decide.window import find_window
    from linkage.results import window_text

    low, high = chain.training["ranges"]["compression_force_kn"]
    value = (low + 2 * high) / 3  # a held value of many digits, inside the training range
    plan = start_design({"roll_force_kn_per_cm": (3.0, 14.0), "roll_gap_mm": (1.5, 3.5)}, 4,
                        held={"compression_force_kn": value})
    held = next(line for line in plan.text().splitlines() if line.startswith("Held: "))
    window = window_text(find_window(chain, _spec(tmp_path, None), settings={"compression_force_kn": value}))
    used = next(line for line in window.splitlines() if line.startswith("  compression_force_kn = "))
    shown = used.split(" = ")[1].split(" ")[0]
    assert held == f"Held: compression_force_kn = {shown}", (held, used)
