"""The pieces of the running-lot guidance (issue 17, item 1), each against
something outside the project: an analytic derivative, a textbook's worked
example, scipy's distributions, a Monte Carlo propagation (JCGM 101)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

from linkage.charts import Reference, run_rules
from linkage.cli.main import cli
from linkage.decide.running import (chart_signals, correction, level_now, sample_size, samples_to_confirm, sensitivity,
                                    shewhart_run_length, solve_setting)
from linkage.models.lean import Model

INPUTS = ["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm"]


# --------------------------------------------------------------------------- sensitivity


def test_sensitivity_of_a_linear_stage_is_its_coefficient():
    # ε = β0 + Σ βj (xj − x̄j): ∂ε/∂xj = βj exactly (analytic derivative of a linear function)
    coef = np.array([-0.018, 0.021, 0.003, -0.0017])
    stage = Model({"kind": "linear", "x_mean": np.array([8.0, 2.5, 5.0, 27.0]), "coef": coef, "intercept": 0.31})

    def predict(columns):
        return stage.predict(np.column_stack([columns[c] for c in INPUTS]))

    settings = {"roll_force_kn_per_cm": 9.3, "roll_gap_mm": 2.1, "roll_speed_rpm": 4.0, "screw_speed_rpm": 30.0}
    for j, name in enumerate(INPUTS):
        for step in (1e-3, 0.5):
            assert sensitivity(predict, settings, name, step) == pytest.approx(coef[j], rel=1e-9, abs=1e-12)


def test_sensitivity_of_a_log_stage_is_within_the_central_difference_error_bound():
    # ε = a − b·ln F (the synthetic truth's solid fraction a + b ln F): ε'(F) = −b/F; the central difference
    # errs by h²·ε'''(ξ)/6 with ε''' = −2b/F³ (Burden & Faires 2011, Numerical Analysis, 9th ed., §4.1, eq. 4.5)
    a, b = 0.62, 0.144

    def predict(columns):
        return a - b * np.log(columns["roll_force_kn_per_cm"])

    for force in (4.0, 8.0, 13.0):
        for h in (0.05, 0.5):
            got = float(sensitivity(predict, {"roll_force_kn_per_cm": force}, "roll_force_kn_per_cm", h))
            bound = h ** 2 / 6 * 2 * b / (force - h) ** 3
            assert abs(got - (-b / force)) <= bound * (1 + 1e-9)


def test_sensitivity_of_stacked_replicates_keeps_the_leading_axis():
    # B models at once: each replicate's own slope
    slopes = np.array([-0.01, -0.02, -0.03])

    def predict(columns):
        return slopes[:, None] * columns["roll_force_kn_per_cm"][None, :]

    got = sensitivity(predict, {"roll_force_kn_per_cm": 7.0}, "roll_force_kn_per_cm", 0.2)
    assert got.shape == (3,)
    np.testing.assert_allclose(got, slopes, rtol=1e-12)


def test_newton_steps_solve_a_log_stage_exactly():
    # f(x) − f(x0) = t with f = a − b ln x has the closed form x = x0·exp(−t/b)
    b, x0, t = 0.144, 8.0, -0.05

    def change(x):
        return -b * math.log(x / x0)

    x, ok = solve_setting(change, x0, t, lambda x: -b / x)
    assert ok
    assert x == pytest.approx(x0 * math.exp(-t / b), rel=1e-6)


# --------------------------------------------------------------------------- uncertainty of the correction


def test_correction_uncertainty_matches_a_monte_carlo_propagation():
    # JCGM 101:2008 (GUM Supplement 1): propagate the distributions by drawing; for small relative
    # uncertainties the first-order law (JCGM 100:2008, eq. 10) agrees with it
    centre, level, u_level, slope, u_slope = 0.30, 0.33, 0.002, -0.018, 0.0009
    dx, u = correction(centre, level, u_level, slope, u_slope)
    assert dx == pytest.approx((centre - level) / slope)
    rng = np.random.default_rng(0)
    draws = (centre - rng.normal(level, u_level, 400_000)) / rng.normal(slope, u_slope, 400_000)
    assert np.mean(draws) == pytest.approx(dx, rel=0.01)
    assert np.std(draws) == pytest.approx(u, rel=0.03)


def test_correction_without_slope_uncertainty_is_the_level_term():
    dx, u = correction(0.30, 0.33, 0.002, -0.018, None)
    assert u == pytest.approx(0.002 / 0.018)
    with pytest.raises(ValueError):
        correction(0.30, 0.33, 0.002, 0.0, None)


def test_level_of_a_trend_and_its_standard_error_follow_least_squares():
    # the line at the last time point and the slope's standard error against scipy.stats.linregress
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 5, 12))
    y = 0.3 + 0.004 * t + 0.005 * rng.standard_normal(12)
    fit = stats.linregress(t, y)
    s = math.sqrt(np.sum((y - fit.intercept - fit.slope * t) ** 2) / (len(t) - 2))
    got = level_now(y, t, s, drifting=True)
    assert got["value"] == pytest.approx(fit.intercept + fit.slope * t[-1], rel=1e-12)
    assert got["rate_per_hour"] == pytest.approx(fit.slope, rel=1e-10)
    assert got["rate_per_hour_se"] == pytest.approx(fit.stderr, rel=1e-10)
    # the mean response's SE, σ·sqrt(1/n + (t0 − t̄)²/S_tt) (Montgomery, Peck & Vining 2012, §2.4.2), equals
    # sqrt(SE(intercept)² + t0²·SE(slope)² + 2·t0·cov) of the fit; with t0 = t̄ it is σ/√n
    stt = np.sum((t - t.mean()) ** 2)
    cov = -t.mean() * s ** 2 / stt
    se_via_fit = math.sqrt(fit.intercept_stderr ** 2 + t[-1] ** 2 * fit.stderr ** 2 + 2 * t[-1] * cov)
    assert got["se"] == pytest.approx(se_via_fit, rel=1e-9)
    flat = level_now(y, t, s, drifting=False)
    assert flat["value"] == pytest.approx(y.mean()) and flat["se"] == pytest.approx(s / math.sqrt(12))


# --------------------------------------------------------------------------- samples to confirm


def test_sample_size_matches_the_textbook_example():
    # Montgomery & Runger, Applied Statistics and Probability for Engineers, §9.2.2, eq. 9-22, the propellant
    # burning-rate example: σ = 2 cm/s, δ = 1 cm/s, α = 0.05, β = 0.10 gives n = (1.96 + 1.28)²·2²/1² ≈ 42.
    # (from memory: the example's numbers). The book rounds the quantiles to 1.96 and 1.28; unrounded the
    # formula gives 42.03, and the samples to take are its ceiling
    assert sample_size(1 / 2, alpha=0.05, power=0.90) == pytest.approx(42.0, abs=0.05)
    assert samples_to_confirm(1 / 2, alpha=0.05, power=0.90) == math.ceil(sample_size(1 / 2, 0.05, 0.90))


@pytest.mark.parametrize("shift", [0.5, 0.8, 1.0, 1.5, 2.0])
@pytest.mark.parametrize("power", [0.8, 0.9, 0.95])
def test_sample_size_is_the_smallest_with_the_power(shift, power):
    # exact power of the two-sided z-test on n samples (scipy's normal distribution):
    # Φ(δ√n − z_{1−α/2}) + Φ(−δ√n − z_{1−α/2})
    alpha = 0.05
    z = stats.norm.ppf(1 - alpha / 2)

    def exact(n):
        return stats.norm.cdf(shift * math.sqrt(n) - z) + stats.norm.cdf(-shift * math.sqrt(n) - z)

    n = samples_to_confirm(shift, alpha, power)
    assert exact(n) >= power
    if n > 1:  # the formula leaves out the far tail, which adds less than 1e-3 here
        assert exact(n - 1) < power + 1e-3


# --------------------------------------------------------------------------- run length


def test_shewhart_run_length_in_control_and_after_a_step():
    # ARL₀ = 1/0.0027 = 370 for 3σ limits (Montgomery 2009, §5.3.3); after a 1σ step the individuals chart
    # signals with p = Φ(−4) + 1 − Φ(2), ARL = 1/p ≈ 44 (geometric run length, Montgomery 2009 §6.2)
    horizon = 20_000
    arl0 = 1 + shewhart_run_length(np.zeros(horizon)).sum()  # E[RL] = Σ_{t≥0} P(RL > t)
    assert arl0 == pytest.approx(1 / (2 * stats.norm.sf(3)), rel=1e-6)
    assert arl0 == pytest.approx(370.4, abs=0.1)
    arl1 = 1 + shewhart_run_length(np.ones(horizon)).sum()
    assert arl1 == pytest.approx(1 / (stats.norm.cdf(-4) + stats.norm.sf(2)), rel=1e-6)


def test_chart_signals_are_the_charts_of_linkage_charts():
    x = np.array([0.0, 0.1, -0.2, 0.4, 3.5, 0.2])
    signals, z, zl, zh = chart_signals(x, 0.0, 1.0)
    rules = run_rules(x, Reference(0.0, 1.0, len(x)))
    for fired, got in zip(rules, signals):
        assert [f"{r} (upward)" if r else r for r in fired] == [g for g in got if "EWMA" not in g]
    assert "beyond 3 sigma (upward)" in signals[4]


# --------------------------------------------------------------------------- bad input


def _samples(path, rows, header="lot,sample,sampled_at,envelope_density_g_cm3,skeletal_density_g_cm3"):
    path.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    return path


def test_bad_samples_file_lists_every_problem_and_writes_nothing(tmp_path):
    f = _samples(tmp_path / "atline.csv", [
        "R-1,1,2026-03-02T08:00,1.05,1.53",
        "R-1,2,,1.06,1.53",                    # no sampled_at
        "R-1,3,2026-03-02T08:50,1.04,1.53x",   # not a number
        "R-1,4,2026-03-02T09:15,1.6,1.53",     # envelope above skeletal density (template rule)
    ])
    chart, out = tmp_path / "run.png", tmp_path / "run.json"
    r = CliRunner().invoke(cli, ["running", str(f), "--window", "0.25:0.35", "--chart", str(chart), "--out", str(out),
                                 "--store", str(tmp_path / "none.db"), "--models-dir", str(tmp_path / "models")])
    assert r.exit_code == 2, r.output
    assert "3 problems found; nothing was written" in r.output
    assert "atline.csv, row 3, column 'sampled_at'" in r.output
    assert "atline.csv, row 4, column 'skeletal_density_g_cm3', value '1.53x'" in r.output
    assert "atline.csv, row 5, column 'envelope_density_g_cm3', value 1.6" in r.output
    assert not chart.exists() and not out.exists()


def test_samples_of_two_lots_are_refused_row_by_row(tmp_path):
    f = _samples(tmp_path / "atline.csv", ["R-1,1,2026-03-02T08:00,1.05,1.53", "R-2,2,2026-03-02T08:25,1.06,1.53",
                                           "R-1,3,2026-03-02T08:50,1.06,1.53", "R-3,4,2026-03-02T09:15,1.06,1.53"])
    r = CliRunner().invoke(cli, ["running", str(f), "--window", "0.25:0.35", "--baseline", "3",
                                 "--store", str(tmp_path / "none.db"), "--models-dir", str(tmp_path / "models")])
    assert r.exit_code == 2
    assert "2 problems found" in r.output
    assert "atline.csv, row 3, column 'lot', value 'R-2'" in r.output
    assert "atline.csv, row 5, column 'lot', value 'R-3'" in r.output


def test_process_file_without_the_lot_is_refused_with_the_samples_problems(tmp_path):
    f = _samples(tmp_path / "atline.csv", ["R-1,1,2026-03-02T08:00,1.05,1.53", "R-2,2,2026-03-02T08:25,1.06,1.53",
                                           "R-1,3,2026-03-02T08:50,1.06,1.53"])
    p = tmp_path / "process.csv"
    p.write_text("lot,roll_force_kn_per_cm,roll_gap_mm,roll_speed_rpm,screw_speed_rpm,mill_screen_mm\n"
                 "R-9,8,2.5,5,27,1.0\n", encoding="utf-8")
    r = CliRunner().invoke(cli, ["running", str(f), "--process", str(p), "--window", "0.25:0.35", "--baseline", "2",
                                 "--store", str(tmp_path / "none.db"), "--models-dir", str(tmp_path / "models")])
    assert r.exit_code == 2
    assert "2 problems found" in r.output
    assert "process.csv, column 'lot': no row for lot 'R-1'" in r.output
    assert "atline.csv, row 3, column 'lot', value 'R-2'" in r.output


@pytest.mark.parametrize("n, baseline", [(8, 10), (5, 5), (2, 5)])
def test_a_baseline_that_leaves_no_sample_to_judge_is_refused(tmp_path, n, baseline):
    """A regression test of a refusal (no outside source needed): `--baseline 10` on 8 samples used to take all 8
    as the baseline without a word, so no sample was ever judged against a centre it did not make; now it is
    refused with exit code 2, the file, both counts and the rule (baseline + 1 samples), and nothing written,
    alongside the file's other problems."""
    f = _samples(tmp_path / "atline.csv", [f"R-1,{i + 1},2026-03-02T{8 + i // 4:02d}:{15 * (i % 4):02d},1.05,1.53"
                                           for i in range(n)])
    out = tmp_path / "run.json"
    r = CliRunner().invoke(cli, ["running", str(f), "--window", "0.25:0.35", "--baseline", str(baseline),
                                 "--out", str(out), "--store", str(tmp_path / "none.db"),
                                 "--models-dir", str(tmp_path / "models")])
    assert r.exit_code == 2, r.output
    assert "1 problem found" in r.output
    assert (f"atline.csv, value {n}: the baseline asks for {baseline} samples and the file has {n}; at least "
            f"baseline + 1 = {baseline + 1} samples") in r.output
    assert not out.exists()


@pytest.mark.parametrize("args, message", [
    ([], "--window LOW:HIGH or --spec"),
    (["--window", "0.35:0.25"], "0 < LOW < HIGH < 1"),
    (["--window", "0,25:0.35"], "is not LOW:HIGH"),
])
def test_window_usage_errors(tmp_path, args, message):
    f = _samples(tmp_path / "atline.csv", ["R-1,1,2026-03-02T08:00,1.05,1.53"])
    r = CliRunner().invoke(cli, ["running", str(f), *args, "--store", str(tmp_path / "none.db"),
                                 "--models-dir", str(tmp_path / "models")])
    assert r.exit_code == 2
    assert message in r.output


def test_samples_from_a_workbook_are_read_by_the_template(tmp_path):
    from openpyxl import Workbook

    from linkage.decide.running import read_samples

    wb = Workbook()
    ws = wb.active
    ws.title = "ribbon"
    ws.append(["lot", "sample", "sampled_at", "envelope_density_g_cm3", "skeletal_density_g_cm3"])
    ws.append(["R-7", "1", "2026-03-02T08:00:00", 1.05, 1.53])
    ws.append(["R-7", "2", "2026-03-02T08:25:00", 1.04, 1.53])
    path = tmp_path / "atline.xlsx"
    wb.save(path)
    df, lot, problems = read_samples(path)
    assert problems == [] and lot == "R-7"
    assert list(df["envelope_density_g_cm3"]) == [1.05, 1.04]
    ws.append(["R-7", "3", None, 1.04, 1.53])
    wb.save(path)
    _, _, problems = read_samples(path)
    assert [(p.row, p.column) for p in problems] == [(4, "sampled_at")]


def test_no_correction_where_the_stage_is_flat_at_the_setting_it_comes_to():
    """A stage that stops moving with the setting (here porosity = 0.3 − 0.05·min(x, 2)) cannot
    bring the level to the centre by that setting alone: past x = 2 the derivative is zero, so the
    law of propagation (JCGM 100:2008, eq. 10: u(Δx) = u(L)/|∂f/∂x|) has no finite value. The
    guidance then suggests nothing and says why, instead of failing (it raised a ValueError)."""
    from types import SimpleNamespace

    from linkage.decide.running import _suggested_correction

    class FlatBeyondTwo:
        def predict(self, columns, raw=False):
            return 0.3 - 0.05 * np.minimum(np.asarray(columns["roll_gap_mm"], float), 2.0)

    lean = SimpleNamespace(_replicates=SimpleNamespace(available=False, models={}))
    notes: list[str] = []
    sens = {"value": -0.05, "se": None}
    level = {"value": 0.275, "se": 0.002}  # the centre 0.225 needs a fall of 0.05: gap 1.5 → 2.5
    got = _suggested_correction(lean, FlatBeyondTwo(), {"roll_gap_mm": 1.5}, "roll_gap_mm", 0.05, sens, None,
                                level, 0.225, 0.225, (1.0, 3.0), notes)
    assert got is None
    assert any("no correction is suggested" in n and "roll_gap_mm" in n for n in notes)


def test_the_first_signal_names_its_sample_once_and_its_place_only_where_they_differ():
    """'first signal at sample 9 (#9)' said the same twice for samples numbered in time order; the place in time
    order is said only for a sample labelled otherwise (wording; no outside source)."""
    from linkage.decide.running import _sample_text

    assert _sample_text({"first_signal_sample": "9", "first_signal_index": 8}) == "sample 9"
    assert _sample_text({"first_signal_sample": "A3", "first_signal_index": 8}) == "sample A3 (the 9th in time order)"
    assert _sample_text({"first_signal_sample": "7", "first_signal_index": 1}) == "sample 7 (the 2nd in time order)"
    assert _sample_text({"first_signal_sample": "x", "first_signal_index": 10}) == "sample x (the 11th in time order)"
