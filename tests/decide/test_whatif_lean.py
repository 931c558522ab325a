"""The what-if as `linkage predict` runs it: from the registry's lean file,
without scikit-learn or pandas, with the numbers of the fitted chain.

References: the fitted chain (scikit-learn estimators, pandas frames) is the
reference the lean file is compared with; tests/models/test_lean.py compares
the arithmetic model by model with scikit-learn and shap.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys

import pytest

from linkage.decide.whatif import predict_whatif
from linkage.exceptions import ModelIntegrityError, ModelNotFoundError
from linkage.models import registry
from linkage.models.lean import LeanChain


def _without_time(d: dict) -> dict:
    return {k: v for k, v in d.items() if k != "made_at"}


@pytest.mark.parametrize("values", [{"ribbon_porosity": 0.31},
                                    {"roll_force_kn_per_cm": 9.0, "roll_gap_mm": 2.5},
                                    {"ribbon_porosity": 0.05}])
def test_the_registry_lean_file_gives_the_fitted_chains_what_if(scenario, saved_model, values):
    _, chain, spec, _ = scenario
    models_dir, model_id, _ = saved_model
    light = registry.load_whatif(models_dir, model_id)
    assert isinstance(light, LeanChain)
    full = registry.load(models_dir, model_id)
    a = predict_whatif(light, values, spec=spec).to_dict()
    b = predict_whatif(full, values, spec=spec).to_dict()
    assert _without_time(a) == _without_time(b)
    assert a["model_id"] == model_id


def test_a_changed_lean_file_is_refused(saved_model, tmp_path):
    models_dir, model_id, _ = saved_model
    copy = tmp_path / "models"
    shutil.copytree(models_dir, copy)
    path = copy / model_id / registry.WHATIF
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(ModelIntegrityError, match="whatif.npz does not match"):
        registry.load_whatif(copy, model_id)
    path.unlink()
    with pytest.raises(ModelIntegrityError, match="missing"):
        registry.load_whatif(copy, model_id)


def test_a_model_saved_before_the_lean_file_is_converted(saved_model, tmp_path):
    """A registry written by the version before whatif.npz: metadata without
    its hash, index hash to match. load_whatif loads the whole chain."""
    models_dir, model_id, _ = saved_model
    copy = tmp_path / "models"
    shutil.copytree(models_dir, copy)
    folder = copy / model_id
    (folder / registry.WHATIF).unlink()
    meta = json.loads((folder / registry.METADATA).read_text(encoding="utf-8"))
    for key in ("whatif_artifact", "whatif_artifact_sha256", "whatif_format"):
        meta.pop(key)
    meta_bytes = json.dumps(meta, indent=2).encode("utf-8")
    (folder / registry.METADATA).write_bytes(meta_bytes)
    index = json.loads((copy / registry.INDEX).read_text(encoding="utf-8"))
    index["models"][model_id]["metadata_sha256"] = registry._sha256(meta_bytes)
    (copy / registry.INDEX).write_text(json.dumps(index), encoding="utf-8")
    light = registry.load_whatif(copy, model_id)
    assert isinstance(light, LeanChain) and light.model_id == model_id


_PROBE = r"""
import sys
from linkage.cli.main import cli  # the click group: main() ends the process by os._exit (cli.main.leave)
sys.argv = ["linkage", *sys.argv[1:]]
try:
    cli()
except SystemExit as exc:
    code = exc.code
heavy = sorted(m for m in ("sklearn", "pandas", "scipy", "joblib", "matplotlib", "shap") if m in sys.modules)
print("HEAVY=" + ",".join(heavy), file=sys.stderr)
sys.exit(code)
"""


@pytest.mark.parametrize("with_store", [False, True])
def test_predict_imports_neither_scikit_learn_nor_pandas(saved_model, tmp_path, with_store):
    """What keeps `linkage predict` fast: only numpy of the heavy libraries
    (the recorded what-if in the store included)."""
    models_dir, model_id, spec_path = saved_model
    store = tmp_path / "linkage.db"
    if with_store:
        from linkage.store import LotStore

        with LotStore(store):
            pass
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    proc = subprocess.run(
        [sys.executable, "-c", _PROBE, "predict", "--set", "ribbon_porosity=0.3", "--spec", str(spec_path),
         "--models-dir", str(models_dir), *(["--store", str(store)] if with_store else ["--no-record"]), "--json"],
        capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "HEAVY=\n" in proc.stderr + "\n", proc.stderr
    assert json.loads(proc.stdout)["model_id"] == model_id
    if with_store:
        from linkage.store import LotStore

        with LotStore(store, create=False) as s:
            assert [p["model_id"] for p in s.predictions()] == [model_id]


def test_a_changed_lean_file_marks_the_model_changed_and_latest_skips_it(saved_model, tmp_path):
    models_dir, model_id, _ = saved_model
    copy = tmp_path / "models"
    shutil.copytree(models_dir, copy)
    (copy / model_id / registry.WHATIF).write_bytes(b"replaced")
    [row] = [r for r in registry.list_models(copy) if r["model_id"] == model_id]
    assert row["status"] == "changed" and "whatif.npz" in row["detail"]
    with pytest.raises(ModelNotFoundError, match="fails its integrity check.*whatif.npz"):
        registry.load_whatif(copy, "latest")  # the only model fails its checks: nothing is resolved
