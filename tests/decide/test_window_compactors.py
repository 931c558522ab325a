"""The window's roll force range says when it is pooled over several compactors (user test, 2026-12-05).

A user refitted the demo's lots and found the ribbon porosity residuals split by compactor (pilot +0.004,
production -0.003): the synthetic truth gives the production compactor a porosity offset
(``Truth.compactor_offsets``), and the default ribbon stage has no roll geometry among its inputs, so the roll
force range the window states belongs to no one compactor. These are regression tests of the statement (no
outside source: the counts are checked against the training table's own compactor column).
"""

from __future__ import annotations

import pandas as pd

from linkage.decide.window import find_window, pooled_compactors
from linkage.models.train import _compactor_lots
from linkage.results import window_text
from linkage.synthetic import WINDOW_SETTINGS


def test_window_names_the_compactors_its_roll_force_is_pooled_over(scenario):
    _, chain, spec, table = scenario
    expected = {str(k): int(n) for k, n in table["compactor"].value_counts().items()}
    assert len(expected) == 2  # the scenario's lots come from the pilot and the production compactor
    w = find_window(chain, spec, settings=dict(WINDOW_SETTINGS), n_draws=500)
    rf = w.to_dict()["roll_force_kn_per_cm"]
    assert rf["compactors"] == expected
    assert all(f"{name}: {n} lots" in rf["compactors_note"] for name, n in expected.items())
    assert rf["low"] is not None  # the scenario has a roll force range to state
    assert "no one compactor's" in window_text(w)


def test_the_reports_glance_says_the_roll_force_is_pooled(scenario):
    from linkage.report.html import render_report

    _, chain, spec, table = scenario
    w = find_window(chain, spec, settings=dict(WINDOW_SETTINGS), n_draws=500)
    html = render_report(chain, table, spec=spec, window=w, parallel=False).html
    glance = html[html.index('id="glance"'):html.index('id="lots"')] if 'id="lots"' in html else html
    assert w.roll_force["low"] is not None and "pooled over 2 compactors" in glance


def test_no_statement_when_the_ribbon_stage_knows_the_rolls_or_one_compactor_made_the_lots():
    two = {"compactor_lots": {"pilot": 21, "production": 27}}
    assert pooled_compactors(two, ("roll_force_kn_per_cm", "roll_gap_mm"))[0] == {"pilot": 21, "production": 27}
    assert pooled_compactors(two, ("roll_force_kn_per_cm", "roll_gap_mm", "roll_diameter_mm")) is None
    assert pooled_compactors({"compactor_lots": {"pilot": 48}}, ("roll_force_kn_per_cm",)) is None
    assert pooled_compactors({}, ("roll_force_kn_per_cm",)) is None  # a model trained before the counts were kept


def test_compactors_counted_by_name_else_by_roll_geometry():
    raw = pd.DataFrame({"compactor": ["pilot", " pilot ", None, "", None],
                        "roll_diameter_mm": [200.0, 200.0, 250.0, 250.0, None],
                        "roll_width_mm": [40.0, 40.0, 100.0, 100.0, None]})
    assert _compactor_lots(raw) == {"pilot": 2, "roll 250 mm × 100 mm": 2}
    assert _compactor_lots(raw.drop(columns="compactor")) == {"roll 200 mm × 40 mm": 2, "roll 250 mm × 100 mm": 2}
    assert _compactor_lots(raw[["roll_diameter_mm"]]) == {}
