"""The API's recording helpers under public names (``linkage.api.record_entry``, ``recording``,
``refuse_unanchored``), used by the CLI instead of private ones (``_record_entry``, ``_recording``,
``_refuse_unanchored``, kept as the same functions for scripts written before). Regression tests of names and of the decisions they keep (no outside source: these are
the recording rules of the README's "Recorded, or `--no-record`")."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from linkage import api
from linkage.exceptions import StorePathError, UsageError

CLI = Path(__file__).resolve().parents[1] / "linkage" / "cli"


def test_the_cli_imports_no_private_name_of_the_api():
    private = []
    for path in sorted(CLI.glob("*.py")):
        for m in re.finditer(r"from linkage\.api import ([^\n]+)", path.read_text(encoding="utf-8")):
            private += [f"{path.name}: {n.strip()}" for n in m.group(1).split(",") if n.strip().startswith("_")]
    assert not private, private
    for name in ("record_entry", "recording", "refuse_unanchored"):
        assert name in api.__all__ and callable(getattr(api, name))
        assert getattr(api, "_" + name) is getattr(api, name), name  # the names before, kept for older scripts
    assert api.record is api.record_entry  # the first public name, kept


def test_recording_decides_as_before(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert api.recording(None, None, "window") is False and api.recording(tmp_path / "x.db", False, "window") is False
    with pytest.raises(UsageError, match="record=True needs a lot store"):
        api.recording(None, True, "window")
    with pytest.raises(StorePathError, match="no lot store at .*nope.db: this predict would not be recorded"):
        api.recording(tmp_path / "nope.db", None, "predict")
    assert api.recording(api.DEFAULT_STORE, None, "window") is False  # the default store, missing: a note only
    assert api.record_entry(tmp_path / "nope.db", "window", model_id=None, inputs={}, outputs={}) is False
