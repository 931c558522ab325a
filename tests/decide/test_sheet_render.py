"""The what-if sheet rendered from its jinja2 templates (issue 20, item 3):
the key texts are placed, user text is escaped as :func:`html.escape`
escapes it (the standard library is the reference), an out-of-domain what-if
promises nothing, and a contribution of exactly zero prints as 0, never -0.
"""

from __future__ import annotations

import html
import re

from linkage import CAUTION
from linkage.decide import held
from linkage.decide.whatif import predict_whatif
from linkage.report.figures import shown_units_text
from linkage.report.sheet import NO_PROMISE, contribution_text, probability_text, whatif_html

LOT = "Q<26>&'049\""  # every character html.escape changes


def _text(page: str) -> str:
    """The page's visible text, tags dropped and entities resolved (html.unescape, the reference)."""
    return html.unescape(re.sub(r"<[^>]+>", " ", page))


def test_an_in_domain_sheet_places_caution_inputs_predictions_and_escapes_the_lot(scenario):
    _, chain, spec, _ = scenario
    r = predict_whatif(chain, {"ribbon_porosity": 0.3}, spec=spec, lot=LOT, n_draws=400, seed=0)
    d = r.to_dict()
    page = whatif_html(r)
    assert page.startswith("<!DOCTYPE html>\n") and page.endswith("</body></html>\n")
    assert f"lot <b>{html.escape(LOT, quote=True)}</b>" in page and LOT not in page
    assert f"<b>Caution.</b> {html.escape(CAUTION, quote=True)}" in page
    text = _text(page)
    assert ("Inside the applicability domain" in text) == d["in_domain"]
    for name, p in d["predictions"].items():
        row = page[page.find(f"<tr class=main><td>{name}"):]
        row = row[:row.find("</tr>")]
        assert row, name
        assert f"<td class=num>{p['value']:.4g}" in row and "<svg" in row
    for name, v in d["inputs"].items():
        assert f"{name}" in text and v["source"] in text
    assert f"Predictions ({round(100 * d['interval_level'])}% intervals)" in text
    assert probability_text(d["p_pass_all"]) in text
    # nothing given to condition on: the few-level mill screen is held at a training level, and says so
    # (linkage.decide.held: the level nearest the training mean); a continuous setting at the training mean
    screen = d["inputs"]["mill_screen_mm"]
    levels = held.of_chain(chain).levels[held.of_chain(chain).names.index("mill_screen_mm")]
    assert screen["source"] == held.MEAN_LEVEL and screen["value"] in levels
    assert d["inputs"]["compression_force_kn"]["source"] == held.MEAN


def test_a_far_out_of_domain_sheet_promises_nothing_and_says_why(scenario):
    _, chain, spec, _ = scenario
    r = predict_whatif(chain, {"roll_force_kn_per_cm": 40.0, "roll_gap_mm": 6.0}, spec=spec, n_draws=400, seed=0)
    d = r.to_dict()
    assert not d["in_domain"] and not d["promise"]
    page = whatif_html(r)
    text = _text(page)
    assert NO_PROMISE in text and "Inside the applicability domain" not in text
    for reason in d["domain_reasons"]:  # with a unit after a number as the report writes it (µm for um)
        assert f"<li>{html.escape(shown_units_text(reason), quote=True)}</li>" in page
    assert "is an extrapolation" in text and "extrapolation, not promised" in text
    assert "at least" not in text.split("Predictions (")[1].split("Each bar")[0]  # no bound stated as a promise


def test_a_zero_contribution_prints_as_0():
    # Python's format keeps the sign of a negative zero (IEEE 754 -0.0): f"{-0.0:+.3g}" == "-0"
    assert f"{-0.0:+.3g}" == "-0"
    assert contribution_text(-0.0) == contribution_text(0.0) == "0"
    assert contribution_text(-0.0403) == "-0.0403" and contribution_text(0.107) == "+0.107"


def _detail_row(page: str, name: str) -> str:
    """The text of the detail row (interval, model, contributions) under an attribute's row of the sheet."""
    row = page[page.find(f"<tr class=main><td>{name}"):]
    row = row[row.find("<tr class=detail>"):]
    return _text(row[:row.find("</tr>")])


def test_the_sheet_lists_only_contributions_that_are_not_zero(scenario):
    """A user test read 'largest contributions: fines_pct -0.0678, ribbon_porosity 0, granule_d50_um 0': an
    input the selected model does not use contributes exactly 0 and is no contribution. Every non-zero one of
    the what-if's three largest (its JSON, ``contributions``) is listed with its sign, no zero is. Regression
    test of the sheet's wording (no outside source; the contributions themselves are checked against SHAP and
    the exact linear terms in tests/report/test_explain.py and tests/models/test_link_candidates.py). The scenario's weight RSD depends on fines alone."""
    _, chain, spec, _ = scenario
    r = predict_whatif(chain, {"roll_force_kn_per_cm": 9.0}, spec=spec, n_draws=400, seed=0)
    d = r.to_dict()
    page = whatif_html(r)
    zeros = 0
    for name, p in d["predictions"].items():
        detail = _detail_row(page, name)
        for c in p["contributions"]:
            if c["value"] == 0:
                zeros += 1
                assert f"{c['input']} 0" not in detail, (name, detail)
            else:
                assert f"{c['input']} {contribution_text(c['value'])}" in detail, (name, detail)
        assert ("largest contributions:" in detail) == bool(p["contributions"])
    assert zeros >= 1, "the scenario should have an attribute whose model leaves an input out"


def test_a_prediction_no_input_moves_says_it_has_no_contribution():
    """A chain of training means (the ``mean`` candidate alone): every contribution is exactly 0 (the
    prediction is the base value whatever the inputs), and the sheet says there is none instead of
    listing zeros. Regression test of the wording (no outside source)."""
    from linkage.assemble import assemble
    from linkage.models.train import train_chain
    from linkage.report.sheet import NO_CONTRIBUTION
    from linkage.synthetic import make_lots

    chain = train_chain(assemble(make_lots(30, seed=1).tables), seed=0, candidates=["mean"], n_bootstrap=0)
    r = predict_whatif(chain, {"ribbon_porosity": 0.3}, n_draws=200, seed=0)
    d = r.to_dict()
    page = whatif_html(r)
    for name, p in d["predictions"].items():
        assert p["contributions"] and all(c["value"] == 0 for c in p["contributions"]), name
        detail = _detail_row(page, name)
        assert f"largest contributions: {NO_CONTRIBUTION}" in detail, detail
        assert not any(f"{c['input']} 0" in detail for c in p["contributions"])


def test_the_sheet_writes_units_as_the_report_does(scenario):
    """The sheet wrote 'granule_d50_um [um]' where the report writes µm: a quantity's unit is now the report's
    (linkage.report.figures.shown_unit) for every predicted and held quantity, and no bracket holds 'um'.
    Regression test of a label (no outside source)."""
    from linkage.report.figures import shown_unit

    _, chain, spec, _ = scenario
    r = predict_whatif(chain, {"ribbon_porosity": 0.3}, spec=spec, n_draws=400, seed=0)
    d = r.to_dict()
    page = whatif_html(r)
    assert "granule_d50_um" in d["predictions"]
    assert "granule_d50_um [µm]" in _text(page) and "[um]" not in page
    for name in [*d["predictions"], *d["inputs"]]:
        unit = shown_unit(name)
        assert (f"<td>{name} [{html.escape(unit)}]</td>" in page) if unit != "-" else f"<td>{name}</td>" in page, name


def test_the_sheet_gives_the_contributions_unit_and_their_base_value(scenario):
    """A user test: the sheet listed each attribute's contributions without their unit or the base value they
    add to. The base value is in ``predict --json`` (``contributions_base``) and on the sheet, with the
    attribute's unit (the schema's column unit: granule_d50_um in micrometres, µm, the SI symbol, BIPM SI
    Brochure 9th ed. Table 7). Checked by local accuracy, the defining property of additive attributions
    (Lundberg & Lee 2017, NeurIPS 30, Property 1): the base value plus every input's contribution is the
    model's value; the granule stage has two inputs, so every contribution is listed and their sum is exact."""
    import math

    from linkage.schema import ASSEMBLED

    _, chain, spec, _ = scenario
    r = predict_whatif(chain, {"roll_force_kn_per_cm": 9.0}, spec=spec, n_draws=400, seed=0)
    d = r.to_dict()
    page = whatif_html(r)
    for name in ("granule_d50_um", "fines_pct"):
        p = d["predictions"][name]
        assert len(p["contributions"]) == 2, p["contributions"]  # both inputs of the granule stage
        total = p["contributions_base"] + sum(c["value"] for c in p["contributions"])
        assert math.isclose(total, p["unprojected"]["value"], rel_tol=1e-9), (name, total, p)
    assert ASSEMBLED["granule_d50_um"] == "um" and ASSEMBLED["fines_pct"] == "%"
    granules = _detail_row(page, "granule_d50_um")
    base = d["predictions"]["granule_d50_um"]["contributions_base"]
    assert f"base value {base:.4g}\u00a0µm" in granules and "(in µm)" in granules, granules
    fines = _detail_row(page, "fines_pct")
    assert f"base value {d['predictions']['fines_pct']['contributions_base']:.4g}%" in fines, fines
    # porosity has no unit: its base value stands alone, and no '(in …)'
    porosity = _detail_row(page, "ribbon_porosity")
    assert f"base value {d['predictions']['ribbon_porosity']['contributions_base']:.4g}" in porosity
    assert "(in " not in porosity
    assert "the model's value is its base value plus the contribution of every input" in _text(page)
