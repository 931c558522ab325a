"""Explanations: SHAP values, exact PLS contributions, VIP, importance, and
the curves against ribbon porosity through the chain.

References
----------
Lundberg S.M., Lee S.-I. (2017). A unified approach to interpreting model
predictions. NeurIPS 30: local accuracy, the contributions add up to
f(x) − E[f(X)].
Lundberg S.M. et al. (2020). From local explanations to global understanding
with explainable AI for trees. Nat. Mach. Intell. 2:56-67: the tree
explainer's expected value under the tree-path-dependent background is the
mean output over the training data the trees were grown on.
Wold S., Johansson E., Cocchi M. (1993), in 3D QSAR in Drug Design,
pp. 523-550 (from memory); Chong I.-G., Jun C.-H. (2005). Chemometr.
Intell. Lab. Syst. 78:103-112: Σ VIP² = p.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from linkage import explain
from linkage.exceptions import UsageError

from .conftest import EVIL_LOT


def _training_inputs(target, table):
    t = table.set_index("lot")
    return t.loc[target.lots, target.inputs].astype(float)


def _with_selected(target, name):
    """The target as if ``name`` had been selected (its full-data fit serves)."""
    return dataclasses.replace(target, selected=name, model_=target.full_models_[name])


@pytest.mark.parametrize("name", ["ribbon_porosity", "tensile_strength_mpa", "dissolution_pct"])
def test_shap_values_add_up_to_prediction_minus_expected_value(chain, table, name):
    """Local accuracy (Lundberg & Lee 2017): Σ SHAP + E[f] = f(x), to 1e-6."""
    target = chain.targets[name]
    X = _training_inputs(target, table)
    sv = explain.shap_values(target, X, candidate="boosting")
    prediction = target.predict_candidate(X, "boosting")
    np.testing.assert_allclose(sv.sum(axis=1).to_numpy() + sv.attrs["base_value"], prediction, rtol=0, atol=1e-6)
    # tree-path-dependent expected value = mean output over the training lots (Lundberg et al. 2020)
    assert sv.attrs["base_value"] == pytest.approx(float(np.mean(prediction)), abs=1e-6)
    assert list(sv.columns) == target.inputs and list(sv.index) == list(X.index)


def test_shap_values_of_a_lot_outside_the_training_set_add_up(chain):
    """Local accuracy holds for any x, not only the training lots."""
    target = chain.targets["tensile_strength_mpa"]
    lo = {c: chain.training["ranges"][c][0] for c in target.inputs}
    X = pd.DataFrame([lo, {c: v * 1.1 for c, v in lo.items()}], index=["low corner", "beyond"])
    sv = explain.shap_values(target, X, candidate="boosting")
    np.testing.assert_allclose(sv.sum(axis=1) + sv.attrs["base_value"], target.predict_candidate(X, "boosting"),
                               rtol=0, atol=1e-6)


def test_pls_contributions_add_up_to_the_scikit_learn_prediction(chain, table):
    """coefficient × (x − x̄) summed, plus the base value, is the prediction of
    the underlying scikit-learn PLSRegression (the reference) to rounding."""
    for name, target in chain.targets.items():
        X = _training_inputs(target, table)
        lc = explain.linear_contributions(target, X, candidate="pls")
        est = target.full_models_["pls"]
        reference = np.asarray(est.pls_.predict(X.to_numpy(float)[:, est.used_]), float).reshape(-1)
        total = lc.sum(axis=1).to_numpy() + lc.attrs["base_value"]
        np.testing.assert_allclose(total, reference, rtol=1e-12, atol=1e-12 * max(1.0, np.abs(reference).max()),
                                   err_msg=name)
        # the base value is the prediction at the training mean of the inputs
        centre = pd.DataFrame([X.mean().to_dict()])
        assert lc.attrs["base_value"] == pytest.approx(float(target.predict_candidate(centre, "pls")[0]), rel=1e-12)


def test_contributions_of_the_selected_model_add_up(chain, table):
    """explain.contributions serves whatever was selected; rows + base = predict."""
    for name, target in chain.targets.items():
        X = _training_inputs(target, table)
        c = explain.contributions(target, X)
        np.testing.assert_allclose(c.sum(axis=1) + c.attrs["base_value"], target.predict(X), rtol=1e-10,
                                   atol=1e-9, err_msg=name)
        assert c.attrs["method"] == explain.METHODS[target.selected]


def test_contributions_of_a_boosting_selection_are_its_shap_values(chain, table):
    target = _with_selected(chain.targets["dissolution_pct"], "boosting")
    X = _training_inputs(target, table)
    via_target = explain.contributions(target, X)
    direct = explain.shap_values(target, X)  # the selected model now, no candidate needed
    np.testing.assert_allclose(via_target.to_numpy(), direct.to_numpy(), rtol=0, atol=1e-9)
    assert via_target.attrs["method"] == "SHAP values, tree explainer"


def test_explaining_the_wrong_kind_of_model_is_refused(chain, table):
    target = _with_selected(chain.targets["dissolution_pct"], "pls")
    X = _training_inputs(target, table)
    with pytest.raises(UsageError, match="SHAP tree values need the boosting model"):
        explain.shap_values(target, X)
    with pytest.raises(UsageError, match="linear contributions need the PLS model"):
        explain.linear_contributions(target, X, candidate="boosting")
    with pytest.raises(UsageError, match="no fitted quadratic_ridge model"):
        explain.shap_values(target, X, candidate="quadratic_ridge")
    with pytest.raises(UsageError, match="lacks the input"):
        explain.contributions(target, X.drop(columns="fines_pct"))


def test_vip_squares_add_up_to_the_number_of_inputs(chain):
    """Σ_j VIP_j² = p for any PLS model (Chong & Jun 2005; references.md §8)."""
    for name, target in chain.targets.items():
        vip = explain.vip(target)
        assert vip is not None, name
        assert list(vip.index) == target.inputs
        assert float((vip**2).sum()) == pytest.approx(len(target.inputs), rel=1e-9), name


def test_global_importance_is_the_mean_absolute_contribution(chain, table):
    """For PLS, mean |c_j| = |b_j| · mean |x_j − x̄_j| (the definition, by hand)."""
    target = _with_selected(chain.targets["tensile_strength_mpa"], "pls")
    X = _training_inputs(target, table)
    imp = explain.global_importance(target, X)
    est = target.model_
    by_hand = np.abs(est.coef_) * np.abs(X.to_numpy(float) - est.x_mean_).mean(axis=0)
    expected = pd.Series(by_hand, index=target.inputs)
    assert list(imp.index) == list(expected.sort_values(ascending=False).index)
    np.testing.assert_allclose(imp[target.inputs].to_numpy(), by_hand, rtol=1e-12)


def test_lot_contributions_from_the_assembled_table(chain, table):
    target = chain.targets["tensile_strength_mpa"]
    out = explain.lot_contributions(target, table, lots=[EVIL_LOT, "LOT-001"])
    assert list(out.index) == [EVIL_LOT, "LOT-001"]
    parts = out[target.inputs].sum(axis=1) + out["base_value"]
    np.testing.assert_allclose(parts, out["prediction"], rtol=1e-10, atol=1e-12)
    everyone = explain.lot_contributions(target, table)
    assert len(everyone) == int(table[target.inputs].notna().all(axis=1).sum())
    with pytest.raises(UsageError, match="not in the table: NOPE"):
        explain.lot_contributions(target, table, lots=["NOPE"])


def test_porosity_curves_follow_the_chain_of_mean_predictions(chain):
    """The mean curve is granule stage → tablet stage evaluated by hand with
    each target's predict at the held settings (nothing given: the training means, the mill screen at the
    training level nearest its mean; linkage.decide.held)."""
    curves = explain.porosity_curves(chain, n_grid=9, n_draws=300, level=0.9, seed=3)
    lo, hi = chain.training["ranges"]["ribbon_porosity"]
    assert curves.grid[0] == pytest.approx(lo) and curves.grid[-1] == pytest.approx(hi)
    st = chain.training["settings"]
    med = {n: st["settings_mean"][i] for i, n in enumerate(st["settings_names"])}
    # the mill screen runs at a few levels: held at the level nearest its training mean (linkage.decide.held)
    levels = np.asarray(st["settings_levels"][st["settings_names"].index("mill_screen_mm")])
    med["mill_screen_mm"] = float(levels[np.argmin(np.abs(levels - med["mill_screen_mm"]))])
    x = pd.DataFrame({"ribbon_porosity": curves.grid, "mill_screen_mm": med["mill_screen_mm"],
                      "compression_force_kn": med["compression_force_kn"]})
    for name in ("granule_d50_um", "fines_pct"):
        x[name] = chain.targets[name].predict(x)
    assert set(curves.curves) == {"granule_d50_um", "fines_pct", "tensile_strength_mpa", "weight_rsd_pct",
                                  "friability_pct", "dissolution_pct", "breaking_force_n"}
    for name, c in curves.curves.items():
        np.testing.assert_allclose(c["mean"], chain.targets[name].predict(x), rtol=1e-10, err_msg=name)
        assert np.all(c["low"] < c["high"]), name
    mean = "held at the training mean, with no setting given to condition on"
    assert curves.settings == {"compression_force_kn": {"value": pytest.approx(med["compression_force_kn"]),
                                                        "source": mean},
                               "mill_screen_mm": {"value": pytest.approx(med["mill_screen_mm"]),
                                                  "source": mean.replace("the training mean",
                                                                         "the training level nearest the training "
                                                                         "mean")}}


def test_porosity_curve_bands_hold_the_true_chain(chain, lots):
    """The synthetic product's true (noise-free) chain at the same settings
    lies inside the 90 % band of simulated lots across the porosity range."""
    curves = explain.porosity_curves(chain, n_grid=15, n_draws=500, level=0.9, seed=0)
    med = {k: v["value"] for k, v in curves.settings.items()}
    n = len(curves.grid)
    truth = lots.truth.chain_mean({"mill_screen_mm": np.full(n, med["mill_screen_mm"]),
                                   "compression_force_kn": np.full(n, med["compression_force_kn"])},
                                  ribbon_porosity=curves.grid)
    for name, c in curves.curves.items():
        true = truth[name].to_numpy(float)
        inside = (true >= c["low"]) & (true <= c["high"])
        assert inside.mean() >= 0.9, f"{name}: truth inside the band at {inside.mean():.0%} of the grid"


def test_porosity_curves_refuse_what_they_scan_or_predict(chain):
    with pytest.raises(UsageError, match="what the curves scan"):
        explain.porosity_curves(chain, {"ribbon_porosity": 0.3})
    with pytest.raises(UsageError, match="predicted by the chain"):
        explain.porosity_curves(chain, {"fines_pct": 20.0})
    with pytest.raises(UsageError, match="level"):
        explain.porosity_curves(chain, level=1.0)
