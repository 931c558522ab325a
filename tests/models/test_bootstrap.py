"""The lot-level bootstrap of the chain (linkage.models.bootstrap) and the
arithmetic that evaluates its replicates (linkage.decide.bound).

References: scipy.stats.bootstrap (percentile method, one-sided) for the
resampling and the percentile bound (Efron & Tibshirani 1993, An
Introduction to the Bootstrap, §13.3); numpy.quantile (linear interpolation,
Hyndman & Fan 1996 type 7); the lean models of linkage.models.lean, which
tests/models/test_lean.py checks against scikit-learn, for the stacked
evaluation of the replicates.
"""

from __future__ import annotations

import inspect

import numpy as np
import pytest
from scipy import stats

from linkage.decide.bound import _Loop, _Stacked, check_assurance, lower_bound
from linkage.exceptions import UsageError
from linkage.models.bootstrap import pack_specs, resample_counts, unpack_specs
from linkage.models.candidates import CANDIDATES
from linkage.models.lean import Model

INPUTS = ["ribbon_porosity", "granule_d50_um", "fines_pct"]


@pytest.fixture(scope="module")
def decide_chain():
    """The default chain trained on tests/models/conftest.py's stated truth (40 lots), with its replicates."""
    from linkage.models.train import train_chain
    from tests.models.conftest import assembled_table

    table = assembled_table(40, seed=3)
    return train_chain(table, seed=0, candidates=["pls", "quadratic_ridge", "rd_baseline"]), table


@pytest.mark.parametrize("assurance", [0.9, 0.95, 0.8])
def test_resamples_and_percentile_bound_are_scipys(assurance):
    """The lot draws are the index matrix scipy.stats.bootstrap draws from the
    same generator, and the bound is its one-sided percentile limit
    (method='percentile', alternative='greater', confidence_level = assurance)."""
    rng = np.random.default_rng(5)
    x = (rng.normal(size=37) > -1.0).astype(float)  # pass (1) / fail (0) of 37 lots: P(pass) is their mean
    B, seed = 999, 123
    counts = resample_counts(x.size, B, seed)
    assert counts.shape == (B, x.size) and (counts.sum(axis=1) == x.size).all()
    replicates = counts @ x / x.size
    # scipy 1.15 named the generator argument rng; before it was random_state (the floor, 1.11, has only that)
    generator = ("rng" if "rng" in inspect.signature(stats.bootstrap).parameters else "random_state")
    ref = stats.bootstrap((x,), np.mean, n_resamples=B, method="percentile", alternative="greater",
                          confidence_level=assurance, vectorized=True, **{generator: np.random.default_rng(seed)})
    np.testing.assert_allclose(np.sort(replicates), np.sort(ref.bootstrap_distribution), rtol=0, atol=1e-12)
    assert lower_bound(replicates, assurance) == pytest.approx(ref.confidence_interval.low, abs=1e-12)
    # capped at the point estimate
    assert lower_bound(replicates, assurance, point=0.0) == 0.0


def test_lower_bound_is_numpys_quantile_per_column_ignoring_failed_replicates():
    reps = np.random.default_rng(0).uniform(size=(200, 5))
    reps[3, 2] = np.nan  # a replicate that drew none of a stage's lots
    low = lower_bound(reps, 0.9)
    for j in range(5):
        col = reps[:, j][np.isfinite(reps[:, j])]
        assert low[j] == pytest.approx(np.quantile(col, 0.1, method="linear"), abs=1e-15)


@pytest.mark.parametrize("bad", [0, 1, -0.1, 1.5, float("nan"), "x", None])
def test_assurance_outside_zero_one_is_refused(bad):
    with pytest.raises(UsageError, match="assurance"):
        check_assurance(bad)


def _fitted(name, params, X, y, seed=0):
    return CANDIDATES[name].build(params, INPUTS, n=len(y), seed=seed).fit(X, y)


def _data(n, seed):
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.uniform(0.2, 0.45, n), rng.uniform(150, 350, n), rng.uniform(10, 30, n)])
    y = 60 + 80 * X[:, 0] + 0.02 * X[:, 1] - 0.3 * X[:, 2] + rng.normal(0, 1.5, n)
    return X, y


@pytest.mark.parametrize("name, params", [("pls", {"n_components": 2}), ("quadratic_ridge", {"alpha": 1.0}),
                                          ("mean", {}), ("rd_baseline", {}), ("boosting", {"max_iter": 10}),
                                          ("log_linear", {"features": [0, 2], "log_inputs": True}),
                                          ("weibull_release", {"features": [0, 1, 2], "log_inputs": False}),
                                          ("linear_select", {"features": [1], "log_inputs": True})])
def test_packed_replicates_predict_as_the_lean_models(name, params):
    """B fits on different resamples, packed into arrays and unpacked, predict
    as the lean model of each fit; the stacked evaluation (all replicates at
    once) gives the same numbers as the lean models one by one."""
    if name == "rd_baseline":
        params = {}
    X, y = _data(60, 1)
    y = np.abs(y) if name != "weibull_release" else np.clip(y, 1.0, 99.0)  # a release percentage
    rng = np.random.default_rng(2)
    specs = []
    for _ in range(6):
        rows = rng.integers(0, len(y), len(y))
        specs.append(_fitted(name, params, X[rows], y[rows]).lean_spec())
    packed = pack_specs(specs)
    back = unpack_specs(packed)
    X_new, _ = _data(25, 3)
    X3 = np.stack([X_new] * len(specs))
    expected = np.stack([Model(s).predict(X_new) for s in specs])
    np.testing.assert_array_equal(np.stack([Model(s).predict(X_new) for s in back]), expected)
    stacked = _Stacked.from_packed(packed)
    if name == "boosting":
        assert stacked is None  # trees of different sizes: evaluated one by one
        np.testing.assert_array_equal(_Loop([Model(s) for s in back]).predict(X3), expected)
    else:
        np.testing.assert_allclose(stacked.predict(X3), expected, rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(stacked.take([1, 4]).predict(X3[:2]), expected[[1, 4]], rtol=1e-12, atol=1e-9)


def test_nested_lean_fields_are_refused():
    with pytest.raises(TypeError, match="nested"):
        pack_specs([{"kind": "x", "a": {"b": 1}}, {"kind": "x", "a": {"b": 2}}])


def test_a_replicate_is_the_selected_candidate_refitted_on_the_drawn_lots(decide_chain):
    """Replicate b of a target equals the selected candidate, built with its
    full-data hyper-parameters, fitted on the lots replicate b drew (each as
    many times as drawn), here refitted by hand."""
    from linkage.models.train import _prepare

    chain, table = decide_chain
    bs = chain.bootstrap
    assert bs["n_replicates"] == bs["requested"] == 200 and bs["failed"] == 0 and bs["reason"] is None
    data, _ = _prepare(table, chain.chain)
    assert bs["lots"] == [str(v) for v in data["lot"]]
    name = "dissolution_pct"
    t = chain.targets[name]
    b = 17
    where = {lot: i for i, lot in enumerate(bs["lots"])}
    sub = data.set_index("lot").loc[t.lots, list(t.inputs) + [name]].to_numpy(float)
    rows = np.repeat(np.arange(len(t.lots)), bs["counts"][b, [where[lot] for lot in t.lots]])
    est = CANDIDATES[t.selected].build(t.hyperparameters["full_data"][t.selected], list(t.inputs), n=len(rows),
                                       monotone=dict(chain.chain.stage_of(name).monotone.get(name, {})),
                                       seed=chain.seed).fit(sub[rows, :-1], sub[rows, -1])
    mine = unpack_specs(bs["targets"][name])[b]
    X_new = sub[:10, :-1]
    np.testing.assert_allclose(Model(mine).predict(X_new), Model(est.lean_spec()).predict(X_new), rtol=1e-10)


def test_n_bootstrap_zero_stores_none_and_bad_values_are_refused(decide_chain):
    from linkage.models.train import train_chain

    _, table = decide_chain
    small = table.head(12)
    chain = train_chain(small, seed=0, n_bootstrap=0, candidates=["pls"])
    assert chain.bootstrap["n_replicates"] == 0 and "n_bootstrap = 0" in chain.bootstrap["reason"]
    assert chain.metadata()["bootstrap"]["n_replicates"] == 0
    for bad in (-1, 2.5, True):
        with pytest.raises(UsageError, match="n_bootstrap"):
            train_chain(small, seed=0, n_bootstrap=bad)
