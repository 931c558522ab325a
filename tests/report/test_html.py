"""The HTML report: sections, escaping, self-containment, figures, notes.

The report under test is rendered once per session from the hostile
synthetic lots of ``conftest.py`` (a lot named ``<script>alert(1)</script>``
and a compactor whose name is an ``<img onerror>`` tag), through assembly
and training.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import re

import numpy as np
import pandas as pd

from linkage import CAUTION
from linkage.report import html as H

from .conftest import EVIL_COMPACTOR, EVIL_LOT

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C 2003), §5.2
SECTIONS = ["glance", "lots", "ribbon", "baseline", "attributes", "explanations", "window", "domain", "card",
            "cautions"]


def _text(page: str) -> str:
    """The visible text of a page (tags dropped, entities decoded)."""
    page = re.sub(r"<style>.*?</style>", " ", page, flags=re.S)
    return html.unescape(re.sub(r"<[^>]+>", " ", page))


def test_every_section_is_there_in_order(report):
    positions = [report.html.find(f'<h2 id="{s}">') for s in SECTIONS]
    assert all(p > 0 for p in positions), dict(zip(SECTIONS, positions))
    assert positions == sorted(positions)
    for s in SECTIONS:
        assert f'<a href="#{s}">' in report.html


def test_a_hostile_lot_name_is_escaped_everywhere(report, table):
    assert EVIL_LOT in set(table["lot"])  # it went through assembly...
    page = report.html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page  # ...and is shown, escaped
    assert re.search(r"<\s*script", page, flags=re.I) is None  # no script element at all
    assert html.escape(EVIL_COMPACTOR, quote=True) in page
    assert re.search(r"<img(?![^>]*src=\"data:image/png;base64,)", page) is None  # every <img> is ours
    assert "onerror=" not in page.replace("onerror=&quot;", "")


def test_the_page_is_self_contained(report):
    page = report.html
    assert re.search(r"(src|href)\s*=\s*[\"']?(https?:|//|file:|ftp:)", page, flags=re.I) is None
    assert "<link" not in page and "@import" not in page and "url(" not in page
    assert all(h.startswith("#") for h in re.findall(r'href="([^"]*)"', page))
    assert "<script" not in page.lower() and "<iframe" not in page.lower()


def test_every_figure_is_an_embedded_png(report):
    sources = re.findall(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"', report.html)
    assert len(sources) == report.n_figures == report.html.count("<img ")
    assert report.n_figures >= 15
    assert f'<meta name="figures" content="{report.n_figures}">' in report.html
    for s in sources:
        png = base64.b64decode(s, validate=True)
        assert png.startswith(PNG_SIGNATURE) and len(png) > 1000
    captions = re.findall(r"<figcaption>Figure (\d+)\.", report.html)
    assert [int(c) for c in captions] == list(range(1, report.n_figures + 1))


def test_no_bare_nan_or_none_in_the_text(report):
    words = set(re.findall(r"[A-Za-z]+", _text(report.html)))
    assert not words & {"nan", "NaN", "None", "inf", "null"}


def test_caution_at_the_top_and_in_the_model_card(report):
    page = report.html
    escaped = html.escape(CAUTION)
    first = page.find(escaped)
    assert 0 < first < page.find('<h2 id="glance">')
    assert page.find(escaped, page.find('<h2 id="card">')) > 0
    assert page.find(escaped, page.find('<h2 id="cautions">')) > 0


def test_candidate_tables_show_baseline_floor_noise_and_selection(report, chain):
    body = report.html[report.html.find('<h2 id="attributes">'):report.html.find('<h2 id="explanations">')]
    assert body.count("✓ selected") == len(chain.targets)
    assert body.count("<td>noise floor</td>") == len(chain.targets)
    assert body.count("<td>mean") == len(chain.targets)
    tablet = [n for n, t in chain.targets.items() if "rd_baseline" in t.candidates]
    assert body.count("<td>rd_baseline") == len(chain.targets)  # used, or listed with why not
    assert len(tablet) >= 4
    assert "not used: ribbon_porosity is not an input of this stage" in body
    for name, t in chain.targets.items():
        cell = f"{t.candidates[t.selected]['rmse']:.4g}"
        assert cell in body, name
    # coverage by porosity third, with its Clopper-Pearson interval and the CV+ guarantee (issue 12)
    assert body.count("Clopper–Pearson") == len(chain.targets)
    assert body.count("CV+ guarantees at least 1 − 2α") == len(chain.targets)


def test_baseline_parameters_with_standard_errors(report, chain):
    body = report.html[report.html.find('<h2 id="baseline">'):report.html.find('<h2 id="attributes">')]
    p = chain.targets["tensile_strength_mpa"].rd_params
    assert f"{p['s0']:.4g} ± {p['s0_se']:.2g}" in body
    assert f"{p['k']:.4g} ± {p['k_se']:.2g}" in body


def test_model_card_records_the_model(report, chain):
    card = report.html[report.html.find('<h2 id="card">'):report.html.find('<h2 id="cautions">')]
    assert chain.training["table_sha256"] in card
    assert f"scikit-learn {chain.library_versions['scikit-learn']}" in card
    assert f"{chain.training['n_lots']}: " in card
    assert "one-standard-error rule" in card
    for name, t in chain.targets.items():
        assert f"<td>{name}</td><td>{t.selected}</td>" in card
        assert f"{100 * t.coverage:.0f}%" in card


def test_the_report_heading_gives_both_times_to_the_second_in_utc(report, chain):
    """The heading's training and report times are written as the what-if page writes the training time
    (page.trained_text: to the second, UTC, said; the model records microseconds). Regression test of a
    label: no outside source."""
    import re

    from linkage.report.page import trained_text

    meta = report.html[report.html.find("<p class=meta>"):]
    meta = meta[:meta.find("</p>")]
    assert f"trained {trained_text(chain.created_at)} ·" in meta and str(chain.created_at) not in meta
    assert re.search(r"report made \d{4}-\d\d-\d\d \d\d:\d\d:\d\d UTC ·", meta), meta


def test_window_section_names_the_window_the_limiting_attribute_and_the_force(report, chain, table, spec):
    from linkage.decide.window import find_window

    w = find_window(chain, spec, confidence=0.9, seed=0)  # the report computed the same at the same seed
    body = report.html[report.html.find('<h2 id="window">'):report.html.find('<h2 id="domain">')]
    assert w.found or w.point_low is not None
    if w.found:
        assert f"Window: {w.low.value:.3f} – {w.high.value:.3f}" in body
        for edge in (w.low, w.high):
            assert (f"limited by <b>{edge.limited_by}</b>" in body) or ("cut by the range of the training data" in body)
    else:  # 36 lots: the lower bound may not reach the confidence where the point estimate does; both are said
        assert "<b>No window</b>: the lower bound (90% assurance)" in body
        assert f"The point estimate reaches 90% over {w.point_low:.3f} – {w.point_high:.3f}" in body
    if w.roll_force.get("low") is not None:
        assert f"{w.roll_force['low']:.2f} – {w.roll_force['high']:.2f} kN/cm" in body
    for a in spec.limits:
        assert f"<td>{a}</td>" in body


def test_lots_left_out_are_listed_with_the_reason(chain, table):
    """A lot without the target (training left it out) and a lot added after
    training are each listed with their reason."""
    t = table.copy()
    t.loc[t["lot"] == "LOT-003", "dissolution_pct"] = np.nan
    target = chain.targets["dissolution_pct"]
    as_trained = dataclasses.replace(target, lots=[v for v in target.lots if v != "LOT-003"])
    trained = dataclasses.replace(chain, targets={**chain.targets, "dissolution_pct": as_trained})
    new = t.iloc[[0]].assign(lot="NEW-<1>")
    t = pd.concat([t, new], ignore_index=True)
    text = H._exclusions(trained, t)
    assert "no value of dissolution_pct" in text and "LOT-003" in text
    assert "not in the data the model was trained on" in text and "NEW-&lt;1&gt;" in text
    assert H._exclusions(chain, table) == "<p>Every lot of the table was used for every attribute.</p>"


def _left_out_rows(chain, table) -> list[list[str]]:
    """The cells of each row of the table of lots a model left out, as text."""
    rows = re.findall(r"<tr>(.*?)</tr>", H._exclusions(chain, table), flags=re.S)[1:]  # after the header
    return [[html.unescape(re.sub(r"<[^>]+>", "", c)) for c in re.findall(r"<td[^>]*>(.*?)</td>", r, re.S)]
            for r in rows]


def test_lots_every_attribute_left_out_for_the_same_reason_are_said_once(chain, table):
    """A new-user test (regression test, no outside source): the lots added since training, which every attribute
    leaves out, were listed once per attribute (the same lots 8 times for 8 attributes). They are one row for all
    attributes, in the same words; a lot one attribute alone leaves out (no value of it) keeps its attribute's row."""
    assert len(chain.targets) > 1
    new_lots = ["NEW-1", "NEW-2", "NEW-3"]
    since = pd.concat([table, table.iloc[:3].assign(lot=new_lots)], ignore_index=True)
    why_new = "not in the data the model was trained on (added or changed later)"
    assert _left_out_rows(chain, since) == [[H.ALL_ATTRIBUTES, why_new, "3", ", ".join(new_lots)]]
    # where the attributes differ: LOT-003 without dissolution is left out of that attribute alone
    since.loc[since["lot"] == "LOT-003", "dissolution_pct"] = np.nan
    target = chain.targets["dissolution_pct"]
    as_trained = dataclasses.replace(target, lots=[v for v in target.lots if v != "LOT-003"])
    trained = dataclasses.replace(chain, targets={**chain.targets, "dissolution_pct": as_trained})
    assert _left_out_rows(trained, since) == [[H.ALL_ATTRIBUTES, why_new, "3", ", ".join(new_lots)],
                                              ["dissolution_pct", "no value of dissolution_pct", "1", "LOT-003"]]


def test_missing_data_gives_a_note_not_a_blank(chain, table):
    b = H._Builder()
    H._ribbon_section(b, chain, table.drop(columns="roll_gap_mm"), {})
    H._window_section(b, chain, table, None, None)
    H._window_section(b, chain, table, object(), None, failure="none of the spec's attributes is predicted")
    H._domain_section(b, chain, table.drop(columns="fines_pct"))
    assert b.notes == [
        "The table has no roll_gap_mm, so porosity against roll force cannot be drawn.",
        "No specification was given (--spec spec.toml), so there are no limits and no window to show.",
        "The window could not be computed: none of the spec's attributes is predicted.",
        "tablets stage: the table lacks fines_pct, so the domain cannot be drawn.",
    ]
    assert all(f'<p class="note">{html.escape(n)}</p>' in "".join(b.parts) for n in b.notes)
    assert len(b.figures) == 1  # the domain figure, with the two stages whose inputs are all there


def test_completeness_comes_from_the_store_when_given(table):
    lots = pd.DataFrame({"lot": ["LOT-002", "LOT-001", "OLD-9"], "process_rows": [1, 1, 1], "ribbon_rows": [3, 0, 2],
                         "ribbon_filled_pct": [100.0, np.nan, 75.0]})
    present, source = H._presence(table, lots)
    assert source == "the lot store"
    assert list(present.columns) == ["process", "ribbon"]
    assert list(present.index[:2]) == list(table["lot"][:2])  # time order of the table first
    assert present.index[-1] == "OLD-9"  # a stored lot that did not assemble comes last
    assert present.loc["LOT-001", "ribbon"] == False and present.loc["LOT-002", "ribbon"] == True  # noqa: E712
    derived, source = H._presence(table, None)
    assert source == "the assembled table" and bool(derived["dissolution"].all())


def test_build_report_writes_the_whole_file_into_new_folders(report, monkeypatch, tmp_path, chain, table):
    monkeypatch.setattr(H, "render_report", lambda *a, **k: report)
    out = H.build_report(chain, table, out_path=tmp_path / "a" / "b" / "r.html")
    assert out == tmp_path / "a" / "b" / "r.html"
    assert out.read_text(encoding="utf-8") == report.html
    assert [p.name for p in out.parent.iterdir()] == ["r.html"]  # no temporary file left behind
    assert out.stat().st_mode & 0o044  # readable by others, as an ordinary file


def test_drift_watch_section_has_its_charts():
    """Issue 6: the report gains a section with the drift charts."""
    import re

    from linkage.assemble import assemble
    from linkage.models.train import train_chain
    from linkage.report.html import render_report
    from linkage.synthetic import make_lots

    lots = make_lots(40, seed=21, raw_material_change_at=32, raw_material_delta=-8.0)
    table = assemble(lots.tables)
    first = table[table["lot"].isin(list(lots.tables["process"]["lot"])[:32])]
    chain = train_chain(first, seed=0, candidates=["mean", "pls"])
    report = render_report(chain, table)
    html = report.html
    assert 'id="drift"' in html
    section = html[html.index('id="drift"'):html.index('id="domain"')]
    assert section.count("<img") == 3  # the alarm's T² against h, residual charts, lot-mean porosity
    assert "Alarms on lots since training" in section
    # issue 19: the alarms are the designed MEWMA's, naming the attributes furthest out, and the design is stated
    assert re.search(r"lot LOT-0(3[3-9]|40): T²[^<]*dissolution_pct", section)
    assert "in-control ARL 200 lots for all attributes together" in section


def test_the_model_card_gives_the_training_time_as_the_heading_does(report, chain):
    """The model card's "trained" row wrote the recorded ISO 8601 text (microseconds, '+00:00') under a heading
    that writes it to the second in UTC (page.trained_text). Regression test of a label: no outside source. The
    expected text is computed here from the recorded time with the standard library (``datetime.fromisoformat``,
    ``astimezone(timezone.utc)``), as tests/test_shown_times.py does, not by the function under test."""
    from datetime import datetime, timezone

    when = datetime.fromisoformat(str(chain.created_at))
    when = when.replace(tzinfo=timezone.utc) if when.tzinfo is None else when.astimezone(timezone.utc)
    card = report.html[report.html.find('<h2 id="card">'):report.html.find('<h2 id="cautions">')]
    assert f"<td>trained</td><td>{when.strftime('%Y-%m-%d %H:%M:%S')} UTC</td>" in card, card[:600]
    assert str(chain.created_at) not in card
