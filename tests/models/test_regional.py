"""Coverage by region, the CV+ guarantee, the spread model and locally
weighted CV+ (issue 12, item 5), checked against scipy, scikit-learn and the
published rules."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sklearn.linear_model import GammaRegressor

from linkage.models import lean
from linkage.models.conformal import (clopper_pearson, coverage_by_region, cv_plus_guarantee, cv_plus_interval,
                                      SPREAD_TEST_LEVEL, fit_spread, lw_cv_plus_interval, region_edges,
                                      spread_trend_test)

from .conftest import assembled_table, one_stage


@pytest.mark.parametrize("k, n", [(0, 10), (3, 10), (10, 10), (44, 48), (15, 16)])
def test_clopper_pearson_matches_scipy_and_the_beta_quantiles(k, n):
    """Clopper & Pearson (1934): low = Beta(α/2; k, n − k + 1), high =
    Beta(1 − α/2; k + 1, n − k); scipy's binomtest gives the same."""
    lo, hi = clopper_pearson(k, n, 0.95)
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    assert (lo, hi) == pytest.approx((ref.low, ref.high), abs=1e-12)
    assert lo == pytest.approx(0.0 if k == 0 else stats.beta.ppf(0.025, k, n - k + 1), abs=1e-9)
    assert hi == pytest.approx(1.0 if k == n else stats.beta.ppf(0.975, k + 1, n - k), abs=1e-9)
    assert clopper_pearson(0, 0) == (0.0, 1.0)


def test_coverage_by_region_counts_each_third():
    values = np.linspace(0.2, 0.5, 31)
    covered = values > 0.25  # the lowest lots are missed
    regions = coverage_by_region(covered, values, region_edges(values))
    assert [r["n"] for r in regions] == [10, 10, 11]  # thirds of 0.2–0.5, the last closed
    assert regions[0]["range"] == pytest.approx([0.2, 0.3])
    k0 = int(covered[values < 0.3].sum())
    assert regions[0]["coverage"] == pytest.approx(k0 / 10)
    ref = stats.binomtest(k0, 10).proportion_ci(method="exact")
    assert (regions[0]["ci_low"], regions[0]["ci_high"]) == pytest.approx((ref.low, ref.high))
    assert regions[2]["coverage"] == 1.0


def test_cv_plus_guarantee_is_one_minus_two_alpha_less_the_k_fold_slack():
    """Barber et al. (2021) Theorems 1 and 4; slack 0.081818 at n = 100,
    K = 10 (references.md §9 check value)."""
    g = cv_plus_guarantee(48, 48, 0.9)
    assert g["guaranteed"] == pytest.approx(0.8) and g["slack"] == 0
    g = cv_plus_guarantee(100, 10, 0.9)
    assert g["slack"] == pytest.approx(0.081818, abs=1e-6)
    assert g["guaranteed"] == pytest.approx(0.8 - 0.081818, abs=1e-6)
    assert "Barber" in g["text"]


def test_spread_model_is_the_gamma_glm_of_scikit_learn():
    """Gamma GLM with log link by IRLS; the reference is scikit-learn's
    GammaRegressor without penalty on the same standardised level."""
    rng = np.random.default_rng(2)
    z = rng.uniform(1, 3, 80)
    r = np.abs(rng.normal(0, 0.05 * z))
    f = fit_spread(z, r)
    u = ((z - z.mean()) / z.std())[:, None]
    ref = GammaRegressor(alpha=0.0, tol=1e-12, max_iter=10_000).fit(u, r)
    assert f["a"] == pytest.approx(ref.intercept_, abs=1e-7)
    assert f["b"] == pytest.approx(ref.coef_[0], abs=1e-7)
    s = lean.spread_scale(f, np.array([0.0, 1.0, 3.0, 9.0]))
    assert s[0] == s[1] and s[3] == pytest.approx(lean.spread_scale(f, 3.0))  # clipped to the fitted levels


def test_locally_weighted_cv_plus_with_a_constant_spread_is_cv_plus():
    """Lei et al. (2018) §5.2: with ρ̂ constant the normalised scores give the
    plain interval."""
    rng = np.random.default_rng(0)
    preds = rng.normal(10, 0.1, (5, 7))
    fold_of = np.repeat(np.arange(5), 6)
    res = rng.normal(0, 1, 30)
    plain = cv_plus_interval(preds, fold_of, res, 0.1)
    lw = lw_cv_plus_interval(preds, fold_of, res, np.full(30, 2.5), np.full(7, 2.5), 0.1)
    np.testing.assert_allclose(lw, plain, rtol=1e-12)


def test_locally_weighted_intervals_cover_in_every_region_where_cv_plus_does_not():
    """Noise SD growing tenfold over the range: pooled CV+ over-covers the
    quiet third and under-covers the noisy one; locally weighted CV+ with the
    fitted spread is near 90 % in each (simulation, 20 replicate sets)."""
    rng = np.random.default_rng(1)
    cov_plain, cov_lw = [], []
    for _ in range(20):
        x = rng.uniform(0, 1, 60)
        xn = rng.uniform(0, 1, 3000)
        sd = lambda v: 0.1 * np.exp(np.log(10) * v)  # noqa: E731  (the spread model's own family)
        y, yn = 2 * x + rng.normal(0, sd(x)), 2 * xn + rng.normal(0, sd(xn))
        fold_of = np.arange(60) % 10
        fold_preds, oof = np.empty((10, 3000)), np.empty(60)
        for k in range(10):
            tr = fold_of != k
            b = np.polyfit(x[tr], y[tr], 1)
            fold_preds[k], oof[~tr] = np.polyval(b, xn), np.polyval(b, x[~tr])
        res = y - oof
        spread = fit_spread(oof, res)
        full = np.polyval(np.polyfit(x, y, 1), xn)
        lo, hi = cv_plus_interval(fold_preds, fold_of, res, 0.1)
        cov_plain.append(coverage_by_region((lo <= yn) & (yn <= hi), xn, [0, 1 / 3, 2 / 3, 1]))
        lo, hi = lw_cv_plus_interval(fold_preds, fold_of, res, lean.spread_scale(spread, oof),
                                     lean.spread_scale(spread, full), 0.1)
        cov_lw.append(coverage_by_region((lo <= yn) & (yn <= hi), xn, [0, 1 / 3, 2 / 3, 1]))
    plain = np.mean([[r["coverage"] for r in c] for c in cov_plain], axis=0)
    lw = np.mean([[r["coverage"] for r in c] for c in cov_lw], axis=0)
    assert plain[0] > 0.97 and plain[2] < 0.86
    assert np.all(np.abs(lw - 0.9) < 0.03), (plain, lw)


def test_glejser_test_is_the_slope_t_test_of_absolute_residuals_on_the_level():
    """Glejser (1969): |r| regressed on the level, two-sided t-test of the
    slope with n − 2 degrees of freedom, computed here by hand from the
    least-squares formulas (Draper & Smith 1998, §3.4: se(b) = s/√Sxx)."""
    rng = np.random.default_rng(5)
    z = rng.uniform(0, 1, 40)
    r = rng.normal(0, 0.1 + 0.3 * z)
    got = spread_trend_test(z, r)
    a = np.abs(r)
    sxx = np.sum((z - z.mean()) ** 2)
    b = np.sum((z - z.mean()) * (a - a.mean())) / sxx
    s2 = np.sum((a - a.mean() - b * (z - z.mean())) ** 2) / (z.size - 2)
    t = b / np.sqrt(s2 / sxx)
    assert got["slope"] == pytest.approx(b)
    assert got["p_value"] == pytest.approx(2 * stats.t.sf(abs(t), z.size - 2))
    assert spread_trend_test(np.ones(5), np.arange(5.0)) == {"slope": 0.0, "p_value": 1.0}


def test_glejser_test_holds_its_size_under_a_constant_spread_and_finds_a_real_trend():
    """Under a constant spread the test rejects in about 5 % of 30-lot sets
    (its size; Glejser 1969 reports it near nominal for normal errors), where
    a fitted spread slope would often look sizeable; a spread growing
    tenfold over the range is found in most sets (power, simulated here)."""
    rng = np.random.default_rng(11)
    z = rng.uniform(0, 1, (2000, 30))
    flat = [spread_trend_test(zi, rng.normal(0, 1, 30))["p_value"] < SPREAD_TEST_LEVEL for zi in z]
    assert abs(np.mean(flat) - SPREAD_TEST_LEVEL) < 0.015
    grow = [spread_trend_test(zi, rng.normal(0, 0.1 + 0.9 * zi))["p_value"] < SPREAD_TEST_LEVEL for zi in z[:200]]
    assert np.mean(grow) > 0.8


@pytest.fixture(scope="module")
def trained():
    from linkage.models.train import train_chain

    table = assembled_table(36, seed=7)
    chain = one_stage("tensile_strength_mpa")
    return table, train_chain(table, chain, seed=0, candidates=["mean", "log_linear", "pls"])


def test_train_reports_coverage_by_porosity_third(trained):
    table, fit = trained
    t = fit.targets["tensile_strength_mpa"]
    s = t.summary()
    regions = s["coverage_by_region"]
    assert s["coverage_region_variable"] == "ribbon_porosity" and len(regions) == 3
    por = table["ribbon_porosity"].to_numpy()
    assert regions[0]["range"][0] == pytest.approx(por.min()) and regions[-1]["range"][1] == pytest.approx(por.max())
    assert sum(r["n"] for r in regions) == t.n_lots
    for r in regions:
        k = round(r["coverage"] * r["n"])
        ref = stats.binomtest(k, r["n"]).proportion_ci(method="exact")
        assert (r["ci_low"], r["ci_high"]) == pytest.approx((ref.low, ref.high))
    weighted = sum(r["coverage"] * r["n"] for r in regions) / t.n_lots
    assert weighted == pytest.approx(s["coverage"])
    n, k = t.n_lots, t.cv["n_splits"]  # 36 lots: grouped 10-fold; Barber et al. (2021) Theorem 4 slack
    slack = min(2 * (1 - 1 / k) / (n / k + 1), (1 - k / n) / (k + 1))
    assert s["coverage_guarantee"]["guaranteed"] == pytest.approx(0.8 - slack)
    choice = s["interval_choice"]
    by = choice["by_method"]
    lw_better = by["locally weighted CV+"]["worst_region_gap"] < by["CV+"]["worst_region_gap"]
    trend = spread_trend_test(t.oof[t.selected].to_numpy(), t.residuals.to_numpy())
    assert choice["spread_test"]["p_value"] == pytest.approx(trend["p_value"])
    use_lw = lw_better and trend["p_value"] < SPREAD_TEST_LEVEL
    assert choice["method"] == ("locally weighted CV+" if use_lw else "CV+")
    assert (s["spread"] is not None) == use_lw
    assert regions == by[choice["method"]]["regions"] and s["coverage"] == by[choice["method"]]["coverage"]
    for m in by.values():
        assert m["worst_region_gap"] == pytest.approx(max(abs(r["coverage"] - 0.9) for r in m["regions"] if r["n"]))


def test_lean_form_and_fitted_chain_give_the_same_locally_weighted_interval(trained):
    table, fit = trained
    t = fit.targets["tensile_strength_mpa"]
    t.spread = fit_spread(t.oof[t.selected].to_numpy(), t.residuals.to_numpy())  # force the method
    try:
        twin = lean.from_npz_bytes(lean.to_npz_bytes(lean.export(fit))).targets["tensile_strength_mpa"]
        X = table[t.inputs].head(6)
        np.testing.assert_allclose(twin.interval({c: X[c].to_numpy() for c in t.inputs}), t.interval(X),
                                   rtol=1e-12)
        assert "locally weighted" in t.summary()["interval_method"]
    finally:
        t.spread = None


def test_a_lean_file_without_the_new_fields_loads_as_plain_cv_plus(trained):
    """Models saved before the spread model and the studentized basis existed: no spread, pooled residuals."""
    table, fit = trained
    spec = lean.export(fit)
    for st in spec["stages"]:
        st.pop("residual_scale", None)
        for t in st["targets"]:
            t.pop("spread", None)
            t.pop("lot_scale", None)
            t.pop("interval", None)
    old = lean.from_npz_bytes(lean.to_npz_bytes(spec)).targets["tensile_strength_mpa"]
    assert old.spread is None
    X = table[old.inputs].head(4)
    cols = {c: X[c].to_numpy() for c in old.inputs}
    preds = np.vstack([m.predict(X.to_numpy(float)) for m in old.fold_models_])
    np.testing.assert_allclose(old.interval(cols, raw=True), cv_plus_interval(preds, old.fold_of_, old.residuals_, 0.1))


def _with_forced_spread(fit):
    """The lean chain of ``fit`` with a spread model forced onto tensile strength: (chain, its stage, the target)."""
    chain = lean.from_fitted(fit)
    st = chain.stages[0]
    t = st.targets["tensile_strength_mpa"]
    t.spread = {"kind": "loglinear", "a": np.log(0.05), "b": 0.5, "z_mean": 1.0, "z_scale": 0.5, "z_low": 0.0,
                "z_high": 5.0}
    return chain, st, t


def test_monte_carlo_rescales_residuals_to_the_spread_at_the_draws_level(trained):
    """A lot's residual r/ρ̂(its level) · ρ̂(draw level): the spread of the
    draws at two inputs is in the ratio of ρ̂ at their predictions."""
    from linkage.decide.propagate import simulate

    table, fit = trained
    chain, st, t = _with_forced_spread(fit)
    st.residual_scale = np.ones(st.residual_matrix.shape)
    rows = {"ribbon_porosity": [0.2, 0.45], "granule_d50_um": [300.0, 300.0], "fines_pct": [20.0, 20.0],
            "compression_force_kn": [18.0, 8.0]}
    d = simulate(chain, rows, n_draws=4000, seed=3)
    mean = t.predict(rows, raw=True)
    ratio = np.std(d.raw["tensile_strength_mpa"][0]) / np.std(d.raw["tensile_strength_mpa"][1])
    assert ratio == pytest.approx(lean.spread_scale(t.spread, mean[0]) / lean.spread_scale(t.spread, mean[1]),
                                  rel=1e-9)


def test_a_fitted_target_pickled_before_these_fields_still_predicts(trained):
    """A chain.joblib from an older version has no coverage_by_region, spread,
    ...: the class defaults stand in, and the interval is plain CV+."""
    import copy

    table, fit = trained
    old = copy.copy(fit.targets["tensile_strength_mpa"])
    for name in ("coverage_by_region", "coverage_region_variable", "coverage_guarantee", "interval_choice", "spread",
                 "interval_basis"):
        old.__dict__.pop(name, None)
    X = table[old.inputs].head(3)
    preds = np.vstack([m.predict(X.to_numpy(float)) for m in old.fold_models_])
    np.testing.assert_allclose(old.interval(X, raw=True),
                               cv_plus_interval(preds, old.fold_of_, old.residuals.to_numpy(), 0.1))
    s = old.summary()
    assert s["coverage_by_region"] is None and s["spread"] is None


def test_ribbon_stage_regions_are_by_predicted_porosity():
    """The target itself never places a lot in a region (that would sort lots
    by their own errors); the ribbon stage uses its out-of-fold prediction."""
    from linkage.models.train import train_chain

    table = assembled_table(20, seed=2)
    chain = one_stage("ribbon_porosity", ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm"))
    t = train_chain(table, chain, seed=0, candidates=["mean", "linear_select"]).targets["ribbon_porosity"]
    assert t.coverage_region_variable == "predicted ribbon_porosity"
    oof = t.oof[t.selected].to_numpy()
    assert t.coverage_by_region[0]["range"][0] == pytest.approx(oof.min())
    assert t.coverage_by_region[-1]["range"][1] == pytest.approx(oof.max())


def test_bound_engine_rescales_residuals_to_the_spread_at_the_level(trained):
    """The exact sums of linkage.decide.bound use the lot's standardised
    residual times ρ̂ at the row's level, as the Monte Carlo does (the test
    above): P(pass) at a row is the share of lots with
    project(μ̂ + rᵢ/ρ̂ᵢ·ρ̂(μ̂)) within the limit, computed here directly."""
    from linkage.decide.bound import chain_probabilities
    from linkage.decide.propagate import within
    from linkage.spec import Limit

    table, fit = trained
    chain, st, t = _with_forced_spread(fit)
    j = list(st.targets).index("tensile_strength_mpa")
    st.residual_scale = np.ones(st.residual_matrix.shape)
    st.residual_scale[:, j] = np.linspace(0.5, 2.0, st.residual_scale.shape[0])
    rows = {"ribbon_porosity": [0.2995, 0.3, 0.3005], "granule_d50_um": [300.0] * 3, "fines_pct": [20.0] * 3,
            "compression_force_kn": [12.0] * 3}
    mean = t.predict(rows, raw=True)
    limit = Limit(float(mean[1] - 0.005), None)
    cp = chain_probabilities(chain, {k: np.asarray(v) for k, v in rows.items()},
                             {"tensile_strength_mpa": limit}, ["tensile_strength_mpa"], replicates=False)
    r = st.residual_matrix[:, j] / st.residual_scale[:, j]
    r = r[np.isfinite(r)]
    s = lean.spread_scale(t.spread, mean)
    expected = within(lean.project("tensile_strength_mpa", mean[:, None] + r[None, :] * s[:, None])[0],
                      limit).mean(axis=1)
    unscaled = within(lean.project("tensile_strength_mpa", mean[:, None] + r[None, :])[0], limit).mean(axis=1)
    assert np.any((expected > 0.05) & (expected < 0.95)) and np.max(np.abs(expected - unscaled)) > 0.05
    np.testing.assert_allclose(cp.p_each["tensile_strength_mpa"], expected, atol=1e-6)
