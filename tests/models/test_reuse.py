"""Results kept beside a model (issue 20, :mod:`linkage.models.reuse`): what is read back is what was
stored, bit for bit and type for type (checked with numpy's own ``array_equal`` and ``dtype``), and only
under the key, kind and model it was stored for. The key's dependence on model, spec, seed and arguments
is checked on the demo's registry in tests/report/test_demo_sections.py."""

from __future__ import annotations

import dataclasses
import json
import re

import numpy as np

from linkage.decide.window import Edge, WindowResult
from linkage.models.registry import INDEX
from linkage.models.reuse import load_result, save_result

MODEL = "m-20260101T000000Z-0123abcd"
KEY = "ab" * 32


def _window() -> WindowResult:
    grid = np.linspace(0.2, 0.45, 7)
    return WindowResult(
        model_id=MODEL, confidence=0.9, data_range=(0.2, 0.45), low=Edge(np.float64(0.25), "dissolution_pct"),
        high=Edge(None, "data range"), mean_low=0.22, mean_high=float("nan"), segments=[(0.25, 0.3), (0.35, 0.4)],
        settings={"roll_gap_mm": {"value": 2.5, "source": "given"}}, attributes=["a", "b"], not_modelled=[],
        roll_force={"low": None, "curve": {"roll_force_kn_per_cm": grid * 30, "p_in_window": grid}},
        grid=grid, p_all=grid ** 2, p_each={"a": grid, "b": 1 - grid},
        bands={"a": {"mean": grid, "low": grid - 0.1, "high": grid + 0.1}}, mean_ok=grid > 0.3, n_draws=2000,
        in_domain=np.array([True, False, True, True, True, True, True]), p_all_low=None,
        bound={"available": True, "n_replicates": np.int64(200), "simultaneous": {"quantile": 0.04}},
        held_point={1: "a key that is not text", "x": (1, 2)})


def _same(a, b, where="result") -> None:
    assert type(a) is type(b), where
    if isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), where
    elif dataclasses.is_dataclass(a):
        for f in dataclasses.fields(a):
            _same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
    elif isinstance(a, dict):
        assert list(a) == list(b), where
        for k in a:
            _same(a[k], b[k], f"{where}[{k!r}]")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{where}[{i}]")
    elif isinstance(a, float) and np.isnan(a):
        assert np.isnan(b), where
    else:
        assert a == b, where


def _registry(models_dir) -> None:
    """A model folder and its entry in the registry index (what ``registry.save`` leaves; only the entry is
    needed here)."""
    (models_dir / MODEL).mkdir()
    (models_dir / INDEX).write_text(json.dumps({"format": 1, "models": {MODEL: {}}}), encoding="utf-8")


def test_a_result_comes_back_bit_for_bit_and_type_for_type(tmp_path):
    _registry(tmp_path)
    stored = _window()
    path = save_result(tmp_path, MODEL, "window", KEY, stored, "linkage window")
    assert path is not None and path.parent == tmp_path / MODEL / "results"
    back = load_result(tmp_path, MODEL, "window", KEY)
    assert back is not None and back.made_by == "linkage window"
    _same(stored, back.result)
    assert "Reused, not recomputed" in back.sentence("the window") and "'linkage window'" in back.sentence("x")
    # its time as every text shows one (to the second, UTC said); regression of the text, no outside source needed
    assert re.search(r"computed it at \d{4}-\d\d-\d\d \d\d:\d\d:\d\d UTC for", back.sentence("x"))


def test_nothing_is_found_under_another_key_kind_or_model_or_in_a_spoilt_file(tmp_path):
    _registry(tmp_path)
    path = save_result(tmp_path, MODEL, "window", KEY, _window(), "linkage window")
    assert load_result(tmp_path, MODEL, "window", "cd" * 32) is None
    assert load_result(tmp_path, MODEL, "space", KEY) is None
    assert load_result(tmp_path, "m-20260101T000000Z-ffffffff", "window", KEY) is None
    assert load_result(tmp_path, MODEL, "window", None) is None
    path.write_bytes(b"not a numpy file")
    assert load_result(tmp_path, MODEL, "window", KEY) is None


def test_what_is_not_a_result_class_is_not_stored(tmp_path):
    @dataclasses.dataclass
    class Other:
        x: int = 1

    _registry(tmp_path)
    assert save_result(tmp_path, MODEL, "window", KEY, Other(), "test") is None
    assert save_result(tmp_path, MODEL, "window", KEY, {"a": object()}, "test") is None
    assert save_result(tmp_path, MODEL, "window", None, _window(), "test") is None


def test_a_result_file_changed_or_not_recorded_in_the_index_is_not_reused(tmp_path):
    """The result files are held to the registry index as the model's files are: a well-formed result whose
    bytes are not the ones the index recorded (edited by hand, or another result copied over it) is computed
    anew, as is one stored where the registry has no such model."""
    _registry(tmp_path)
    path = save_result(tmp_path, MODEL, "window", KEY, _window(), "linkage window")
    good = path.read_bytes()
    other = dataclasses.replace(_window(), confidence=0.95)
    save_result(tmp_path, MODEL, "window", KEY, other, "linkage window")  # records the other's hash
    changed = path.read_bytes()
    path.write_bytes(good)  # a valid file, but not the bytes the index now records
    assert load_result(tmp_path, MODEL, "window", KEY) is None
    path.write_bytes(changed)
    assert load_result(tmp_path, MODEL, "window", KEY).result.confidence == 0.95
    assert save_result(tmp_path, "m-20260101T000000Z-ffffffff", "window", KEY, _window(), "x") is None


def test_a_kept_mewma_design_is_the_simulated_one_and_is_not_simulated_again(tmp_path, monkeypatch):
    """The drift watch's design kept beside the model (issue 20): read back, it is the design the seeded
    simulation gives (compared field by field with a fresh call of ``linkage.decide.mewma._design``, the
    simulation itself), and :func:`linkage.decide.mewma.design` returns it without simulating."""
    from linkage.decide import mewma

    monkeypatch.setattr(mewma, "_KEPT", {})  # nothing an earlier test's model kept (its training design) counts here
    _registry(tmp_path)
    p, n_ref = 2, 12
    simulated = mewma.design(p, n_ref=n_ref)
    assert mewma.simulated(simulated)  # 12 estimated lots: not in the table of known-parameter designs
    assert not mewma.simulated(mewma.design(3))  # tabulated
    save_result(tmp_path, MODEL, "mewma", KEY, [dict(simulated)], "linkage report")
    back = load_result(tmp_path, MODEL, "mewma", KEY).result
    _same(back, [dict(mewma._design(p, mewma.LAMBDA, mewma.ARL0, n_ref))])
    monkeypatch.setattr(mewma, "_KEPT", {})
    mewma.remember(back + [{"attributes": "not a design"}])

    def no_simulation(*args, **kwargs):
        raise AssertionError("simulated again")

    monkeypatch.setattr(mewma, "_design", no_simulation)
    _same(dict(mewma.design(p, n_ref=n_ref)), dict(simulated))
    assert not mewma.simulated(back[0])  # taken from what was kept: nothing new to keep


def test_a_result_stored_as_the_only_one_of_its_kind_removes_the_others_and_their_records(tmp_path):
    """``only=True`` (the report's figures, a new key for every state of the lots): the other files of that kind
    beside the model go, with their index records; files of other kinds stay."""
    _registry(tmp_path)
    first = save_result(tmp_path, MODEL, "window", KEY, _window(), "linkage window", only=True)
    space = save_result(tmp_path, MODEL, "space", KEY, _window(), "linkage space")
    second = save_result(tmp_path, MODEL, "window", "cd" * 32, _window(), "linkage window", only=True)
    assert not first.exists() and second.exists() and space.exists()
    recorded = json.loads((tmp_path / INDEX).read_text(encoding="utf-8"))["models"][MODEL]["results"]
    assert sorted(recorded) == sorted([second.name, space.name])
    assert load_result(tmp_path, MODEL, "window", KEY) is None
    assert load_result(tmp_path, MODEL, "window", "cd" * 32) is not None


def test_a_handed_in_window_of_no_stored_class_gets_no_figures_key(tmp_path):
    """A window object the result store cannot encode is drawn by the report but not keyed (no internal
    storage error): the report's figures are then neither kept nor reused."""
    from linkage.api import _figures_key

    _registry(tmp_path)
    assert _figures_key(tmp_path, MODEL, None, None, None, given_window=True, window=object(), window_args=None,
                        space_args=None, seed=0) is None
