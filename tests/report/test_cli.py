"""``linkage report``: lots from a real lot store, the model from a real
registry, the report written where asked (or to the default path)."""

from __future__ import annotations

import copy
import html
import re

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli

from .conftest import EVIL_LOT


@pytest.fixture(scope="module")
def site(tmp_path_factory, lots, chain):
    """A lot store holding the hostile synthetic lots, a registry holding the
    session's chain, and the spec file, as a user would have them."""
    from linkage.models.registry import save
    from linkage.synthetic import WINDOW_SPEC

    root = tmp_path_factory.mktemp("site")
    lots.write_csv(root / "exports", spec=WINDOW_SPEC)
    runner = CliRunner()
    done = runner.invoke(cli, ["ingest", str(root / "exports"), "--store", str(root / "lots.db")])
    assert done.exit_code == 0, done.output
    model_id = save(copy.deepcopy(chain), root / "models")
    return root, model_id


@pytest.mark.slow
def test_report_writes_to_the_default_path_and_prints_it(site, monkeypatch):
    root, model_id = site
    monkeypatch.chdir(root)
    result = CliRunner().invoke(cli, ["report", "--store", "lots.db", "--models-dir", "models",
                                      "--spec", "exports/spec.toml"])
    assert result.exit_code == 0, result.output
    expected = root / "reports" / f"report-{model_id}.html"
    assert result.output.strip() == str(expected.relative_to(root))
    page = expected.read_text(encoding="utf-8")
    assert html.escape(EVIL_LOT) in page and "<script" not in page
    assert f"Model {model_id} ·" in page
    assert "From the lot store." in page  # completeness from the store, not derived
    assert '<h2 id="window">' in page and "No specification was given" not in page
    n = int(re.search(r'<meta name="figures" content="(\d+)">', page).group(1))
    assert page.count('<img src="data:image/png;base64,') == n


def test_report_refuses_a_bad_confidence_before_any_work(site):
    root, _ = site
    result = CliRunner().invoke(cli, ["report", "--store", str(root / "lots.db"), "--models-dir",
                                      str(root / "models"), "--confidence", "1.5", "--out", str(root / "x.html")])
    assert result.exit_code == 2
    assert "--confidence must lie between 0 and 1; got 1.5" in result.output
    assert not (root / "x.html").exists()


def test_report_without_a_store_says_where_it_looked(site, tmp_path):
    root, _ = site
    result = CliRunner().invoke(cli, ["report", "--store", str(tmp_path / "none.db"), "--models-dir",
                                      str(root / "models"), "--out", str(tmp_path / "r.html")])
    assert result.exit_code == 2  # --store names no lot store: usage (linkage.exceptions.EXIT_CODES)
    assert f"no lot store at {tmp_path / 'none.db'}" in result.output
    assert not (tmp_path / "r.html").exists()


def test_report_help_has_an_example():
    result = CliRunner().invoke(cli, ["report", "--help"])
    assert result.exit_code == 0
    assert "Example:" in result.output and "linkage report --spec spec.toml" in result.output


@pytest.mark.slow
def test_report_of_a_store_copied_without_its_anchor_file_states_the_caution(site, tmp_path):
    """A sealed store copied without ``<store>.seal``: the command prints the caution on stderr, and the report
    (the document passed around) states it too, in "At a glance" and in the cautions section. Regression test
    of a user's re-test (the report kept silent about it); a check of wording, so no outside source."""
    import shutil

    from tests.report.demo_sections import sections

    from linkage.seal import anchor_path

    root, _ = site
    assert anchor_path(root / "lots.db").exists()  # the store as ingested is anchored
    shutil.copy(root / "lots.db", tmp_path / "copy.db")  # the anchor file left behind
    out = tmp_path / "r.html"
    result = CliRunner().invoke(cli, ["report", "--store", str(tmp_path / "copy.db"), "--models-dir",
                                      str(root / "models"), "--spec", str(root / "exports" / "spec.toml"),
                                      "--out", str(out)])
    assert result.exit_code == 0, result.output
    missing = f"no anchor file {anchor_path(tmp_path / 'copy.db')}"
    assert "caution, store:" in result.stderr and missing in result.stderr
    found = sections(out.read_text(encoding="utf-8"))
    assert f"Caution, lot store: {missing}" in found["glance"]["text"]
    assert f"The lot store this report was made from: {missing}" in found["cautions"]["text"]
    assert "compare the newest seal's hash" in found["glance"]["text"]
