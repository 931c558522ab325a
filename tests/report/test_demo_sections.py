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
    # the figures, kept by the first render (issue 20), are said to be reused under the report's title
    figures_said = said.pop("head")
    assert len(figures_said) == 1 and figures_said[0].startswith("Reused, not drawn again: all 28 figures")
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
    text = ("Model m-20261204T191929Z-da230cb0 trained 2026-12-04T19:19:29+00:00, made 2026-12-04 19:20:01 UTC, "
            "SHA-256 " + "ab" * 32 + " of /tmp/x/demo-lots.db; window 0.209 – 0.434; "
            "numpy 1.26.0, scikit-learn 1.9.1, scipy 1.17.1 seed 0")
    assert normalise(text) == ("Model <model id> trained <time>, made <time>, SHA-256 <sha256> of <path>/demo-lots.db; "
                               "window 0.209 – 0.434; numpy <version>, scikit-learn <version>, "
                               "scipy <version> seed 0")


# ---------------------------------------------------------------- the figures kept beside the model (issue 20)

def _pngs(html_text: str) -> list[str]:
    """SHA-256 (hashlib, FIPS 180-4) of each embedded figure's PNG bytes, in order."""
    import base64
    import hashlib
    import re

    return [hashlib.sha256(base64.b64decode(m)).hexdigest()
            for m in re.findall(r'src="data:image/png;base64,([^"]+)"', html_text)]


def _figures_files(outputs):
    return sorted((outputs.models_dir / outputs.model_id / "results").glob("figures-*.npz"))


def test_kept_figures_are_the_drawn_ones_byte_for_byte_and_recorded_by_their_sha256(demo):
    """A report drawn afresh keeps its figures; the next report takes them instead of drawing, and its PNGs
    are the drawn ones byte for byte (compared by SHA-256, hashlib, FIPS 180-4). The kept file is recorded in
    the registry index by the SHA-256 of its bytes, as the model's own files are."""
    import hashlib
    import shutil

    from linkage.models.registry import INDEX

    folder, outputs = demo
    shutil.rmtree(outputs.models_dir / outputs.model_id / "results", ignore_errors=True)
    drawn = render_demo(folder, outputs, "drawn.html")
    assert "head" not in reused(drawn)
    (kept,) = _figures_files(outputs)
    index = json.loads((outputs.models_dir / INDEX).read_text(encoding="utf-8"))
    assert index["models"][outputs.model_id]["results"][kept.name] == hashlib.sha256(kept.read_bytes()).hexdigest()
    again = render_demo(folder, outputs, "again.html")
    assert reused(again)["head"][0].startswith("Reused, not drawn again: all 28 figures")
    assert _pngs(again) == _pngs(drawn) and len(_pngs(drawn)) == 28
    _same_as_stored(again)


def test_a_tampered_kept_figures_file_is_not_used_and_the_figures_are_drawn_again(demo):
    """A kept figures file whose bytes are not those the index recorded (here: one figure's PNG swapped for
    another's, the file otherwise well formed) is not used: every figure is drawn again, the report does not
    say they were reused, and the figures are the ones drawn afresh."""
    import io

    import numpy as np

    folder, outputs = demo
    drawn = render_demo(folder, outputs, "before-tamper.html")  # keeps them (or uses those kept)
    (kept,) = _figures_files(outputs)
    with np.load(kept, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    head = json.loads(arrays["__json__"].tobytes().decode("utf-8"))
    uris = head["result"]["uris"]
    uris[0], uris[1] = uris[1], uris[0]
    arrays["__json__"] = np.frombuffer(json.dumps(head).encode("utf-8"), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    kept.write_bytes(buf.getvalue())
    redrawn = render_demo(folder, outputs, "after-tamper.html")
    assert "head" not in reused(redrawn)
    assert _pngs(redrawn) == _pngs(drawn)
    _same_as_stored(redrawn)


def test_the_figures_key_changes_with_the_lots_the_spec_the_model_and_the_settings(demo, tmp_path, monkeypatch):
    """The key (:func:`linkage.report.kept.figures_key`) is the SHA-256 (hashlib, FIPS 180-4) of the parts the
    module notes list: the same inputs give the same key; a changed value in the assembled table, a lot less in
    the store's summary, another spec limit, another artifact hash recorded for the model, another seed or
    another code digest each give another key; a model not in the registry gets none."""
    import hashlib
    import shutil

    from linkage.assemble import assemble
    from linkage.demo import DEMO_DATA
    from linkage.models.registry import INDEX
    from linkage.report import kept
    from linkage.spec import Limit, read_spec
    from linkage.store import LotStore

    folder, outputs = demo
    spec = read_spec(DEMO_DATA / "lots" / "spec.toml")
    with LotStore(outputs.store, create=False) as store:
        table, lots = assemble(store.current_tables()), store.lots()
    settings = dict(confidence=0.9, seed=0, assurance=0.9, curve_draws=400)

    def key(models_dir=outputs.models_dir, spec=spec, table=table, lots=lots, **changed):
        return kept.figures_key(models_dir, outputs.model_id, spec, table=table, lots=lots, **{**settings, **changed})

    here = key()
    assert here == key() and len(here) == 64 and int(here, 16) >= 0
    changed_table = table.copy()
    changed_table.loc[changed_table.index[0], "ribbon_porosity"] += 1e-9
    other_spec = read_spec(DEMO_DATA / "lots" / "spec.toml")
    name = next(iter(other_spec.limits))
    other_spec.limits[name] = Limit(min=other_spec.limits[name].min, max=(other_spec.limits[name].max or 1e9) * 2)
    other_models = tmp_path / "models"
    shutil.copytree(outputs.models_dir, other_models)
    index = json.loads((other_models / INDEX).read_text(encoding="utf-8"))
    index["models"][outputs.model_id]["artifact_sha256"] = hashlib.sha256(b"another artifact").hexdigest()
    (other_models / INDEX).write_text(json.dumps(index), encoding="utf-8")
    others = [key(table=changed_table), key(lots=lots.iloc[1:]), key(spec=other_spec), key(models_dir=other_models),
              key(seed=1)]
    with monkeypatch.context() as m:
        m.setattr(kept, "_code", ["0" * 64])  # another version of linkage's source
        others.append(key())
    assert all(k is not None and k != here for k in others) and len(set(others)) == len(others)
    assert kept.frame_sha256(table) == kept.frame_sha256(table.copy()) != kept.frame_sha256(changed_table)
    # the key is the SHA-256 of the parts named, as :func:`linkage.models.reuse.result_key` documents
    from linkage import __version__

    artifact = json.loads((outputs.models_dir / INDEX).read_text(encoding="utf-8"))["models"][outputs.model_id][
        "artifact_sha256"]
    parts = {"kind": "figures", "model_id": outputs.model_id, "model_sha256": artifact, "linkage": __version__,
             "spec": {"limits": spec.to_dict(), "described": spec.describe()},
             "arguments": {"table_sha256": kept.frame_sha256(table), "lots_sha256": kept.frame_sha256(lots),
                           "code_sha256": kept.code_sha256(), **settings}}
    assert here == hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode("utf-8")).hexdigest()
    assert kept.figures_key(outputs.models_dir, "m-20000101T000000Z-00000000", spec, table=table, lots=lots,
                            **settings) is None


def test_the_figures_key_follows_matplotlibs_settings_and_the_code_on_disk(demo, monkeypatch):
    """matplotlib's settings in force are part of the key (a ``matplotlibrc`` or style changes the pictures:
    here one rcParams entry, ``lines.linewidth``, changed); shap's version is one of the libraries; a source
    stamp that no longer matches the files on disk (linkage updated under a running session) gives no key,
    so nothing is kept or reused, and the stamp taken now gives the same key as none."""
    import matplotlib

    from linkage.assemble import assemble
    from linkage.demo import DEMO_DATA
    from linkage.report import kept
    from linkage.spec import read_spec
    from linkage.store import LotStore

    folder, outputs = demo
    spec = read_spec(DEMO_DATA / "lots" / "spec.toml")
    with LotStore(outputs.store, create=False) as store:
        table, lots = assemble(store.current_tables()), store.lots()

    def key(**extra):
        return kept.figures_key(outputs.models_dir, outputs.model_id, spec, table=table, lots=lots, seed=0, **extra)

    here = key()
    with matplotlib.rc_context({"lines.linewidth": matplotlib.rcParams["lines.linewidth"] + 1.0}):
        assert key() not in (None, here)
    assert key() == here
    assert "shap" in kept.LIBRARIES
    # a font that takes precedence over the bundled one changes the pictures: another key. The font file
    # named is the one matplotlib's own findfont resolves, with hashlib's SHA-256 of its bytes
    import hashlib
    from pathlib import Path

    from matplotlib import font_manager

    resolved = Path(font_manager.findfont(font_manager.FontProperties()))
    assert kept._font() == f"{resolved.name}={hashlib.sha256(resolved.read_bytes()).hexdigest()}"
    families = {font_manager.FontProperties(fname=f).get_name() for f in resolved.parent.glob("*.ttf")}
    other = sorted(families - {font_manager.FontProperties(fname=resolved).get_name()})[0]
    with matplotlib.rc_context({"font.family": other}):
        assert kept._font().split("=")[0] != resolved.name
        assert key() not in (None, here)
    # Pillow writes the PNGs: its version is part of the key
    assert "pillow" in kept.LIBRARIES and kept._version("pillow") == __import__("PIL").__version__
    stamp = kept.source_stamp()
    assert key(stamp=stamp) == here
    path, mtime, size = stamp[0]
    assert key(stamp=((path, mtime - 1, size), *stamp[1:])) is None


def test_the_figures_key_is_the_same_in_another_process(demo):
    """The key is computed in each process that reports (``linkage report`` is one process a run): the same
    inputs must give the same key in a fresh interpreter, else a report run again never finds the figures the
    last one kept. Regression: matplotlib's ``backend`` setting is an object whose ``repr`` names its memory
    address until a backend is chosen, and it made the key differ in every process."""
    import subprocess
    import sys

    from linkage.demo import DEMO_DATA
    from linkage.report import kept

    folder, outputs = demo
    script = ("import sys; from linkage.report import kept; from linkage.store import LotStore; "
              "from linkage.assemble import assemble; from linkage.spec import read_spec\n"
              "with LotStore(sys.argv[1], create=False) as s: t, lots = assemble(s.current_tables()), s.lots()\n"
              "print(kept.figures_key(sys.argv[2], sys.argv[3], read_spec(sys.argv[4]), table=t, lots=lots, seed=0))")
    args = [str(outputs.store), str(outputs.models_dir), outputs.model_id, str(DEMO_DATA / "lots" / "spec.toml")]
    keys = {subprocess.run([sys.executable, "-c", script, *args], capture_output=True, text=True,
                           check=True).stdout.strip() for _ in range(2)}
    import matplotlib

    assert "backend" in dict.keys(matplotlib.rcParams)  # the entry the key leaves out exists
    assert len(keys) == 1 and len(next(iter(keys))) == 64
    assert kept._drawing_settings({"backend": object(), "lines.linewidth": 1.5, "x.hook": object()}) == [
        ("lines.linewidth", "1.5"), ("x.hook", "object")]


def test_results_of_a_model_object_are_not_kept_under_its_registry_id(demo, tmp_path):
    """``window`` and ``space`` given a model object (not an id) compute their result but keep nothing
    beside the registry's model of that id: the object may not be what the registry holds."""
    import shutil

    from linkage import api
    from linkage.demo import DEMO_DATA
    from linkage.models.registry import load

    folder, outputs = demo
    models = tmp_path / "models"
    shutil.copytree(outputs.models_dir, models)
    results = models / outputs.model_id / "results"
    shutil.rmtree(results, ignore_errors=True)
    chain = load(models, outputs.model_id)
    spec = DEMO_DATA / "lots" / "spec.toml"
    api.window(spec, store=None, models_dir=models, model=chain, n_draws=200)
    api.space(spec, models_dir=models, model=chain, n_grid=6)
    assert not results.exists() or not any(results.iterdir())
    api.window(spec, store=None, models_dir=models, model=outputs.model_id, n_draws=200)
    assert any(p.name.startswith("window-") for p in results.iterdir())
