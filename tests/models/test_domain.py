"""Applicability domain: control limits against references.md §8 and the
statistics against scikit-learn's PCA."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.decomposition import PCA

from linkage.models.domain import (
    DomainModel,
    q_limit_box,
    q_limit_jackson_mudholkar,
    t2_limit_phase1,
    t2_limit_phase2,
)


def test_t2_limits_match_reference_values():
    """references.md §8 at n = 30, A = 3, α = 0.05: phase II
    A(n²−1)/(n(n−A))·F₀.₉₅(3, 27) = 9.856873 (NIST/SEMATECH e-Handbook
    §6.5.4.3); phase I (n−1)²/n·Beta₀.₉₅(1.5, 13) = 7.164127 (Tracy, Young &
    Mason 1992)."""
    assert t2_limit_phase2(30, 3, 0.05) == pytest.approx(9.856873, abs=1e-6)
    assert t2_limit_phase1(30, 3, 0.05) == pytest.approx(7.164127, abs=1e-6)


def test_t2_phase2_tends_to_chi_square():
    """Large-n limit χ²₀.₉₅(3) = 7.814728 (references.md §8)."""
    assert t2_limit_phase2(100_000, 3, 0.05) == pytest.approx(7.814728, abs=1e-3)


def test_q_limits_match_reference_values():
    """references.md §8: residual eigenvalues [0.5, 0.3, 0.2, 0.1] ->
    Jackson & Mudholkar (1979) 2.871787, Box (1954) 2.833453."""
    lam = [0.5, 0.3, 0.2, 0.1]
    assert q_limit_jackson_mudholkar(lam, 0.05) == pytest.approx(2.871787, abs=1e-6)
    assert q_limit_box(lam, 0.05) == pytest.approx(2.833453, abs=1e-6)


def _correlated(n=60, seed=0):
    rng = np.random.default_rng(seed)
    a = rng.normal(size=n)
    b = rng.normal(size=n)
    return pd.DataFrame({
        "roll_force_kn_per_cm": 9 + 2.5 * a,
        "roll_gap_mm": 2.5 + 0.5 * a + 0.05 * rng.normal(size=n),
        "roll_speed_rpm": 5 + 1.5 * b,
        "screw_speed_rpm": 50 + 10 * b + 1 * rng.normal(size=n),
    })


def test_pca_statistics_match_scikit_learn():
    """T² = Σ tₐ²/sₐ² and Q = ‖z − ẑ‖² computed independently with
    scikit-learn's PCA on the same standardised data."""
    X = _correlated()
    dm = DomainModel.fit(X, n_components=2)
    assert dm.method_ == "pca" and dm.n_components_ == 2
    Z = ((X - X.mean()) / X.std(ddof=1)).to_numpy()
    pca = PCA(n_components=2).fit(Z)
    T = pca.transform(Z)
    t2 = np.sum(T**2 / T.var(axis=0, ddof=1), axis=1)
    q = np.sum((Z - pca.inverse_transform(T)) ** 2, axis=1)
    verdicts = dm.check(X.iloc[:10])
    assert [v.t2 for v in verdicts] == pytest.approx(t2[:10], rel=1e-8)
    assert [v.q for v in verdicts] == pytest.approx(q[:10], rel=1e-7, abs=1e-12)
    # residual eigenvalues: the discarded principal-component variances
    full = PCA().fit(Z)
    assert dm.residual_eigenvalues_[:2] == pytest.approx(full.explained_variance_[2:], rel=1e-8)
    assert dm.q_limit_ == pytest.approx(q_limit_jackson_mudholkar(full.explained_variance_[2:], 0.05), rel=1e-8)
    assert dm.t2_limit_ == pytest.approx(t2_limit_phase2(60, 2, 0.05), rel=1e-12)


def test_verdicts_give_reasons_and_contributions_add_up():
    X = _correlated()
    dm = DomainModel.fit(X, n_components=2)
    centre = X.mean().to_frame().T
    far = centre.copy()
    far["roll_force_kn_per_cm"] = 18.0  # outside the range, far along the first component
    far["roll_gap_mm"] = 3.3  # inside its range: the force drives T²
    broken = centre.copy()
    broken["roll_gap_mm"] = X["roll_gap_mm"].max()  # in range, but breaks the force-gap correlation
    broken["roll_force_kn_per_cm"] = X["roll_force_kn_per_cm"].min()
    missing = centre.copy()
    missing["roll_speed_rpm"] = np.nan
    ok, out_far, out_q, out_missing = dm.check(pd.concat([centre, far, broken, missing], ignore_index=True))

    assert ok.in_domain and ok.reasons == []
    assert not out_far.in_domain
    lo, hi = X["roll_force_kn_per_cm"].min(), X["roll_force_kn_per_cm"].max()
    assert f"roll_force_kn_per_cm = 18 kN/cm is above the training range {lo:.4g}–{hi:.4g}" in out_far.reasons
    assert any(r.startswith("Hotelling T²") and "95% limit" in r and "driven by roll_force_kn_per_cm" in r
               for r in out_far.reasons)
    assert not out_q.in_domain
    assert any(r.startswith("Q residual") for r in out_q.reasons)
    assert not any("training range" in r for r in out_q.reasons)
    assert out_missing.reasons == ["roll_speed_rpm is missing"] and not out_missing.in_domain
    for v in (ok, out_far, out_q):
        assert sum(v.t2_contributions.values()) == pytest.approx(v.t2, rel=1e-9)
        assert sum(v.q_contributions.values()) == pytest.approx(v.q, rel=1e-9, abs=1e-12)
    assert out_far.to_dict()["in_domain"] is False


def test_pls_domain_with_targets_and_pca_fallback():
    X = _correlated()
    y = X["roll_force_kn_per_cm"].to_numpy() * -0.01 + 0.4
    with_y = DomainModel.fit(X, y=y)
    assert with_y.method_ == "pls" and 1 <= with_y.n_components_ <= 3
    too_few = np.full(len(X), np.nan)
    too_few[:3] = y[:3]
    assert DomainModel.fit(X, y=too_few).method_ == "pca"  # fewer than 5 lots with targets
    # training points sit mostly inside their own limits
    inside = np.mean([v.in_domain for v in with_y.check(X)])
    assert inside > 0.8


def test_constant_input_is_checked_by_its_range():
    X = _correlated()
    X["roll_speed_rpm"] = 5.0
    dm = DomainModel.fit(X)
    assert dm.constant_inputs_ == ["roll_speed_rpm"]
    row = X.iloc[[0]].copy()
    assert dm.check(row)[0].in_domain or dm.check(row)[0].reasons  # a training lot: no crash
    row["roll_speed_rpm"] = 6.0
    v = dm.check(row)[0]
    assert not v.in_domain
    assert "roll_speed_rpm = 6 rpm is above the training range 5–5" in v.reasons
