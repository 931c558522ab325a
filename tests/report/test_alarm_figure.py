"""The report's figure of the drift alarm's statistic: the multivariate EWMA's T² of each lot since training
against its limit h (a new-user test: the report drew only the per-attribute charts, whose EWMA is another).

The case is the synthetic raw-material change of tests/decide/test_watch.py (its ``drift`` fixture; the alarm's
timing is checked there against the known change, and the MEWMA itself against published run lengths in
tests/decide/test_mewma.py). Here the check is that the figure draws the watch's own numbers, T² and h, lot by
lot in time order, with the signalled lots marked: no outside source, the figure against the computation.
"""

from __future__ import annotations

import numpy as np

from linkage.decide.watch import watch
from linkage.report.html import _Builder, _watch_section

from tests.decide.test_watch import drift  # noqa: F401  (the fixture: lots, table, chain, lot order)


class _Kept(_Builder):
    """A builder that keeps each figure's maker and caption, to look at what it draws."""

    def __init__(self):
        super().__init__(parallel=False)
        self.made: list[tuple[object, str]] = []

    def figure(self, fig_or_ax, caption, alt=None, panels=1):
        self.made.append((fig_or_ax, caption))
        super().figure(fig_or_ax, caption, alt=alt, panels=panels)


def test_the_figure_draws_the_watchs_t2_against_h(drift):  # noqa: F811
    lots, table, chain, order = drift
    result = watch(chain, table)
    m = result.mewma
    b = _Kept()
    _watch_section(b, chain, table, None, result)
    first_maker, first_caption = b.made[0]  # before the per-attribute charts
    assert first_caption.startswith("The alarm's statistic: T²") and len(b.made) == 3
    ax = first_maker()
    limit = [line for line in ax.lines if line.get_linestyle() == "--"]
    assert len(limit) == 1 and np.allclose(limit[0].get_ydata(), m["h"])  # the horizontal line at h
    curve = [line for line in ax.lines if line.get_linestyle() == "-"]
    assert len(curve) == 1 and np.allclose(curve[0].get_ydata(), m["t2"])  # T², lot by lot
    assert np.array_equal(curve[0].get_xdata(), np.arange(len(m["lots"])))
    # the lots in time order (the table's), named along the axis
    assert m["lots"] == [lot for lot in order if lot in set(m["lots"])]
    named = [t.get_text() for t in ax.get_xticklabels()]
    assert named == [m["lots"][int(i)] for i in ax.get_xticks()]
    # the signalled lots (T² above h) marked: the points drawn in the second scatter are exactly those
    above = np.array(m["t2"]) > m["h"]
    assert above.any() and list(np.array(m["lots"])[above]) == list(m["signals"])
    marked = ax.collections[1].get_offsets()
    assert np.allclose(marked[:, 0], np.flatnonzero(above)) and np.allclose(marked[:, 1], np.array(m["t2"])[above])


def test_no_lot_since_training_gives_a_note_not_a_figure(drift):  # noqa: F811
    lots, table, chain, order = drift
    trained = table[table["lot"].isin(chain.training["lots"])]
    result = watch(chain, trained)
    b = _Kept()
    _watch_section(b, chain, trained, None, result)
    assert not result.new_lots and not any(c.startswith("The alarm's statistic") for _, c in b.made)
    assert "The alarm's statistic (T² against its limit h) is not drawn: no lot since training." in b.notes
