"""Results kept beside a model, so that a later command reuses them instead of computing them again.

``linkage window`` and ``linkage space`` (and the report, for what it had to
compute itself) store their result in the model's folder::

    models/m-.../results/<kind>-<key>.npz

``key`` is the SHA-256 of everything the result depends on: the kind, the
model (its id and the SHA-256 of its artifact, as the registry index
records them), the specification (its limits, judges and time points, its
file name and the SHA-256 of its bytes), the seed and every other argument
of the computation, and the version of linkage. A model, spec, seed or
argument that differs gives another key, so nothing stale is ever found: the
result is computed anew. A result is reused only when its file holds the
same key, kind and model id, and its bytes have the SHA-256 the registry
index recorded when it was stored (:func:`linkage.models.registry.record_result`):
a result file changed or copied in by hand is not reused but computed anew,
as the model's own files are checked against the index.

The file is numpy's ``.npz``, read with ``allow_pickle=False``: the arrays of
the result, and its other fields as JSON (UTF-8 bytes in the entry
``__json__``); nothing in it is code. Only the result classes listed in
:data:`CLASSES` are stored. Writing is best effort: a registry that cannot
be written to (read-only, full) leaves the command's output as it was.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from linkage.exceptions import LinkageError, shown_time
from linkage.models.registry import record_result, result_intact

__all__ = ["Reused", "result_key", "load_result", "save_result"]

FOLDER = "results"


def _classes() -> dict:
    from linkage.decide.space import SpaceResult
    from linkage.decide.window import Edge, WindowResult

    return {"WindowResult": WindowResult, "Edge": Edge, "SpaceResult": SpaceResult}


#: the result classes that are stored, by name (filled on first use; importing them here would load decide/)
CLASSES: dict = {}


@dataclasses.dataclass
class Reused:
    """A result read back, with where and when it was made."""

    result: object
    kind: str
    made_at: str
    made_by: str
    path: Path

    def sentence(self, what: str) -> str:
        """The report's words for it: what was reused, from which command and when."""
        return (f"Reused, not recomputed: {what} as '{self.made_by}' computed it at {shown_time(self.made_at)} for "
                "this model, this specification, seed and settings (stored beside the model; a different model, "
                "specification, seed or setting is computed anew).")


def _model_sha256(models_dir, model_id: str) -> str | None:
    """The artifact's SHA-256 as the registry index records it. The model's
    bytes are not hashed again here: every command that computes a result
    loads the model first, and the load checks the artifact against this
    same record (:func:`linkage.models.registry.load`), so a changed artifact
    never gets this far; re-reading it for each key cost a report up to six
    hashes of the artifact and its metadata (issue 20)."""
    from linkage.models.registry import recorded_artifact_sha256

    try:
        return recorded_artifact_sha256(models_dir, model_id)
    except Exception:  # noqa: BLE001 - an unreadable index gives no stored results at all
        return None


def result_key(kind: str, models_dir, model_id: str | None, spec, **arguments) -> str | None:
    """The SHA-256 naming a result: see the module notes. None when the model
    is not in the registry index (then nothing is stored or reused)."""
    from linkage import __version__

    if not model_id or models_dir is None:
        return None
    artifact = _model_sha256(models_dir, model_id)
    if artifact is None:
        return None
    parts = {"kind": kind, "model_id": model_id, "model_sha256": artifact, "linkage": __version__,
             "spec": None if spec is None else {"limits": spec.to_dict(), "described": spec.describe()},
             "arguments": arguments}
    text = json.dumps(parts, sort_keys=True, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _path(models_dir, model_id: str, kind: str, key: str) -> Path:
    return Path(models_dir) / model_id / FOLDER / f"{kind}-{key[:32]}.npz"


# ------------------------------------------------------------------ encoding

def _encode(value, arrays: dict):
    """JSON-able form of ``value``; arrays and numpy scalars go to ``arrays``
    (as themselves, so they come back bit for bit and of the same type)."""
    if isinstance(value, (np.ndarray, np.generic)):
        key = f"a{len(arrays)}"
        arrays[key] = np.asarray(value)
        return {"__array__": key, "scalar": isinstance(value, np.generic)}
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        name = type(value).__name__
        if CLASSES.get(name) is not type(value):
            raise TypeError(f"{name} is not a stored result class")
        return {"__dataclass__": name,
                "fields": {f.name: _encode(getattr(value, f.name), arrays) for f in dataclasses.fields(value)}}
    if isinstance(value, tuple):
        return {"__tuple__": [_encode(v, arrays) for v in value]}
    if isinstance(value, list):
        return [_encode(v, arrays) for v in value]
    if isinstance(value, dict):
        if all(isinstance(k, str) for k in value) and not any(k.startswith("__") for k in value):
            return {k: _encode(v, arrays) for k, v in value.items()}
        return {"__items__": [[_encode(k, arrays), _encode(v, arrays)] for k, v in value.items()]}
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise TypeError(f"cannot store a {type(value).__name__}")


def _decode(value, arrays):
    if isinstance(value, list):
        return [_decode(v, arrays) for v in value]
    if not isinstance(value, dict):
        return value
    if "__array__" in value:
        a = arrays[value["__array__"]]
        return a[()] if value["scalar"] else a
    if "__dataclass__" in value:
        cls = CLASSES[value["__dataclass__"]]
        return cls(**{k: _decode(v, arrays) for k, v in value["fields"].items()})
    if "__tuple__" in value:
        return tuple(_decode(v, arrays) for v in value["__tuple__"])
    if "__items__" in value:
        return {_decode(k, arrays): _decode(v, arrays) for k, v in value["__items__"]}
    return {k: _decode(v, arrays) for k, v in value.items()}


# ------------------------------------------------------------------ storing and reading

def save_result(models_dir, model_id: str | None, kind: str, key: str | None, result, made_by: str, *,
                only: bool = False) -> Path | None:
    """Store ``result`` under ``key`` (see :func:`result_key`); returns the
    file, or None when nothing could be stored (no key, a class that is not
    stored, a registry that cannot be written to). ``only``: the other files
    of this kind beside the model are removed, with their index records (the
    report's figures, which a new key per state of the lots would otherwise
    pile up, megabytes each)."""
    from linkage.export import write_atomic

    if key is None:
        return None
    CLASSES.update(_classes())
    arrays: dict = {}
    try:
        body = _encode(result, arrays)
    except TypeError:
        return None
    head = {"kind": kind, "key": key, "model_id": model_id, "made_by": made_by,
            "made_at": datetime.now(timezone.utc).isoformat(timespec="seconds"), "result": body}
    arrays["__json__"] = np.frombuffer(json.dumps(head).encode("utf-8"), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    path = _path(models_dir, model_id, kind, key)
    data = buf.getvalue()
    try:
        path.parent.mkdir(exist_ok=True)

        def prune() -> list[str]:
            older = [p for p in path.parent.glob(f"{kind}-*.npz") if p.name != path.name]
            for p in older:
                p.unlink(missing_ok=True)
            return [p.name for p in older]

        record_result(models_dir, model_id, path.name, data, write=lambda: write_atomic(path, data),
                      prune=prune if only else None)
    except (OSError, LinkageError):
        return None
    return path


def load_result(models_dir, model_id: str | None, kind: str, key: str | None) -> Reused | None:
    """The result stored under ``key``, or None (none stored, another key or
    kind inside, or a file that cannot be read)."""
    if key is None:
        return None
    path = _path(models_dir, model_id, kind, key)
    if not path.is_file():
        return None
    CLASSES.update(_classes())
    try:
        raw = path.read_bytes()
        if not result_intact(models_dir, model_id, path.name, raw):
            return None  # not recorded in the registry index, or changed since: computed anew
        with np.load(io.BytesIO(raw), allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
        head = json.loads(arrays.pop("__json__").tobytes().decode("utf-8"))
        if (head.get("key"), head.get("kind"), head.get("model_id")) != (key, kind, model_id):
            return None
        result = _decode(head["result"], arrays)
    except (OSError, ValueError, KeyError, TypeError, LinkageError):
        return None
    return Reused(result=result, kind=kind, made_at=head["made_at"], made_by=head["made_by"], path=path)
