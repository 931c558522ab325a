"""Untrusted artifacts: what the model registry refuses, before any
unpickling (loading a joblib file runs code: Python documentation, "pickle:
Python object serialization", the warning at its top).

Each refusal is checked with a booby-trapped artifact: a pickle that, if it
were ever unpickled, would create a marker file. The marker must never
appear. Hashes are checked against Python's hashlib (FIPS 180-4 SHA-256).
"""

from __future__ import annotations

import builtins
import hashlib
import json
import pickle
import shutil
from pathlib import Path

import pytest

from linkage.exceptions import LinkageError, ModelIntegrityError, ModelNotFoundError, UsageError
from linkage.models import registry

from .helpers import run_cli

pytestmark = pytest.mark.reliability


class _Trap:
    """Unpickling this calls open(marker, "w"): proof that a file was unpickled."""

    def __init__(self, marker: Path):
        self.marker = str(marker)

    def __reduce__(self):
        return builtins.open, (self.marker, "w")


def trap_bytes(marker: Path) -> bytes:
    return pickle.dumps(_Trap(marker))


@pytest.fixture
def reg(tmp_path, trained_small):
    """A registry holding one real model; returns (models_dir, model_id)."""
    models = tmp_path / "models"
    return models, registry.save(trained_small, models)


def _refused(counts, exc_type, call, *args, **kwargs):
    with pytest.raises(exc_type) as info:
        call(*args, **kwargs)
    assert str(info.value).strip()
    counts["artifacts refused"] += 1
    return info.value


def test_saved_hash_is_the_sha256_of_the_artifact(reg):
    models, mid = reg
    index = json.loads((models / registry.INDEX).read_text())
    data = (models / mid / registry.ARTIFACT).read_bytes()
    assert index["models"][mid]["artifact_sha256"] == hashlib.sha256(data).hexdigest()
    assert registry.load(models, mid).model_id == mid


@pytest.mark.parametrize("how", ["trap", "one byte flipped", "truncated", "another model's artifact"])
def test_a_changed_artifact_is_never_unpickled(tmp_path, reg, trained_small, how, counts):
    models, mid = reg
    marker = tmp_path / "unpickled"
    artifact = models / mid / registry.ARTIFACT
    if how == "trap":
        artifact.write_bytes(trap_bytes(marker))
    elif how == "one byte flipped":
        data = bytearray(artifact.read_bytes())
        data[len(data) // 2] ^= 0x01
        artifact.write_bytes(bytes(data))
    elif how == "truncated":
        artifact.write_bytes(artifact.read_bytes()[:100])
    else:
        other = registry.save(trained_small, tmp_path / "elsewhere")
        shutil.copy(tmp_path / "elsewhere" / other / registry.ARTIFACT, artifact)
    exc = _refused(counts, ModelIntegrityError, registry.load, models, mid)
    assert "SHA-256" in str(exc) and exc.exit_code == 4
    assert not marker.exists()
    rows = {r["model_id"]: r for r in registry.list_models(models)}
    assert rows[mid]["status"] == "changed" and not rows[mid]["latest"]


def test_a_consistent_forgery_of_artifact_metadata_and_sidecar_is_refused(tmp_path, reg, counts):
    """Replacing the artifact and rewriting its metadata and .sha256 file to
    match does not help: the registry index is the reference."""
    models, mid = reg
    marker = tmp_path / "unpickled"
    folder = models / mid
    data = trap_bytes(marker)
    digest = hashlib.sha256(data).hexdigest()
    (folder / registry.ARTIFACT).write_bytes(data)
    (folder / registry.HASHFILE).write_text(f"{digest}  {registry.ARTIFACT}\n")
    meta = json.loads((folder / registry.METADATA).read_text())
    meta["artifact_sha256"] = digest
    (folder / registry.METADATA).write_text(json.dumps(meta))
    _refused(counts, ModelIntegrityError, registry.load, models, mid)
    _refused(counts, ModelNotFoundError, registry.load, models, "latest")  # the only model fails its checks
    assert not marker.exists()


def test_latest_refuses_a_changed_newer_model_and_serves_no_older_one(tmp_path, reg, trained_small, counts):
    """A user test: a newer model in service whose artifact was changed is not passed over for an older one
    (before: a warning, and the older model served). ``latest`` is refused with the integrity error, naming the
    model, the file and the check, and the older model to name with --model; the older one still loads by id.
    A refusal: no outside source."""
    from datetime import datetime, timezone

    from linkage.exceptions import NoVerifiedModelError

    models, old = reg
    trained_small.created_at = datetime.now(timezone.utc).isoformat(timespec="microseconds")
    new = registry.save(trained_small, models)
    marker = tmp_path / "unpickled"
    (models / new / registry.ARTIFACT).write_bytes(trap_bytes(marker))
    exc = _refused(counts, NoVerifiedModelError, registry.load, models)
    text = str(exc)
    assert exc.exit_code == 4 and f"latest is {new}" in text and str(models / new / registry.ARTIFACT) in text
    assert "SHA-256" in text and f"--model {old}" in text and ".." not in text.replace("…", "")
    assert registry.load(models, old).model_id == old  # named explicitly, it serves
    assert not marker.exists()


def test_the_listing_gives_the_lots_of_a_model_that_fails_its_check(tmp_path, reg, trained_small):
    """A user read a blank lots column for a model whose artifact was changed: the lot count is in the model's
    metadata, read as JSON (never unpickled), which still matches the SHA-256 the index recorded. The listing
    now gives it beside the failing status and role; a metadata file that was itself changed is not trusted
    (blank). Regression test of the listing (no outside source)."""
    from linkage.cli.model_cmds import format_models

    models, mid = reg
    marker = tmp_path / "unpickled"
    (models / mid / registry.ARTIFACT).write_bytes(trap_bytes(marker))
    [row] = registry.list_models(models)
    assert row["status"] == "changed" and row["role"] == "champion" and not row["latest"]
    assert row["n_lots"] == trained_small.training["n_lots"] == 6
    line = next(l for l in format_models([row]).splitlines() if mid in l)
    assert line.split(mid)[1].split()[3:6] == ["6", "changed", "champion"], line  # date, time, UTC, lots, status, role
    assert not marker.exists()
    meta = json.loads((models / mid / registry.METADATA).read_text())
    meta["training"]["n_lots"] = 60
    (models / mid / registry.METADATA).write_text(json.dumps(meta))
    [row] = registry.list_models(models)
    assert row["status"] == "changed" and row.get("n_lots") is None


ESCAPES = ["../x", "..", ".", "../../etc/passwd", "/etc/passwd", "m-20260301T101500Z-1a2b3c4d/../../x",
           "..\\x", "a/b", "m-20260301T101500Z-1a2b3c4d/..", ".tmp-m-20260301T101500Z-1a2b3c4d-1",
           "x\x00y", "~/models/m-20260301T101500Z-1a2b3c4d", "C:\\models\\m"]


@pytest.mark.parametrize("model_id", ESCAPES)
def test_a_model_id_that_is_a_path_is_refused(reg, model_id, counts):
    models, _ = reg
    for call in (registry.resolve, registry.load, registry.verify):
        exc = _refused(counts, LinkageError, call, models, model_id)
        assert isinstance(exc, (ModelIntegrityError, ModelNotFoundError))


def test_a_model_folder_that_is_a_symlink_out_of_the_registry_is_refused(tmp_path, reg, counts):
    models, mid = reg
    outside = tmp_path / "outside"
    shutil.copytree(models / mid, outside / mid)
    shutil.rmtree(models / mid)
    (models / mid).symlink_to(outside / mid, target_is_directory=True)
    exc = _refused(counts, ModelIntegrityError, registry.load, models, mid)
    assert "symbolic link" in str(exc)


def test_the_command_line_refuses_escapes_and_changed_files(tmp_path, reg, counts, no_env):
    """Through `linkage predict`: exit code 2 (an id that is a path: bad input; no such model), 4
    (integrity), a message, no traceback, and nothing unpickled."""
    models, mid = reg
    settings = ["--set", "roll_force_kn_per_cm=8", "--set", "roll_gap_mm=2.5", "--models-dir", models]
    ok = run_cli(["predict", *settings, "--json"])
    assert ok.exit_code == 0, ok.output
    for bad in ("../x", "/etc/passwd", "m-20260301T101500Z-1a2b3c4d/../.."):
        result = run_cli(["predict", *settings, "--model", bad])
        assert result.exit_code == 2 and "not a model id" in result.stderr, result.output
        counts["artifacts refused"] += 1
    marker = tmp_path / "unpickled"
    (models / mid / registry.ARTIFACT).write_bytes(trap_bytes(marker))
    result = run_cli(["predict", *settings, "--model", mid])
    assert result.exit_code == 4 and "SHA-256" in result.stderr, result.output
    result = run_cli(["predict", *settings])  # latest: nothing verified is left
    # the only model in service fails its checks: an integrity failure, exit code 4 (issue 15 item 6; it was 2)
    assert result.exit_code == 4 and "fails its integrity check" in result.stderr, result.output
    assert "there is no other model in service" in result.stderr
    counts["artifacts refused"] += 2
    assert not marker.exists()


def test_a_copied_in_model_is_refused_until_imported_with_a_note(tmp_path, trained_small, counts, no_env):
    """A model folder copied by hand into a registry is 'foreign': never
    loaded, never latest. `linkage models --import` needs --note, checks the
    artifact against its own metadata, and records where it came from."""
    elsewhere, models = tmp_path / "elsewhere", tmp_path / "models"
    mid = registry.save(trained_small, elsewhere)
    models.mkdir()
    shutil.copytree(elsewhere / mid, models / mid)
    exc = _refused(counts, ModelIntegrityError, registry.load, models, mid)
    assert "import" in str(exc)
    _refused(counts, ModelNotFoundError, registry.load, models, "latest")
    assert [r["status"] for r in registry.list_models(models)] == ["foreign"]

    no_note = run_cli(["models", "--import", elsewhere / mid, "--models-dir", models])
    assert no_note.exit_code == 2 and "--note" in no_note.stderr
    counts["artifacts refused"] += 1

    forged = tmp_path / "forged" / mid  # a copy whose artifact no longer matches its own metadata
    shutil.copytree(elsewhere / mid, forged)
    marker = tmp_path / "unpickled"
    (forged / registry.ARTIFACT).write_bytes(trap_bytes(marker))
    refused = run_cli(["models", "--import", forged, "--note", "from a colleague", "--models-dir", models])
    assert refused.exit_code == 4 and "not imported" in refused.stderr.lower(), refused.output
    counts["artifacts refused"] += 1
    assert not marker.exists()

    # the copy already in the registry is registered in place
    done = run_cli(["models", "--import", models / mid, "--note", "trained on the pilot-plant PC",
                    "--models-dir", models, "--json"])
    assert done.exit_code == 0 and json.loads(done.stdout) == {"imported": mid}, done.output
    entry = json.loads((models / registry.INDEX).read_text())["models"][mid]
    assert entry["source"]["kind"] == "imported"
    assert entry["source"]["note"] == "trained on the pilot-plant PC"
    assert entry["source"]["from"] == str((models / mid).resolve())
    assert registry.load(models).model_id == mid
    again = run_cli(["models", "--import", elsewhere / mid, "--note", "twice", "--models-dir", models])
    assert again.exit_code == 2 and "already" in again.stderr
    _refused(counts, UsageError, registry.import_model, elsewhere / mid, models, "  ")

    other = tmp_path / "other"  # a copy imported from outside the registry is copied in, with its source
    imported = registry.import_model(elsewhere / mid, other, "from the shared drive")
    assert imported == mid and registry.load(other, mid).model_id == mid
    source = json.loads((other / registry.INDEX).read_text())["models"][mid]["source"]
    assert source["from"] == str((elsewhere / mid).resolve()) and source["note"] == "from the shared drive"


def test_the_command_line_refuses_a_changed_champion_with_exit_4_and_serves_no_older_model(tmp_path, reg,
                                                                                           trained_small, counts):
    """A user test: after a newer model entered service, a byte flipped in its whatif.npz made `predict` run on
    the older model with exit 0 and a 'Warning: latest ... resolved to ... Refused..' line. Exit code 4 means a
    model file failed its integrity check (README): the newer model is refused, the message names it, the file
    and the check, and how to go on (the older model to name with --model); nothing is predicted. Named
    explicitly, the older model serves. When no other model passes, the message says so (issue 15 item 6's exit
    code 4 kept). A refusal: no outside source."""
    from datetime import datetime, timezone

    models, old = reg
    trained_small.created_at = datetime.now(timezone.utc).isoformat(timespec="microseconds")
    new = registry.save(trained_small, models)
    whatif = models / new / registry.WHATIF
    data = bytearray(whatif.read_bytes())
    data[len(data) // 2] ^= 0x01  # one byte flipped, as the user did
    whatif.write_bytes(bytes(data))
    listed = run_cli(["models", "--models-dir", models, "--json"])
    assert listed.exit_code == 0
    rows = {r["model_id"]: r for r in json.loads(listed.stdout)["models"]}
    assert rows[new]["role"] == "champion" and rows[new]["status"] == "changed" and not rows[new]["latest"]
    assert rows[old]["role"] == "superseded" and not rows[old]["latest"]
    settings = ["--set", "roll_force_kn_per_cm=8", "--models-dir", models, "--no-record"]
    refused = run_cli(["predict", *settings, "--json"])
    assert refused.exit_code == 4, refused.output
    assert refused.stdout == "" and "Warning" not in refused.stderr and ".." not in refused.stderr.replace("…", "")
    assert f"latest is {new}" in refused.stderr and str(whatif) in refused.stderr
    assert "SHA-256" in refused.stderr and f"--model {old}" in refused.stderr
    named = run_cli(["predict", *settings, "--json", "--model", old])
    assert named.exit_code == 0 and json.loads(named.stdout)["model_id"] == old, named.output
    (models / old / registry.WHATIF).write_bytes(b"changed too")
    none_left = run_cli(["predict", *settings])
    assert none_left.exit_code == 4 and "no other model in service passes its checks" in none_left.stderr
    counts["artifacts refused"] += 2
