"""Where a command's output goes: standard output that cannot be written (``> /dev/full``, no space left on
device) is said with what the command had done by then, exit code 5; ``--out -`` is refused (exit 2, nothing
written), never a file named ``-``. Regression tests of a refusal and of an error message (no outside source):
each runs the command in a child process with its standard output on /dev/full, as a user's shell would."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli

ROOT = Path(__file__).resolve().parents[1]
TEMPLATE = ROOT / "tests" / "data" / "template-example"
FULL = Path("/dev/full")
needs_full = pytest.mark.skipif(not FULL.exists(), reason="no /dev/full on this system")


def _env() -> dict:
    """The child's environment: this tree first, and standard output buffered as a user's shell has it (no
    PYTHONUNBUFFERED, under which every print would fail at once rather than at the end)."""
    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}
    return {**env, "PYTHONPATH": str(ROOT)}


def _linkage_to_full(*args, cwd) -> subprocess.CompletedProcess:
    with open(FULL, "w") as full:
        return subprocess.run([sys.executable, "-m", "linkage", *map(str, args)], stdout=full, stderr=subprocess.PIPE,
                              text=True, cwd=cwd, env=_env(), timeout=300)


@needs_full
def test_output_to_a_full_device_says_the_work_was_done(tmp_path):
    """``ingest`` records the lots, then prints: its output failing must say the record is kept (a second run
    would be a second ingest), exit 5, not only 'cannot read or write: No space left on device'."""
    if not TEMPLATE.is_dir():
        pytest.skip(f"template example not found at {TEMPLATE}")
    shutil.copytree(TEMPLATE, tmp_path / "lab")
    done = _linkage_to_full("ingest", tmp_path / "lab", "--store", tmp_path / "s.db", cwd=tmp_path)
    assert done.returncode == 5, done.stderr
    assert "cannot write the command's output to standard output: No space left on device" in done.stderr
    assert "is kept; see 'linkage audit' before running it again" in done.stderr
    assert "cannot read or write:" not in done.stderr
    listed = subprocess.run([sys.executable, "-m", "linkage", "lots", "--store", str(tmp_path / "s.db"), "--json"],
                            capture_output=True, text=True, env=_env(), timeout=300)
    assert listed.returncode == 0 and listed.stdout.count('"lot"') == 4  # the record was made before the output


@needs_full
def test_output_buffered_until_the_end_is_not_lost_silently(tmp_path):
    """Output still buffered when the process ends (printed without a flush) and not writable: before, the
    flush at the end ignored the error and the command exited 0 with its output lost."""
    script = "from linkage.cli.main import leave\nprint('a result')\nleave(0)\n"
    with open(FULL, "w") as full:
        done = subprocess.run([sys.executable, "-c", script], stdout=full, stderr=subprocess.PIPE, text=True,
                              env=_env(), timeout=120)
    assert done.returncode == 5
    assert "cannot write the command's output to standard output: No space left on device" in done.stderr


def test_a_closed_pipe_still_stops_quietly():
    """The reader stopping (``| head -1``) is not the full device: no message, exit 0, as before."""
    script = ("import os, sys\nfrom linkage.cli.main import leave\nr, w = os.pipe()\nos.close(r)\n"
              "os.dup2(w, 1)\nprint('x' * 10)\nleave(0)\n")
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          env=_env(), timeout=120)
    assert done.returncode == 0 and done.stderr == ""


@pytest.mark.parametrize("args", [
    ["report", "--out", "-"],
    ["assemble", "--out", "-"],
    ["plan", "--lots", "4", "--range", "roll_force_kn_per_cm=3:14", "--new", "--out", "-"],
    ["running", "s.csv", "--out", "-"],
    ["demo", "--out", "-"],
])
def test_out_dash_is_refused(tmp_path, monkeypatch, args):
    """``--out -`` wrote a file named '-' (a 2.9 MB report): every ``--out`` takes a file or folder name and
    refuses '-' before any work, exit 2, nothing written."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "s.csv").write_text("lot,ribbon_porosity\nA,0.3\n", encoding="utf-8")
    result = CliRunner().invoke(cli, [*args, "--store", str(tmp_path / "none.db")]
                                if args[0] != "demo" else args)
    assert result.exit_code == 2, result.output
    assert "'-'" in result.output and "nothing was written" in result.output
    assert not (tmp_path / "-").exists()
