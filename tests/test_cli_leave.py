"""How the ``linkage`` command ends its process (:func:`linkage.cli.main.leave`): with the command's exit code,
its output flushed and the ``atexit`` functions run, as :func:`sys.exit` ends it, but without the interpreter's
teardown. Regression tests (no outside source): the reference is what ``sys.exit`` does with the same code,
run in a child Python process each."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _run(code: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)


def _both(ending: str) -> tuple[subprocess.CompletedProcess, subprocess.CompletedProcess]:
    """The same script ended by ``leave`` and by ``sys.exit``."""
    script = ("import atexit, sys\nfrom linkage.cli.main import leave\n"
              "atexit.register(lambda: print('atexit ran', flush=True))\n"
              "print('buffered', end='')\nsys.stderr.write('to stderr')\n")
    return _run(script + f"leave({ending})\n"), _run(script + f"sys.exit({ending})\n")


def test_leave_ends_as_sys_exit_does():
    for ending in ("0", "3", "None", "'a message'"):
        left, exited = _both(ending)
        assert left.returncode == exited.returncode, ending
        assert left.stdout == exited.stdout == "bufferedatexit ran\n", ending
        assert left.stderr == exited.stderr, ending


def test_the_command_line_ends_through_leave():
    done = subprocess.run([sys.executable, "-m", "linkage", "--version"], capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=120)
    assert done.returncode == 0 and "linkage" in done.stdout
    bad = subprocess.run([sys.executable, "-m", "linkage", "no-such-command"], capture_output=True, text=True,
                         env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=120)
    assert bad.returncode == 2 and "no-such-command" in bad.stderr


def test_the_installed_command_is_main():
    """The console script runs main (which ends through leave), not the click group alone."""
    import tomllib

    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]["scripts"]
    assert scripts["linkage"] == "linkage.cli.main:main"
