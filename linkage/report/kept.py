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
  matplotlib, numpy, pandas, scipy, scikit-learn, shap and Pillow (which
  writes the PNGs; as imported), so any change of the code that draws or
  computes a figure gives another key; matplotlib's settings in force
  (``rcParams``: a ``matplotlibrc`` or a style changes the pictures); and the
  font file matplotlib resolves for the figures' text (its name and
  SHA-256: a font installed that takes precedence changes the pictures). When linkage's source files on disk are no
  longer those that were there when :mod:`linkage.api` was imported (an
  update under a running session), there is no key: nothing is kept or
  reused.

A file whose bytes differ from the index's record (changed by hand, copied
in), another key, or a figure whose caption is not the one the report now
writes, is not used: that figure is drawn again. What is not in the key: a
fallback font matplotlib takes for a character the resolved font lacks (a
lot or product name in another script; the bundled font has every
character of linkage's own labels and units) and the time of day (no figure
shows it).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from linkage.exceptions import shown_time

#: the kind of result the figures are kept as (:mod:`linkage.models.reuse`)
KIND = "figures"

#: the libraries whose version is part of the key (their code draws or computes the figures)
LIBRARIES = ("matplotlib", "numpy", "pandas", "scipy", "scikit-learn", "shap", "pillow")

#: import names of the libraries whose distribution name differs
_MODULES = {"scikit-learn": "sklearn", "pillow": "PIL"}

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


def _sources() -> list[Path]:
    root = Path(__file__).resolve().parents[1]
    return sorted(p for p in root.rglob("*")
                  if p.suffix in (".py", ".j2", ".css", ".js") and "__pycache__" not in p.parts)


def source_stamp() -> tuple:
    """(path, modification time, size) of each of linkage's source files: taken when :mod:`linkage.api`
    is imported (:data:`linkage.api.SOURCE_STAMP`), to tell later whether the files on disk are still the
    code that is running."""
    out = []
    for path in _sources():
        st = path.stat()
        out.append((str(path), st.st_mtime_ns, st.st_size))
    return tuple(out)


def code_sha256(stamp: tuple | None = None) -> str | None:
    """SHA-256 of linkage's source files (``*.py``, the templates and the page's style and script), with the
    versions of :data:`LIBRARIES` as imported in this process (``__version__``; the installed metadata for
    one not imported yet), matplotlib's settings in force (every ``rcParams`` entry: a ``matplotlibrc``
    or style changes the pictures) and the font file the figures' text resolves to (:func:`_font`); the
    source part computed once a process. None when the source files
    are no longer those of ``stamp`` (changed on disk since linkage was imported: the running code is not
    the code the hash would name, so nothing is kept or reused)."""
    if stamp is not None and source_stamp() != stamp:
        return None
    if not _code:
        root = Path(__file__).resolve().parents[1]
        digest = hashlib.sha256()
        for path in _sources():
            digest.update(str(path.relative_to(root)).encode("utf-8") + b"\x00" + path.read_bytes() + b"\x00")
        _code.append(digest.hexdigest())
    digest = hashlib.sha256(_code[0].encode("ascii"))
    for name in LIBRARIES:
        digest.update(f"{name}={_version(name)}\x00".encode("utf-8"))
    import matplotlib  # the top-level package only: its settings, not its drawing code

    digest.update(repr(_drawing_settings(matplotlib.rcParams)).encode("utf-8"))
    digest.update(_font().encode("utf-8"))
    return digest.hexdigest()


#: rcParams entries that do not change a figure drawn on the Agg canvas: which window backend an
#: interactive session would use (``backend`` holds a sentinel object until a backend is resolved, whose
#: ``repr`` names its memory address, another in every process)
_NOT_DRAWING = frozenset({"backend", "backend_fallback", "interactive", "toolbar", "savefig.directory"})


def _drawing_settings(params) -> list[tuple[str, str]]:
    """The matplotlib settings in force that the key covers, as sorted (name, repr) pairs, the same in every
    process for the same settings. ``dict.items``: the stored values, without RcParams' per-key checks (0.4 ms
    against 0.2 s). A value whose ``repr`` names a memory address (an object with no value ``repr``) would
    give another key in every process, so nothing would ever be reused; such a value stands by its type."""
    out = []
    for name, value in sorted(dict.items(params)):
        if name in _NOT_DRAWING:
            continue
        text = repr(value)
        out.append((name, type(value).__qualname__ if " at 0x" in text else text))
    return out


def _font() -> str:
    """The file name and SHA-256 of the font matplotlib resolves for the figures' text (its default font
    properties under the settings in force: every text of the figures uses them, at other sizes); about
    12 ms, most of it importing matplotlib's font list, which the drawing loads anyway."""
    from matplotlib import font_manager

    path = Path(font_manager.findfont(font_manager.FontProperties(), fallback_to_default=True))
    stat = path.stat()
    seen = (str(path), stat.st_mtime_ns, stat.st_size)  # the file hashed once a process while it is unchanged
    if seen not in _fonts:
        _fonts[seen] = f"{path.name}={hashlib.sha256(path.read_bytes()).hexdigest()}"
    return _fonts[seen]


#: (font file, modification time, size) -> its name and SHA-256 (:func:`_font`)
_fonts: dict[tuple, str] = {}


def _version(name: str) -> str | None:
    """The version of library ``name`` as imported here, else as installed."""
    import sys
    from importlib.metadata import PackageNotFoundError, version

    module = sys.modules.get(_MODULES.get(name, name))
    if module is not None and getattr(module, "__version__", None):
        return str(module.__version__)
    try:
        return version(name)
    except PackageNotFoundError:
        return None


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


def figures_key(models_dir, model_id, spec, *, table, lots, stamp: tuple | None = None, **arguments) -> str | None:
    """The key of the report's figures (see the module notes); None when the model is not in the
    registry index, or linkage's source files changed since ``stamp`` (nothing is kept or reused then)."""
    from linkage.models.reuse import result_key

    code = code_sha256(stamp)
    if code is None:
        return None
    return result_key(KIND, models_dir, model_id, spec, table_sha256=frame_sha256(table),
                      lots_sha256=frame_sha256(lots), code_sha256=code, **arguments)


def sentence(made_by: str, made_at: str, n_reused: int, n_figures: int) -> str:
    """The report's words for figures it did not draw again."""
    which = f"all {n_figures} figures" if n_reused == n_figures else f"{n_reused} of the {n_figures} figures"
    return (f"Reused, not drawn again: {which}, as '{made_by}' drew them at {shown_time(made_at)} for this model, "
            "these lots, this specification, these settings and this version of the code (kept beside the model; "
            "any change to one of them draws the figures anew).")
