"""assemble: one row per lot, checked against computations written here,
independently of linkage.physics.

Issue acceptance: 60 lots with 3–5 ribbon replicates and 11 sieve fractions
each reproduce independently computed porosity to 1e-4, d-values to within
the spread between linear and log interpolation, and tensile strength to 0.5%.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from linkage.assemble import assemble
from linkage.exceptions import InputError
from linkage.synthetic import make_lots

APERTURES = np.array([1400, 1000, 710, 500, 355, 250, 180, 125, 90, 63, 0], float)


def _random_tables(n_lots: int = 60, seed: int = 7) -> dict[str, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    lots = [f"T-{i:03d}" for i in range(n_lots)]
    process = pd.DataFrame({
        "lot": lots,
        "roll_force_kn_per_cm": rng.uniform(4, 14, n_lots),
        "roll_gap_mm": rng.uniform(1.5, 3.5, n_lots),
        "roll_speed_rpm": rng.uniform(2, 8, n_lots),
        "screw_speed_rpm": rng.uniform(15, 60, n_lots),
        "mill_screen_mm": rng.choice([0.8, 1.0, 1.25], n_lots),
    })
    ribbon = []
    granules = []
    for lot in lots:
        skeletal = rng.uniform(1.45, 1.58)
        eps = rng.uniform(0.2, 0.45)
        for s in range(int(rng.integers(3, 6))):
            sk = skeletal + rng.normal(0, 0.003)
            ribbon.append((lot, str(s + 1), round(sk * (1 - eps + rng.normal(0, 0.01)), 4), round(sk, 4)))
        # an RRSB curve sampled onto the stack, so every d-value is bracketed
        while True:  # keep d10 and d90 inside the stack (pan < 10 %, top sieve > 90 % passing)
            xp, n = rng.uniform(250, 500), rng.uniform(1.2, 2.2)
            passing = 1 - np.exp(-(APERTURES[:-1] / xp) ** n)  # fraction passing each sieve
            if passing[-1] < 0.09 and passing[0] > 0.91:
                break
        cum_pass = np.concatenate([passing, [0.0]])
        retained = -np.diff(np.concatenate([[1.0], cum_pass])) * 100.0
        for a, m in zip(APERTURES, retained):
            granules.append((lot, a, round(float(m), 2)))
    tablets = pd.DataFrame({
        "lot": lots,
        "compression_force_kn": rng.uniform(8, 20, n_lots),
        "breaking_force_n": rng.uniform(50, 150, n_lots).round(1),
        "thickness_mm": rng.uniform(3.4, 4.6, n_lots).round(3),
        "diameter_mm": np.full(n_lots, 10.0),
        "weight_rsd_pct": rng.uniform(0.5, 3, n_lots).round(2),
        "friability_pct": rng.uniform(0.1, 1.2, n_lots).round(2),
        "dissolution_pct": rng.uniform(70, 98, n_lots).round(1),
    })
    return {
        "process": process,
        "ribbon": pd.DataFrame(ribbon, columns=["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3"]),
        "granules": pd.DataFrame(granules, columns=["lot", "sieve_um", "retained_g"]),
        "tablets": tablets,
    }


def _d_value(aperture, undersize, q, log):
    """Written here from the definition (references.md §6): interpolate the
    cumulative undersize curve between the bracketing apertures."""
    x = np.log(aperture) if log else aperture
    value = np.interp(q, undersize, x)
    return math.exp(value) if log else value


@pytest.fixture(scope="module")
def tables():
    return _random_tables()


@pytest.fixture(scope="module")
def table(tables):
    return assemble(tables).set_index("lot")


def test_porosity_matches_independent_mean_of_replicates(tables, table):
    r = tables["ribbon"]
    eps = 1 - r["envelope_density_g_cm3"] / r["skeletal_density_g_cm3"]  # porosity = 1 − ρ_env/ρ_true (§1)
    expected = eps.groupby(r["lot"]).mean()
    np.testing.assert_allclose(table.loc[expected.index, "ribbon_porosity"], expected, atol=1e-4)
    np.testing.assert_allclose(table.loc[expected.index, "ribbon_porosity_sd"],
                               eps.groupby(r["lot"]).std(ddof=1), atol=1e-9)
    np.testing.assert_allclose(table["ribbon_solid_fraction"], 1 - table["ribbon_porosity"])
    assert set(table["ribbon_samples"]) <= {3.0, 4.0, 5.0}


def test_d_values_within_linear_log_spread(tables, table):
    g = tables["granules"]
    checked = 0
    for lot, rows in g.groupby("lot"):
        rows = rows.sort_values("sieve_um")
        masses = rows["retained_g"].to_numpy()
        sizes = rows["sieve_um"].to_numpy()
        # undersize at aperture x = mass passing x = mass on smaller sieves and the pan
        undersize = 100 * np.cumsum(masses)[:-1] / masses.sum()
        aperture = sizes[1:]
        for q in (10, 50, 90):
            lin = _d_value(aperture, undersize, q, log=False)
            log = _d_value(aperture, undersize, q, log=True)
            lo, hi = min(lin, log), max(lin, log)
            got = table.loc[lot, f"granule_d{q}_um"]
            assert lo - 1e-6 <= got <= hi + 1e-6, (lot, q, got, lin, log)
            checked += 1
    assert checked == 180


def test_tensile_strength_fell_newton_within_half_percent(tables, table):
    t = tables["tablets"].set_index("lot")
    expected = 2 * t["breaking_force_n"] / (math.pi * t["diameter_mm"] * t["thickness_mm"])  # Fell & Newton 1970
    np.testing.assert_allclose(table.loc[t.index, "tensile_strength_mpa"], expected, rtol=0.005)
    assert set(table["tensile_strength_method"]) == {"fell_newton_1970"}


def test_fines_and_span(tables, table):
    lot = "T-000"
    rows = tables["granules"].query("lot == @lot")
    below = rows.loc[rows["sieve_um"] < 125, "retained_g"].sum() / rows["retained_g"].sum() * 100
    # 125 µm is one of the apertures, so fines are the undersize there exactly
    assert table.loc[lot, "fines_pct"] == pytest.approx(below, rel=1e-9)
    d10, d50, d90 = table.loc[lot, ["granule_d10_um", "granule_d50_um", "granule_d90_um"]]
    assert table.loc[lot, "granule_span"] == pytest.approx((d90 - d10) / d50)


def test_one_row_per_lot_and_nothing_dropped(tables, table):
    assert len(table) == 60
    assert table.index.is_unique


def test_unit_weights_override_reported_rsd_and_give_acceptance_value():
    tables = _random_tables(3, seed=1)
    w = np.array([250.1, 248.7, 251.3, 249.9, 252.0, 247.8, 250.6, 249.2, 251.1, 250.4])
    tables["tablet_weights"] = pd.DataFrame({"lot": "T-001", "unit": [str(i) for i in range(10)], "weight_mg": w})
    out = assemble(tables).set_index("lot")
    rsd = 100 * np.std(w, ddof=1) / np.mean(w)
    assert out.loc["T-001", "weight_rsd_pct"] == pytest.approx(rsd)
    assert out.loc["T-001", "weight_rsd_reported_pct"] == tables["tablets"].set_index("lot").loc["T-001", "weight_rsd_pct"]
    # USP <905>: contents x_i = w_i·100/mean(w); AV = |M − X̄| + 2.4·s with M = X̄ = 100 here
    x = w * 100 / w.mean()
    assert out.loc["T-001", "weight_acceptance_value"] == pytest.approx(2.4 * np.std(x, ddof=1))
    assert math.isnan(out.loc["T-000", "weight_acceptance_value"])


def test_vessels_give_dissolution_at_time_point_and_s1_verdict():
    tables = _random_tables(2, seed=2)
    rows = []
    for v in range(6):
        for t, r in ((15, 60 + v), (45, 90 + v)):
            rows.append(("T-000", str(v + 1), t, r))
    tables["dissolution"] = pd.DataFrame(rows, columns=["lot", "vessel", "time_min", "released_pct"])
    out = assemble(tables, dissolution_time_min=30, dissolution_q_pct=80).set_index("lot")
    # linear in time between 15 and 45 min: 75 + v at 30 min, mean over v = 0..5 → 77.5
    assert out.loc["T-000", "dissolution_pct"] == pytest.approx(77.5)
    assert out.loc["T-000", "dissolution_vessels"] == 6
    assert out.loc["T-000", "dissolution_s1_pass"] == False  # noqa: E712 - every unit must reach Q + 5 = 85
    # the lot without vessel data keeps its reported value
    reported = tables["tablets"].set_index("lot").loc["T-001", "dissolution_pct"]
    assert out.loc["T-001", "dissolution_pct"] == reported


def test_results_for_unknown_lot_are_refused():
    tables = _random_tables(2, seed=3)
    extra = tables["tablets"].iloc[[0]].assign(lot="GHOST")
    tables["tablets"] = pd.concat([tables["tablets"], extra])
    with pytest.raises(InputError, match="GHOST.*no process record"):
        assemble(tables)


def test_a_d_value_off_the_stack_is_nan_with_a_note():
    tables = _random_tables(1, seed=4)
    g = tables["granules"]
    g.loc[g["sieve_um"] == 0, "retained_g"] = 400.0  # the pan holds most of the mass: d10 below 63 µm
    out = assemble(tables)
    assert math.isnan(out.loc[0, "granule_d10_um"])
    assert any("d10" in note and "outside the sieve stack" in note for note in out.attrs["notes"])


def test_a_column_from_two_tables_is_a_clear_error_not_a_pandas_one():
    """An extra process column named like a quantity another table gives
    (here fines_pct, derived from the sieve) cannot be joined silently; every
    clash is named. (Found by the store helper: pandas raised 'columns overlap'.)"""
    lots = make_lots(8, seed=3)
    tables = {k: v.copy() for k, v in lots.tables.items()}
    tables["process"]["fines_pct"] = 1.0
    tables["process"]["compression_force_kn"] = 2.0
    with pytest.raises(InputError) as err:
        assemble(tables)
    text = str(err.value)
    assert "'fines_pct' comes from both process and granules" in text
    assert "'compression_force_kn' comes from both process and tablets" in text
