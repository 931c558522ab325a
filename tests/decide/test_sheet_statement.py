"""The what-if states what it was judged against and what it was made for
(issue 13, item 4): the spec file's name and SHA-256 (checked against
hashlib, the reference implementation of FIPS 180-4), each attribute's judge
and time point, the lot and the product.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import replace

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.decide.whatif import predict_whatif
from linkage.exceptions import UsageError
from linkage.report.sheet import whatif_html
from linkage.spec import read_spec

SPEC_TEXT = ("[dissolution_pct]\nmin = 80\ntime_min = 30\n\n[breaking_force_n]\nmin = 120\n\n"
             "[weight_rsd_pct]\nmax = 2.0\n")


@pytest.fixture
def spec_file(tmp_path):
    path = tmp_path / "site-spec-v3.toml"
    path.write_text(SPEC_TEXT, encoding="utf-8")
    return path


def test_the_spec_keeps_its_file_name_and_sha256(spec_file):
    spec = read_spec(spec_file)
    assert spec.file == "site-spec-v3.toml"
    assert spec.sha256 == hashlib.sha256(spec_file.read_bytes()).hexdigest()
    d = spec.describe()
    assert d["attributes"]["dissolution_pct"] == {"limits": ">= 80", "judge": "mean", "time_min": 30.0}
    assert d["attributes"]["breaking_force_n"] == {"limits": ">= 120", "judge": "mean", "time_min": None}


def test_the_sheet_states_spec_judges_time_points_lot_and_product(scenario, spec_file):
    _, chain, _, _ = scenario
    spec = read_spec(spec_file)
    r = predict_whatif(chain, {"ribbon_porosity": 0.3}, spec=spec, lot="Q26-049", product="QZ-417 200 mg")
    html = whatif_html(r)
    assert "lot <b>Q26-049</b>" in html and "product <b>QZ-417 200 mg</b>" in html
    assert "site-spec-v3.toml" in html and hashlib.sha256(spec_file.read_bytes()).hexdigest() in html
    for name in ("dissolution_pct", "breaking_force_n", "weight_rsd_pct"):
        row = html[html.find(f"<tr><td>{name}"):]
        row = row[:row.find("</tr>")]
        assert "<td>mean" in row and "judged" in row, row
    assert "<td class=num>30 min</td>" in html
    assert "dissolution modelled at 30 min" in html
    d = r.to_dict()
    assert (d["lot"], d["product"], d["product_source"]) == ("Q26-049", "QZ-417 200 mg", "given")


def test_a_product_the_model_was_not_trained_on_is_refused_and_its_only_product_is_the_default(scenario):
    _, chain, spec, _ = scenario
    one = replace(chain, training={**chain.training, "products": ["QZ-417 200 mg"]})
    with pytest.raises(UsageError, match="trained on lots of 'QZ-417 200 mg' only"):
        predict_whatif(one, {"ribbon_porosity": 0.3}, spec=spec, product="QZ-500")
    r = predict_whatif(one, {"ribbon_porosity": 0.3}, spec=spec)
    assert (r.product, r.product_source) == ("QZ-417 200 mg", "the model's only training product")
    assert predict_whatif(chain, {"ribbon_porosity": 0.3}).product is None  # trained without a product column


def test_predict_lot_and_product_options_reach_json_sheet_and_text(saved_model, spec_file, tmp_path):
    models_dir, _, _ = saved_model
    sheet = tmp_path / "whatif.html"
    common = ["predict", "--set", "ribbon_porosity=0.3", "--spec", str(spec_file), "--lot", "Q26-049",
              "--product", "QZ-417 200 mg", "--models-dir", str(models_dir), "--no-record"]
    runner = CliRunner()
    r = runner.invoke(cli, [*common, "--json", "--html", str(sheet)], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["lot"] == "Q26-049" and d["product"] == "QZ-417 200 mg"
    assert d["spec"]["file"] == "site-spec-v3.toml"
    assert "lot <b>Q26-049</b>" in sheet.read_text(encoding="utf-8")
    text = runner.invoke(cli, common, catch_exceptions=False).stdout
    assert text.startswith("For lot Q26-049, product QZ-417 200 mg:")
    assert "Spec site-spec-v3.toml, SHA-256 " in text and "dissolution modelled at 30 min" in text


def test_the_sheet_speaks_to_its_reader_judges_with_signs_and_lower_case_lot(scenario, spec_file):
    """A regression test of the sheet's labels (no outside source): the 'Judged:' line writes its limits with ≥/≤ as
    the limits column does, 'lot: not stated' mid-line is lower case, and a model of two products with the product
    not given says so for a reader of the page, with no command-line option in it (the terminal keeps its hint)."""
    _, chain, _, _ = scenario
    two = replace(chain, training={**chain.training, "products": ["QZ-417 200 mg", "QZ-417 100 mg"],
                                   "product_lots": {"QZ-417 200 mg": 8, "QZ-417 100 mg": 4}})
    r = predict_whatif(two, {"ribbon_porosity": 0.3}, spec=read_spec(spec_file))
    page = whatif_html(r)
    judged = page[page.find("Judged:"):]
    judged = judged[:judged.find("</p>")]
    assert "lot mean ≥ 120" in judged and "≤ 2" in judged and ">=" not in judged and "<=" not in judged, judged
    assert "What-if made for: lot: not stated" in page and "Lot: not stated" not in page
    assert "the product was not stated when the what-if was made" in page and "--product" not in page
    from linkage.results import trained_products_lines

    assert "give --product to say which" in " ".join(trained_products_lines(r.to_dict()))
