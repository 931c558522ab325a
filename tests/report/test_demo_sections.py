"""Issue 20: the report's sections are the same on the demo whatever the report's code does to be fast.

The fixture ``data/demo_sections.json`` holds each section's text and number
of figures as the report code before issue 20 rendered them on the demo
(regression fixture, made by ``python -m tests.report.demo_sections``; no
outside reference: the check is that a refactoring changed nothing).
"""

from __future__ import annotations

import json

import pytest

from tests.report.demo_sections import FIXTURE, normalise, render_demo, reused, sections

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from linkage.demo import run_demo

    folder = tmp_path_factory.mktemp("demo")
    return folder, run_demo(folder)


def _same_as_stored(html_text: str) -> None:
    expected = json.loads(FIXTURE.read_text(encoding="utf-8"))
    found = sections(html_text)
    assert list(found) == list(expected)  # the same sections in the same order
    for key, want in expected.items():
        assert found[key]["figures"] == want["figures"], key
        assert found[key]["text"] == normalise(want["text"]), key  # the fixture predates some placeholders
    assert sum(s["figures"] for s in found.values()) == sum(s["figures"] for s in expected.values()) == 28


def test_computed_afresh_the_sections_and_figures_are_those_of_the_stored_demo_report(demo):
    import shutil

    folder, outputs = demo
    shutil.rmtree(outputs.models_dir / outputs.model_id / "results", ignore_errors=True)  # nothing to reuse
    html_text = render_demo(folder, outputs, "cold.html")
    assert reused(html_text) == {}
    _same_as_stored(html_text)


def test_reusing_the_window_and_the_map_changes_nothing_but_says_so(demo):
    folder, outputs = demo
    render_demo(folder, outputs, "first.html")  # stores what it computed (or finds what the demo stored)
    html_text = render_demo(folder, outputs, "warm.html")
    said = reused(html_text)
    assert set(said) == {"window", "space"}
    assert all(len(v) == 1 and v[0].startswith("Reused, not recomputed") for v in said.values())
    _same_as_stored(html_text)


def test_a_different_seed_spec_or_model_finds_nothing_to_reuse(demo):
    from linkage.demo import DEMO_DATA
    from linkage.models.reuse import load_result, result_key
    from linkage.spec import Limit, read_spec

    folder, outputs = demo
    spec = read_spec(DEMO_DATA / "lots" / "spec.toml")
    args = dict(x="roll_force_kn_per_cm", y="roll_gap_mm", n_grid=40, settings={}, confidence=0.9, assurance=0.9)
    here = result_key("space", outputs.models_dir, outputs.model_id, spec, seed=0, **args)
    assert load_result(outputs.models_dir, outputs.model_id, "space", here) is not None
    other_spec = read_spec(DEMO_DATA / "lots" / "spec.toml")
    name = next(iter(other_spec.limits))
    other_spec.limits[name] = Limit(min=other_spec.limits[name].min, max=(other_spec.limits[name].max or 1e9) * 2)
    for key in (result_key("space", outputs.models_dir, outputs.model_id, spec, seed=1, **args),
                result_key("space", outputs.models_dir, outputs.model_id, other_spec, seed=0, **args),
                result_key("window", outputs.models_dir, outputs.model_id, spec, seed=0, **args)):
        assert key != here
        assert load_result(outputs.models_dir, outputs.model_id, "space", key) is None
    # a model that is not in the registry gets no key, so nothing is stored or reused for it
    assert result_key("space", outputs.models_dir, "m-20000101T000000Z-00000000", spec, seed=0, **args) is None


def test_the_normalising_replaces_only_what_varies_between_runs():
    text = ("Model m-20261204T191929Z-da230cb0 trained 2026-12-04T19:19:29+00:00, "
            "SHA-256 " + "ab" * 32 + " of /tmp/x/demo-lots.db; window 0.209 – 0.434; "
            "numpy 1.26.0, scikit-learn 1.9.1, scipy 1.17.1 seed 0")
    assert normalise(text) == ("Model <model id> trained <time>, SHA-256 <sha256> of <path>/demo-lots.db; "
                               "window 0.209 – 0.434; numpy <version>, scikit-learn <version>, "
                               "scipy <version> seed 0")
