"""The lower bound on the probability of passing (issue 12, items 1 and 2):
the window, the roll force range through the whole chain and the what-if.

References: the truth of linkage.synthetic's window scenario (its true
probability of passing, Monte Carlo over its own noise, which the fitted
chain never sees); the percentile bound of Efron & Tibshirani (1993, §13.3),
checked against scipy in tests/models/test_bootstrap.py; the Monte Carlo of
linkage.decide.propagate for the point estimate.
"""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.decide.bound import NO_BOUND, _final_sums, _nanquantile, _SortedLots, chain_probabilities
from linkage.decide.propagate import within
from linkage.decide.whatif import predict_whatif
from linkage.decide.window import find_window
from linkage.exceptions import UsageError
from linkage.models.lean import as_lean, export, from_npz_bytes, project, to_npz_bytes
from linkage.spec import Limit
from linkage.synthetic import WINDOW_SETTINGS, WINDOW_SPEC

CONFIDENCE = 0.9


@pytest.fixture(scope="module")
def window(scenario):
    _, chain, spec, _ = scenario
    return find_window(chain, spec, settings=dict(WINDOW_SETTINGS), confidence=CONFIDENCE, n_draws=2000)


@pytest.fixture(scope="module")
def old_chain(scenario):
    """The scenario's chain as a model saved before bootstrap replicates existed."""
    _, chain, _, _ = scenario
    old = copy.copy(chain)
    old.__dict__.pop("bootstrap", None)  # an old pickle has no such attribute: the class default (None) shows
    assert old.bootstrap is None
    return old


LIMITS = [("weight_rsd_pct", Limit(None, 2.0)), ("weight_rsd_pct", Limit(0.5, 2.0)),
          ("dissolution_pct", Limit(80.0, None)), ("ribbon_porosity", Limit(0.2, 0.4)),
          ("friability_pct", Limit(-1.0, 0.8)), ("weight_rsd_pct", Limit(-2.0, -1.0))]
SCALES = {"weight_rsd_pct": 2.0, "dissolution_pct": 20.0, "ribbon_porosity": 0.5, "friability_pct": 1.0}


def _direct_sums(items, lw, w, ok):
    """The straightforward form of the last stage's sums: every lot of every
    draw projected and judged (linkage.models.lean.project, then
    linkage.decide.propagate.within), B × rows × draws × lots, summed with
    numpy's plain products."""
    joint = ok[..., None].copy()
    each = {}
    for name, pred, col, pick, limit, scale in items:
        r = np.broadcast_to(col[pick], lw.shape)
        s = 1.0 if scale is None else scale[..., None]
        passes = within(project(name, pred[..., None] + r[:, None, None, :] * s)[0], limit)
        joint = joint & passes
        each[name] = np.einsum("brd,bd->br", (passes * lw[:, None, None, :]).sum(axis=-1), w)
    return np.einsum("brd,bd->br", (joint * lw[:, None, None, :]).sum(axis=-1), w), each


def _sorted(items, lw):
    """The items as _final_sums takes them: each replicate's lots sorted by the residual."""
    return [(name, pred, _SortedLots(col, pick, lw.shape[0], lw), limit, s) for name, pred, col, pick, limit, s in items]


@pytest.mark.parametrize("name, limit", LIMITS)
def test_limits_on_residuals_equal_projection_then_limits(name, limit):
    """The last stage's sums judge pred + r on thresholds of the sorted
    residuals; they must equal projecting every sum onto the physical range,
    checking the limits and adding the weights of the lots that pass
    (linkage.models.lean.project, linkage.decide.propagate.within, numpy's
    plain sums): to rounding, with and without a spread model."""
    rng = np.random.default_rng(1)
    scale = SCALES[name]
    pred = rng.normal(0, scale, (3, 4, 5))
    col = rng.normal(0, scale, 9)  # the stage's lots; each replicate takes 7 of them
    pick = rng.integers(0, 9, (3, 7))
    lw = rng.dirichlet(np.ones(7), 3)
    w = rng.dirichlet(np.ones(5), 3)
    ok = np.ones(pred.shape, dtype=bool)
    for s in (None, rng.uniform(0.2, 3.0, pred.shape)):
        items = [(name, pred, col, pick, limit, s)]
        p_all, each = _final_sums(_sorted(items, lw), lw, w, ok)
        ref_all, ref_each = _direct_sums(items, lw, w, ok)
        np.testing.assert_allclose(p_all, ref_all, rtol=0, atol=1e-14)
        np.testing.assert_allclose(each[name], ref_each[name], rtol=0, atol=1e-14)


def test_final_sums_equal_the_direct_sums_on_a_seeded_case():
    """The fast sums of the last stage (sorted residuals, prefix sums, bit
    masks) against the direct computation (numpy, every lot of every draw
    judged): several targets at once, residuals with ties (whole lots drawn
    again), a spread model, draws that failed upstream, a replicate whose
    weights are NaN (it drew none of the stage's lots), NaN predictions, and
    the uniform weights of lots drawn by weight; 3 × 2 × 11 draws, 70 lots."""
    rng = np.random.default_rng(7)
    B, rows, D, L = 3, 2, 11, 70
    items = []
    # (limit, centre and SD of the predictions, SD of the residuals): each passes about 0.8 of the lots alone
    cases = {"weight_rsd_pct": (Limit(None, 2.0), 1.0, 0.3, 0.5), "dissolution_pct": (Limit(80.0, None), 90.0, 3.0, 6.0),
             "ribbon_porosity": (Limit(0.2, 0.4), 0.3, 0.02, 0.05), "friability_pct": (Limit(-1.0, 0.8), 0.3, 0.1, 0.3)}
    for name, (limit, centre, sd, r_sd) in cases.items():
        pred = rng.normal(centre, sd, (B, rows, D))
        pred[0, 0, 0] = np.nan
        base = rng.normal(0, r_sd, 40)
        col = np.concatenate([base, base[:10]])  # 50 stage lots, ten residuals twice (ties)
        pick = rng.integers(0, col.size, (B, L))  # each replicate's lots, some taken more than once
        s = rng.uniform(0.5, 2.0, pred.shape) if name == "dissolution_pct" else None
        items.append((name, pred, col, pick, limit, s))
    w = rng.dirichlet(np.ones(D), B)
    ok = rng.random((B, rows, D)) > 0.2
    lw = rng.dirichlet(np.ones(L), B)
    lw[2] = np.nan
    for weights in (lw, np.full((B, L), 1.0 / L)):
        p_all, each = _final_sums(_sorted(items, weights), weights, w, ok)
        ref_all, ref_each = _direct_sums(items, weights, w, ok)
        np.testing.assert_allclose(p_all, ref_all, rtol=0, atol=1e-14)
        assert set(each) == set(ref_each)
        for name in each:
            np.testing.assert_allclose(each[name], ref_each[name], rtol=0, atol=1e-14)
    assert np.isnan(p_all).sum() == 0 and np.isnan(_final_sums(_sorted(items, lw), lw, w, ok)[0][2]).all()
    assert 0.05 < np.nanmean(p_all) < 0.95  # the case is not trivial


def test_lot_counts_equal_numpy_searchsorted_row_by_row():
    """_SortedLots counts each replicate's residuals below (at most) a
    threshold from integer ranks; numpy's sort and searchsorted, row by row,
    are the reference (ties and lots taken twice included)."""
    rng = np.random.default_rng(3)
    col = np.round(rng.normal(size=40), 1)  # rounded: many ties
    x = np.round(rng.normal(size=(6, 5, 9)), 1)
    for pick in (rng.integers(0, 40, (6, 30)), np.arange(40)[None, :]):
        lots = _SortedLots(col, pick, 6, np.ones((1, pick.shape[1])))
        rows = np.sort(np.broadcast_to(col[pick], (6, pick.shape[1])), axis=1)
        np.testing.assert_array_equal(np.take_along_axis(np.broadcast_to(col[pick], rows.shape), lots.order, 1), rows)
        for side in ("left", "right"):
            expected = np.stack([np.searchsorted(rows[b], x[b], side=side) for b in range(6)])
            np.testing.assert_array_equal(lots.count(x, side), expected)


def test_quantile_of_replicates_equals_numpys_nanquantile():
    """Where the replicates have no NaN, their quantile is taken by
    np.quantile; numpy's np.nanquantile is the reference, bit for bit, at the
    levels the bounds use and with ties."""
    rng = np.random.default_rng(5)
    reps = np.round(rng.beta(8, 2, (200, 61)), 3)
    for q in (0.0, 0.1, 0.05, 0.0372, 0.5, 1.0):
        np.testing.assert_array_equal(_nanquantile(reps, q), np.nanquantile(reps, q, axis=0))
    reps[3, 5] = reps[17, 5] = np.nan
    np.testing.assert_array_equal(_nanquantile(reps, 0.1), np.nanquantile(reps, 0.1, axis=0))


def test_engine_point_matches_monte_carlo_on_the_grid(scenario, window):
    """The exact sums over residual lots (point estimate, fitted models) give
    the Monte Carlo's P(all pass) within its sampling error: 4 binomial SDs
    of 2000 draws, plus 0.01 for lots the sums leave out where a target is missing."""
    _, chain, spec, _ = scenario
    lean = as_lean(chain)
    columns = {"ribbon_porosity": window.grid,
               **{k: np.full(window.grid.size, v["value"]) for k, v in window.settings.items()}}
    cp = chain_probabilities(lean, columns, spec.limits, window.attributes, replicates=False)
    sd = np.sqrt(np.clip(window.p_all * (1 - window.p_all), 1e-4, None) / window.n_draws)
    assert np.all(np.abs(cp.p_all - window.p_all) <= 4 * sd + 0.01), np.max(np.abs(cp.p_all - window.p_all))


def test_bound_is_below_the_point_estimate_in_expectation(scenario, window):
    """Before the cap at the point estimate, the replicates' (1 − a) quantile
    lies below the point estimate on average over the grid, and the
    replicates centre on the point estimate (median within 0.02 on average)."""
    _, chain, spec, _ = scenario
    columns = {"ribbon_porosity": window.grid,
               **{k: np.full(window.grid.size, v["value"]) for k, v in window.settings.items()}}
    cp = chain_probabilities(as_lean(chain), columns, spec.limits, window.attributes)
    raw = np.quantile(cp.reps_all, 0.1, axis=0)
    moving = (cp.p_all > 0.02) & (cp.p_all < 0.98)
    assert moving.sum() > 10
    assert np.mean(raw[moving] - cp.p_all[moving]) < -0.01
    assert np.mean(np.abs(np.median(cp.reps_all, axis=0) - cp.p_all)) <= 0.02
    assert (window.p_all_low <= cp.p_all + 1e-12).all()
    # a higher assurance gives a lower bound, everywhere
    assert (cp.low_all(0.95) <= cp.low_all(0.9) + 1e-12).all() and (cp.low_all(0.9) <= cp.low_all(0.5) + 1e-12).all()


def test_bound_window_is_inside_the_point_window_and_true_probability_holds(scenario, window):
    """With the true chain known: the bound's window lies inside the point
    estimate's, and at every porosity of it the true probability of passing
    every limit is at least the confidence less 0.02 (one 160-lot campaign;
    the calibration over many campaigns is the benchmark's job)."""
    truth, *_ = scenario
    assert window.found and window.point_low is not None
    assert window.point_low - 1e-9 <= window.low.value and window.high.value <= window.point_high + 1e-9
    eps = np.linspace(window.low.value, window.high.value, 15)
    s = WINDOW_SETTINGS
    p_true = truth.p_pass_all(eps, WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"], n_draws=20000)
    assert np.min(p_true) >= CONFIDENCE - 0.02, (eps, p_true)


def test_window_edges_are_where_the_bound_crosses_the_confidence(window):
    d = json.loads(json.dumps(window.to_dict()))
    assert d["assurance"] == 0.9 and d["bound"]["available"] and d["bound"]["n_replicates"] == 200
    grid, low = np.array(d["curve"]["ribbon_porosity"]), np.array(d["curve"]["p_all_low"])
    assert len(low) == len(d["curve"]["p_all"]) == len(grid)
    lo, hi = d["ribbon_porosity"]["low"], d["ribbon_porosity"]["high"]
    inside = (grid >= lo) & (grid <= hi)
    assert (low[inside] >= CONFIDENCE - 1e-6).all()
    for edge in (lo, hi):  # the neighbours just outside a cut edge are below the confidence
        if min(abs(edge - grid[0]), abs(edge - grid[-1])) > 1e-9:
            outside = grid[np.argmin(np.where(inside, np.inf, np.abs(grid - edge)))]
            assert low[np.flatnonzero(grid == outside)[0]] < CONFIDENCE
    assert set(d["curve"]["p_each_low"]) == set(d["curve"]["p_each"])


def test_roll_force_range_runs_through_the_whole_chain(scenario, window):
    """low/high are where the bound of P(all pass), simulated from roll force
    on, reaches the confidence; the point estimate's range contains it; with
    the truth, a lot made at either edge force passes every limit with true
    probability at least the confidence less 0.05 (ribbon scatter included)."""
    truth, *_ = scenario
    rf = window.roll_force
    assert rf["low"] is not None and rf["bound_available"]
    forces, low = np.array(rf["chain_curve"]["roll_force_kn_per_cm"]), np.array(rf["chain_curve"]["p_all_low"])
    inside = (forces >= rf["low"] - 1e-9) & (forces <= rf["high"] + 1e-9)
    assert (low[inside] >= CONFIDENCE - 1e-6).all()
    assert rf["point_low"] <= rf["low"] + 1e-9 and rf["high"] <= rf["point_high"] + 1e-9
    assert rf["mean_response_low"] is not None
    held = {k: v["value"] for k, v in rf["held_chain"].items()}
    rng = np.random.default_rng(0)
    for force in (rf["low"], rf["high"]):
        mean_eps = truth.porosity_mean(force, held["roll_gap_mm"], held["roll_speed_rpm"], held["screw_speed_rpm"])
        eps = mean_eps + rng.normal(0, truth.porosity_process_sd, 2000)  # the lot's own porosity
        p = truth.p_pass_all(eps, WINDOW_SPEC, held["mill_screen_mm"], held["compression_force_kn"], n_draws=1000)
        assert float(np.mean(p)) >= CONFIDENCE - 0.05, (force, float(np.mean(p)))


def test_whatif_gives_each_bound_and_the_lean_file_the_same(scenario):
    _, chain, spec, _ = scenario
    values = {"ribbon_porosity": 0.30, **WINDOW_SETTINGS}
    a = predict_whatif(chain, values, spec=spec, assurance=0.9).to_dict()
    lean = from_npz_bytes(to_npz_bytes(export(chain)))
    b = predict_whatif(lean, values, spec=spec, assurance=0.9).to_dict()
    assert a["p_pass_all_bound"] == b["p_pass_all_bound"]
    bound = a["p_pass_all_bound"]
    assert bound["assurance"] == 0.9 and 0 <= bound["low"] <= 1 and "reason" not in bound
    for name, p in a["predictions"].items():
        if "p_pass" in p:
            assert p["p_pass_low"] <= p["p_pass_point"] + 1e-12
            assert bound["low"] <= p["p_pass_low"] + 1e-12  # all at once is never likelier than one
    c = predict_whatif(chain, values, spec=spec, assurance=0.99).to_dict()
    assert c["p_pass_all_bound"]["low"] <= bound["low"] + 1e-12


def test_old_model_without_replicates_says_no_bound(scenario, old_chain):
    _, _, spec, _ = scenario
    w = find_window(old_chain, spec, settings=dict(WINDOW_SETTINGS), n_draws=500)
    d = w.to_dict()
    assert d["bound"]["available"] is False and d["bound"]["reason"] == NO_BOUND
    assert d["curve"]["p_all_low"] is None and d["promise"] is False and NO_BOUND in d["promise_reasons"]
    # the window shown is the point estimate's, and said to be
    assert d["ribbon_porosity"]["low"] == d["ribbon_porosity"]["point_low"]
    from linkage.cli.decide_cmds import format_whatif, format_window

    assert "no lower bound" in format_window(w)
    lean = from_npz_bytes(to_npz_bytes(export(old_chain)))
    assert lean.bootstrap is None
    r = predict_whatif(lean, {"ribbon_porosity": 0.3}, spec=spec)
    out = r.to_dict()
    assert out["p_pass_all_bound"]["low"] is None and out["p_pass_all_bound"]["reason"] == NO_BOUND
    assert out["promise"] is False and all(p.get("p_pass_low", None) is None for p in out["predictions"].values())
    assert "no lower bound" in format_whatif(r)


def test_assurance_is_validated_before_any_work(tmp_path):
    runner = CliRunner()
    missing = tmp_path / "no-models"
    spec = tmp_path / "spec.toml"
    spec.write_text("[limits]\n", encoding="utf-8")
    for args in (["window", "--spec", str(spec)], ["predict", "--set", "ribbon_porosity=0.3"],
                 ["report", "--spec", str(spec)]):
        for bad in ("0", "1", "1.5", "nan", "x"):
            r = runner.invoke(cli, [*args, "--assurance", bad, "--models-dir", str(missing)])
            assert r.exit_code == 2, (args, bad, r.output)
            assert "--assurance" in r.output
    assert not missing.exists()
    with pytest.raises(UsageError, match="assurance"):
        find_window(None, None, assurance=1.0)


def test_cli_json_carries_the_contract_keys(saved_model):
    models_dir, _, spec_path = saved_model
    runner = CliRunner()
    r = runner.invoke(cli, ["window", "--spec", str(spec_path), "--json", "--draws", "500", "--assurance", "0.8",
                            "--models-dir", str(models_dir)], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["assurance"] == 0.8 and len(d["curve"]["p_all_low"]) == len(d["curve"]["p_all"])
    assert {"low", "high", "point_low", "point_high", "mean_response_low", "mean_response_high",
            "in_window_low", "in_window_high"} <= set(d["roll_force_kn_per_cm"])
    r = runner.invoke(cli, ["predict", "--set", "roll_force_kn_per_cm=9", "--spec", str(spec_path), "--json",
                            "--assurance", "0.8", "--models-dir", str(models_dir)], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert set(d["p_pass_all_bound"]) == {"assurance", "low"} and d["p_pass_all_bound"]["assurance"] == 0.8
    assert all("p_pass_low" in p for p in d["predictions"].values() if "p_pass" in p)
    r = runner.invoke(cli, ["predict", "--set", "roll_force_kn_per_cm=9", "--spec", str(spec_path),
                            "--models-dir", str(models_dir)], catch_exceptions=False)
    assert "with 90% assurance (point estimate" in r.stdout


def test_old_model_in_the_registry_says_no_bound_on_the_command_line(old_chain, tmp_path):
    """A model saved without replicates (as before they existed): `predict`
    and `window` load it, compute, and say plainly that there is no bound."""
    from linkage.models.registry import load_whatif, save
    from linkage.synthetic import spec_toml

    models_dir = tmp_path / "models"
    save(old_chain, models_dir)
    assert load_whatif(models_dir).bootstrap is None
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    runner = CliRunner()
    common = ["--spec", str(spec_path), "--models-dir", str(models_dir), "--no-record"]
    r = runner.invoke(cli, ["predict", "--set", "ribbon_porosity=0.3", *common, "--json"], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["p_pass_all_bound"]["low"] is None and "no lower bound" in d["p_pass_all_bound"]["reason"]
    r = runner.invoke(cli, ["window", *common, "--draws", "300"], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    assert "!! no lower bound on the probability is available" in r.stdout
    assert "(not promised)" in r.stdout


def test_the_unit_level_factor_is_carried_at_its_point_estimate():
    """P(pass with units) = P(lot values pass) x P(units pass | lot values pass) (the product rule of
    probability); with_unit_level scales the lot-level bound by the second factor's point estimate and never
    exceeds the unit-level point estimate. Checked on a simulated example with numpy."""
    from linkage.decide.bound import with_unit_level

    rng = np.random.default_rng(3)
    lot_ok = rng.random(200_000) < 0.95            # lot values pass
    units_ok = lot_ok & (rng.random(200_000) < 0.9)  # units pass given lot values pass
    lot_point, unit_point = lot_ok.mean(), units_ok.mean()
    low = with_unit_level(np.array([0.92]), np.array([lot_point]), np.array([unit_point]))
    assert low[0] == pytest.approx(0.92 * unit_point / lot_point)
    assert low[0] == pytest.approx(0.92 * 0.9, abs=0.003)
    assert with_unit_level(np.array([0.99]), np.array([0.5]), np.array([0.6]))[0] == 0.6  # capped
    assert with_unit_level(np.array([0.9]), np.array([0.0]), np.array([0.0]))[0] == 0.0


def test_simultaneous_band_on_independent_points_matches_sidak():
    """K independent points: a band holding at all of them with assurance a
    takes each at level 1 − a^(1/K) (Šidák 1967, JASA 62:626-633), so the
    quantile level found is 1 − 0.9^(1/5) = 0.0209 within Monte Carlo error
    of 20,000 replicates; the band lies at or below the pointwise bound and
    a fraction ≥ a of the replicates lie above it everywhere."""
    from linkage.decide.bound import lower_bound, simultaneous_lower_bound

    rng = np.random.default_rng(5)
    reps = rng.uniform(size=(20000, 5))
    point = np.ones(5)
    band, q = simultaneous_lower_bound(reps, 0.9, point, np.ones(5, dtype=bool))
    assert q == pytest.approx(1 - 0.9 ** (1 / 5), abs=0.002)
    assert np.all(band <= lower_bound(reps, 0.9, point) + 1e-12)
    assert np.mean(np.all(reps >= band, axis=1)) >= 0.9


def test_simultaneous_band_on_one_point_or_identical_points_is_the_pointwise_bound():
    """One point (or points that move together) needs no adjustment: the
    level is 1 − a, the band the pointwise percentile bound."""
    from linkage.decide.bound import lower_bound, simultaneous_lower_bound

    rng = np.random.default_rng(6)
    col = rng.beta(8, 2, size=(200, 1))
    for reps in (col, np.repeat(col, 7, axis=1)):
        point = np.full(reps.shape[1], 0.99)
        band, q = simultaneous_lower_bound(reps, 0.9, point, np.ones(reps.shape[1], dtype=bool))
        assert q == pytest.approx(0.1, abs=1e-9)
        np.testing.assert_allclose(band, lower_bound(reps, 0.9, point))
    # the region decides which points count; outside it the band is the same quantile level
    reps = rng.uniform(size=(400, 4))
    band, q = simultaneous_lower_bound(reps, 0.9, np.ones(4), np.array([True, False, False, False]))
    assert q == pytest.approx(0.1, abs=0.003)
    np.testing.assert_allclose(band, np.quantile(reps, q, axis=0))


def test_window_bound_is_simultaneous_and_below_the_pointwise_one(window):
    d = window.to_dict()
    sim = d["bound"]["simultaneous"]
    assert sim is not None and 0 <= sim["quantile"] <= 0.1 + 1e-12 and "Montiel Olea" in sim["method"]
    low, pointwise = np.array(d["curve"]["p_all_low"]), np.array(d["curve"]["p_all_low_pointwise"])
    assert np.all(low <= pointwise + 1e-6)
    force = d["roll_force_kn_per_cm"]
    assert force["bound_quantile"] is not None and force["bound_quantile"] <= 0.1 + 1e-12
    assert np.all(np.array(force["chain_curve"]["p_all_low"])
                  <= np.array(force["chain_curve"]["p_all_low_pointwise"]) + 1e-6)


@pytest.mark.parametrize("popcount", [True, False])
def test_the_bits_set_in_the_lot_masks_are_counted_as_python_counts_them(popcount, monkeypatch):
    """The count of lots in a mask (bits set over its uint64 words) by numpy's popcount where numpy has it
    (2.0 on) and by the byte table before: both equal Python's own int.bit_count, word by word (Python
    documentation, int.bit_count, 3.10 on), over random words with every bit pattern likely and the extremes."""
    from linkage.decide import bound

    if not popcount:
        monkeypatch.delattr(bound.np, "bitwise_count", raising=False)
    elif not hasattr(np, "bitwise_count"):
        pytest.skip("numpy before 2.0 has no bitwise_count")
    rng = np.random.default_rng(7)
    words = rng.integers(0, 2 ** 63, size=(3, 5, 4), dtype=np.uint64) * np.uint64(2) + rng.integers(
        0, 2, size=(3, 5, 4), dtype=np.uint64)
    words[0, 0] = np.uint64(0)
    words[0, 1] = ~np.uint64(0)
    expected = np.array([[sum(int(w).bit_count() for w in row) for row in block] for block in words])
    got = bound._bits_set(words.astype("<u8"))
    assert got.dtype == np.int64 and np.array_equal(got, expected)


def test_a_flat_gather_takes_the_same_prefix_rows_as_indexing_by_replicate_and_row():
    """_SortedLots.at gives the flat positions at which np.take gathers weight[b, i] and masks[b, i]: the same
    elements as numpy's indexing by two arrays (numpy's own definition of advanced indexing is the reference)."""
    rng = np.random.default_rng(11)
    B, n_s, L = 4, 9, 70
    col = rng.normal(size=n_s)
    pick = rng.integers(0, n_s, size=(B, L))
    lots = _SortedLots(col, pick, B, np.full((B, L), 1.0 / L))
    i = rng.integers(0, L + 1, size=(B, 6, 5))
    b = np.arange(B)[:, None, None]
    assert np.array_equal(np.take(lots.weight.reshape(-1), lots.at(i)), lots.weight[b, i])
    masks = lots.masks.reshape(-1, lots.masks.shape[-1])
    assert np.array_equal(np.take(masks, lots.at(i), axis=0), lots.masks[b, i])
    one = i[:1]  # rows given for one replicate spread to every replicate, as indexing by two arrays broadcasts them
    assert np.array_equal(np.take(lots.weight.reshape(-1), lots.at(one)), lots.weight[b, one])
    x = rng.normal(size=(B, 6, 5))
    for side in ("left", "right"):
        expected = np.array([[[np.sum(np.sort(col[pick[k]]) < v) if side == "left" else
                               np.sum(np.sort(col[pick[k]]) <= v) for v in row] for row in x[k]] for k in range(B)])
        assert np.array_equal(lots.count(x, side), expected)
