"""Coherent held settings (linkage.decide.held, propagate.fill_settings)."""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression

from linkage.decide import held
from linkage.decide.propagate import fill_settings
from linkage.decide.whatif import predict_whatif
from linkage.models.lean import LeanChain, as_lean


def _regression(X, g, m, xg):
    """E[x_m | x_g] as the least-squares regression of the missing settings on
    the given ones over the same lots: the sample form of the conditional mean
    μ_m + Σ_mg Σ_gg⁻¹ (x_g − μ_g) (Anderson 2003, An Introduction to
    Multivariate Statistical Analysis, Thm 2.5.1 and §2.5.2: the regression
    coefficients are Σ_mg Σ_gg⁻¹)."""
    return LinearRegression().fit(X[:, g], X[:, m]).predict(np.atleast_2d(xg))


@pytest.mark.parametrize("given", [[5], [1, 2], [0, 1, 2, 4]])
def test_conditional_mean_is_the_regression_of_missing_on_given(given):
    rng = np.random.default_rng(7)
    A = rng.normal(size=(6, 6))
    X = rng.normal(size=(50, 6)) @ A + rng.normal(size=6)
    rec = held.fit_settings(X, [f"s{i}" for i in range(6)])
    missing = [j for j in range(6) if j not in given]
    xg = rng.normal(size=(4, len(given))) @ A[np.ix_(given, given)] + X[:4, given]
    ours = held.conditional_mean(rec["settings_mean"], rec["settings_cov"], given, xg, missing)
    np.testing.assert_allclose(ours, _regression(X, given, missing, xg), rtol=1e-9, atol=1e-9)


def test_nothing_given_holds_the_training_mean_and_says_so():
    X = np.random.default_rng(1).normal(size=(30, 3))
    m = held.settings_model(*(held.fit_settings(X, ["a", "b", "c"])[k] for k in
                              ("settings_mean", "settings_cov", "settings_names", "settings_low", "settings_high")))
    values, source = held.hold(m, {}, ["a", "c"])
    assert source == held.MEAN
    np.testing.assert_allclose([values["a"][0], values["c"][0]], X.mean(axis=0)[[0, 2]], rtol=1e-12)


def test_held_values_are_clipped_to_the_training_range():
    X = np.column_stack([np.linspace(0, 1, 20), np.linspace(0, 1, 20) * 2 + 1])  # b = 2a + 1, b in [1, 3]
    m = held.settings_model(*(held.fit_settings(X, ["a", "b"])[k] for k in
                              ("settings_mean", "settings_cov", "settings_names", "settings_low", "settings_high")))
    values, source = held.hold(m, {"a": np.array([0.5, 5.0])}, ["b"])
    assert source == held.COHERENT
    np.testing.assert_allclose(values["b"], [2.0, 3.0])  # 2·0.5 + 1 = 2; 2·5 + 1 = 11 clipped to 3


def test_fill_settings_holds_the_conditional_mean_of_the_training_lots(scenario):
    _, chain, _, table = scenario
    names = chain.training["settings"]["settings_names"]
    assert names == chain.chain.root_inputs()
    X = table[names].dropna().to_numpy(float)
    g = [names.index("compression_force_kn"), names.index("roll_gap_mm")]
    # the mill screen runs at 3 levels: held at the level nearest its conditional mean, and the
    # continuous settings given that level too (see the discrete-settings tests below)
    s = names.index("mill_screen_mm")
    levels = np.unique(X[:, s])
    screen = levels[np.argmin(np.abs(_regression(X, g, [s], [[10.0, 2.0]])[0, 0] - levels))]
    missing = [j for j in range(len(names)) if j not in g and j != s]
    expected = np.clip(_regression(X, g + [s], missing, [[10.0, 2.0, screen]])[0], X[:, missing].min(axis=0),
                       X[:, missing].max(axis=0))
    missing = missing + [s]
    expected = np.append(expected, screen)
    for c in (chain, as_lean(chain)):  # the fitted chain and the lean model agree
        values, source = fill_settings(c, {"compression_force_kn": 10.0, "roll_gap_mm": 2.0})
        np.testing.assert_allclose([values[names[j]] for j in missing], expected, rtol=1e-9)
        assert {source[names[j]] for j in missing if j != s} == {held.COHERENT}
        assert source["mill_screen_mm"] == held.COHERENT_LEVEL  # at a level, and said so


def test_a_model_saved_before_keeps_the_median_rule_and_says_so(scenario):
    _, chain, spec, _ = scenario
    lean = as_lean(chain)
    old = LeanChain({k: v for k, v in lean.spec.items() if not k.startswith("settings_")})
    values, source = fill_settings(old, {"roll_force_kn_per_cm": 9.0})
    assert source["roll_gap_mm"] == "training median"
    assert values["roll_gap_mm"] == chain.training["medians"]["roll_gap_mm"]
    d = predict_whatif(old, {"roll_force_kn_per_cm": 9.0}, spec=spec, n_draws=200).to_dict()
    assert d["held_point"]["rule"] == held.RULE_MEDIAN and "retrain" in d["held_point"]["rule"]


@pytest.mark.slow
def test_predict_compression_force_alone_stays_in_the_domain(tmp_path, monkeypatch):
    """The issue's case: screw speed follows roll speed × gap in the lots
    (linkage.synthetic._design), so the independent medians are a
    combination no lot ran (Q residual above its limit, driven by screw
    speed); held coherently, the what-if is inside the domain."""
    from click.testing import CliRunner

    from linkage.assemble import assemble
    from linkage.cli.main import cli
    from linkage.models.registry import save
    from linkage.models.train import train_chain
    from linkage.synthetic import make_lots

    chain = train_chain(assemble(make_lots(40, seed=39).tables), seed=0)
    models = tmp_path / "models"
    save(chain, models)
    monkeypatch.chdir(tmp_path)  # no lot store here: nothing recorded
    r = CliRunner().invoke(cli, ["predict", "--models-dir", str(models), "--set", "compression_force_kn=10",
                                 "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["in_domain"] is True and d["held_point"]["in_domain"] is True
    assert d["inputs"]["screw_speed_rpm"]["source"] == held.COHERENT
    lean = as_lean(chain)
    old = LeanChain({k: v for k, v in lean.spec.items() if not k.startswith("settings_")})
    before = predict_whatif(old, {"compression_force_kn": 10.0}, n_draws=200)
    assert before.in_domain is False
    assert any("Q residual" in r and "screw_speed_rpm" in r for r in before.domain_reasons)


def test_window_and_force_range_state_their_held_point(scenario):
    """The held point's verdict is the stages' own domain check
    (DomainModel via linkage.models.lean.domain_verdicts) at the held
    settings and the chain of mean predictions."""
    from linkage.decide.window import find_window

    _, chain, spec, _ = scenario
    w = find_window(chain, spec, settings={"roll_gap_mm": 2.5}, n_grid=21, n_draws=300).to_dict(curve=False)
    hp = w["held_point"]
    assert hp["rule"].startswith(held.RULE_COHERENT) and isinstance(hp["in_domain"], bool)
    assert hp["point"]["roll_gap_mm"] == 2.5
    rf = w["roll_force_kn_per_cm"]["held_point"]
    lean = as_lean(chain)
    ribbon = next(s for s in lean.stages if "ribbon_porosity" in s.targets)
    direct = ribbon.domain.check({c: [rf["point"][c]] for c in ribbon.domain.inputs})[0]
    assert rf["in_domain"] == (direct["in_domain"] and not any(r.startswith("granule") or r.startswith("tablet")
                                                               for r in rf["reasons"]))
    assert [r for r in rf["reasons"] if r.startswith(ribbon.name)] == [f"{ribbon.name} stage: {r}"
                                                                        for r in direct["reasons"]]


# --------------------------------------------------------------------------- discrete settings (few levels)
def test_a_setting_run_at_few_levels_is_discrete():
    """The rule (common practice, no source): at most 6 distinct training
    values and at least 2 lots per value on average."""
    rng = np.random.default_rng(3)
    assert held.discrete_levels(rng.choice([1.0, 1.25, 1.5], 40)) == [1.0, 1.25, 1.5]
    assert held.discrete_levels(rng.uniform(8, 20, 40)) == []  # continuous
    assert held.discrete_levels([1.0, 1.5, 2.0, 2.5, 3.0]) == []  # 5 lots, 5 values: not enough repeats
    assert held.discrete_levels(np.full(10, 1.0)) == []  # one level: nothing to choose between
    assert held.discrete_levels([1.0, 2.0, np.nan, 1.0, 2.0]) == [1.0, 2.0]


def test_a_discrete_setting_is_held_at_the_nearest_level_and_the_rest_follow_it():
    """The mill screen is held at the training level nearest its conditional
    mean (the lower on a tie), never between levels; the continuous settings
    still missing are then the regression on the given settings and that
    level (scikit-learn's LinearRegression over the same lots, the sample
    form of Anderson 2003, Thm 2.5.1)."""
    rng = np.random.default_rng(5)
    n = 80
    screen = rng.choice([1.0, 1.25, 1.5], n)
    force = rng.uniform(4, 14, n) + 4 * (screen - 1.25)
    speed = 3 + 0.2 * force + 2 * screen + rng.normal(0, 0.3, n)
    X = np.column_stack([force, screen, speed])
    names = ["force", "screen", "speed"]
    rec = held.fit_settings(X, names)
    assert rec["settings_levels"] == [[], [1.0, 1.25, 1.5], []]
    m = held.of_chain(SimpleNamespace(spec={k: v for k, v in rec.items()}))
    f = np.array([4.5, 9.0, 13.5])
    values, source = held.hold(m, {"force": f}, ["screen", "speed"])
    assert source == held.COHERENT
    cm = _regression(X, [0], [1], f[:, None])[:, 0]
    want_screen = np.array([[1.0, 1.25, 1.5][int(np.argmin(np.abs(c - np.array([1.0, 1.25, 1.5]))))] for c in cm])
    np.testing.assert_array_equal(values["screen"], want_screen)
    assert set(values["screen"]) <= {1.0, 1.25, 1.5}
    want_speed = np.clip(_regression(X, [0, 1], [2], np.column_stack([f, want_screen]))[:, 0], speed.min(),
                         speed.max())
    np.testing.assert_allclose(values["speed"], want_speed, rtol=1e-9)
    # nothing given: the level nearest the training mean
    v0, s0 = held.hold(m, {}, ["screen", "speed"])
    assert s0 == held.MEAN and v0["screen"][0] in (1.0, 1.25, 1.5)
    assert v0["speed"][0] == pytest.approx(speed.mean(), rel=1e-12)  # the others stay at the training mean
    assert abs(v0["screen"][0] - screen.mean()) <= 0.125 + 1e-12
    assert held.nearest_level([1.125], [1.0, 1.25])[0] == 1.0  # a tie takes the lower level
    # hold_with_sources: the same values, and a discrete setting's source names the level it was moved to
    both, said = held.hold_with_sources(m, {"force": f}, ["screen", "speed"])
    np.testing.assert_array_equal(both["screen"], values["screen"])
    np.testing.assert_array_equal(both["speed"], values["speed"])
    assert said == {"screen": held.COHERENT_LEVEL, "speed": held.COHERENT}
    assert held.hold_with_sources(m, {}, ["screen", "speed"])[1] == {"screen": held.MEAN_LEVEL, "speed": held.MEAN}


def test_the_scenario_holds_the_mill_screen_at_a_level_run_and_an_older_model_still_loads(scenario):
    """The synthetic lots run the mill screen at 3 levels (linkage.synthetic
    MILL_SCREENS_MM); a what-if that does not give it holds it at one of them.
    A whatif.npz written before settings_levels was kept loads and holds it
    continuous, as before."""
    from linkage.models.lean import from_npz_bytes, to_npz_bytes
    from linkage.synthetic import MILL_SCREENS_MM

    _, chain, _, table = scenario
    lean = from_npz_bytes(to_npz_bytes(as_lean(chain).spec))
    levels = sorted(set(table["mill_screen_mm"].dropna()))
    assert lean.spec["settings_levels"][lean.spec["settings_names"].index("mill_screen_mm")] == levels
    assert set(levels) <= set(MILL_SCREENS_MM)
    given = {"roll_force_kn_per_cm": 9.3, "compression_force_kn": 12.7}
    values, source = fill_settings(lean, given)
    assert values["mill_screen_mm"] in levels and source["mill_screen_mm"] == held.COHERENT_LEVEL
    assert held.RULE_LEVELS in held.rule_of(lean)
    old_spec = {k: v for k, v in as_lean(chain).spec.items() if k != "settings_levels"}
    old = from_npz_bytes(to_npz_bytes(old_spec))
    v_old, _ = fill_settings(old, given)
    rec = chain.training["settings"]
    names = rec["settings_names"]
    X = table[names].dropna().to_numpy(float)
    g = [names.index(k) for k in given]
    want = _regression(X, g, [names.index("mill_screen_mm")], [[given[names[i]] for i in g]])[0, 0]
    assert v_old["mill_screen_mm"] == pytest.approx(np.clip(want, min(levels), max(levels)), rel=1e-9)
    assert held.rule_of(old) == held.RULE_COHERENT


def test_held_sources_and_the_window_and_what_if_texts_open_no_bracket_inside_another(scenario):
    """A user test read "compression_force_kn = 13.84 (held at the training mean (no setting given to condition
    on))" in the window's text and the report: a source is shown in brackets beside its value, so it has none of
    its own, and the window's and the what-if's texts open no bracket inside another. Same facts: the words of
    each source are kept. A wording regression: no outside source."""
    from linkage.decide.window import find_window
    from linkage.results import whatif_text, window_text
    from tests.brackets import nested_brackets

    sources = (held.COHERENT, held.MEAN, held.COHERENT_LEVEL, held.MEAN_LEVEL)
    assert not any("(" in s or ")" in s for s in sources), sources
    assert "no setting given to condition on" in held.MEAN and "conditional mean of training lots" in held.COHERENT
    _, chain, spec, _ = scenario
    w = find_window(chain, spec, n_grid=21, n_draws=300)
    text = window_text(w)
    assert held.MEAN in text or held.MEAN_LEVEL in text, text  # nothing given: held at the training mean
    assert nested_brackets(text) == [], nested_brackets(text)
    for given in ({}, {"roll_force_kn_per_cm": 8.0}):
        text = whatif_text(predict_whatif(chain, given, spec=spec, n_draws=300, seed=0))
        assert nested_brackets(text) == [], nested_brackets(text)
