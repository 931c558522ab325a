"""The candidate registry: every candidate is one class, registered once and
placed in the simplicity order, and owns its rules."""

from __future__ import annotations

import numpy as np
import pytest

from linkage.models.candidates import CANDIDATES, Candidate, CandidateSpec, register
from linkage.models.cv import SIMPLICITY_ORDER
from linkage.models.physical import PHYSICAL_INPUTS


def test_the_registry_and_the_simplicity_order_name_the_same_candidates():
    assert list(CANDIDATES) == list(SIMPLICITY_ORDER)
    for name, cls in CANDIDATES.items():
        assert issubclass(cls, Candidate) and cls.name == name and cls.description


def test_candidate_spec_is_the_base_class_under_its_former_name():
    assert CandidateSpec is Candidate


def test_a_name_cannot_be_registered_twice():
    class Other(Candidate):
        name = "pls"

    with pytest.raises(TypeError, match="taken by PLSRegressor"):
        register(Other)
    assert CANDIDATES["pls"].__name__ == "PLSRegressor"


def test_a_new_candidate_is_one_class():
    """A candidate defined as one subclass, with only the methods it needs,
    is tuned by the same grid loop as the built-in ones; here least squares
    on one input, checked against numpy's polyfit."""

    class FirstInputLine(Candidate):
        name = "first_input_line"
        description = "least squares on the first input (a test's candidate)"

        def _fit(self, X, y):
            self.slope_, self.intercept_ = np.polyfit(X[:, 0], y, 1)
            return self

        def _predict(self, X):
            return self.slope_ * X[:, 0] + self.intercept_

    rng = np.random.default_rng(0)
    X = rng.normal(size=(20, 2))
    y = 3 * X[:, 0] + 1 + rng.normal(0, 0.1, 20)
    assert FirstInputLine.not_applicable(["a", "b"], X, y) is None
    assert FirstInputLine.not_applicable(["a", "b"], np.ones((20, 2)), y) == "no input varies over the training lots"
    (pred,) = FirstInputLine.fit_predict_grid(FirstInputLine.grid(20, 2), X, y, [X[:3]], inputs=["a", "b"],
                                              monotone=None, seed=0)
    slope, icpt = np.polyfit(X[:, 0], y, 1)
    assert pred[0] == pytest.approx(slope * X[:3, 0] + icpt, rel=1e-12)
    assert "first_input_line" not in CANDIDATES  # registering is a deliberate step


def _domain_data(name: str, n: int, seed: int, exact: bool = False):
    """(X, y, inputs) inside the candidate's domain: a strength-like target on (ribbon_porosity, roll_gap_mm) for
    every candidate but the Johanson baseline, which needs roll force, gap and roll diameter and a porosity target
    (its own law, K = 5.5, C = 700 MPa: this test's stated truth)."""
    rng = np.random.default_rng(seed)
    if name == "johanson_baseline":
        from linkage.physics.rolling import johanson_ribbon_porosity

        X = np.column_stack([rng.uniform(4, 14, n), rng.uniform(1.5, 3.5, n), np.where(np.arange(n) % 2, 200., 400.)])
        y = johanson_ribbon_porosity(X[:, 0], X[:, 1], X[:, 2], 5.5, 700.0)
        return X, y + (0 if exact else rng.normal(0, 0.005, n)), list(PHYSICAL_INPUTS)
    X = np.column_stack([rng.uniform(0.1, 0.4, n), rng.normal(size=n)])
    y = 5 * np.exp(-4 * X[:, 0]) + (0 if exact else rng.normal(0, 0.01, n))
    return X, y, ["ribbon_porosity", "b" if exact else "roll_gap_mm"]


@pytest.mark.parametrize("name", list(SIMPLICITY_ORDER))
def test_every_candidate_refuses_nan_at_fit_and_use_before_fit(name):
    """scikit-learn's contract (check_is_fitted raises NotFittedError before
    fit; NaN refused where the estimator does not handle missing values)."""
    from sklearn.exceptions import NotFittedError

    cls = CANDIDATES[name]
    X, y, inputs = _domain_data(name, 12, seed=1, exact=True)
    est = cls.build(cls.grid(12, X.shape[1])[0], inputs, n=12)
    with pytest.raises(NotFittedError):
        est.predict(X)
    X_nan = X.copy()
    X_nan[3, 1] = np.nan
    with pytest.raises(ValueError, match=rf"{cls.__name__}\.fit: .*NaN.*X row 3, column 1.*do not impute"):
        est.fit(X_nan, y)
    est.fit(X, y)
    with pytest.raises(ValueError, match=rf"X has 1 features, but {cls.__name__} is expecting {X.shape[1]} features"):
        est.predict(X[:, :1])
    X_nan[3, 1] = np.inf
    with pytest.raises(ValueError, match=rf"{cls.__name__}: the inputs contain NaN or infinite values \(X row 3, "
                                         r"column 1\); a prediction needs every input"):
        est.predict(X_nan)


@pytest.mark.parametrize("name", list(SIMPLICITY_ORDER))
def test_every_candidate_records_and_checks_feature_names(name):
    """scikit-learn's contract for column names (validate_data): a DataFrame
    at fit sets feature_names_in_; other names at predict are refused; an
    array at fit sets none. The predictions are the same floats either way
    (the array in the frame's own memory layout: PLS's floats depend on it
    in the last bit, as they did before validate_data)."""
    import pandas as pd

    cls = CANDIDATES[name]
    X, y, inputs = _domain_data(name, 16, seed=2)
    frame = pd.DataFrame(X, columns=inputs)
    build = lambda: cls.build(cls.grid(16, X.shape[1])[0], inputs, n=16)  # noqa: E731
    by_name, by_array = build().fit(frame, y), build().fit(frame.to_numpy(), y)
    assert list(by_name.feature_names_in_) == inputs and by_name.n_features_in_ == len(inputs)
    assert not hasattr(by_array, "feature_names_in_") and by_array.n_features_in_ == len(inputs)
    assert np.array_equal(by_name.predict(frame), by_array.predict(frame.to_numpy()))
    with pytest.raises(ValueError, match="feature names"):
        by_name.predict(frame[inputs[::-1]])


@pytest.mark.parametrize("name", list(SIMPLICITY_ORDER))
def test_the_short_path_for_float_arrays_does_what_validate_data_does(name):
    """Reference: scikit-learn's own ``validate_data`` (the estimator's
    ``_validate_data`` at scikit-learn 1.5). For the float64 arrays training
    passes, the candidates' short path must give the same array, the same
    ``n_features_in_`` and the same refusal of another input count."""
    from linkage.models.candidates import _sklearn_validate_data, validate_inputs

    cls = CANDIDATES[name]
    X = np.random.default_rng(3).uniform(0.1, 0.4, (10, 3))
    ours, theirs = cls(), cls()
    out_ours = validate_inputs(ours, X, reset=True)
    out_theirs = _sklearn_validate_data(theirs, X, reset=True, dtype=np.float64)
    assert out_ours is X and np.shares_memory(out_theirs, X) and np.array_equal(out_ours, out_theirs)
    assert ours.n_features_in_ == theirs.n_features_in_ == 3
    assert not hasattr(ours, "feature_names_in_") and not hasattr(theirs, "feature_names_in_")
    for bad in (X[:, :2], np.hstack([X, X])):
        with pytest.raises(ValueError) as mine:
            validate_inputs(ours, bad, reset=False)
        with pytest.raises(ValueError) as reference:
            _sklearn_validate_data(theirs, bad, reset=False, dtype=np.float64)
        assert str(mine.value) == str(reference.value)
