"""A model that keeps a material column (issue 19 item 4) through `linkage predict`: the column is a setting of
the chain, taken by ``--set`` and otherwise held coherently with the given settings; the lean what-if needs neither
pandas nor scikit-learn. References: the fitted chain (the lean file must give its what-if) and scikit-learn's
LinearRegression (the conditional mean of a multivariate normal with the sample mean and covariance is the
least-squares regression on the given settings: Anderson 2003, Thm 2.5.1)."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest

from linkage.assemble import assemble
from linkage.decide.whatif import predict_whatif
from linkage.models import registry
from linkage.models.materials import train_with_materials
from linkage.synthetic import WINDOW_SPEC, make_lots, spec_toml

from .test_whatif_lean import _PROBE, _without_time

SETTINGS = ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm",
            "compression_force_kn")


@pytest.fixture(scope="module")
def moist(tmp_path_factory):
    """A campaign whose blend moisture moves ribbon porosity (-0.03 per %), trained with the comparison."""
    table = assemble(make_lots(48, seed=2, raw_materials=True, moisture_porosity_per_pct=-0.03).tables)
    chain = train_with_materials(table, seed=0, candidates=["mean", "log_linear", "linear_select"], n_bootstrap=20)
    assert chain.training["materials"]["kept"].get("ribbon_porosity") == ["blend_moisture_pct"]
    folder = tmp_path_factory.mktemp("moist")
    model_id = registry.save(chain, folder / "models")
    spec = folder / "spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    return table, chain, folder / "models", model_id, spec


def _predict(models_dir, spec, *sets):
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    args = [a for s in sets for a in ("--set", s)]
    proc = subprocess.run([sys.executable, "-c", _PROBE, "predict", *args, "--spec", str(spec), "--models-dir",
                           str(models_dir), "--json"], capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "HEAVY=\n" in proc.stderr + "\n", proc.stderr  # neither pandas nor scikit-learn (nor scipy, joblib)
    return json.loads(proc.stdout)


@pytest.mark.slow
def test_predict_takes_the_material_column_by_set_and_holds_it_coherently_otherwise(moist):
    from sklearn.linear_model import LinearRegression

    table, chain, models_dir, model_id, spec = moist
    given = {"roll_force_kn_per_cm": 8.0, "roll_gap_mm": 2.5}
    wet = _predict(models_dir, spec, *(f"{k}={v}" for k, v in given.items()), "blend_moisture_pct=3.6")
    dry = _predict(models_dir, spec, *(f"{k}={v}" for k, v in given.items()), "blend_moisture_pct=2.4")
    held = _predict(models_dir, spec, *(f"{k}={v}" for k, v in given.items()))
    assert wet["model_id"] == model_id
    assert wet["inputs"]["blend_moisture_pct"] == {"value": 3.6, "source": "given"}
    # wetter blend, denser ribbon: the truth's slope is -0.03 per %
    step = wet["predictions"]["ribbon_porosity"]["value"] - dry["predictions"]["ribbon_porosity"]["value"]
    assert -0.05 < step / 1.2 < -0.01
    # not given: held at the least-squares prediction from the given settings over the training lots
    assert "blend_moisture_pct" in held["held_point"]["held"]
    names = [c for c in chain.chain.root_inputs()]
    assert "blend_moisture_pct" in names and set(SETTINGS) <= set(names)
    X = table[names].to_numpy(float)
    X = X[np.all(np.isfinite(X), axis=1)]
    cols = [names.index(k) for k in given]
    reg = LinearRegression().fit(X[:, cols], X[:, names.index("blend_moisture_pct")])
    expected = float(np.clip(reg.predict(np.array([list(given.values())]))[0], X[:, names.index("blend_moisture_pct")].min(),
                             X[:, names.index("blend_moisture_pct")].max()))
    assert held["inputs"]["blend_moisture_pct"]["value"] == pytest.approx(expected, rel=1e-9)
    assert held["inputs"]["blend_moisture_pct"]["source"] != "given"


@pytest.mark.slow
def test_the_lean_file_gives_the_fitted_chains_what_if_with_the_material_column(moist):
    from linkage.spec import Limit, Spec

    _, chain, models_dir, model_id, _ = moist
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    light = registry.load_whatif(models_dir, model_id)
    for values in ({"roll_force_kn_per_cm": 9.0, "blend_moisture_pct": 3.3}, {"roll_force_kn_per_cm": 9.0}):
        a = predict_whatif(light, values, spec=spec).to_dict()
        b = predict_whatif(chain, values, spec=spec).to_dict()
        assert _without_time(a) == _without_time(b)
