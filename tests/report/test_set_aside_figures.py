"""A training lot set aside after the model was trained, in the report's per-attribute figures.

User test: the model's out-of-fold results hold the lot, the assembled table of lots in use does not, so the
report drew it as compactor "(none)" and last in time, and the other compactors' colours moved. These are
regression tests of the report's labelling and placement: they need no outside source. The expected place and
compactor of the lot are those of the store's own table before the lot was set aside (assembled as any table is).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from linkage import api
from linkage.store import LotStore

REASON = "DEV-2026-031: sampling error, ribbon samples from the wrong drum"


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """Twelve synthetic lots (linkage.synthetic.make_lots, seed 3) ingested, a model trained on all of them, and
    then the 6th lot in time set aside."""
    from linkage.synthetic import make_lots

    folder = tmp_path_factory.mktemp("aside-figures")
    make_lots(12, seed=3).write_csv(folder / "lots")
    store, models = folder / "lab.db", folder / "models"
    api.ingest(folder / "lots", store)
    trained = api.train(store, models, seed=0, materials=False)
    before = api.assemble(store)  # every lot, in time order
    lot = str(before["lot"].iloc[5])
    api.set_aside(lot, store, reason=REASON)
    return Path(store), trained.chain, before, lot


def _figure_lots(store, chain):
    from linkage.assemble import assemble
    from linkage.report.html import lots_frame, set_aside_training_rows
    from linkage.store import current_tables_of

    with LotStore(store, create=False) as s:
        tables = current_tables_of(s, None)
        rows = set_aside_training_rows(s, None, tables.set_aside, chain.training["lots"])
    return assemble(tables), rows, lots_frame(assemble(tables), rows)


def test_the_set_aside_lot_keeps_its_compactor_and_place_in_time(lab):
    from linkage.report.html import attribute_lots

    store, chain, before, lot = lab
    table, rows, frame = _figure_lots(store, chain)
    assert lot not in set(table["lot"]) and list(rows["lot"]) == [lot]
    compactor = dict(zip(before["lot"].astype(str), before["compactor"].astype(str)))
    for name, target in chain.targets.items():
        oof_lots = [str(v) for v in target.oof.index]
        order, col, groups, marked = attribute_lots(frame, oof_lots)
        assert lot in order, name
        assert "(none)" not in groups, name  # the fault: no compactor for the set-aside lot
        assert col == "compactor" and dict(zip(order, groups)) == {v: compactor[v] for v in order}, name
        expected = [v for v in before["lot"].astype(str) if v in set(oof_lots)]  # the time order before set-aside
        assert order == expected, name
        assert [v for v, m in zip(order, marked) if m] == [lot], name


def test_the_figure_marks_it_set_aside_and_keeps_the_compactors_colours(lab):
    import matplotlib

    matplotlib.use("Agg")
    from linkage.report import figures as F
    from linkage.report.html import _attribute_figure, attribute_lots

    store, chain, before, lot = lab
    _, _, frame = _figure_lots(store, chain)
    name, target = next(iter(chain.targets.items()))
    order, col, groups, marked = attribute_lots(frame, [str(v) for v in target.oof.index])
    fig = _attribute_figure(name, target, target.oof.reindex(order), order, groups, col, None, marked)
    for ax in fig.axes:
        legend = ax.get_legend()
        labels = [t.get_text() for t in legend.get_texts()]
        assert F.SET_ASIDE_LABEL in labels and "(none)" not in labels
        # the hollow marker is drawn on top of every filled marker (a regression test: it was drawn beneath the
        # groups drawn after its own); hollow: a scatter with no (or a transparent) face and points in it
        from matplotlib.collections import PathCollection  # what ax.scatter draws

        drawn = [c for c in ax.collections if isinstance(c, PathCollection) and len(c.get_offsets())]
        hollow = [c for c in drawn if not len(c.get_facecolors()) or c.get_facecolors()[0][3] == 0]
        filled = [c for c in drawn if c not in hollow]
        assert hollow and filled and min(c.get_zorder() for c in hollow) > max(c.get_zorder() for c in filled)
    # the compactors' styles are those of the lots without the set-aside one: the same colour for the same
    # compactor as in a report of the same store before the lot was set aside
    assert F.group_styles(sorted(set(groups))) == F.group_styles(sorted(set(before["compactor"].astype(str))))
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_without_the_set_aside_rows_the_lot_would_be_drawn_last_with_no_compactor(lab):
    """The fault as the user test found it, kept as the contrast of the fix: the table alone does not place it."""
    from linkage.report.html import attribute_lots, lots_frame

    store, chain, before, lot = lab
    table, _, _ = _figure_lots(store, chain)
    target = next(iter(chain.targets.values()))
    order, _, groups, marked = attribute_lots(lots_frame(table, None), [str(v) for v in target.oof.index])
    assert order[-1] == lot and groups[-1] == "(none)" and not any(marked)


def test_at_a_glance_says_why_the_table_has_fewer_lots_than_the_model(lab):
    from linkage.report.html import _glance_aside

    store, chain, before, lot = lab
    with LotStore(store, create=False) as s:
        aside = s.set_aside_lots()
    assert _glance_aside(chain, aside) == (f"1 lot set aside in the store ({lot}) is left out of the table; it was "
                                           "among the lots the model was trained on")
    assert _glance_aside(chain, {}) == ""
    other = {"NOT-TRAINED": {"reason": REASON}}
    assert _glance_aside(chain, other).endswith("none of them was among the model's training lots")


def test_the_domain_section_says_the_set_aside_training_lot_is_not_counted(lab):
    """A regression test of the domain section's text (no outside source): its 'training lots' count is of the
    table's lots, so a training lot set aside since training is named as not counted nor drawn."""
    from linkage.report.html import _domain_aside_text

    store, chain, _, lot = lab
    with LotStore(store, create=False) as s:
        aside = s.set_aside_lots()
    assert _domain_aside_text(chain, aside) == (f"1 of the model's training lots is set aside since training ({lot}): "
                                                "not in this report's table, so not counted among the training "
                                                "lots below nor drawn in the charts.")
    assert _domain_aside_text(chain, {}) == ""
