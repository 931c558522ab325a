"""The report's plan section in a whole report (issue 18): planned lots of
the report's own chain, drawn after the window section, the hostile lot
names of the shared fixtures escaped."""

from __future__ import annotations

import pytest


@pytest.mark.slow
def test_report_with_a_plan_has_the_section_after_the_window(chain, table, spec, tmp_path):
    from linkage.decide.plan import augment_design, write_plan
    from linkage.report.html import render_report

    plan = augment_design(chain, table, spec, 4, settings={"mill_screen_mm": 1.0, "compression_force_kn": 14.0},
                          seed=1)
    write_plan(plan, tmp_path)
    report = render_report(chain, table, spec=spec, curve_draws=200, plan=tmp_path / "plan.json")
    page = report.html
    assert page.index('id="window"') < page.index('id="plan"')
    assert any("Planned lots" in caption for caption in report.figures)
    for lot in plan.lots:
        assert lot.lot in page
    # each lot's reason on a line of its own under its settings (not a squeezed column beside them), and the
    # settings' long names may break after an underscore without a character added to the copied text
    import html

    section = page[page.index('id="plan"'):]
    section = section[:section.index("</table>")]
    assert section.count("<tr class=main>") == section.count("<tr class=detail>") == len(plan.lots)
    for lot in plan.lots:
        assert f"why: {html.escape(lot.reason)}</td>" in section
    assert "roll_<wbr>force_<wbr>kn_<wbr>per_<wbr>cm" in section
    assert "<script>alert(1)</script>" not in page
