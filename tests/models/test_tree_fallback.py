"""The tree walker reads scikit-learn's private tree layout; when a release
renames it, predict falls back to scikit-learn's own predict and
contributions to shap's TreeExplainer, and the lean export refuses clearly.

The rename is simulated by a HistGradientBoostingRegressor whose private
``_predictors`` and ``_baseline_prediction`` are hidden from every caller
outside scikit-learn and shap (as a renamed attribute would be to linkage,
while scikit-learn itself, and a shap release that follows it, still read it).
"""

from __future__ import annotations

import sys

import numpy as np
import pytest
import sklearn.ensemble
from sklearn.ensemble import HistGradientBoostingRegressor

from linkage.models.candidates import BoostingRegressor, tree_predict, tree_shap_values

_HIDDEN = {"_predictors", "_baseline_prediction"}


class _Renamed(HistGradientBoostingRegressor):
    def __getattribute__(self, name):
        if name in _HIDDEN:
            caller = sys._getframe(1).f_globals.get("__name__", "")
            if not caller.startswith(("sklearn", "shap")):
                raise AttributeError(name)
        return super().__getattribute__(name)


# shap recognises the model by its class path; keep scikit-learn's
_Renamed.__name__ = _Renamed.__qualname__ = "HistGradientBoostingRegressor"
_Renamed.__module__ = HistGradientBoostingRegressor.__module__


def _data():
    rng = np.random.default_rng(5)
    X = rng.uniform(0, 1, size=(60, 3))
    y = np.sin(4 * X[:, 0]) + X[:, 1] + rng.normal(0, 0.1, 60)
    return X, y


def test_predict_and_contributions_fall_back_when_the_private_tree_layout_is_gone(monkeypatch):
    """Reference: scikit-learn's own predict and shap.TreeExplainer (Lundberg
    et al. 2020) on the same fitted trees."""
    shap = pytest.importorskip("shap")
    X, y = _data()
    normal = BoostingRegressor(max_iter=20).fit(X, y)
    explainer = shap.TreeExplainer(normal.model_)  # before the patch: shap finds the class by its path
    ref = np.asarray(explainer.shap_values(X[:8]), float)
    monkeypatch.setattr(sklearn.ensemble, "HistGradientBoostingRegressor", _Renamed)
    hidden = BoostingRegressor(max_iter=20).fit(X, y)
    assert type(hidden.model_) is _Renamed
    with pytest.raises(AttributeError):
        hidden.model_._predictors  # noqa: B018 - the walker cannot see the trees
    assert tree_predict(hidden.model_, X) is None and tree_shap_values(hidden.model_, X) is None
    assert np.array_equal(hidden.predict(X), hidden.model_.predict(X))
    assert np.array_equal(hidden.predict(X), normal.predict(X))  # the same trees, the same floats
    values, base = hidden.contributions(X[:8])
    assert values == pytest.approx(ref, abs=1e-9)
    assert base == pytest.approx(float(np.asarray(explainer.expected_value).reshape(-1)[0]), abs=1e-9)
    assert values.sum(axis=1) + base == pytest.approx(hidden.predict(X[:8]), abs=1e-6)


def test_the_lean_export_refuses_clearly_when_the_trees_cannot_be_read(monkeypatch):
    X, y = _data()
    monkeypatch.setattr(sklearn.ensemble, "HistGradientBoostingRegressor", _Renamed)
    hidden = BoostingRegressor(max_iter=5).fit(X, y)
    with pytest.raises(TypeError, match="cannot be read into the lean form with scikit-learn .*without boosting"):
        hidden.lean_spec()
