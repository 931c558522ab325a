"""Control charts against the textbook formulas and worked numbers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from linkage.charts import Reference, cusum, ewma, run_rules, shewhart_limits


def test_reference_from_values_uses_sample_sd():
    ref = Reference.from_values([1.0, 2.0, 3.0, 4.0])
    assert ref.mu0 == 2.5
    assert ref.sigma == pytest.approx(np.std([1, 2, 3, 4], ddof=1))


def test_reference_refuses_too_few_or_constant():
    with pytest.raises(ValueError, match="at least 3"):
        Reference.from_values([1.0, np.nan])
    with pytest.raises(ValueError, match="vary"):
        Reference.from_values([2.0, 2.0, 2.0])


def test_shewhart_limits_are_three_sigma():
    assert shewhart_limits(Reference(10.0, 2.0, 20)) == (4.0, 16.0)


def test_ewma_limits_reach_the_asymptote():
    # NIST/SEMATECH §6.3.2.4: asymptotic limits mu0 ± L·σ·sqrt(λ/(2−λ));
    # with λ = 0.3, L = 3, σ = 1: ± 3·sqrt(0.3/1.7) = ± 1.260252 (computed).
    ref = Reference(0.0, 1.0, 50)
    z, lo, hi = ewma(np.zeros(200), ref, lam=0.3, L=3.0)
    assert hi[-1] == pytest.approx(3 * np.sqrt(0.3 / 1.7), rel=1e-9)
    # first point: L·σ·sqrt(λ/(2−λ)·(1−(1−λ)²)) = 3·λ·σ = 0.9 (computed: (1−0.49)·0.3/1.7 = 0.09)
    assert hi[0] == pytest.approx(0.9)
    assert np.all(np.diff(hi) >= 0)


def test_ewma_worked_recursion():
    # z_t = λx_t + (1−λ)z_{t−1} with z_0 = 50, λ = 0.3 (NIST §6.3.2.4 recursion), computed by hand:
    # x = [52, 47, 53]: z1 = 15.6 + 35 = 50.6; z2 = 14.1 + 35.42 = 49.52; z3 = 15.9 + 34.664 = 50.564
    z, _, _ = ewma([52.0, 47.0, 53.0], Reference(50.0, 2.0, 30), lam=0.3)
    np.testing.assert_allclose(z, [50.6, 49.52, 50.564])


def test_cusum_worked_example():
    # Tabular CUSUM (Montgomery 2009, §9.1.2) with mu0 = 10, σ = 1, k = 0.5, h = 5, computed by hand:
    # x = [10.5, 11.8, 12.0, 9.0]: C+ = [0, 1.3, 2.8, 1.3]; C− = [0, 0, 0, 0.5]
    cp, cm, h = cusum([10.5, 11.8, 12.0, 9.0], Reference(10.0, 1.0, 30))
    np.testing.assert_allclose(cp, [0.0, 1.3, 2.8, 1.3])
    np.testing.assert_allclose(cm, [0.0, 0.0, 0.0, 0.5])
    assert h == 5.0


def test_cusum_detects_a_one_sigma_shift_quickly():
    rng = np.random.default_rng(0)
    x = np.concatenate([rng.normal(0, 1, 30), rng.normal(1.0, 1, 40)])
    cp, _, h = cusum(x, Reference(0.0, 1.0, 100))
    first = int(np.argmax(cp > h))
    # the average run length of this CUSUM for a 1σ shift is about 10 points
    # (Montgomery 2009, Table 9.3: ARL1 = 10.4 for k = 0.5, h = 5; from memory)
    assert 30 < first < 30 + 40


def test_run_rules_each_fire():
    ref = Reference(0.0, 1.0, 100)
    assert "beyond 3 sigma" in run_rules([0, 0, 3.5], ref)[2]
    assert "2 of 3 beyond 2 sigma" in run_rules([2.5, 0.0, 2.2], ref)[2]
    assert "4 of 5 beyond 1 sigma" in run_rules([1.5, 1.2, 0.0, 1.1, 1.3], ref)[4]
    assert "8 in a row on one side" in run_rules([-0.1] * 8, ref)[7]
    assert run_rules([0.5, -0.5, 0.2, -0.3], ref) == [[], [], [], []]


@settings(max_examples=50, deadline=None)
@given(st.lists(st.floats(-5, 5), min_size=1, max_size=40), st.floats(0.05, 1.0))
def test_ewma_stays_within_the_range_of_start_and_data(x, lam):
    z, lo, hi = ewma(x, Reference(0.0, 1.0, 10), lam=lam)
    # a convex combination of mu0 and the data cannot leave their hull
    assert np.all(z >= min(0.0, min(x)) - 1e-12) and np.all(z <= max(0.0, max(x)) + 1e-12)
    assert np.all(lo <= 0) and np.all(hi >= 0)
