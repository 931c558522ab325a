"""The what-if page in headless Chromium: its applicability-domain and prediction tables put each numeric heading
over its numbers (user test: left-aligned headings over right-aligned numbers in wide columns, so each number sat
under the next heading), a model of two products says so, and a heading's unit is the one the report and the
sheet write (figures.shown_unit). Regression tests of layout and labels: they need no outside source."""

from __future__ import annotations

import pytest

from .test_whatif_labels import mixed  # noqa: F401  (a model of two products, trained in seconds)
from .test_whatif_page import browser  # noqa: F401

pytestmark = [pytest.mark.slow, pytest.mark.browser]


@pytest.fixture(scope="module")
def mixed_page(mixed, tmp_path_factory):  # noqa: F811
    from linkage.report.page import page_html

    chain, spec = mixed
    path = tmp_path_factory.mktemp("mixed-page") / "page.html"
    path.write_text(page_html(chain, spec, n_draws=400), encoding="utf-8")
    return path


def _columns(browser, table_class: str) -> list[dict]:  # noqa: F811
    """Per column of the page's table: the heading's text, alignment and right edge, and the right edges of the
    column's cells."""
    return browser.evaluate(f"""(() => {{
      const t = document.querySelector("table.{table_class}");
      const rows = [...t.querySelectorAll("tr")];
      return [...rows[0].children].map((th, i) => ({{
        heading: th.textContent, align: getComputedStyle(th).textAlign, right: th.getBoundingClientRect().right,
        cells: rows.slice(1).map((r) => r.children[i]).filter((c) => c && c.classList.contains("num"))
          .map((c) => c.getBoundingClientRect().right)}}));
    }})()""")


def test_numeric_headings_stand_over_their_numbers(browser, mixed_page):  # noqa: F811
    browser.open(mixed_page.as_uri())
    assert browser.evaluate("window.linkageError") is None
    for table, numeric in (("domain", ["T²", "T² limit", "Q", "Q limit"]),
                           ("predictions", ["predicted", "P(pass)"])):
        columns = {c["heading"]: c for c in _columns(browser, table)}
        for name in numeric:
            c = columns[name]
            assert c["cells"], (table, name)  # the column has numbers
            assert c["align"] == "right", (table, name)
            # the heading's text ends where the numbers end (padding alike): over them, not over the next column
            assert all(abs(right - c["right"]) < 1.0 for right in c["cells"]), (table, name, c)


def test_the_page_says_the_model_covers_two_products_and_writes_units_as_the_sheet(browser, mixed_page):  # noqa: F811
    from linkage.report.sheet import _unit

    browser.open(mixed_page.as_uri())
    said = browser.evaluate("document.getElementById('trained-on').textContent")
    assert said.startswith("Model trained on 2 products: 'NP-1 100 mg' (8 lots), 'NP-2 50 mg' (8 lots)")
    headings = browser.evaluate("[...document.querySelectorAll('table.settings tr td:nth-child(2)')]"
                                ".map((td) => td.textContent)")
    names = browser.evaluate("window.linkageModel.settings.map((s) => s.name)")
    assert headings == [name + _unit(name) for name in names]
