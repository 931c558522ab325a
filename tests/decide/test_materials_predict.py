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

from linkage.decide.whatif import predict_whatif
from linkage.models import registry
from linkage.synthetic import WINDOW_SPEC

from .test_whatif_lean import _PROBE, _without_time

SETTINGS = ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm", "mill_screen_mm",
            "compression_force_kn")


@pytest.fixture(scope="module")
def moist(moist_model):
    m = moist_model
    return m.table, m.chain, m.models_dir, m.model_id, m.spec


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
    # not given: held at the least-squares prediction from the given settings over the training lots, and from
    # the settings run at a few levels (mill screen), held at a level (linkage.decide.held's rule)
    assert "blend_moisture_pct" in held["held_point"]["held"]
    names = [c for c in chain.chain.root_inputs()]
    assert "blend_moisture_pct" in names and set(SETTINGS) <= set(names)
    X = table[names].to_numpy(float)
    X = X[np.all(np.isfinite(X), axis=1)]
    levels = [k for k in names if k not in given and len(np.unique(X[:, names.index(k)])) <= 6
              and len(X) >= 2 * len(np.unique(X[:, names.index(k)]))]
    assert levels == ["mill_screen_mm"]
    at = {**given, **{k: held["inputs"][k]["value"] for k in levels}}
    cols = [names.index(k) for k in at]
    moisture = X[:, names.index("blend_moisture_pct")]
    reg = LinearRegression().fit(X[:, cols], moisture)
    expected = float(np.clip(reg.predict(np.array([list(at.values())]))[0], moisture.min(), moisture.max()))
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
