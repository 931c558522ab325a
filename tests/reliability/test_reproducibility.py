"""Reproducibility: the same store, chain and seed give byte-identical
cross-validation results and predictions.

Two fresh interpreters train from the same store with the same chain file
and seed through `linkage train`. They differ in what must not matter:
Python's string-hash seed (PYTHONHASHSEED, which changes the iteration order
of sets of strings) and the model registry folder. (With --jobs 2 in one of
the runs the texts were also equal when this test was written; the suite
runs --jobs 1 in both, since starting worker processes costs seconds.)

Each run writes the CV results of `train --json`, the full model metadata,
every out-of-fold prediction, the predictions and intervals of every target
on a fixed grid, and a `predict --json` what-if, as text with floats in
Python's round-trip repr. The two texts must be equal byte for byte, once
the fields that name the run (model id, creation and save times) are set
aside.
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from linkage.synthetic import make_lots

from .helpers import run_cli

pytestmark = pytest.mark.reliability

CHAIN = """
[[stage]]
name = "ribbon"
inputs = ["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm"]
targets = ["ribbon_porosity"]

[stage.monotone.ribbon_porosity]
roll_force_kn_per_cm = -1

[[stage]]
name = "tablets"
inputs = ["ribbon_porosity", "compression_force_kn"]
targets = ["tensile_strength_mpa", "dissolution_pct"]
"""

RUN = r"""
import json, sys, warnings
warnings.simplefilter("ignore")
from pathlib import Path
import numpy as np
import pandas as pd
from click.testing import CliRunner
from linkage.cli.main import cli
from linkage.models import registry

store, models, chain, jobs, out = sys.argv[1:6]
RUN_FIELDS = {"model_id", "created_at", "model_created_at", "made_at", "saved_at"}  # the times and ids of a run


def strip(obj):
    if isinstance(obj, dict):
        return {k: strip(v) for k, v in obj.items() if k not in RUN_FIELDS}
    if isinstance(obj, list):
        return [strip(v) for v in obj]
    return repr(obj) if isinstance(obj, float) else obj


res = CliRunner().invoke(cli, ["train", "--store", store, "--models-dir", models, "--chain", chain,
                               "--seed", "7", "--jobs", jobs, "--json"])
assert res.exit_code == 0, res.output
train = json.loads(res.stdout)
fitted = registry.load(models, train["model_id"])
grid = pd.DataFrame({"roll_force_kn_per_cm": np.linspace(4, 14, 7), "roll_gap_mm": np.linspace(1.5, 3.5, 7),
                     "roll_speed_rpm": np.linspace(2, 8, 7), "ribbon_porosity": np.linspace(0.15, 0.45, 7),
                     "compression_force_kn": np.linspace(8, 20, 7)})
predictions, oof = {}, {}
for name, target in fitted.targets.items():
    x = grid[target.inputs]
    low, high = target.interval(x)
    predictions[name] = strip({"value": target.predict(x).tolist(), "low": low.tolist(), "high": high.tolist()})
    oof[name] = target.oof.reset_index().astype({c: object for c in target.oof.columns}).map(
        lambda v: repr(v) if isinstance(v, float) else v).to_dict("list")
whatif = CliRunner().invoke(cli, ["predict", "--models-dir", models, "--model", train["model_id"], "--seed", "3",
                                  "--set", "roll_force_kn_per_cm=8", "--set", "roll_gap_mm=2.5",
                                  "--set", "roll_speed_rpm=5", "--set", "compression_force_kn=12", "--json"])
assert whatif.exit_code == 0, whatif.output
record = {"train": strip(train), "metadata": strip(fitted.metadata()), "out_of_fold": oof,
          "predictions": predictions, "whatif": strip(json.loads(whatif.stdout))}
Path(out).write_text(json.dumps(record, sort_keys=True, indent=1, ensure_ascii=False), encoding="utf-8")
"""


def test_same_store_chain_and_seed_give_byte_identical_results(tmp_path, counts):
    make_lots(10, seed=8).write_csv(tmp_path / "lots")
    store, chain = tmp_path / "lots.db", tmp_path / "chain.toml"
    assert run_cli(["ingest", tmp_path / "lots", "--store", store]).exit_code == 0
    chain.write_text(CHAIN)
    runs = []
    for i, (hash_seed, jobs) in enumerate((("1", "1"), ("2", "1"))):
        env = dict(os.environ, PYTHONHASHSEED=hash_seed, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
        out = tmp_path / f"run{i}.json"
        runs.append((subprocess.Popen([sys.executable, "-c", RUN, str(store), str(tmp_path / f"models{i}"),
                                       str(chain), jobs, str(out)], env=env, cwd=tmp_path,
                                      stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True), out))
    texts = []
    for proc, out in runs:
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err[-2000:]
        texts.append(out.read_bytes())
    counts["reproducibility runs compared"] += len(texts)
    assert b'"out_of_fold"' in texts[0] and b'"boosting"' in texts[0]  # the record holds what it claims
    assert texts[0] == texts[1], _first_difference(texts[0], texts[1])


def _first_difference(a: bytes, b: bytes) -> str:
    la, lb = a.decode().splitlines(), b.decode().splitlines()
    for k, (x, y) in enumerate(zip(la, lb)):
        if x != y:
            return f"line {k + 1}: {x.strip()!r} != {y.strip()!r}"
    return f"lengths differ: {len(la)} and {len(lb)} lines"
