"""Shared fixtures of the report and explanation tests.

One chain is trained per session on synthetic lots (:mod:`linkage.synthetic`,
36 lots, a grouped 10-fold outer CV) whose raw tables carry hostile text: a
lot named ``<script>alert(1)</script>`` and a compactor whose name is an HTML
tag. Every report test uses that chain, so every test of the report also
checks that the hostile names went through raw tables, assembly, training
and rendering.
"""

from __future__ import annotations

import pytest

#: a lot id that would run a script if the report did not escape it
EVIL_LOT = "<script>alert(1)</script>"
#: a compactor name that would be an element (with an event handler) if not escaped
EVIL_COMPACTOR = 'pilot <img src=x onerror="alert(2)"> & co'
#: candidates trained in the tests: fewer than the default, to keep the session short
CANDIDATES = ["rd_baseline", "pls", "boosting"]


def _hostile(tables: dict) -> dict:
    """The raw tables with lot LOT-007 renamed to EVIL_LOT everywhere and the
    pilot compactor renamed to EVIL_COMPACTOR."""
    out = {}
    for name, df in tables.items():
        df = df.copy()
        df["lot"] = df["lot"].astype(str).replace({"LOT-007": EVIL_LOT})
        if "compactor" in df.columns:
            df["compactor"] = df["compactor"].replace({"pilot": EVIL_COMPACTOR})
        out[name] = df
    return out


@pytest.fixture(scope="session")
def lots():
    from linkage.synthetic import make_lots

    made = make_lots(36, seed=1, with_vessels=True)
    made.tables = _hostile(made.tables)
    return made


@pytest.fixture(scope="session")
def table(lots):
    from linkage.assemble import assemble

    return assemble(lots.tables)


@pytest.fixture(scope="session")
def chain(table):
    from linkage.models.train import train_chain

    return train_chain(table, seed=0, candidates=CANDIDATES)


@pytest.fixture(scope="session")
def spec():
    from linkage.spec import Limit, Spec

    # the synthetic product's window scenario limits (linkage.synthetic.WINDOW_SPEC)
    from linkage.synthetic import WINDOW_SPEC

    return Spec(limits={name: Limit(min=lo, max=hi) for name, (lo, hi) in WINDOW_SPEC.items()})


@pytest.fixture(scope="session")
def report(chain, table, spec):
    from linkage.report.html import render_report

    return render_report(chain, table, spec=spec, curve_draws=200)
