"""The model registry: hashes checked before any load, escapes refused,
foreign models refused until imported, latest = newest complete model."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from datetime import datetime, timezone

import joblib
import pytest

from linkage.exceptions import ModelIdError, ModelIntegrityError, ModelNotFoundError, NoVerifiedModelError, UsageError
from linkage.models import registry
from linkage.models.registry import import_model, list_models, load, resolve, save
from linkage.models.train import train_chain

from .conftest import assembled_table, one_stage


@pytest.fixture(scope="module")
def fit():
    return train_chain(assembled_table(8, seed=4), one_stage(), candidates=["mean", "pls"])


def _never_load(*args, **kwargs):  # stands in for joblib.load where nothing may be unpickled
    raise AssertionError("joblib.load was called on an unverified artifact")


def test_save_and_load_round_trip(fit, tmp_path):
    mid = save(fit, tmp_path)
    assert registry.ID_RE.match(mid)
    folder = tmp_path / mid
    assert sorted(p.name for p in folder.iterdir()) == ["chain.joblib", "chain.joblib.sha256", "metadata.json", "whatif.npz"]
    meta = json.loads((folder / "metadata.json").read_text())
    assert meta["model_id"] == mid and meta["training"]["n_lots"] == 8
    assert (folder / "chain.joblib.sha256").read_text().split()[0] == meta["artifact_sha256"]
    index = json.loads((tmp_path / "registry.json").read_text())
    assert index["models"][mid]["source"] == {"kind": "trained"}
    back = load(tmp_path)
    X = assembled_table(8, seed=4)[fit.targets["dissolution_pct"].inputs]
    assert back.model_id == mid
    assert back.targets["dissolution_pct"].predict(X).tobytes() == fit.targets["dissolution_pct"].predict(X).tobytes()


def test_ids_are_unique_within_one_second(fit, tmp_path):
    ids = [save(fit, tmp_path) for _ in range(3)]
    assert len(set(ids)) == 3


def test_the_id_names_the_time_the_listing_shows(fit, tmp_path):
    """Regression (a user test: `models` showed 'created' at the start of training while the model id carried the
    time it was saved, seconds apart; no outside source needed): the id's time is ``created_at`` in UTC to the
    second, one recorded in another offset included."""
    import dataclasses

    mid = save(fit, tmp_path)
    assert mid.split("-")[1] == datetime.fromisoformat(fit.created_at).astimezone(timezone.utc).strftime(
        "%Y%m%dT%H%M%SZ")
    elsewhere = dataclasses.replace(fit, created_at="2026-03-01T01:30:05.250000+02:00")
    assert save(elsewhere, tmp_path).split("-")[1] == "20260228T233005Z"  # 01:30:05 at +02:00 is 23:30:05 UTC


def test_edited_artifact_is_refused_without_unpickling(fit, tmp_path, monkeypatch):
    mid = save(fit, tmp_path)
    art = tmp_path / mid / "chain.joblib"
    data = bytearray(art.read_bytes())
    data[len(data) // 2] ^= 0x01
    art.write_bytes(bytes(data))
    monkeypatch.setattr(joblib, "load", _never_load)
    with pytest.raises(ModelIntegrityError, match="does not match its recorded SHA-256"):
        load(tmp_path, mid)
    with pytest.raises(NoVerifiedModelError, match="fails its integrity check.*no other model in service"):
        load(tmp_path)  # latest is refused, and there is no other


def test_edited_metadata_is_refused(fit, tmp_path, monkeypatch):
    mid = save(fit, tmp_path)
    meta = tmp_path / mid / "metadata.json"
    meta.write_text(meta.read_text().replace('"seed": 0', '"seed": 1'))
    monkeypatch.setattr(joblib, "load", _never_load)
    with pytest.raises(ModelIntegrityError, match="metadata.json does not match"):
        load(tmp_path, mid)


@pytest.mark.parametrize("bad", ["../x", "/etc/passwd", "..", "m-1/../../x", ".tmp-m-1"])
def test_paths_that_escape_are_refused(fit, tmp_path, bad):
    save(fit, tmp_path)
    # bad input, exit code 2 (the README's exit-code line; it was 4, model integrity, before the user test)
    with pytest.raises(ModelIdError, match="is a path, not a model id") as caught:
        resolve(tmp_path, bad)
    assert caught.value.exit_code == 2


def test_symlinked_model_folder_is_refused(fit, tmp_path, monkeypatch):
    outside = tmp_path / "elsewhere"
    reg = tmp_path / "models"
    mid = save(fit, outside)
    reg.mkdir()
    index = json.loads((outside / "registry.json").read_text())
    (reg / "registry.json").write_text(json.dumps(index))  # even an index that lists it
    os.symlink(outside / mid, reg / mid)
    monkeypatch.setattr(joblib, "load", _never_load)
    with pytest.raises(ModelIntegrityError, match="symbolic link"):
        load(reg, mid)


def test_unknown_id_lists_the_available_ones(fit, tmp_path):
    mid = save(fit, tmp_path)
    with pytest.raises(ModelNotFoundError, match=f"available: {mid}"):
        load(tmp_path, "m-20990101T000000Z-00000000")
    with pytest.raises(ModelNotFoundError, match="no model registry"):
        load(tmp_path / "none")


def test_foreign_model_is_refused_until_imported(fit, tmp_path, monkeypatch):
    a, b = tmp_path / "a", tmp_path / "b"
    mid = save(fit, a)
    b.mkdir()
    shutil.copytree(a / mid, b / mid)  # copied in by hand
    with monkeypatch.context() as m:
        m.setattr(joblib, "load", _never_load)
        with pytest.raises(ModelIntegrityError, match="not in the registry index"):
            load(b, mid)
        with pytest.raises(ModelNotFoundError):
            load(b)  # a foreign folder is never latest
    assert [(r["model_id"], r["status"]) for r in list_models(b)] == [(mid, "foreign")]
    with pytest.raises(UsageError, match="source note"):
        import_model(b / mid, b, " ")
    assert import_model(b / mid, b, "copied from the pilot-plant PC") == mid  # registered in place
    assert load(b).model_id == mid
    row = list_models(b)[0]
    assert row["status"] == "ok" and row["latest"]
    assert row["source"]["kind"] == "imported" and row["source"]["note"] == "copied from the pilot-plant PC"
    c = tmp_path / "c"
    assert import_model(a / mid, c, "from registry a") == mid  # copied in by the import
    assert list_models(c)[0]["source"]["from"] == str((a / mid).resolve())
    with pytest.raises(UsageError, match="already in the registry"):
        import_model(a / mid, c, "again")


def test_import_refuses_an_edited_artifact(fit, tmp_path, monkeypatch):
    mid = save(fit, tmp_path / "a")
    art = tmp_path / "a" / mid / "chain.joblib"
    art.write_bytes(art.read_bytes() + b"\x00")
    monkeypatch.setattr(joblib, "load", _never_load)
    with pytest.raises(ModelIntegrityError, match="Not imported"):
        import_model(tmp_path / "a" / mid, tmp_path / "b", "test")


def test_latest_is_the_newest_complete_verified_model(fit, tmp_path):
    old = save(fit, tmp_path)
    new = save(fit, tmp_path)
    assert resolve(tmp_path).name == new
    (tmp_path / ".tmp-m-20990101T000000Z-ffffffff-1").mkdir()  # an interrupted save
    (tmp_path / new / "chain.joblib").write_bytes(b"not a model")
    with pytest.raises(NoVerifiedModelError, match=f"latest is {new}"):  # never replaced by the older one
        resolve(tmp_path)
    assert resolve(tmp_path, old).name == old
    status = {r["model_id"]: r["status"] for r in list_models(tmp_path)}
    assert status[new] == "changed" and status[old] == "ok"
    assert status[".tmp-m-20990101T000000Z-ffffffff-1"] == "incomplete"


_CHILD = r"""
import sys, time
from pathlib import Path
import numpy as np, pandas as pd
from linkage.models import registry
from linkage.models.chain import ChainSpec, StageSpec
from linkage.models.train import train_chain

models_dir, marker, phase = Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3]
rng = np.random.default_rng(0)
table = pd.DataFrame({"lot": [f"L{i}" for i in range(6)], "ribbon_porosity": rng.uniform(0.2, 0.4, 6),
                      "dissolution_pct": rng.normal(90, 2, 6)})
fit = train_chain(table, ChainSpec([StageSpec("t", ["ribbon_porosity"], ["dissolution_pct"])]), candidates=["mean"])

def stall():
    marker.write_text("ready")
    time.sleep(120)

if phase == "artifact":
    original = registry._write_file
    def write_then_stall(path, data):
        original(path, data)
        if path.name == "chain.joblib":
            stall()
    registry._write_file = write_then_stall
else:  # killed after the folder is renamed, before the index records it
    registry._write_index = lambda *a: stall()
registry.save(fit, models_dir)
"""


@pytest.mark.reliability
@pytest.mark.parametrize("phase", ["artifact", "index"])
def test_sigkill_during_save_never_leaves_a_loadable_half_model(fit, tmp_path, phase):
    previous = save(fit, tmp_path)
    marker = tmp_path.parent / f"marker-{phase}"
    child = subprocess.Popen([sys.executable, "-c", _CHILD, str(tmp_path), str(marker), phase])
    try:
        deadline = time.monotonic() + 120
        while not marker.exists():
            assert child.poll() is None, "the child ended before it reached the kill point"
            assert time.monotonic() < deadline
            time.sleep(0.05)
        os.kill(child.pid, signal.SIGKILL)
    finally:
        child.wait(timeout=60)
    assert child.returncode == -signal.SIGKILL
    assert resolve(tmp_path).name == previous
    assert load(tmp_path).model_id == previous
    rows = {r["model_id"]: r["status"] for r in list_models(tmp_path)}
    left = [s for mid, s in rows.items() if mid != previous]
    assert left == (["incomplete"] if phase == "artifact" else ["foreign"])
