"""Degenerate data: a single lot, fewer lots than folds, a target constant
across lots, all lots at one porosity, a column entirely missing.

Each must end in a clear message (exit code 2 from the command line) or in
the fallback ``linkage.models.train`` documents in its module notes, and the
outputs a user reads (``train --json``, the text of ``train``) must carry no
NaN or infinite number: a missing value is ``null`` with a note saying why.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest

from linkage.assemble import assemble
from linkage.cli.model_cmds import format_train, train_json
from linkage.exceptions import InsufficientDataError
from linkage.models.chain import ChainSpec
from linkage.models.cv import SIMPLICITY_ORDER
from linkage.models.train import MIN_LOTS, train_chain
from linkage.synthetic import make_lots

from .helpers import finite_json, run_cli

pytestmark = pytest.mark.reliability

CHAIN = ChainSpec.from_toml_text("""
[[stage]]
name = "ribbon"
inputs = ["roll_force_kn_per_cm", "roll_gap_mm"]
targets = ["ribbon_porosity"]

[[stage]]
name = "tablets"
inputs = ["ribbon_porosity", "compression_force_kn"]
targets = ["tensile_strength_mpa", "dissolution_pct", "friability_pct"]
""", source="test chain")


def _no_nan_anywhere(fitted) -> dict:
    """train --json is strict JSON with no NaN or inf, and the text has no 'nan' or 'inf'."""
    payload = train_json(fitted)
    text = json.dumps(payload, allow_nan=False)  # raises on NaN or inf
    assert finite_json(json.loads(text))
    words = format_train(fitted).lower().replace("inf", " inf ").split()
    assert "nan" not in words and "inf" not in words, format_train(fitted)
    return payload


def _train(table):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return train_chain(table, CHAIN, seed=0)


@pytest.mark.parametrize("n_lots", [1, 2, MIN_LOTS - 1])
def test_too_few_lots_is_a_clear_refusal(tmp_path, n_lots, counts, no_env):
    """Through the command line: `linkage train` on a store of 1 to 4 lots
    exits 2 and says how many lots it needs; nothing is registered."""
    make_lots(n_lots, seed=1).write_csv(tmp_path / "lots")
    store, models = tmp_path / "lots.db", tmp_path / "models"
    assert run_cli(["ingest", tmp_path / "lots", "--store", store]).exit_code == 0
    result = run_cli(["train", "--store", store, "--models-dir", models])
    assert result.exit_code == 2, result.output
    assert f"at least {MIN_LOTS} lots" in result.stderr and f"has {n_lots} lot" in result.stderr
    assert not (models / "registry.json").exists()
    with pytest.raises(InsufficientDataError):
        train_chain(assemble(make_lots(n_lots, seed=1).tables), CHAIN)
    counts["degenerate data sets handled"] += 1


def test_fewer_lots_than_folds_constant_target_and_an_empty_column(counts):
    """Five lots (fewer than the 5 inner folds a training set of 4 would
    need), dissolution the same in every lot, friability missing everywhere:
    documented fallbacks, each stated."""
    table = assemble(make_lots(MIN_LOTS, seed=4).tables)
    table["dissolution_pct"] = 85.0
    table["friability_pct"] = np.nan
    fitted = _train(table)
    payload = _no_nan_anywhere(fitted)
    por = payload["targets"]["ribbon_porosity"]
    assert por["cv"]["scheme"] == "leave-one-lot-out" and por["cv"]["n_splits"] == MIN_LOTS
    diss = payload["targets"]["dissolution_pct"]
    assert diss["selected"] == "mean" and diss["candidates"]["mean"]["q2"] is None
    assert any("constant target" in n for n in diss["notes"])
    assert set(diss["unavailable"]) == set(SIMPLICITY_ORDER) - {"mean"}
    assert "friability_pct" not in payload["targets"]
    assert "friability_pct missing on 5 of 5 lots" in payload["skipped"]["friability_pct"]
    counts["degenerate data sets handled"] += 3


def test_all_lots_at_one_porosity(counts):
    """Every lot at porosity 0.30: the ribbon stage can only fit the mean,
    and the Ryshkewitch–Duckworth baseline of the tablet stage says why it is
    not used (it needs porosities that differ)."""
    table = assemble(make_lots(6, seed=5).tables)
    table["ribbon_porosity"] = 0.30
    fitted = _train(table)
    payload = _no_nan_anywhere(fitted)
    assert payload["targets"]["ribbon_porosity"]["selected"] == "mean"
    assert "rd_baseline" in payload["targets"]["tensile_strength_mpa"]["unavailable"]
    counts["degenerate data sets handled"] += 1


def test_a_table_missing_entirely(tmp_path, counts, no_env):
    """A store with process and ribbon only: `linkage train` with the default
    chain trains what it can and lists each skipped attribute with why."""
    lots = make_lots(6, seed=6)
    lots.tables = {t: lots.tables[t] for t in ("process", "ribbon")}
    lots.write_csv(tmp_path / "lots")
    store, models = tmp_path / "lots.db", tmp_path / "models"
    assert run_cli(["ingest", tmp_path / "lots", "--store", store]).exit_code == 0
    result = run_cli(["train", "--store", store, "--models-dir", models, "--json"])
    assert result.exit_code == 0, result.output
    payload = json.loads(result.stdout, parse_constant=lambda c: pytest.fail(f"{c} in train --json"))
    assert list(payload["targets"]) == ["ribbon_porosity"]
    for attr in ("granule_d50_um", "fines_pct", "tensile_strength_mpa", "dissolution_pct"):
        assert "missing on 6 of 6 lots" in payload["skipped"][attr] or "absent" in payload["skipped"][attr], \
            payload["skipped"][attr]
    text = run_cli(["train", "--store", store, "--models-dir", models])
    assert "Not trained:" in text.stdout and "nan" not in text.stdout.lower().split()
    counts["degenerate data sets handled"] += 1


def test_predict_json_is_strict_json_when_intervals_are_unbounded(tmp_path, trained_small, counts, no_env):
    """With six lots a 90 % CV+ interval is unbounded (the model says so in a
    note); `predict --json` must still print standard JSON (RFC 8259 has no
    Infinity or NaN), with null for an open end."""
    from linkage.models import registry

    registry.save(trained_small, tmp_path / "models")
    result = run_cli(["predict", "--set", "roll_force_kn_per_cm=8", "--set", "roll_gap_mm=2.5", "--json",
                      "--models-dir", tmp_path / "models"])
    assert result.exit_code == 0, result.output
    counts["degenerate data sets handled"] += 1

    def refuse(constant):
        raise AssertionError(f"{constant} in predict --json")

    payload = json.loads(result.stdout, parse_constant=refuse)
    low = payload["predictions"]["ribbon_porosity"]["low"]
    assert low is None or math.isfinite(low)
