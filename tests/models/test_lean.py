"""The lean form of a fitted chain (linkage.models.lean) gives the numbers the
fitted chain gives: every candidate's prediction and contributions, the CV+
interval, the applicability-domain verdict; and its file holds no pickle.

References: the fitted estimators themselves, and behind them scikit-learn
(``HistGradientBoostingRegressor.predict``, ``PLSRegression``) and shap
(``TreeExplainer``, Lundberg et al. 2020, Nat. Mach. Intell. 2:56-67).
"""

from __future__ import annotations

import io

import numpy as np
import pytest

from linkage.models import lean
from linkage.models.chain import ChainSpec, StageSpec
from tests.models.conftest import assembled_table

INPUTS = ["ribbon_porosity", "granule_d50_um", "fines_pct", "compression_force_kn"]
KINDS = {"mean": "mean", "rd_baseline": "rd", "pls": "linear", "quadratic_ridge": "quadratic", "boosting": "trees",
         "log_linear": "link", "weibull_release": "link", "linear_select": "link"}


@pytest.fixture(scope="module")
def fit():
    from linkage.models.train import train_chain

    table = assembled_table(40, seed=5)
    chain = ChainSpec([StageSpec("tablets", INPUTS, ["dissolution_pct", "tensile_strength_mpa"])])
    return table, train_chain(table, chain, seed=0)


@pytest.fixture(scope="module")
def new_points():
    """New lots from the same truth: most inside the training range, some outside."""
    table = assembled_table(700, seed=9)  # > 512 rows: the fitted boosting calls scikit-learn's predict
    return table[INPUTS]


def test_every_candidate_predicts_the_same_floats(fit, new_points):
    _, chain = fit
    X = new_points.to_numpy(float)
    seen = set()
    for target in chain.targets.values():
        for name, est in target.full_models_.items():
            model = lean.Model(lean._model_spec(est))
            assert model.kind == KINDS[name]
            np.testing.assert_array_equal(model.predict(X), est.predict(X))
            np.testing.assert_array_equal(model.predict(X[:3]), est.predict(X[:3]))
            seen.add(name)
    assert seen == set(KINDS)


def test_trees_equal_scikit_learn_and_shap(fit, new_points):
    """Against the reference libraries directly, not through our estimator."""
    _, chain = fit
    X = new_points.to_numpy(float)
    est = chain.targets["dissolution_pct"].full_models_["boosting"]
    model = lean.Model(lean._model_spec(est))
    np.testing.assert_array_equal(model.predict(X), est.model_.predict(X))  # scikit-learn's own predictor
    shap = pytest.importorskip("shap")
    explainer = shap.TreeExplainer(est.model_)
    phi, base = model.contributions(X[:20])
    np.testing.assert_allclose(phi, np.asarray(explainer.shap_values(X[:20])).reshape(20, -1), rtol=0, atol=1e-10)
    assert base == pytest.approx(float(np.asarray(explainer.expected_value).reshape(-1)[0]), abs=1e-10)


def test_every_candidate_gives_the_same_contributions(fit, new_points):
    _, chain = fit
    X = new_points.to_numpy(float)[:25]
    for target in chain.targets.values():
        for name, est in target.full_models_.items():
            phi, base = lean.Model(lean._model_spec(est)).contributions(X)
            phi_ref, base_ref = est.contributions(X)
            np.testing.assert_array_equal(phi, phi_ref)
            assert base == base_ref
            # contributions add up to prediction − base (the property every explainer here promises)
            np.testing.assert_allclose(phi.sum(axis=1), est.predict(X) - base, rtol=0, atol=1e-9)


def test_target_prediction_interval_and_domain_equal_the_fitted_chain(fit, new_points):
    _, chain = fit
    light = lean.from_npz_bytes(lean.to_npz_bytes(lean.export(chain)))
    columns = {c: new_points[c].to_numpy(float) for c in INPUTS}
    for name, target in chain.targets.items():
        twin = light.targets[name]
        assert twin.selected == target.selected
        np.testing.assert_array_equal(twin.predict(columns), target.predict(new_points))
        for level in (0.5, 0.8, 0.9):
            lo, hi = twin.interval(columns, level)
            lo_ref, hi_ref = target.interval(new_points, level)
            np.testing.assert_array_equal(lo, lo_ref)
            np.testing.assert_array_equal(hi, hi_ref)
    stage, twin_stage = chain.stages[0], light.stages[0]
    ours = twin_stage.domain.check(columns)
    ref = stage.domain.check(new_points)
    assert [v["in_domain"] for v in ours] == [v.in_domain for v in ref]
    assert any(not v.in_domain for v in ref) and any(v.in_domain for v in ref)
    for a, b in zip(ours, ref):
        assert a["reasons"] == b.reasons
        assert a["t2"] == b.t2 and a["q"] == b.q
    table = stage.residual_table()
    np.testing.assert_array_equal(twin_stage.residual_matrix, table.to_numpy(float))
    assert twin_stage.residual_lots == [str(v) for v in table.index]


def test_the_file_holds_no_pickle_and_round_trips(fit):
    _, chain = fit
    data = lean.to_npz_bytes(lean.export(chain))
    with np.load(io.BytesIO(data), allow_pickle=False) as npz:  # an object array would raise here
        assert all(not npz[k].dtype.hasobject for k in npz.files)
        assert len(npz.files) > 10
    assert lean.to_npz_bytes(lean.export(chain)) == data  # the same model, the same bytes
    light = lean.from_npz_bytes(data)
    assert light.medians == {k: v for k, v in chain.training["medians"].items()}
    assert light.root_inputs() == chain.chain.root_inputs()


def test_a_damaged_file_is_refused_clearly():
    from linkage.exceptions import UsageError

    with pytest.raises(UsageError, match="not a lean chain"):
        lean.from_npz_bytes(b"not a zip file")
    buf = io.BytesIO()
    np.savez(buf, x=np.arange(3))
    with pytest.raises(UsageError, match="no header"):
        lean.from_npz_bytes(buf.getvalue())


@pytest.mark.parametrize(
    ("value", "limit", "digits"),
    [
        (0.45051, 0.45049, 5),  # equal at 4 digits (0.4505): one more each
        (12.5, 9.75, 4),  # different at 4 digits: as always
        (1.0000000000001, 1.0, 12),  # equal even at 12 digits: stops there
    ],
)
def test_a_value_beyond_its_limit_is_shown_with_the_digits_that_tell_them_apart(value, limit, digits):
    # Reference: Python's format specification (format(v, ".Ng"), Python Language Reference,
    # "Format Specification Mini-Language"); the rule (4 digits, more until they differ) is ours.
    assert lean._fmt_beyond(value, limit) == (format(value, f".{digits}g"), format(limit, f".{digits}g"))


def test_link_inputs_take_the_log_of_the_logged_columns_only_with_the_same_values():
    """``_link_inputs`` takes ln x only in the columns some replicate logs (it took the log of every input of
    the map's B × rows × inputs stacks and kept the logged ones): the result is numpy's own
    ``where(mask, log(max(x, tiny)), x)`` over the whole array, element for element, for one mask or one per
    replicate, with values at or below zero (reference: numpy's log and where on the same array)."""
    import numpy as np

    from linkage.models.lean import _link_inputs

    from linkage.models.lean import link_predict

    rng = np.random.default_rng(7)
    cases = [((40, 6), (6,)), ((12, 25, 5), (12, 1, 5)), ((3, 4), (4,)), ((9, 4), (4, 1, 4)), ((9, 4), (1,)),
             ((9, 4), ())]  # the last three broadcast: a mask of more axes than X, of one column, a scalar
    for shape, mask_shape in cases:
        for layout in (np.ascontiguousarray, np.asfortranarray):  # a DataFrame's array is Fortran-ordered
            X = rng.normal(1.0, 2.0, shape)  # some at or below zero
            X.flat[0] = 0.0
            X = layout(X)
            for _ in range(15):
                mask = rng.random(mask_shape) < rng.random()
                with np.errstate(divide="ignore", invalid="ignore"):  # no input logged: X itself, as before
                    expected = np.where(mask, np.log(np.maximum(X, np.finfo(float).tiny)), X) if mask.any() else X
                got = _link_inputs(X, mask)
                assert np.array_equal(got, expected)
                if X.ndim == 2 and mask.ndim <= 1:  # the product after it sums in the same order: equal to the bit
                    coef, x_mean = rng.normal(size=shape[-1]), rng.normal(size=shape[-1])
                    reference = (expected - x_mean) @ coef + 0.5
                    assert np.array_equal(link_predict(X, "identity", mask, x_mean, coef, 0.5), reference)
