"""The design-space section of the report and its figure."""

from __future__ import annotations

import re

import numpy as np

from linkage import CAUTION
from linkage.decide.space import FORCE, GAP, design_space
from linkage.report.space_section import plot_space


def test_report_has_the_design_space_section(report):
    html = report.html
    assert '<h2 id="space">' in html
    section = html[html.index('<h2 id="space">'):]
    section = section[:section.index("<h2 id=", 10)]
    assert section.count("<img ") == 1
    assert "applicability-domain boundary" in section and "training lots" in section
    assert re.search(r"Acceptable ranges|No acceptable ranges", section)
    assert CAUTION.split(",")[0] in section


def test_map_figure_has_units_lots_and_the_domain_boundary(chain, table, spec):
    """Axis labels carry the units of the template (kN/cm, mm); the lots are
    drawn where they are; the domain boundary is drawn whenever the mask is
    neither all in nor all out."""
    r = design_space(chain, spec, n_grid=8)
    ax = plot_space(r, table[FORCE], table[GAP])
    assert ax.get_xlabel() == "roll_force_kn_per_cm [kN/cm]" and ax.get_ylabel() == "roll_gap_mm [mm]"
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    n_lots = int(np.isfinite(table[[FORCE, GAP]].to_numpy(float)).all(axis=1).sum())
    assert f"training lots ({n_lots})" in labels
    partial = 0 < r.in_domain.sum() < r.in_domain.size
    assert ("applicability-domain boundary" in labels) == partial
