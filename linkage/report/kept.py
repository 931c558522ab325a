"""The report's figures kept beside the model, so that a report run again on the same inputs does not draw them again.

Drawing the figures to PNG is most of a report's time (issue 20). After a
report has drawn them, :func:`linkage.api.report` stores the PNG ``data:``
URIs and their captions beside the model, as the window and the map are
stored (:mod:`linkage.models.reuse`: ``models/<id>/results/figures-<key>.npz``,
its SHA-256 recorded in the registry index). The next report uses them only
when the key is the same: the SHA-256 of everything a figure is drawn from,
namely

* the model: its id and its artifact's SHA-256 as the registry index records it;
* the lots: the SHA-256 of the assembled table the report draws (every
  column's name, type and values, the index and the notes) and of the lot
  store's per-lot summary (tables present, filled cells), so a lot added,
  revised or removed gives another key;
* the specification (limits, judges, time point, its file's SHA-256);
* the report's settings (confidence, assurance, seed, draws) and how the
  window, the map, the plan and the drift watch's design came about (the
  arguments they are computed or kept with; a window handed in is hashed
  itself);
* the code: the SHA-256 of linkage's own source files and the versions of
  matplotlib, numpy, pandas, scipy and scikit-learn, so any change of the
  code that draws or computes a figure gives another key.

A file whose bytes differ from the index's record (changed by hand, copied
in), another key, or a figure whose caption is not the one the report now
writes, is not used: that figure is drawn again. What is not in the key: the
fonts of the machine beyond matplotlib's own (the figures use matplotlib's
bundled font) and the time of day (no figure shows it).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

#: the kind of result the figures are kept as (:mod:`linkage.models.reuse`)
KIND = "figures"

#: the libraries whose version is part of the key (their code draws or computes the figures)
LIBRARIES = ("matplotlib", "numpy", "pandas", "scipy", "scikit-learn")

_code: list[str] = []


def frame_sha256(frame) -> str:
    """SHA-256 of a DataFrame's content: each column's name, type and values (numeric columns
    as their bytes, others as JSON text), the index and the ``attrs`` (the assembly's notes)."""
    import pandas as pd

    digest = hashlib.sha256()

    def add(label, values) -> None:
        digest.update(json.dumps([str(label), str(values.dtype)]).encode("utf-8"))
        array = values.to_numpy() if isinstance(values, (pd.Series, pd.Index)) else np.asarray(values)
        if isinstance(values.dtype, np.dtype) and values.dtype.kind in "biufcmM":
            digest.update(np.ascontiguousarray(array).tobytes())
        else:
            digest.update(json.dumps(list(array), default=repr).encode("utf-8"))

    if frame is None:
        return "none"
    add("__index__", frame.index)
    for name in frame.columns:
        add(name, frame[name])
    digest.update(json.dumps(frame.attrs, sort_keys=True, default=str).encode("utf-8"))
    return digest.hexdigest()


def code_sha256() -> str:
    """SHA-256 of linkage's source files (``*.py``, the templates and the page's style and script),
    with the versions of :data:`LIBRARIES`; computed once a process."""
    if not _code:
        from importlib.metadata import PackageNotFoundError, version

        root = Path(__file__).resolve().parents[1]
        digest = hashlib.sha256()
        for path in sorted(root.rglob("*")):
            if path.suffix in (".py", ".j2", ".css", ".js") and "__pycache__" not in path.parts:
                digest.update(str(path.relative_to(root)).encode("utf-8") + b"\x00" + path.read_bytes() + b"\x00")
        for name in LIBRARIES:
            try:
                found = version(name)
            except PackageNotFoundError:
                found = None
            digest.update(f"{name}={found}\x00".encode("utf-8"))
        _code.append(digest.hexdigest())
    return _code[0]


def result_sha256(result) -> str:
    """SHA-256 of a result object (a window handed to the report): its fields as
    :mod:`linkage.models.reuse` stores them, arrays by their bytes."""
    from linkage.models import reuse

    reuse.CLASSES.update(reuse._classes())
    arrays: dict = {}
    body = reuse._encode(result, arrays)
    digest = hashlib.sha256(json.dumps(body, sort_keys=True, default=repr).encode("utf-8"))
    for key in sorted(arrays):
        digest.update(key.encode("utf-8") + str(arrays[key].dtype).encode("utf-8") + arrays[key].tobytes())
    return digest.hexdigest()


def figures_key(models_dir, model_id, spec, *, table, lots, **arguments) -> str | None:
    """The key of the report's figures (see the module notes); None when the model is not in the
    registry index (nothing is kept or reused for it)."""
    from linkage.models.reuse import result_key

    return result_key(KIND, models_dir, model_id, spec, table_sha256=frame_sha256(table),
                      lots_sha256=frame_sha256(lots), code_sha256=code_sha256(), **arguments)


def sentence(made_by: str, made_at: str, n_reused: int, n_figures: int) -> str:
    """The report's words for figures it did not draw again."""
    which = f"all {n_figures} figures" if n_reused == n_figures else f"{n_reused} of the {n_figures} figures"
    return (f"Reused, not drawn again: {which}, as '{made_by}' drew them at {made_at} for this model, these lots, "
            "this specification, these settings and this version of the code (kept beside the model; any change "
            "to one of them draws the figures anew).")
