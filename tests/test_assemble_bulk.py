"""assemble on many lots at once (issue 8): the sieve analyses of lots that
share a sieve stack are computed as one matrix; the numbers must be those of
the lot-by-lot path through linkage.physics.psd, to the last bit.

Reference: the lot-by-lot path (``psd.cumulative_undersize_pct``,
``psd.percentile_size_um``, ``psd.fines_pct``, ``psd.fit_rrsb``), which
tests/physics checks against published worked examples; and numpy's
``np.unique(axis=0)`` for the grouping of equal sieve stacks.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from linkage import assemble as assemble_module
from linkage.assemble import _same_rows, assemble
from linkage.read import read_folder
from linkage.synthetic import make_lots


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    path = tmp_path_factory.mktemp("lots")
    make_lots(90, seed=4, with_units=0.6, with_vessels=0.6, raw_materials=True, product="P").write_csv(path)
    tables = read_folder(path).tables
    g = tables["granules"].copy()
    lots = g["lot"].unique().tolist()
    g.loc[g["lot"] == lots[2], "retained_g"] = np.nan  # a missing mass: left to the lot-by-lot path
    coarse = g["lot"].isin(lots[5:9]) & (g["sieve_um"] >= 800)  # d90 above the top sieve: notes
    g.loc[coarse, "retained_g"] *= 40
    one = g["lot"] == lots[10]  # everything on one sieve: too few points for the RRSB fit
    g.loc[one, "retained_g"] = np.where(g.loc[one, "sieve_um"] == g.loc[one, "sieve_um"].max(), 50.0, 0.0)
    for k in range(20):  # 20 more stacks of two lots each (a top sieve of its own): more than a few stacks
        pair = g["lot"].isin(lots[30 + 2 * k:32 + 2 * k]) & (g["sieve_um"] == g["sieve_um"].max())
        g.loc[pair, "sieve_um"] += k + 1
    shorter = g["lot"].isin(lots[75:80]) & (g["sieve_um"] == g["sieve_um"].min())  # one sieve fewer
    g = g[~shorter].reset_index(drop=True)
    tables["granules"] = g
    return tables


def test_sieve_matrix_equals_lot_by_lot_physics(tables, monkeypatch):
    fast = assemble(tables, dissolution_q_pct=80.0)
    monkeypatch.setattr(assemble_module, "_sieve_stacks", lambda *args: {})
    slow = assemble(tables, dissolution_q_pct=80.0)
    pd.testing.assert_frame_equal(fast, slow, check_exact=True)
    assert fast.attrs["notes"] == slow.attrs["notes"]
    notes = "\n".join(fast.attrs["notes"])
    assert "lies outside the sieve stack" in notes and "no RRSB fit" in notes and "has no mass" in notes


def test_the_matrix_path_takes_most_lots(tables):
    """The comparison above is only worth something if the matrix path ran."""
    g = tables["granules"]
    names, order, bounds = assemble_module._by_lot(g["lot"].astype(str))
    fast = assemble_module._sieve_stacks(names, g["sieve_um"].to_numpy(float)[order],
                                         g["retained_g"].to_numpy(float)[order], bounds, 125.0)
    assert len(fast) >= 80


def _groups(pairs):
    return sorted((tuple(np.asarray(x).tolist()), tuple(m.tolist())) for x, m in pairs)


@pytest.mark.parametrize("distinct", [1, 3, 16, 17, 40])
def test_same_rows_groups_as_numpy_unique(distinct):
    rng = np.random.default_rng(distinct)
    stacks = rng.integers(0, 5, size=(distinct, 6)).astype(float)
    S = stacks[rng.integers(0, distinct, size=200)]
    S[rng.integers(0, 200, size=7), 2] = np.nan  # rows with a NaN are left out
    zeros = np.argwhere(S == 0)[::2]
    S[zeros[:, 0], zeros[:, 1]] = -0.0  # equal to 0.0, as np.unique compares them
    keep = ~np.isnan(S).any(axis=1)
    uniq, which = np.unique(S[keep], axis=0, return_inverse=True)
    expected = [(u, np.flatnonzero(keep)[which.reshape(-1) == s]) for s, u in enumerate(uniq)]
    assert _groups(_same_rows(S)) == _groups(expected)
    B = S[keep] > 2  # booleans, as the RRSB fit groups its point patterns
    uniq, which = np.unique(B, axis=0, return_inverse=True)
    assert _groups(_same_rows(B)) == _groups([(u, np.flatnonzero(which.reshape(-1) == s))
                                              for s, u in enumerate(uniq)])
