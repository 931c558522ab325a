"""What a user test found the report saying that was not so (the report on a store of 54 lots, 48 of them
trained on, one of those revised after training):

- the design-space legend said "training lots (54)" and the transfer section "fitted to 54 lots";
- a training lot revised after training (``linkage watch`` names it) went unsaid;
- the transfer table's "stated rolls" were rolls nobody stated (an example of the code's own);
- the baseline section called its fit "the physical law" for tensile strength, a fit against ribbon porosity
  whose k < 0 (strength rising with porosity: not the Ryshkewitch–Duckworth law of a compact's own porosity);
- lot names along the time axes were 6 pt, about 8 px (barely legible).

The counts and the revised lots are rules of the lot record, checked against the store's rule
(:func:`linkage.decide.watch.revised_since_training`, as ``linkage watch`` applies it): regression tests, no
outside source. The sign of k is checked against scipy's Spearman correlation of the same lots; the legibility
against matplotlib's own text layout (the tick labels' drawn boxes).
"""

from __future__ import annotations

import html
import re

import numpy as np
import pandas as pd
import pytest

from linkage.report.html import _Builder

#: lots appended to the table after the chain was trained (copies of its last lots under new names)
LATE = ["LATE-1", "LATE-2", "LATE-3"]


def _section(html_text: str, anchor: str) -> str:
    start = html_text.index(f'<h2 id="{anchor}">')
    end = html_text.find("<h2 id=", start + 10)
    return html_text[start:end if end > 0 else None]


def _plain(html_text: str) -> str:
    """The text a reader sees: tags dropped, entities read, white space as one blank."""
    return re.sub(r"\s+", " ", html.unescape(re.sub(r"<[^>]+>", " ", html_text)))


@pytest.fixture(scope="module")
def later(table):
    """The session's table with three lots the chain was never trained on, made after it."""
    tail = table.tail(len(LATE)).copy()
    tail["lot"] = LATE
    return pd.concat([table, tail], ignore_index=True)


@pytest.fixture(scope="module")
def store_lots(chain, later):
    """What the lot store's ``lots()`` gives for ``later``: every lot at revision 1 stored before the chain was
    trained, the later lots after it, and one training lot revised (revision 2) after it."""
    from datetime import datetime, timedelta

    trained = datetime.fromisoformat(chain.created_at)
    before, after = (trained - timedelta(days=1)).isoformat(), (trained + timedelta(hours=1)).isoformat()
    lots = pd.DataFrame({"lot": later["lot"].astype(str), "revision": 1, "updated_at": before})
    lots.loc[lots["lot"].isin(LATE), "updated_at"] = after
    revised = str(chain.training["lots"][3])
    lots.loc[lots["lot"] == revised, ["revision", "updated_at"]] = [2, after]
    return lots


@pytest.fixture(scope="module")
def rendered(chain, later, store_lots):
    from linkage.report.html import render_report

    return render_report(chain, later, lots=store_lots, curve_draws=50, parallel=False).html


def test_a_training_lot_revised_after_training_is_said_where_the_report_describes_the_lots(chain, store_lots,
                                                                                            rendered):
    from linkage.decide.watch import revised_since_training

    revised = revised_since_training(store_lots, chain.training["lots"], chain.created_at)
    assert len(revised) == 1  # the fixture's one lot, as `linkage watch` finds it
    lot = revised[0]["lot"]
    glance, lots, card = (_plain(_section(rendered, a)) for a in ("glance", "lots", "card"))
    assert f"1 training lot(s) revised after the model was trained : {lot} (revision 2" in glance
    assert f"1 of the model's training lots was revised after it was trained : {lot} (revision 2" in lots
    assert "training lots revised since" in card and lot in card
    # none said where none was revised (revision 2 stored before the model was trained)
    from linkage.report.html import revised_training_lots

    quiet = store_lots.assign(updated_at=store_lots["updated_at"].min())
    assert revised_training_lots(chain, quiet) == [] and revised_training_lots(chain, None) == []


def test_lots_not_trained_on_are_counted_apart(chain, later, rendered):
    n_all, n_trained = len(later), len(chain.training["lots"])
    assert n_all == n_trained + len(LATE)
    lots = _plain(_section(rendered, "lots"))
    assert (f"{n_all} lots in the assembled table (the model was trained on {n_trained} of them; the other "
            f"{len(LATE)} are not among its training lots)") in lots
    transfer = _plain(_section(rendered, "transfer"))
    assert f"fitted to {n_all} lots of every compactor at once" in transfer
    assert f"{n_trained} of them lots the model was trained on, {len(LATE)} not" in transfer


def test_the_map_legend_counts_training_lots_and_later_lots_apart(chain, later, spec):
    from linkage.decide.space import FORCE, GAP, design_space
    from linkage.report.space_section import plot_space, space_section

    r = design_space(chain, spec, n_grid=8)
    trained = later["lot"].isin(set(map(str, chain.training["lots"]))).to_numpy()
    ax = plot_space(r, later[FORCE], later[GAP], trained=trained)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"training lots ({len(chain.training['lots'])})" in labels
    assert f"lots not trained on ({len(LATE)})" in labels
    b = _Builder(parallel=False)
    space_section(b, chain, later, spec, result=r)
    assert f"training lots ({len(chain.training['lots'])}); filled squares: the lots the model was not trained on " \
           f"({len(LATE)})" in b.figures[0]


def test_the_example_rolls_are_labelled_as_nobody_s_and_the_command_for_one_s_own_is_given():
    from linkage.report.transfer_section import EXAMPLE_LABEL, SCALE_UP_ROLLS, transfer_section
    from linkage.synthetic_rolling import make_transfer_lots

    lots = make_transfer_lots(seed=2)
    b = _Builder(parallel=False)
    transfer_section(b, lots)
    page = _plain("".join(b.parts))
    assert "stated rolls" not in page and "stated production rolls" not in page  # nobody stated them
    assert page.count(EXAMPLE_LABEL) >= 2  # the sentence and the table's rows
    assert "not rolls anyone stated" in page and f"({SCALE_UP_ROLLS[0]:g} mm diameter, {SCALE_UP_ROLLS[1]:g} mm wide)" in page
    gap = float(lots["roll_gap_mm"].median())
    porosity = float(lots["ribbon_porosity"].median())
    assert (f"linkage transfer --roll-diameter-mm D --roll-width-mm W --gap-mm {gap:.3g} --porosity {porosity:.3f}"
            in page)


def test_the_baseline_is_not_called_a_law_and_a_negative_k_is_said_to_mean_strength_rising(chain, table):
    """k < 0 in y0·exp(−k·ε) means y rising with ε; the lots' own rank correlation of strength with ribbon
    porosity (scipy.stats.spearmanr) has the same sign for each strength attribute the section names."""
    from scipy import stats

    from linkage.report.html import STRENGTH, _baseline_section, _by_lot

    b = _Builder(parallel=False)
    _baseline_section(b, chain, table, {})
    text = _plain("".join(b.parts))
    assert "physical law" not in text.replace("not a physical law", "")
    assert "k is an empirical coefficient" in text
    t = _by_lot(table)
    named = []
    for name in STRENGTH:
        target = chain.targets.get(name)
        if target is None or not target.rd_params:
            continue
        sub = t.loc[[v for v in target.lots if v in t.index], ["ribbon_porosity", name]].dropna()
        rho = stats.spearmanr(sub["ribbon_porosity"], sub[name]).statistic
        if target.rd_params["k"] < 0:
            named.append(name)
            assert rho > 0, (name, rho)
    assert named, "the synthetic lots' strength rises with ribbon porosity (the truth's loss of compactibility)"
    assert f"For {', '.join(named)}, k < 0: the tablets' strength rises with ribbon porosity" in text
    assert "Herting & Kleinebudde 2008" in text


@pytest.mark.parametrize("kind", ["control", "residuals", "completeness"])
def test_lot_names_on_time_axes_are_legible_and_do_not_overlap(kind):
    """54 lots named Q26-001 … along a time axis: every name shown is at least 8 pt (11 px at the figures'
    100 dpi), no two drawn names overlap and none runs off the figure (matplotlib's drawn boxes)."""
    from linkage.report import figures as F

    lots = [f"Q26-{i:03d}" for i in range(1, 55)]
    rng = np.random.default_rng(0)
    values = rng.standard_normal(len(lots))
    if kind == "control":
        ax = F.plot_control_chart(lots, values, centre=0.0, limits=(-3.0, 3.0), name="ribbon_porosity")
    elif kind == "residuals":
        ax = F.plot_residuals_in_time(lots, values, name="ribbon_porosity")
    else:
        present = pd.DataFrame({"process": True, "ribbon": rng.random(len(lots)) > 0.3}, index=lots)
        ax = F.plot_completeness(present)
    fig = ax.figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    renderer = FigureCanvasAgg(fig).get_renderer()
    labels = [t for t in ax.get_xticklabels() if t.get_text()]
    assert len(labels) >= 8  # thinned, not dropped
    assert all(t.get_fontsize() >= 8 for t in labels)
    boxes = sorted((t.get_window_extent(renderer) for t in labels), key=lambda bb: bb.x0)
    assert all(a.x1 <= b.x0 for a, b in zip(boxes, boxes[1:]))  # side by side, none over the next
    assert all(bb.y0 >= 0 for bb in boxes)  # inside the figure
    assert all(bb.height >= 0.8 * bb.width for bb in boxes)  # upright
