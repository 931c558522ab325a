"""The fold jobs of training through another joblib backend give the same chain.

Reference: the default backend (the jobs run one after another in this
process). A local Dask cluster with two worker processes must give the same
selected models, cross-validated metrics, out-of-fold predictions,
hyperparameters, intervals and predictions, bit for bit: the jobs are seeded
and independent and joblib returns them in order. The Dask test is skipped
when dask.distributed is not installed (the 'distributed' extra).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from linkage.assemble import assemble
from linkage.exceptions import UsageError
from linkage.models.train import train_chain
from linkage.synthetic import make_lots

#: small but not trivial: 40 lots is a grouped 10-fold outer loop
CANDIDATES = ["rd_baseline", "pls", "quadratic_ridge"]


@pytest.fixture(scope="module")
def table():
    return assemble(make_lots(40, seed=3).tables)


@pytest.fixture(scope="module")
def reference(table):
    return train_chain(table, seed=0, candidates=CANDIDATES)


def _assert_same_chain(a, b, table):
    assert list(a.targets) == list(b.targets)
    assert a.skipped == b.skipped
    for name, ta in a.targets.items():
        tb = b.targets[name]
        assert tb.selected == ta.selected, name
        assert tb.candidates == ta.candidates, name  # RMSE, MAE, Q², bias, SE, coverage of every candidate
        assert tb.unavailable == ta.unavailable, name
        assert tb.hyperparameters == ta.hyperparameters, name
        assert tb.coverage == ta.coverage, name
        pd.testing.assert_frame_equal(tb.oof, ta.oof, check_exact=True)
        X = table[ta.inputs].dropna()
        assert np.array_equal(tb.predict(X), ta.predict(X)), name
        lo_a, hi_a = ta.interval(X)
        lo_b, hi_b = tb.interval(X)
        assert np.array_equal(lo_a, lo_b) and np.array_equal(hi_a, hi_b), name


def test_threads_give_the_same_chain(table, reference):
    got = train_chain(table, seed=0, candidates=CANDIDATES, n_jobs=2, backend="threading")
    _assert_same_chain(reference, got, table)


def test_an_unknown_backend_is_refused(table):
    with pytest.raises(UsageError, match="unknown parallel backend 'spark'.*loky"):
        train_chain(table, seed=0, candidates=CANDIDATES, backend="spark")


def test_a_local_dask_cluster_gives_the_same_chain(table, reference):
    distributed = pytest.importorskip(
        "dask.distributed", reason="dask.distributed is not installed (pip install 'linkage[distributed]')")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, distributed.Client(cluster):
        got = train_chain(table, seed=0, candidates=CANDIDATES, n_jobs=-1, backend="dask")
    _assert_same_chain(reference, got, table)


def test_the_dask_backend_without_a_client_is_refused(table):
    distributed = pytest.importorskip(
        "dask.distributed", reason="dask.distributed is not installed (pip install 'linkage[distributed]')")
    try:
        distributed.get_client()
    except ValueError:
        pass
    else:  # pragma: no cover - only when some other test left a client behind
        pytest.skip("a Dask client is already running in this process")
    with pytest.raises(UsageError, match="needs a running Dask client"):
        train_chain(table, seed=0, candidates=CANDIDATES, backend="dask")
