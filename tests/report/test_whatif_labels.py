"""What the what-if sheet and the what-if page say besides their numbers (user test of the report, the page and the
sheet): a model of two products says so on both, a column's unit follows one rule on both, the sheet's times are
written as the page and the report write them (to the second, in UTC, said) and with the model's training time,
and its limits read '≥'/'≤' as the page's do. Regression tests of labels: they need no outside source.

The model is trained on lots of two products drawn by linkage.synthetic (8 lots of each, seeds 5 and 6), so the
products and their counts are those of a real training record.
"""

from __future__ import annotations

import html
import re

import pandas as pd
import pytest

from linkage.report.figures import shown_unit


@pytest.fixture(scope="module")
def mixed():
    from linkage.assemble import assemble
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SPEC, make_lots

    a = make_lots(8, seed=5, product="NP-1 100 mg", lot_prefix="A")
    b = make_lots(8, seed=6, product="NP-2 50 mg", lot_prefix="B", start="2026-03-02")
    tables = {name: pd.concat([a.tables[name], b.tables[name]], ignore_index=True)
              for name in a.tables if name in b.tables}
    chain = train_chain(assemble(tables), seed=0, candidates=["mean", "log_linear"], n_bootstrap=20)
    spec = Spec(limits={name: Limit(min=lo, max=hi) for name, (lo, hi) in WINDOW_SPEC.items()})
    return chain, spec


def _sheet(chain, spec) -> str:
    from linkage.decide.whatif import predict_whatif
    from linkage.report.sheet import whatif_html

    values = {"roll_force_kn_per_cm": float(chain.training["medians"]["roll_force_kn_per_cm"])}
    return html.unescape(whatif_html(predict_whatif(chain, values, spec=spec, n_draws=400)))  # as a reader sees it


def test_the_sheet_and_the_page_say_the_model_covers_two_products(mixed):
    from linkage.report.page import page_payload

    chain, spec = mixed
    said = "Model trained on 2 products: 'NP-1 100 mg' (8 lots), 'NP-2 50 mg' (8 lots)"
    assert said in _sheet(chain, spec)
    payload = page_payload(chain, spec, n_draws=200)
    assert payload["trained_on"].startswith(said)
    assert payload["products"] == ["NP-1 100 mg", "NP-2 50 mg"]


def test_a_model_of_one_product_says_nothing_of_products(mixed):
    import copy

    from linkage.report.page import trained_on_line

    chain, spec = mixed
    one = copy.copy(chain)
    one.training = {**chain.training, "products": ["NP-1 100 mg"], "product_lots": {"NP-1 100 mg": 16},
                    "lots_without_product": 0}
    assert trained_on_line(one) is None
    assert "trained on 2 products" not in _sheet(one, spec)


def test_the_sheet_writes_its_times_as_the_page_does_and_gives_the_training_time(mixed):
    from linkage.report.page import trained_text

    chain, spec = mixed
    sheet = _sheet(chain, spec)
    assert f"(trained {trained_text(chain.created_at)})" in sheet
    assert re.search(r"made \d{4}-\d{2}-\d{2} \d{2}:\d{2}:\d{2} UTC", sheet)
    assert not re.search(r"made \d{4}-\d{2}-\d{2}T", sheet)  # not the ISO form with its offset


def test_the_sheets_limits_read_as_the_pages(mixed):
    chain, spec = mixed
    cells = re.findall(r"<td>([^<]*)</td><td>(?:stages|mean)", _sheet(chain, spec))
    assert cells and all(">=" not in c and "<=" not in c for c in cells)
    assert {c.split()[0] for c in cells if c.split()[0] in ("≥", "≤")}  # the page's signs


def test_the_page_and_the_sheet_give_a_column_the_same_unit(mixed):
    """An extra process column (a material the materials comparison keeps, here api_d50_um put among the
    model's medians as such a column is): the page showed it without a unit ('-' in its payload) where the sheet
    writes [µm]."""
    from linkage.models.lean import as_lean
    from linkage.report.page import page_payload
    from linkage.report.sheet import _unit

    chain, spec = mixed
    lean = as_lean(chain)
    lean.medians["api_d50_um"] = 45.0
    payload = page_payload(lean, spec, n_draws=200)
    assert payload["shown_units"]["api_d50_um"] == "µm" and _unit("api_d50_um") == " [µm]"
    for name, unit in payload["shown_units"].items():
        assert _unit(name) == ("" if unit == "-" else f" [{unit}]"), name
        assert unit == shown_unit(name)
    assert payload["units"]["api_d50_um"] == "-"  # kept as lean.py's domain reasons write it (the page mirrors them)
