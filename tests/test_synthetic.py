"""Tests of linkage.synthetic (the known-truth lot generator) and of the demo
scenario it writes (data_demo/).

Each check names what it is compared with: a published formula (with its
source), a reference library (scipy.stats), a probability-theory identity, or
the generator's own stated noise model (parameter recovery, marked so).
"""

from __future__ import annotations

import importlib.util
import math
import tomllib
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from linkage.exceptions import UsageError
from linkage.schema import DATETIME, NUMBER, TABLES
from linkage.synthetic import (
    ATTRIBUTES,
    SIEVES_UM,
    WINDOW_SETTINGS,
    WINDOW_SPEC,
    Truth,
    make_lots,
    remeasure_ribbon,
    rrsb_from_d50_fines,
)

DEMO = Path(__file__).resolve().parents[1] / "data_demo"
SCREEN = WINDOW_SETTINGS["mill_screen_mm"]
FORCE = WINDOW_SETTINGS["compression_force_kn"]


@pytest.fixture(scope="module")
def big():
    """12,000 lots with every optional table, for the statistical checks."""
    return make_lots(12_000, seed=11, with_units=True, with_vessels=True)


# ---------------------------------------------------------------- helpers
def schema_problems(name: str, frame: pd.DataFrame) -> list[str]:
    """Every breach of linkage.schema's rules by one raw table: required
    headers, non-empty cells, numeric bounds with their inclusivity, ISO
    datetimes, unique keys. Written from schema.TABLES directly."""
    table = TABLES[name]
    problems = [f"{name}: missing required column {c.name}" for c in table.columns
                if c.required and c.name not in frame.columns]
    for col in table.columns:
        if col.name not in frame.columns:
            continue
        values = frame[col.name]
        if col.nonempty and values.isna().any():
            problems.append(f"{name}.{col.name}: empty cell in a non-empty column")
        present = values.dropna()
        if col.kind == NUMBER:
            x = pd.to_numeric(present, errors="coerce")
            if x.isna().any():
                problems.append(f"{name}.{col.name}: non-numeric value")
            if col.low is not None:
                bad = x < col.low if col.low_inclusive else x <= col.low
                if bad.any():
                    problems.append(f"{name}.{col.name}: below {col.bound_text()}: {x[bad].min()}")
            if col.high is not None:
                bad = x > col.high if col.high_inclusive else x >= col.high
                if bad.any():
                    problems.append(f"{name}.{col.name}: above {col.bound_text()}: {x[bad].max()}")
        elif col.kind == DATETIME:
            parsed = pd.to_datetime(present, format="ISO8601", errors="coerce")
            if parsed.isna().any():
                problems.append(f"{name}.{col.name}: not ISO 8601")
    if frame.duplicated(list(table.key)).any():
        problems.append(f"{name}: duplicate key {table.key}")
    return problems


def rsd_pct(values) -> float:
    """RSD = 100 s / mean with the sample SD (n - 1); the usual definition
    (common practice, no source)."""
    x = np.asarray(values, dtype=float)
    return 100.0 * x.std(ddof=1) / x.mean()


def load_generate():
    spec = importlib.util.spec_from_file_location("demo_generate", DEMO / "generate.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# ---------------------------------------------------------------- determinism
def test_same_seed_same_tables_other_seed_other_tables():
    a = make_lots(60, seed=3, with_units=0.5, with_vessels=0.5, raw_materials=True)
    b = make_lots(60, seed=3, with_units=0.5, with_vessels=0.5, raw_materials=True)
    c = make_lots(60, seed=4, with_units=0.5, with_vessels=0.5, raw_materials=True)
    assert a.tables.keys() == b.tables.keys()
    for name in a.tables:
        pd.testing.assert_frame_equal(a.tables[name], b.tables[name])
    pd.testing.assert_frame_equal(a.lot_truth, b.lot_truth)
    assert not np.array_equal(a.tables["ribbon"]["envelope_density_g_cm3"].head(10),
                              c.tables["ribbon"]["envelope_density_g_cm3"].head(10))


def test_optional_tables_leave_every_other_value_unchanged():
    plain = make_lots(80, seed=5)
    full = make_lots(80, seed=5, with_units=True, with_vessels=True)
    assert set(plain.tables) == {"process", "ribbon", "granules", "tablets"}
    assert set(full.tables) == {"process", "ribbon", "granules", "tablets", "tablet_weights", "dissolution"}
    for name in plain.tables:
        pd.testing.assert_frame_equal(plain.tables[name], full.tables[name])


# ---------------------------------------------------------------- template
def test_tables_follow_the_template_and_its_bounds():
    lots = make_lots(500, seed=1, with_units=True, with_vessels=True, raw_materials=True, product="P-1")
    problems = [p for name, frame in lots.tables.items() for p in schema_problems(name, frame)]
    assert problems == []
    ribbon = lots.tables["ribbon"]
    # schema rule of the ribbon table: envelope <= skeletal density
    assert (ribbon["envelope_density_g_cm3"] <= ribbon["skeletal_density_g_cm3"]).all()
    assert ribbon.groupby("lot").size().between(3, 5).all()
    # skeletal density of the product 1.50-1.56 g/cm3 (MCC-like; Akseli et al. 2011 Table II
    # implies about 1.55 g/cm3 for MCC, references.md section 1), pycnometer noise small
    assert ribbon["skeletal_density_g_cm3"].between(1.49, 1.57).all()
    granules = lots.tables["granules"]
    # schema rule: each lot's retained masses sum to more than 0 g; 11 fractions incl. the pan
    assert (granules.groupby("lot")["retained_g"].sum() > 0).all()
    assert (granules.groupby("lot").size() == len(SIEVES_UM)).all()
    assert set(granules["sieve_um"]) == set(SIEVES_UM)
    assert granules.groupby("lot")["retained_g"].sum().between(90, 110).all()
    # one lot per working day, in order
    started = pd.to_datetime(lots.tables["process"]["manufactured_at"])
    assert started.is_monotonic_increasing
    assert (started.dt.day_of_week < 5).all()
    assert started.dt.normalize().is_unique
    # the campaign spans the ribbon porosity range the brief asks for
    eps = lots.lot_truth["ribbon_porosity"]
    assert eps.min() < 0.215 and eps.max() > 0.43


# ---------------------------------------------------------------- ribbon stage
def test_ribbon_porosity_is_the_pycnometry_definition():
    """Porosity = 1 - envelope / skeletal density (references.md section 1),
    mean over the lot's replicates, recomputed from the ribbon table."""
    lots = make_lots(300, seed=2)
    r = lots.tables["ribbon"]
    eps = (1.0 - r["envelope_density_g_cm3"] / r["skeletal_density_g_cm3"]).groupby(r["lot"]).mean()
    truth = lots.lot_truth.set_index("lot")
    np.testing.assert_allclose(eps.loc[truth.index], truth["ribbon_porosity"], rtol=0, atol=1e-12)


def test_ribbon_truth_directions():
    """Solid fraction linear in ln(roll force) (logarithmic compressibility
    form, Walker 1923, from memory): doubling the force adds b ln 2 to the
    solid fraction at any force. Larger gap and faster rolls: more porous."""
    t = Truth()
    force = np.array([4.0, 5.0, 7.0])
    step = t.porosity_mean(force, 2.5, 5.0, 27.5) - t.porosity_mean(2 * force, 2.5, 5.0, 27.5)
    np.testing.assert_allclose(step, t.sf_per_ln_force * math.log(2.0), rtol=1e-12)
    assert t.porosity_mean(8.0, 3.0, 5.0, 33.0) > t.porosity_mean(8.0, 2.0, 5.0, 22.0)
    assert t.porosity_mean(8.0, 2.5, 7.0, 38.5) > t.porosity_mean(8.0, 2.5, 3.0, 16.5)
    assert t.porosity_mean(8.0, 2.5, 5.0, 27.5, compactor=np.array(["production"]))[0] < \
        t.porosity_mean(8.0, 2.5, 5.0, 27.5)


def test_porosity_noise_matches_the_stated_sd(big):
    """Parameter recovery (own noise model): measured lot porosity minus its
    mean has SD sqrt(process^2 + replicate^2 / n) for each replicate count."""
    lt = big.lot_truth
    resid = lt["ribbon_porosity"] - lt["ribbon_porosity_mean"]
    for n in (3, 4, 5):
        sd = resid[lt["ribbon_samples"] == n].std()
        assert sd == pytest.approx(big.truth.porosity_noise_sd(n), rel=0.05)
    assert big.truth.noise_sd["ribbon_porosity"] == pytest.approx(big.truth.porosity_noise_sd(4))


# ---------------------------------------------------------------- granule stage
def test_granule_truth_is_rrsb_checked_with_scipy_weibull():
    """RRSB Q3(x) = 1 - exp(-(x/x')^n) is the Weibull CDF with shape n and
    scale x' (Rosin & Rammler 1933, from memory; references.md section 6):
    d50 and fines from scipy.stats.weibull_min."""
    t = Truth()
    eps = np.array([0.2, 0.3, 0.45])
    for screen in (0.8, 1.0, 1.25):
        g = t.granules_mean(eps, screen)
        ref = stats.weibull_min(g["rrsb_n"], scale=g["rrsb_x_prime_um"])
        np.testing.assert_allclose(g["granule_d50_um"], ref.ppf(0.5), rtol=1e-10)
        np.testing.assert_allclose(g["fines_pct"], 100 * ref.cdf(125.0), rtol=1e-10)
    g = t.granules_mean(np.linspace(0.2, 0.45, 20), 1.0)
    assert np.all(np.diff(g["granule_d50_um"]) < 0)  # denser ribbon -> coarser granules
    assert np.all(np.diff(g["fines_pct"]) > 0)
    assert t.granules_mean(0.3, 1.25)["granule_d50_um"] > t.granules_mean(0.3, 0.8)["granule_d50_um"]


def test_rrsb_worked_example():
    """references.md section 6 (COMPUTED): x' = 400 um, n = 2 gives
    d50 = 333.022 um; inverting from d50 and the fines below 125 um returns
    x' and n."""
    fines = 100 * (1 - math.exp(-(125 / 400) ** 2))
    x_prime, n = rrsb_from_d50_fines(333.022, fines)
    assert x_prime == pytest.approx(400.0, rel=1e-5)
    assert n == pytest.approx(2.0, rel=1e-5)


@settings(max_examples=40, deadline=None)
@given(x_prime=st.floats(150.0, 900.0), n=st.floats(0.8, 3.0))
def test_rrsb_inversion_round_trip(x_prime, n):
    ref = stats.weibull_min(n, scale=x_prime)
    fines = 100 * ref.cdf(125.0)
    if not 0.01 < fines < 49.0:
        return
    got_x, got_n = rrsb_from_d50_fines(ref.ppf(0.5), fines)
    assert got_x == pytest.approx(x_prime, rel=1e-7)
    assert got_n == pytest.approx(n, rel=1e-7)


def test_sieve_masses_follow_the_lot_rrsb_distribution():
    """The share retained on each sieve is the difference of the Weibull CDF
    (scipy) at the bracketing apertures for the lot's realised x' and n, up to
    weighing noise; fines (mass through 125 um, pan included) match the lot's
    true fines."""
    lots = make_lots(400, seed=6)
    g = lots.tables["granules"]
    mass = g["retained_g"].to_numpy().reshape(-1, len(SIEVES_UM))
    share = mass / mass.sum(axis=1, keepdims=True)
    lt = lots.lot_truth
    apertures = np.array(SIEVES_UM[:-1], dtype=float)
    cdf = stats.weibull_min.cdf(apertures[None, :], lt["rrsb_n"].to_numpy()[:, None],
                                scale=lt["rrsb_x_prime_um"].to_numpy()[:, None])
    expected = -np.diff(np.concatenate([np.ones((len(lt), 1)), cdf, np.zeros((len(lt), 1))], axis=1), axis=1)
    assert np.abs(share - expected).max() < 0.002
    below_125 = share[:, SIEVES_UM.index(125) + 1:].sum(axis=1) * 100
    assert np.abs(below_125 - lt["fines_pct"]).max() < 0.2


def test_sieve_d50_is_close_to_the_rrsb_truth():
    """The learnable d50 is read from the sieve curve by log-linear
    interpolation (references.md section 6), not the RRSB median: here it
    reads within 1.5 % of the truth (documented in data_demo/README.md)."""
    lots = make_lots(400, seed=8)
    mass = lots.tables["granules"]["retained_g"].to_numpy().reshape(-1, len(SIEVES_UM))
    undersize = 100 * (1 - np.cumsum(mass, axis=1)[:, :-1] / mass.sum(axis=1, keepdims=True))
    ap = np.array(SIEVES_UM[:-1], dtype=float)[::-1]
    d50 = np.array([math.exp(np.interp(50.0, q[::-1], np.log(ap))) for q in undersize])
    rel = d50 / lots.lot_truth["granule_d50_um"].to_numpy() - 1
    assert np.abs(rel).max() < 0.015


def test_granule_noise_matches_the_stated_sd(big):
    """Parameter recovery (own noise model): SDs and correlation of the lot
    d50 and fines around their stage means."""
    lt = big.lot_truth
    inside = lt["ribbon_porosity_lot"].between(0.22, 0.40)  # away from the clipping limits
    r_d50 = (lt["granule_d50_um"] - lt["granule_d50_um_mean"])[inside]
    r_fines = (lt["fines_pct"] - lt["fines_pct_mean"])[inside]
    assert r_d50.std() == pytest.approx(big.truth.noise_sd["granule_d50_um"], rel=0.04)
    assert r_fines.std() == pytest.approx(big.truth.noise_sd["fines_pct"], rel=0.04)
    assert np.corrcoef(r_d50, r_fines)[0, 1] == pytest.approx(big.truth.granule_noise_corr, abs=0.03)


# ---------------------------------------------------------------- tablet stage
def test_breaking_force_reproduces_strength_by_fell_newton():
    """Tensile strength of a flat round tablet sigma = 2F / (pi D t)
    (Fell & Newton 1970, J Pharm Sci 59:688), from the tablets table, equals
    the lot's realised strength up to rounding of F (0.1 N) and t (0.001 mm)."""
    lots = make_lots(500, seed=9)
    tab = lots.tables["tablets"]
    sigma = 2 * tab["breaking_force_n"] / (math.pi * tab["diameter_mm"] * tab["thickness_mm"])
    np.testing.assert_allclose(sigma, lots.lot_truth["tensile_strength_mpa"], rtol=0, atol=1.5e-3)
    # flat 10 mm tablets of realistic thickness
    assert (tab["diameter_mm"] == 10.0).all()
    assert tab["thickness_mm"].between(3.4, 4.8).all()


def test_fell_newton_check_value_in_the_mean_function():
    """references.md section 3 (COMPUTED): sigma = 2 MPa, D = 10 mm,
    t = 4 mm -> F = 125.664 N. The truth's breaking force at its own
    thickness, scaled to 2 MPa and 4 mm, gives the same number."""
    t = Truth()
    m = t.tablets_mean(0.3, 300.0, 20.0, 14.0)
    force_at_2mpa_4mm = m["breaking_force_n"] * (2.0 / m["tensile_strength_mpa"]) * (4.0 / m["thickness_mm"])
    assert force_at_2mpa_4mm == pytest.approx(125.664, abs=5e-4)
    assert 2 * m["breaking_force_n"] / (math.pi * 10.0 * m["thickness_mm"]) == pytest.approx(
        m["tensile_strength_mpa"], rel=1e-12)


def test_strength_is_ryshkewitch_duckworth_in_tablet_porosity():
    """sigma = sigma0 exp(-k eps) (Ryshkewitch 1953, Duckworth 1953).
    references.md section 2 (COMPUTED): sigma0 = 10 MPa, k = 8, eps = 0.25
    -> 1.353353 MPa. With no ribbon-hardening or granule-size term, pick the
    compression force at which the Heckel form gives tablet porosity 0.25."""
    t = Truth(rd_sigma0_mpa=10.0, rd_k=8.0, ribbon_hardening=0.0, strength_d50_exponent=0.0)
    pressure_mpa = t.apparent_yield_pressure_mpa * (-math.log(0.25) - t.heckel_a)  # ln(1/eps) = A + P/Py
    force_kn = pressure_mpa * math.pi * 10.0 ** 2 / 4 / 1000
    m = t.tablets_mean(0.3, 300.0, 20.0, force_kn)
    assert m["tablet_porosity"] == pytest.approx(0.25, rel=1e-12)
    assert m["tensile_strength_mpa"] == pytest.approx(1.353353, abs=1e-6)


def test_tablet_porosity_has_the_heckel_slope():
    """Heckel (1961, from memory): ln(1/eps) = A + P/Py, so a straight-line
    fit of ln(1/eps) on pressure returns slope 1/Py (no hardening term)."""
    t = Truth(ribbon_hardening=0.0)
    force = np.linspace(8, 20, 7)
    pressure = force * 1000 / (math.pi * 10.0 ** 2 / 4)
    eps = t.tablet_porosity(0.3, force)
    slope, intercept = np.polyfit(pressure, np.log(1 / eps), 1)
    assert slope == pytest.approx(1 / t.apparent_yield_pressure_mpa, rel=1e-9)
    assert intercept == pytest.approx(t.heckel_a, rel=1e-9)


def test_tablet_truth_directions():
    """Strength rises with ribbon porosity (loss of tabletability after roll
    compaction: Akseli et al. 2011 Table III, the denser ribbon section gave
    the weaker tablets) and with compression force; weight RSD rises with
    fines; friability falls as strength rises; dissolution falls as the
    ribbon densifies."""
    t = Truth()
    eps = np.linspace(0.2, 0.45, 11)
    m = t.tablets_mean(eps, 300.0, 20.0, 14.0)
    assert np.all(np.diff(m["tensile_strength_mpa"]) > 0)
    assert np.all(np.diff(m["friability_pct"]) < 0)
    assert np.all(np.diff(m["dissolution_pct"]) > 0)
    assert np.all(np.diff(t.tablets_mean(0.3, 300.0, np.linspace(5, 35, 7), 14.0)["weight_rsd_pct"]) > 0)
    assert np.all(np.diff(t.tablets_mean(0.3, 300.0, 20.0, np.linspace(8, 20, 7))["tensile_strength_mpa"]) > 0)
    # Akseli et al. 2011 Table III, case 1: SF 0.53 -> 5.21 MPa, SF 0.70 -> 2.79 MPa; the truth's
    # strength ratio over the same ribbon solid fractions has the same direction and a milder size
    ratio = t.tablets_mean(0.47, 300.0, 20.0, 14.0)["tensile_strength_mpa"] / \
        t.tablets_mean(0.30, 300.0, 20.0, 14.0)["tensile_strength_mpa"]
    assert 1.0 < ratio < 5.21 / 2.79


def test_tablet_noise_matches_the_stated_sd(big):
    """Parameter recovery (own noise model): realised minus stage mean has
    the SD of noise_sd; the vessels scatter with the vessel SD."""
    lt = big.lot_truth
    noise = big.truth.noise_sd
    for a in ("tensile_strength_mpa", "weight_rsd_pct", "dissolution_pct"):
        assert (lt[a] - lt[f"{a}_mean"]).std() == pytest.approx(noise[a], rel=0.04), a
    strong = lt["friability_pct_mean"] > 0.25  # away from the floor at 0
    assert (lt["friability_pct"] - lt["friability_pct_mean"])[strong].std() == pytest.approx(
        noise["friability_pct"], rel=0.06)
    vessels = big.tables["dissolution"]
    within = vessels.groupby("lot")["released_pct"].std()
    assert np.sqrt((within ** 2).mean()) == pytest.approx(big.truth.dissolution_vessel_sd_pct, rel=0.04)


def test_dissolution_and_weight_rsd_agree_with_the_unit_data(big):
    """Consistent data: the lot's dissolution is the mean of its vessels at
    the spec time; its weight RSD is the RSD (n - 1) of its unit weights."""
    tab = big.tables["tablets"].set_index("lot")
    vessel_mean = big.tables["dissolution"].groupby("lot")["released_pct"].mean()
    np.testing.assert_allclose(tab.loc[vessel_mean.index, "dissolution_pct"], vessel_mean, atol=1e-9)
    units = big.tables["tablet_weights"]
    by_lot = units.groupby("lot")["weight_mg"]
    rsd = 100 * by_lot.std(ddof=1) / by_lot.mean()  # RSD = 100 s / mean, s with n - 1
    np.testing.assert_allclose(tab.loc[rsd.index, "weight_rsd_pct"], rsd, atol=0.005 + 1e-9)
    assert (units.groupby("lot").size() == 10).all()
    assert (big.tables["dissolution"].groupby("lot").size() == 6).all()


# ---------------------------------------------------------------- chain
def test_chain_mean_composes_the_stage_means():
    lots = make_lots(50, seed=12)
    settings_ = lots.tables["process"].merge(lots.tables["tablets"][["lot", "compression_force_kn"]], on="lot")
    settings_.index = settings_["lot"]
    chain = lots.truth.chain_mean(settings_)
    assert list(chain.index) == list(settings_.index)
    np.testing.assert_allclose(chain["dissolution_pct"], lots.lot_truth["dissolution_pct_chain"], rtol=1e-12)
    t = lots.truth
    eps = t.porosity_mean(*(settings_[k] for k in ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm",
                                                   "screw_speed_rpm")), compactor=settings_["compactor"])
    g = t.granules_mean(eps, settings_["mill_screen_mm"])
    m = t.tablets_mean(eps, g["granule_d50_um"], g["fines_pct"], settings_["compression_force_kn"])
    for a in ATTRIBUTES:
        ref = {"ribbon_porosity": eps, **g, **m}[a]
        np.testing.assert_allclose(chain[a], ref, rtol=1e-12)
    fixed = t.chain_mean(settings_, ribbon_porosity=0.3)
    assert (fixed["ribbon_porosity"] == 0.3).all()
    with pytest.raises(UsageError, match="roll_gap_mm"):
        t.chain_mean({"roll_force_kn_per_cm": [8.0], "mill_screen_mm": [1.0], "compression_force_kn": [14.0]})


# ---------------------------------------------------------------- p_pass_all
def test_p_pass_all_matches_the_normal_cdf_for_one_stage():
    """A fines-only spec involves only the granule stage: the pass probability
    is Phi((max - mean) / sd) (scipy.stats.norm). Monte Carlo SE at 20,000
    draws is at most 0.0036; tolerance 0.015."""
    t = Truth()
    eps = np.linspace(0.25, 0.40, 7)
    p = t.p_pass_all(eps, {"fines_pct": (None, 25.0)}, SCREEN, FORCE)
    ref = stats.norm.cdf((25.0 - t.granules_mean(eps, SCREEN)["fines_pct"]) / t.noise_sd["fines_pct"])
    np.testing.assert_allclose(p, ref, atol=0.015)
    assert p.min() < 0.2 and p.max() > 0.8  # the comparison spans the interesting range


def test_p_pass_all_matches_the_normal_cdf_without_granule_noise():
    """With the granule noise switched off only the tablet stage's noise
    matters: P(dissolution >= 80) = 1 - Phi((80 - mean) / sd), likewise for
    strength (scipy.stats.norm)."""
    t = replace(Truth(), granule_d50_sd_um=0.0, fines_sd_pct=0.0)
    eps = np.linspace(0.20, 0.30, 11)
    g = t.granules_mean(eps, SCREEN)
    m = t.tablets_mean(eps, g["granule_d50_um"], g["fines_pct"], FORCE)
    p = t.p_pass_all(eps, {"dissolution_pct": {"min": 80.0}}, SCREEN, FORCE)
    ref = stats.norm.sf((80.0 - m["dissolution_pct"]) / t.noise_sd["dissolution_pct"])
    np.testing.assert_allclose(p, ref, atol=0.015)
    m8 = t.tablets_mean(eps, g["granule_d50_um"], g["fines_pct"], 8.0)
    p8 = t.p_pass_all(eps, {"tensile_strength_mpa": (1.7, None)}, SCREEN, 8.0)
    ref8 = stats.norm.sf((1.7 - m8["tensile_strength_mpa"]) / t.noise_sd["tensile_strength_mpa"])
    np.testing.assert_allclose(p8, ref8, atol=0.015)


def test_p_pass_all_is_monotone_where_the_truth_is():
    t = Truth()
    eps = np.linspace(0.15, 0.50, 71)
    up = t.p_pass_all(eps, {"dissolution_pct": (80, None)}, SCREEN, FORCE, n_draws=5000)
    down = t.p_pass_all(eps, {"weight_rsd_pct": (None, 2.0)}, SCREEN, FORCE, n_draws=5000)
    assert np.all(np.diff(up) >= 0) and up[0] < 0.05 and up[-1] == 1.0
    assert np.all(np.diff(down) <= 0) and down[0] == 1.0 and down[-1] < 0.05
    both = t.p_pass_all(eps, WINDOW_SPEC, SCREEN, FORCE, n_draws=5000)
    top = int(np.argmax(both))
    assert np.all(np.diff(both[:top + 1]) >= 0) and np.all(np.diff(both[top:]) <= 0)


def test_p_pass_all_obeys_the_frechet_bounds():
    """For events A_i: max(0, sum P(A_i) - (k - 1)) <= P(all A_i) <= min P(A_i)
    (Boole/Frechet inequalities; exact here because every call uses the same
    draws)."""
    t = Truth()
    eps = np.linspace(0.2, 0.45, 26)
    single = np.array([t.p_pass_all(eps, {a: WINDOW_SPEC[a]}, SCREEN, FORCE, n_draws=5000) for a in WINDOW_SPEC])
    joint = t.p_pass_all(eps, WINDOW_SPEC, SCREEN, FORCE, n_draws=5000)
    assert np.all(joint <= single.min(axis=0) + 1e-12)
    assert np.all(joint >= np.maximum(0, single.sum(axis=0) - (len(single) - 1)) - 1e-12)


def test_spec_errors_name_the_problem():
    t = Truth()
    with pytest.raises(UsageError, match="hardness"):
        t.p_pass_all(0.3, {"hardness": (1, None)}, SCREEN, FORCE)
    with pytest.raises(UsageError, match="above max"):
        t.mean_window({"dissolution_pct": (90, 80)}, SCREEN, FORCE)
    with pytest.raises(UsageError, match="design"):
        make_lots(5, design="grid")


# ---------------------------------------------------------------- window scenario
def test_window_scenario_is_two_sided_inside_the_data_range():
    t = Truth.window_scenario()
    mean = t.limiting_attributes(WINDOW_SPEC, SCREEN, FORCE)
    prob = t.limiting_attributes(WINDOW_SPEC, SCREEN, FORCE, confidence=0.9)
    assert mean["low"][1] == "dissolution_pct" and mean["high"][1] == "weight_rsd_pct"
    assert prob["low"][1] == "dissolution_pct" and prob["high"][1] == "weight_rsd_pct"
    (lo, _), (hi, _) = prob["low"], prob["high"]
    assert lo == pytest.approx(0.25, abs=0.01) and hi == pytest.approx(0.36, abs=0.01)
    assert mean["low"][0] < lo < hi < mean["high"][0]  # 90 % confidence is inside the mean window
    assert t.probability_window(WINDOW_SPEC, SCREEN, FORCE, 0.9) == (lo, hi)
    # the edge is where the joint pass probability crosses 0.9
    assert t.p_pass_all(lo + 0.003, WINDOW_SPEC, SCREEN, FORCE) >= 0.9 > t.p_pass_all(lo - 0.003, WINDOW_SPEC,
                                                                                      SCREEN, FORCE)
    # strength and friability never bind over the campaign's porosity range at these settings
    eps = np.linspace(0.20, 0.45, 26)
    for a in ("tensile_strength_mpa", "friability_pct"):
        assert t.p_pass_all(eps, {a: WINDOW_SPEC[a]}, SCREEN, FORCE).min() > 0.999


# ---------------------------------------------------------------- drift and scale
def test_raw_material_change_shifts_dissolution_from_that_lot_on():
    base = make_lots(200, seed=13, raw_materials=True)
    drift = make_lots(200, seed=13, raw_materials=True, raw_material_change_at=120, raw_material_delta=-6.0)
    lt, b = drift.lot_truth, base.lot_truth
    assert (lt["raw_material_changed"] == (np.arange(200) >= 120)).all()
    delta = lt["dissolution_pct_mean"] - b["dissolution_pct_mean"]
    np.testing.assert_allclose(delta[:120], 0.0, atol=1e-12)
    np.testing.assert_allclose(delta[120:], -6.0, atol=1e-9)
    reported = drift.tables["tablets"]["dissolution_pct"] - base.tables["tablets"]["dissolution_pct"]
    assert np.abs(reported[:120]).max() == 0.0
    assert np.abs(reported[120:] + 6.0).max() <= 0.1 + 1e-9  # rounding of the vessel mean to 0.1
    jump = drift.tables["process"]["api_d50_um"] - base.tables["process"]["api_d50_um"]
    assert (jump[:120] == 0).all() and np.allclose(jump[120:], 15.0, atol=0.11)
    shifted = drift.truth.shifted("dissolution_pct", -6.0)
    lo_before, _ = drift.truth.probability_window(WINDOW_SPEC, SCREEN, FORCE, 0.9, n_draws=5000)
    lo_after, _ = shifted.probability_window(WINDOW_SPEC, SCREEN, FORCE, 0.9, n_draws=5000)
    assert lo_after > lo_before + 0.02  # slower dissolution narrows the dense side


def test_two_thousand_lots_vectorised():
    lots = make_lots(2_000, seed=14, with_units=True, with_vessels=True, design="routine")
    assert len(lots.tables["process"]) == 2_000
    assert len(lots.tables["granules"]) == 2_000 * len(SIEVES_UM)
    assert len(lots.tables["tablet_weights"]) == 20_000
    assert len(lots.lot_truth) == 2_000
    assert lots.tables["process"]["lot"].is_unique


def test_write_csv_round_trips(tmp_path):
    lots = make_lots(12, seed=16, with_vessels=True, product="P-2")
    written = lots.write_csv(tmp_path, spec=WINDOW_SPEC)
    assert {p.name for p in written} == {"process.csv", "ribbon.csv", "granules.csv", "tablets.csv",
                                         "dissolution.csv", "spec.toml"}
    back = pd.read_csv(tmp_path / "tablets.csv", dtype={"lot": str})
    pd.testing.assert_frame_equal(back, lots.tables["tablets"], check_dtype=False)
    with open(tmp_path / "spec.toml", "rb") as fh:
        spec = tomllib.load(fh)
    assert {k: (v.get("min"), v.get("max")) for k, v in spec.items()} == WINDOW_SPEC


def test_remeasure_gives_new_values_for_the_same_samples():
    lots = make_lots(20, seed=15)
    new = remeasure_ribbon(lots, "LOT-007", seed=3)
    old = lots.tables["ribbon"].query("lot == 'LOT-007'").reset_index(drop=True)
    assert list(new["sample"]) == list(old["sample"])
    assert not np.array_equal(new["envelope_density_g_cm3"], old["envelope_density_g_cm3"])
    assert schema_problems("ribbon", new) == []
    with pytest.raises(UsageError, match="LOT-999"):
        remeasure_ribbon(lots, "LOT-999")


# ---------------------------------------------------------------- the demo
def test_demo_files_are_reproduced_byte_for_byte(tmp_path):
    generate = load_generate()
    written = generate.write(tmp_path)
    assert written
    for path in written:
        relative = path.relative_to(tmp_path)
        committed = DEMO / relative
        assert committed.is_file(), f"{relative} is not committed; run python data_demo/generate.py"
        assert path.read_bytes() == committed.read_bytes(), f"{relative} differs from a fresh generation"


def test_demo_data_are_valid_and_consistent():
    lots = DEMO / "lots"
    tables = {p.stem: pd.read_csv(p, dtype={"lot": str, "sample": str, "unit": str, "vessel": str})
              for p in lots.glob("*.csv")}
    assert set(tables) == {"process", "ribbon", "granules", "tablets", "tablet_weights", "dissolution"}
    problems = [p for name, frame in tables.items() for p in schema_problems(name, frame)]
    assert problems == []
    assert len(tables["process"]) == 48 and set(tables["process"]["compactor"]) == {"pilot", "production"}
    assert {"blend_moisture_pct", "api_d50_um", "lubricant_pct"} <= set(tables["process"].columns)
    tab = tables["tablets"].set_index("lot")
    assert tab.isna().sum().sum() >= 1  # a missing test
    vessels = tables["dissolution"]
    assert (vessels["time_min"] == 30).all()
    vessel_mean = vessels.groupby("lot")["released_pct"].mean()
    np.testing.assert_allclose(tab.loc[vessel_mean.index, "dissolution_pct"], vessel_mean, atol=1e-9)
    rsd = tables["tablet_weights"].groupby("lot")["weight_mg"].agg(rsd_pct)
    np.testing.assert_allclose(tab.loc[rsd.index, "weight_rsd_pct"], rsd, atol=0.005 + 1e-9)
    with open(lots / "spec.toml", "rb") as fh:
        spec = tomllib.load(fh)
    # the window scenario's limits plus the demo's breaking-force minimum (data_demo/generate.py, DEMO_SPEC)
    assert {k: (v.get("min"), v.get("max")) for k, v in spec.items()} == {**WINDOW_SPEC,
                                                                          "breaking_force_n": (100.0, None)}
    assert spec["dissolution_pct"]["time_min"] == 30
    again = pd.read_csv(DEMO / "remeasured" / "ribbon.csv", dtype={"lot": str, "sample": str})
    assert again["lot"].nunique() == 1 and set(again.columns) == set(tables["ribbon"].columns)
    first = tables["ribbon"][tables["ribbon"]["lot"] == again["lot"].iloc[0]]
    assert list(first["sample"]) == list(again["sample"])
    assert not np.array_equal(first["envelope_density_g_cm3"], again["envelope_density_g_cm3"])


def test_the_truth_judges_breaking_force_through_fell_and_newton():
    """A breaking-force minimum L is, tablet by tablet, the tensile-strength minimum 2L/(πDt) of Fell & Newton
    (1970) at the tablet's thickness (references.md §3; linkage.physics.tablet is checked against its worked
    example), so with the same draws the truth gives the same probability for both."""
    from linkage.physics.tablet import tensile_strength_flat_mpa

    t = Truth.window_scenario()
    for eps in (0.25, 0.30, 0.35):
        sigma = float(tensile_strength_flat_mpa(200.0, t.tablet_diameter_mm, t.thickness_mm(eps, FORCE)))
        by_force = t.p_pass_all(eps, {"breaking_force_n": (200.0, None)}, SCREEN, FORCE, n_draws=4000)
        by_strength = t.p_pass_all(eps, {"tensile_strength_mpa": (sigma, None)}, SCREEN, FORCE, n_draws=4000)
        assert by_force == pytest.approx(by_strength, abs=1 / 4000)
    assert 0.05 < t.p_pass_all(0.32, {"breaking_force_n": (200.0, None)}, SCREEN, FORCE) < 0.95  # it binds there
