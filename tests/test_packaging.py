"""Packaging checks (issue 14): what a plain, non-editable install needs.

The references are the Python standard library's own rules (tomllib reads
pyproject.toml; ``import importlib`` does not bind ``importlib.util``, Python
docs, "importlib" module reference) and setuptools' package list.
"""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

import linkage

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def test_every_subpackage_of_linkage_is_listed_for_the_wheel():
    found = {"linkage"} | {
        "linkage." + ".".join(p.parent.relative_to(ROOT / "linkage").parts)
        for p in (ROOT / "linkage").rglob("__init__.py") if p.parent != ROOT / "linkage"}
    listed = set(PYPROJECT["tool"]["setuptools"]["packages"])
    assert found <= listed, f"add {sorted(found - listed)} to [tool.setuptools] packages"
    assert PYPROJECT["tool"]["setuptools"]["package-dir"]["linkage.data_demo"] == "data_demo"


def test_the_version_has_one_source():
    assert "version" not in PYPROJECT["project"]
    assert PYPROJECT["project"]["dynamic"] == ["version"]
    assert PYPROJECT["tool"]["setuptools"]["dynamic"]["version"] == {"attr": "linkage.__version__"}
    assert isinstance(linkage.__version__, str) and linkage.__version__


def test_py_typed_marker_is_there():
    assert (ROOT / "linkage" / "py.typed").is_file()
    assert "py.typed" in PYPROJECT["tool"]["setuptools"]["package-data"]["linkage"]


def test_the_demo_data_resolve_to_the_shipped_scenario():
    from linkage.demo import DEMO_DATA

    assert (DEMO_DATA / "lots" / "process.csv").read_bytes() == (
        ROOT / "data_demo" / "lots" / "process.csv").read_bytes()


def test_help_works_when_importlib_util_was_never_imported():
    # a console script in a fresh venv starts with importlib.util not imported; hide it
    code = ("import importlib, sys\n"
            "sys.modules.pop('importlib.util', None)\n"
            "if hasattr(importlib, 'util'): del importlib.util\n"
            "from linkage.cli.main import cli\n"
            "cli(['--help'], standalone_mode=False)\n")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert "demo" in result.stdout and "predict" in result.stdout


def test_the_report_templates_are_package_data():
    # a plain (non-editable) wheel holds only what package-data lists: every template must match its pattern
    import fnmatch

    from linkage.report.templating import TEMPLATES

    patterns = PYPROJECT["tool"]["setuptools"]["package-data"]["linkage.report"]
    found = sorted(p.relative_to(TEMPLATES.parent).as_posix() for p in TEMPLATES.rglob("*") if p.is_file())
    assert found and all(any(fnmatch.fnmatch(f, pat) for pat in patterns) for f in found), found
    assert any(d.startswith("jinja2>=") for d in PYPROJECT["project"]["dependencies"])
