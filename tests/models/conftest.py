"""Shared helpers of the model tests: small assembled tables with a known truth.

The truths here are our own, simple and stated in the code, so that each test
knows the right answer without depending on :mod:`linkage.synthetic`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from linkage.models.chain import ChainSpec, StageSpec

#: true SD of the lot-mean dissolution in :func:`assembled_table` [%]
DISSOLUTION_SD = 2.0
N_VESSELS = 6


def assembled_table(n: int = 48, seed: int = 1, dissolution_sd: float = DISSOLUTION_SD) -> pd.DataFrame:
    """An assembled table (one row per lot) drawn from a stated truth.

    ribbon_porosity = 0.45 − 0.015·force + 0.02·gap + 0.002·roll speed − 0.0003·screw speed + N(0, 0.01)
    dissolution_pct = 60 + 80·porosity + 0.5·fines − 0.02·d50 + mean of 6 vessels with
                      SD dissolution_sd·√6 (so the lot mean has SD dissolution_sd)
    """
    rng = np.random.default_rng(seed)
    force = rng.uniform(4, 14, n)
    gap = rng.uniform(1.5, 4, n)
    roll = rng.uniform(2, 8, n)
    screw = rng.uniform(20, 80, n)
    screen = rng.choice([0.8, 1.0, 1.25, 1.5], n)
    cf = rng.uniform(8, 20, n)
    por = 0.45 - 0.015 * force + 0.02 * gap + 0.002 * roll - 0.0003 * screw + rng.normal(0, 0.01, n)
    d50 = 150 + 200 * screen - 300 * (por - 0.3) + rng.normal(0, 10, n)
    fines = 20 + 60 * (por - 0.3) - 5 * screen + rng.normal(0, 1.5, n)
    ts = 8 * np.exp(-6 * por) * (cf / 14) ** 0.8 + rng.normal(0, 0.08, n)
    wrsd = 1.0 + 0.004 * (fines - 15) ** 2 + rng.normal(0, 0.1, n)
    fri = 0.9 - 0.03 * cf + rng.normal(0, 0.05, n)
    vessels = (60 + 80 * por + 0.5 * fines - 0.02 * d50)[:, None] + rng.normal(
        0, dissolution_sd * np.sqrt(N_VESSELS), (n, N_VESSELS))
    return pd.DataFrame({
        "lot": [f"L{i:03d}" for i in range(n)],
        "roll_force_kn_per_cm": force, "roll_gap_mm": gap, "roll_speed_rpm": roll, "screw_speed_rpm": screw,
        "mill_screen_mm": screen, "compression_force_kn": cf,
        "ribbon_porosity": por, "ribbon_porosity_sd": np.full(n, 0.01), "ribbon_samples": np.full(n, 3),
        "granule_d50_um": d50, "fines_pct": fines, "tensile_strength_mpa": ts, "weight_rsd_pct": wrsd,
        "friability_pct": fri, "dissolution_pct": vessels.mean(axis=1),
        "dissolution_sd_pct": vessels.std(axis=1, ddof=1), "dissolution_vessels": np.full(n, N_VESSELS),
    })


def one_stage(target: str = "dissolution_pct",
              inputs=("ribbon_porosity", "granule_d50_um", "fines_pct", "compression_force_kn")) -> ChainSpec:
    return ChainSpec([StageSpec("tablets", list(inputs), [target])])


@pytest.fixture(scope="session")
def small_fit():
    """A quick one-stage fit (PLS, quadratic ridge and the floor) shared by API tests."""
    from linkage.models.train import train_chain

    table = assembled_table(24, seed=3)
    chain = ChainSpec([StageSpec("tablets", ["ribbon_porosity", "granule_d50_um", "fines_pct",
                                             "compression_force_kn"], ["dissolution_pct", "tensile_strength_mpa"])])
    return table, train_chain(table, chain, seed=0, candidates=["mean", "rd_baseline", "pls", "quadratic_ridge"])


def assert_estimator_contract(make, X, y, columns):
    """What scikit-learn's estimator checks ask, on data inside an estimator's domain (for candidates whose
    domain the checks' generated data miss): NotFittedError before fit; fit returns self and leaves the
    parameters as given; n_features_in_ and no feature names from an array; a clone fits to the same floats;
    pickling keeps the predictions bit for bit; predictions do not depend on the order or the subset of rows
    predicted; a second fit gives the same model; another input count is refused with scikit-learn's message;
    a DataFrame's column names are recorded and give the same floats, and other names are refused. Returns
    the fitted estimator."""
    import pickle

    from sklearn.base import clone
    from sklearn.exceptions import NotFittedError

    est = make()
    with pytest.raises(NotFittedError):
        est.predict(X)
    params = est.get_params()
    assert est.fit(X, y) is est
    assert est.get_params() == params
    assert est.n_features_in_ == X.shape[1] and not hasattr(est, "feature_names_in_")
    pred = est.predict(X)
    assert np.array_equal(clone(est).fit(X, y).predict(X), pred)
    assert np.array_equal(pickle.loads(pickle.dumps(est)).predict(X), pred)
    order = np.random.default_rng(1).permutation(len(X))
    assert np.array_equal(est.predict(X[order]), pred[order])
    assert np.array_equal(np.concatenate([est.predict(X[:5]), est.predict(X[5:])]), pred)
    assert np.array_equal(est.fit(X, y).predict(X), pred)
    with pytest.raises(ValueError, match=f"X has 1 features, but {type(est).__name__} is expecting {X.shape[1]} "
                                         "features"):
        est.predict(X[:, :1])
    frame = pd.DataFrame(X, columns=columns)
    named = make().fit(frame, y)
    assert list(named.feature_names_in_) == list(columns)
    assert np.array_equal(named.predict(frame), pred)
    with pytest.raises(ValueError, match="feature names"):
        named.predict(frame.rename(columns={columns[-1]: "other"}))
    return est


@pytest.fixture
def ingested(tmp_path):
    """``ingested(lots)``: write a synthetic campaign's tables to a folder, ingest it into a new lot store with the
    command line, and return (store path, models folder path, CliRunner)."""
    from click.testing import CliRunner

    from linkage.cli.main import cli

    def run(lots):
        folder = tmp_path / "lab"
        folder.mkdir()
        for name, df in lots.tables.items():
            df.to_csv(folder / f"{name}.csv", index=False)
        store, models = tmp_path / "lots.db", tmp_path / "models"
        runner = CliRunner()
        assert runner.invoke(cli, ["ingest", str(folder), "--store", str(store)]).exit_code == 0
        return store, models, runner

    return run
