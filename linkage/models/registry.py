"""The model registry: one folder per model, an index, hashes checked before
any load.

Layout::

    models/
      registry.json               index: model id -> artifact and metadata SHA-256, source
      m-20260301T101500Z-1a2b3c4d/
        chain.joblib              the fitted chain
        chain.joblib.sha256       its SHA-256 (sha256sum format)
        whatif.npz                the same model as numbers for the what-if (no pickle; linkage.models.lean)
        metadata.json             id, time, training lots, table hash, versions, chain, CV results...

Rules:

* A save writes into a temporary folder inside the registry (``.tmp-*``),
  fsyncs every file, writes ``metadata.json`` last, renames the folder to
  its id, then records it in ``registry.json`` (written to a temporary file
  and renamed over the old one). A save killed at any point leaves either a
  ``.tmp-*`` folder or a folder missing from the index: neither is ever
  loaded or resolved as ``latest``.
* Before a load, the metadata's SHA-256 and the artifact's SHA-256 are
  checked against the index (and the metadata); a changed or foreign file is
  refused with :class:`ModelIntegrityError` and never passed to joblib,
  because unpickling runs code. ``whatif.npz`` is checked against the
  SHA-256 the (verified) metadata records for it before it is read.
* :func:`load_whatif` gives the lean form (numpy only, fast to load) for a
  what-if; a model saved before ``whatif.npz`` existed is loaded whole and
  converted.
* A model id is a plain name (``m-YYYYMMDDTHHMMSSZ-<8 hex>``); an id that is a
  path, climbs out (``..``), or a folder that is a symbolic link, is refused.
* A model folder copied in from elsewhere is "foreign" until
  :func:`import_model` records where it came from.
* ``latest`` is the newest model (by creation time) that is in the index and
  in service. When it fails a check, ``latest`` is refused
  (:class:`NoVerifiedModelError`, exit code 4) and no older model is used in
  its place: a model that fails its integrity check is never silently
  replaced (``--model ID`` names another explicitly). ``linkage train`` puts its model in
  service; a challenger from ``linkage retrain`` enters service only when it
  is promoted, and stays in the registry (by id) when it is not. Every
  retraining decision is appended to the index's ``decisions`` list.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import os
import re
import shutil
from datetime import datetime, timezone
from pathlib import Path

from linkage.exceptions import (ModelIdError, ModelIntegrityError, ModelNotFoundError, NoModelError,
                                NoVerifiedModelError, UsageError)

__all__ = ["save", "load", "load_whatif", "resolve", "list_models", "import_model", "verify", "record_decision",
           "decisions", "INDEX", "ARTIFACT", "METADATA", "WHATIF"]

INDEX = "registry.json"
ARTIFACT = "chain.joblib"
HASHFILE = "chain.joblib.sha256"
METADATA = "metadata.json"
WHATIF = "whatif.npz"
LOCKFILE = ".registry.lock"
TMP_PREFIX = ".tmp-"
FORMAT = 1
ID_RE = re.compile(r"^m-\d{8}T\d{6}Z-[0-9a-f]{8}$")


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------
def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="microseconds")


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_file(path: Path, data: bytes) -> None:
    with open(path, "xb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())


@contextlib.contextmanager
def _locked(models_dir: Path):
    """Exclusive lock of the registry for writers (advisory, fcntl)."""
    import fcntl

    fd = os.open(models_dir / LOCKFILE, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


def _read_index(models_dir: Path) -> dict:
    path = models_dir / INDEX
    if path.is_symlink():
        raise ModelIntegrityError(f"{path} is a symbolic link; the registry index must be a plain file")
    if not path.exists():
        return {"format": FORMAT, "models": {}}
    try:
        index = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelIntegrityError(f"the registry index {path} cannot be read ({exc}); no model is loaded") from None
    if not isinstance(index, dict) or not isinstance(index.get("models"), dict):
        raise ModelIntegrityError(f"the registry index {path} is not a linkage registry index")
    return index


def _write_index(models_dir: Path, index: dict) -> None:
    tmp = models_dir / f"{INDEX}.tmp-{os.getpid()}"
    tmp.unlink(missing_ok=True)
    _write_file(tmp, json.dumps(index, indent=2, sort_keys=True).encode("utf-8"))
    os.replace(tmp, models_dir / INDEX)
    _fsync_dir(models_dir)


def _read_plain(path: Path, what: str) -> bytes:
    if path.is_symlink():
        raise ModelIntegrityError(f"{what} {path} is a symbolic link; refused")
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise ModelIntegrityError(f"{what} {path} is missing; the model is incomplete") from None


def _registry_dir(models_dir) -> Path:
    """The registry folder, created if needed; a file in its place is refused."""
    models_dir = Path(models_dir)
    if models_dir.exists() and not models_dir.is_dir():
        raise UsageError(f"{models_dir} is a file, not a model registry folder")
    try:
        models_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(f"cannot create the model registry folder {models_dir}: {exc}") from None
    return models_dir


def _available(models_dir: Path) -> list[str]:
    try:
        return sorted(_read_index(models_dir)["models"])
    except ModelIntegrityError:
        return []


# ---------------------------------------------------------------------------
# resolving and verifying
# ---------------------------------------------------------------------------
def _check_id(model_id: str, models_dir: Path) -> str:
    s = str(model_id)
    if (os.path.isabs(s) or "/" in s or "\\" in s or s in (".", "..") or ".." in s or "\x00" in s
            or s.startswith(".")):
        raise ModelIdError(  # bad input (exit 2); refused before any file is opened
            f"model id {s!r} is a path, not a model id; only models inside the registry {models_dir} are loaded "
            "(give an id such as m-20260301T101500Z-1a2b3c4d, or 'latest')")
    if not ID_RE.match(s):
        avail = _available(models_dir)
        raise ModelNotFoundError(
            f"no model {s!r} in {models_dir}; available: {', '.join(avail) if avail else 'none'}")
    return s


def _model_dir(models_dir: Path, model_id: str) -> Path:
    path = models_dir / model_id
    if path.is_symlink():
        raise ModelIntegrityError(f"model folder {path} is a symbolic link; refused (it may point out of the registry)")
    root = models_dir.resolve()
    if path.resolve().parent != root:
        raise ModelIntegrityError(f"model folder {path} lies outside the registry {root}; refused")
    return path


def verify(models_dir, model_id: str, index: dict | None = None) -> tuple[dict, bytes]:
    """Check one model against the index: its folder, the SHA-256 of its
    metadata and of its artifact. Returns (metadata, artifact bytes);
    nothing is unpickled.

    Raises
    ------
    ModelIntegrityError
        Foreign (not in the index), changed, incomplete, or outside the registry.
    ModelNotFoundError
        No such model.
    """
    meta, data, _ = _verify(models_dir, model_id, index)
    return meta, data


def _verify(models_dir, model_id: str, index: dict | None = None) -> tuple[dict, bytes, bytes | None]:
    """:func:`verify`, also returning the checked bytes of ``whatif.npz``
    (None for a model saved before it existed)."""
    models_dir = Path(models_dir)
    model_id = _check_id(model_id, models_dir)
    path = _model_dir(models_dir, model_id)
    index = _read_index(models_dir) if index is None else index
    entry = index["models"].get(model_id)
    if entry is None:
        if path.is_dir():
            raise ModelIntegrityError(
                f"model {model_id} is not in the registry index {models_dir / INDEX}: it was copied in from "
                "elsewhere or its save was interrupted. Refused; if you trust it, import it with "
                f"'linkage models --import {path} --note \"where it came from\"'")
        avail = _available(models_dir)
        raise ModelNotFoundError(
            f"no model {model_id!r} in {models_dir}; available: {', '.join(avail) if avail else 'none'}")
    if not path.is_dir():
        raise ModelIntegrityError(f"model {model_id} is in the index but its folder {path} is missing")
    meta_bytes = _read_plain(path / METADATA, "metadata file")
    if _sha256(meta_bytes) != entry.get("metadata_sha256"):
        raise ModelIntegrityError(
            f"{path / METADATA} does not match the SHA-256 the registry recorded for it; it was changed after "
            "the model was saved. Refused.")
    try:
        meta = json.loads(meta_bytes)
    except json.JSONDecodeError as exc:  # pragma: no cover - hash matched a bad file: only if saved bad
        raise ModelIntegrityError(f"{path / METADATA} is not JSON ({exc})") from None
    if meta.get("model_id") != model_id or meta.get("artifact_sha256") != entry.get("artifact_sha256"):
        raise ModelIntegrityError(f"the metadata of {model_id} does not agree with the registry index; refused")
    data = _read_plain(path / ARTIFACT, "model artifact")
    found = _sha256(data)
    if found != entry["artifact_sha256"]:
        raise ModelIntegrityError(
            f"the artifact {path / ARTIFACT} does not match its recorded SHA-256 (recorded "
            f"{entry['artifact_sha256'][:16]}…, found {found[:16]}…): it was changed or replaced. It is not "
            "loaded, because loading a joblib file runs code.")
    whatif = _whatif_bytes(path, meta)  # a model whose what-if file was changed is not a complete model either
    return meta, data, whatif


def _whatif_bytes(path: Path, meta: dict) -> bytes | None:
    """The bytes of ``whatif.npz`` after checking them against the SHA-256
    the (verified) metadata records; None for a model saved before the file
    existed."""
    recorded = meta.get("whatif_artifact_sha256")
    if recorded is None:
        return None
    data = _read_plain(path / WHATIF, "what-if file")
    found = _sha256(data)
    if found != recorded:
        raise ModelIntegrityError(
            f"{path / WHATIF} does not match the SHA-256 its metadata records for it (whatif_artifact_sha256 in "
            f"{METADATA}: recorded {recorded[:16]}…, found {found[:16]}…): it was changed after the model "
            "was saved. Refused.")
    return data


def _ordered_ids(index: dict) -> list[str]:
    """Ids of models in service, newest first (creation time, then time of
    saving, then id). An entry without the flag predates it and is in service."""
    models = {i: m for i, m in index["models"].items() if m.get("in_service", True)}
    return sorted(models, key=lambda i: (str(models[i].get("created_at", "")), str(models[i].get("saved_at", "")),
                                         i), reverse=True)


def _sentence(text: str) -> str:
    """``text`` ending with one full stop (a message quoted inside another never ends in '..')."""
    text = str(text).strip()
    return text if text.endswith((".", "!", "?")) else text + "."


def _latest_refused(models_dir: Path, index: dict, model_id: str, older: list[str], exc: Exception) -> str:
    """Why ``latest`` stops at ``model_id`` (the newest model in service, which fails its check ``exc``), and how
    to go on: the newest older model in service that passes its checks is named for ``--model ID``, never used."""
    other = None
    for mid in older:
        try:
            _verify(models_dir, mid, index)
        except (ModelIntegrityError, ModelNotFoundError):
            continue
        other = mid
        break
    if other is not None:
        named = (f"or name another model explicitly with --model ID, e.g. --model {other} (in service before "
                 f"{model_id}; it passes its checks)")
    else:
        named = "no other model in service passes its checks" if older else "there is no other model in service"
    return (f"latest is {model_id}, the newest model in service, and it fails its integrity check: "
            f"{_sentence(exc)} It is not used, and no other model is used in its place. To go on: run "
            f"'linkage verify' to see every model's checks; restore the model's folder from a backup or train a "
            f"new model ('linkage train'); {named}.")


def no_model_text(models_dir, why: str, train: str | None = None) -> str:
    """What a command says when the models folder it looked in holds no model to use (``why``: "no model registry
    at", "no complete, verified model in"): the folder (and where it is, when given relative to the working
    folder), how to name another, and ``train``: a sentence on making one (default: train one). A user test read
    "train a model first" on a store of 4 lots, where training cannot work, and was not told of --models-dir."""
    folder = Path(models_dir)
    where = str(folder) if folder.is_absolute() else f"{folder} ({folder.resolve()})"
    train = f". {train}" if train else ", or train a model first ('linkage train')"
    return (f"{why} {where}: no model found in the models folder looked in. Give the folder that holds the models "
            f"with --models-dir DIR (or $LINKAGE_MODELS_DIR){train}")


def resolve(models_dir, model_id: str | None = "latest") -> Path:
    """Folder of a model, after the escape checks; ``latest`` (or None) is
    the newest model in service, refused (:class:`NoVerifiedModelError`) when
    its hashes do not verify."""
    return _resolve(models_dir, model_id)[0]


def _resolve(models_dir, model_id: str | None) -> tuple[Path, tuple | None]:
    """:func:`resolve`, also returning what :func:`_verify` gave for the model
    when resolving ``latest`` verified it (None for an id: not verified yet)."""
    models_dir = Path(models_dir)
    if not models_dir.is_dir():
        raise NoModelError(no_model_text(models_dir, "no model registry at"), models_dir, "no model registry at")
    if model_id in (None, "latest"):
        index = _read_index(models_dir)
        ordered = _ordered_ids(index)
        if not ordered:
            raise NoModelError(no_model_text(models_dir, "no complete, verified model in"), models_dir,
                               "no complete, verified model in")
        mid = ordered[0]
        try:
            checked = _verify(models_dir, mid, index)
        except (ModelIntegrityError, ModelNotFoundError) as exc:
            # never served in its place by an older model (a user test: a byte flipped in the new champion's
            # whatif.npz, and predict ran on the superseded champion with exit 0): exit code 4, saying how to go on
            raise NoVerifiedModelError(_latest_refused(models_dir, index, mid, ordered[1:], exc)) from None
        return models_dir / mid, checked
    model_id = _check_id(model_id, models_dir)
    path = _model_dir(models_dir, model_id)
    if not path.is_dir():
        avail = _available(models_dir)
        raise ModelNotFoundError(
            f"no model {model_id!r} in {models_dir}; available: {', '.join(avail) if avail else 'none'}")
    return path, None


def _checked(models_dir: Path, model_id: str | None) -> tuple[Path, dict, bytes, bytes | None]:
    """Folder, metadata, artifact bytes and what-if bytes of a model, each
    file read and hashed once."""
    path, checked = _resolve(models_dir, model_id)
    meta, data, whatif = checked or _verify(models_dir, path.name)
    return path, meta, data, whatif


# ---------------------------------------------------------------------------
# save, load, list, import
# ---------------------------------------------------------------------------
def _new_id(chain, index: dict, models_dir: Path) -> str:
    """``m-<time>-<hash>``: the time is the model's ``created_at`` (when training began and read its lots, the
    time ``models`` shows), in UTC to the second, so that the id and the listing name one time; now when a chain
    has no readable ``created_at``."""
    try:
        began = datetime.fromisoformat(str(chain.created_at))
    except ValueError:
        began = datetime.now(timezone.utc)
    began = began.replace(tzinfo=timezone.utc) if began.tzinfo is None else began.astimezone(timezone.utc)
    stamp = began.strftime("%Y%m%dT%H%M%SZ")  # one without an offset is UTC, as linkage records times
    basis = json.dumps({"created_at": chain.created_at, "table": chain.training.get("table_sha256"),
                        "chain": chain.chain.to_toml(), "seed": chain.seed, "pid": os.getpid(),
                        "saved_at": _now()}, sort_keys=True)
    digest = _sha256(basis.encode("utf-8"))
    for attempt in range(10_000):
        mid = f"m-{stamp}-{digest[:8]}"
        if mid not in index["models"] and not os.path.lexists(models_dir / mid):
            return mid
        digest = _sha256(f"{digest}:{attempt}".encode())
    raise RuntimeError("could not find a free model id")  # pragma: no cover


def _install(models_dir: Path, model_id: str, artifact: bytes, metadata: bytes, whatif: bytes | None = None) -> None:
    """Write a model folder atomically: temp folder, fsync, metadata last, rename."""
    tmp = models_dir / f"{TMP_PREFIX}{model_id}-{os.getpid()}"
    if os.path.lexists(tmp):
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        sha = _sha256(artifact)
        _write_file(tmp / ARTIFACT, artifact)
        _write_file(tmp / HASHFILE, f"{sha}  {ARTIFACT}\n".encode())
        if whatif is not None:
            _write_file(tmp / WHATIF, whatif)
        _write_file(tmp / METADATA, metadata)  # last: a folder with metadata has everything else
        _fsync_dir(tmp)
        os.rename(tmp, models_dir / model_id)
        _fsync_dir(models_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def save(chain, models_dir, *, in_service: bool = True) -> str:
    """Save a fitted chain; returns its new model id (``m-<UTC time>-<8 hex>``,
    unique even within one second). ``in_service=False`` keeps it in the
    registry without letting ``latest`` resolve to it (a challenger that was
    not promoted)."""
    import joblib

    from linkage.models import lean
    from linkage.models.fitted import FittedChain

    if not isinstance(chain, FittedChain):
        raise TypeError("save takes a FittedChain")
    models_dir = _registry_dir(models_dir)
    with _locked(models_dir):
        index = _read_index(models_dir)
        model_id = _new_id(chain, index, models_dir)
        previous = chain.model_id
        chain.model_id = model_id
        try:
            buf = io.BytesIO()
            joblib.dump(chain, buf)
            artifact = buf.getvalue()
            whatif = lean.to_npz_bytes(lean.export(chain))
            meta = chain.metadata()
            meta.update(artifact=ARTIFACT, artifact_sha256=_sha256(artifact), registry_format=FORMAT,
                        whatif_artifact=WHATIF, whatif_artifact_sha256=_sha256(whatif),
                        whatif_format=lean.FORMAT)
            meta_bytes = json.dumps(meta, indent=2, allow_nan=False, ensure_ascii=False).encode("utf-8")
            _install(models_dir, model_id, artifact, meta_bytes, whatif)
        except BaseException:
            chain.model_id = previous
            raise
        index["models"][model_id] = {
            "artifact_sha256": meta["artifact_sha256"],
            "metadata_sha256": _sha256(meta_bytes),
            "created_at": chain.created_at,
            "saved_at": _now(),
            "source": {"kind": "trained"},
            "in_service": bool(in_service),
        }
        index["format"] = FORMAT
        _write_index(models_dir, index)
    return model_id


def load(models_dir, model_id: str | None = "latest"):
    """Load a model after verifying it (see :func:`verify`)."""
    import joblib

    from linkage.models.fitted import FittedChain

    path, _, data, _ = _checked(Path(models_dir), model_id)
    chain = joblib.load(io.BytesIO(data))  # the bytes whose hash was just checked
    if not isinstance(chain, FittedChain) or chain.model_id != path.name:
        raise ModelIntegrityError(f"{path / ARTIFACT} does not hold the fitted chain {path.name}")
    return chain


def load_whatif(models_dir, model_id: str | None = "latest"):
    """The lean form of a model (:class:`linkage.models.lean.LeanChain`) for a
    what-if, after the same checks as :func:`load` and a check of
    ``whatif.npz`` against the SHA-256 its metadata records. Neither
    scikit-learn nor pandas is imported, and nothing is unpickled. A model
    saved before ``whatif.npz`` existed is loaded whole and converted."""
    from linkage.models import lean

    path, meta, _, data = _checked(Path(models_dir), model_id)  # the bytes whose hash was just checked
    if data is None:
        return lean.from_fitted(load(models_dir, path.name))
    chain = lean.from_npz_bytes(data)
    if chain.model_id != path.name:
        raise ModelIntegrityError(f"{path / WHATIF} does not hold the model {path.name}")
    training = meta.get("training") if isinstance(meta.get("training"), dict) else {}
    chain.training_lots = None if training.get("lots") is None else [str(lot) for lot in training["lots"]]
    return chain


def list_models(models_dir) -> list[dict]:
    """Every model folder and index entry with its status, newest first.

    status: ``ok``; ``changed`` (a hash does not match), ``missing`` (in the
    index, no folder), ``foreign`` (a folder not in the index), ``incomplete``
    (an interrupted save). ``latest`` marks the one ``latest`` resolves to
    (none when the champion fails its checks). ``in_service``: the model
    entered service (trained, promoted or imported) and was never withdrawn.
    ``role`` (:data:`ROLES`, :func:`roles`): which of them is the champion
    and which are superseded or challengers; None for a folder not in the
    index.
    """
    models_dir = Path(models_dir)
    if not models_dir.is_dir():
        return []
    index = _read_index(models_dir)
    rows: dict[str, dict] = {}
    for mid, entry in index["models"].items():
        row = {"model_id": mid, "created_at": entry.get("created_at"), "saved_at": entry.get("saved_at"),
               "source": entry.get("source"), "status": "ok", "detail": None, "latest": False,
               "in_service": bool(entry.get("in_service", True))}
        try:
            meta, _ = verify(models_dir, mid, index)
            row.update(_training_fields(meta),
                       targets={t: v.get("selected") for t, v in meta.get("targets", {}).items()},
                       coverage={t: v.get("coverage") for t, v in meta.get("targets", {}).items()},
                       nominal_coverage=meta.get("nominal_coverage"),
                       # None: a model saved before models recorded it (read as the default 30 min)
                       dissolution_time_min=meta.get("training", {}).get("dissolution_time_min"))
        except (ModelIntegrityError, ModelNotFoundError) as exc:
            row["status"] = "missing" if not (models_dir / mid).is_dir() else "changed"
            row["detail"] = str(exc)
            meta = _recorded_metadata(models_dir, mid, entry)  # lots and products of a model that fails its checks
            if meta is not None:
                row.update(_training_fields(meta))
        rows[mid] = row
    for p in sorted(models_dir.iterdir()):
        name = p.name
        if name in rows or name in (INDEX, LOCKFILE) or name.startswith(f"{INDEX}.tmp"):
            continue
        if name.startswith(TMP_PREFIX):
            rows[name] = {"model_id": name, "created_at": None, "saved_at": None, "source": None,
                          "status": "incomplete",
                          "detail": "an interrupted save; never loaded (safe to delete)", "latest": False,
                          "role": None}
        elif ID_RE.match(name) or (p.is_dir() and (p / METADATA).exists()):
            rows[name] = {"model_id": name, "created_at": None, "saved_at": None, "source": None,
                          "status": "foreign",
                          "detail": "not in the registry index; import it to use it", "latest": False,
                          "role": None}
    ordered = _ordered_ids(index)
    if ordered and rows[ordered[0]]["status"] == "ok":  # the champion failing its checks leaves no model latest
        rows[ordered[0]]["latest"] = True
    for mid, role in roles(index).items():
        rows[mid]["role"] = role
    return sorted(rows.values(), key=lambda r: (str(r["created_at"] or ""), str(r.get("saved_at") or ""),
                                                r["model_id"]), reverse=True)


def _training_fields(meta: dict) -> dict:
    """What ``linkage models`` shows of a model's training lots: ``n_lots``, ``products`` (each product with
    ``n_lots``; ``product`` null for lots without a product name, :func:`linkage.products.training_counts`) and
    ``mixed_products`` (lots of several products, or of one and lots without one: :func:`linkage.products.is_mixed`)."""
    from linkage.products import is_mixed, training_counts

    training = meta.get("training") if isinstance(meta.get("training"), dict) else {}
    counts = training_counts(training)
    return {"n_lots": training.get("n_lots"), "products": [{"product": p, "n_lots": n} for p, n in counts],
            "mixed_products": is_mixed(counts)}


def _recorded_metadata(models_dir: Path, model_id: str, entry: dict) -> dict | None:
    """The metadata of a model that fails its integrity check, read as JSON (never unpickled) when the file
    still matches the SHA-256 the index recorded for it (the artifact or the what-if file is what failed);
    None when it does not, is missing or is no JSON: a changed metadata file says nothing to trust."""
    path = models_dir / model_id / METADATA
    try:
        data = _read_plain(path, "metadata file")
    except (ModelIntegrityError, OSError):
        return None
    if _sha256(data) != entry.get("metadata_sha256"):
        return None
    try:
        meta = json.loads(data)
    except (json.JSONDecodeError, UnicodeDecodeError):
        return None
    return meta if isinstance(meta, dict) else None


#: a model's role in the registry (``linkage models``: ``role``), with what it means
ROLES = {
    "champion": "the newest model in service: what latest resolves to (refused, never replaced, when it fails "
                "its checks)",
    "superseded": "in service before a newer champion; used only when named with --model ID",
    "not promoted": "a challenger that retrain kept but did not promote; used only when named with --model ID",
    "decision pending": "a challenger whose retrain decision was left half-made; the next retrain settles it",
    "decision abandoned": "a challenger whose promotion was abandoned (its audit row could not be written)",
}


def roles(index: dict) -> dict[str, str]:
    """Model id -> its role (a key of :data:`ROLES`) for every model of the index: the newest in service is the
    champion, the other models in service are superseded; a model not in service is a challenger, named by the
    last decision that names it."""
    ordered = _ordered_ids(index)
    out = {mid: ("champion" if i == 0 else "superseded") for i, mid in enumerate(ordered)}
    last = {d.get("challenger_id"): d for d in index.get("decisions", []) if isinstance(d, dict)}
    for mid in index["models"]:
        if mid not in out:
            state = (last.get(mid) or {}).get("state")
            out[mid] = {PENDING: "decision pending", ABANDONED: "decision abandoned"}.get(state, "not promoted")
    return out


def import_model(src_dir, models_dir, source_note: str) -> str:
    """Bring a model folder from elsewhere into the registry, recording where
    it came from. The artifact must match the SHA-256 in its own metadata;
    nothing is unpickled. A foreign folder already inside the registry is
    registered in place. Returns the model id."""
    if not isinstance(source_note, str) or not source_note.strip():
        raise UsageError("say where the model comes from (a non-empty source note) to import it")
    src = Path(src_dir)
    models_dir = Path(models_dir)
    if not src.is_dir():
        raise ModelNotFoundError(f"no model folder at {src}")
    meta_bytes = _read_plain(src / METADATA, "metadata file")
    try:
        meta = json.loads(meta_bytes)
    except json.JSONDecodeError as exc:
        raise ModelIntegrityError(f"{src / METADATA} is not JSON ({exc}); not imported") from None
    model_id = meta.get("model_id") if isinstance(meta, dict) else None
    if not isinstance(model_id, str) or not ID_RE.match(model_id):
        raise ModelIntegrityError(f"{src / METADATA} names no valid model id ({model_id!r}); not imported")
    artifact = _read_plain(src / ARTIFACT, "model artifact")
    if _sha256(artifact) != meta.get("artifact_sha256"):
        raise ModelIntegrityError(
            f"{src / ARTIFACT} does not match the SHA-256 in its own metadata; it was changed. Not imported.")
    whatif = None
    if meta.get("whatif_artifact_sha256") is not None:
        whatif = _read_plain(src / WHATIF, "what-if file")
        if _sha256(whatif) != meta["whatif_artifact_sha256"]:
            raise ModelIntegrityError(
                f"{src / WHATIF} does not match the SHA-256 in its own metadata; it was changed. Not imported.")
    models_dir = _registry_dir(models_dir)
    with _locked(models_dir):
        index = _read_index(models_dir)
        if model_id in index["models"]:
            raise UsageError(f"model {model_id} is already in the registry {models_dir}")
        dest = models_dir / model_id
        in_place = os.path.lexists(dest)
        if in_place:
            if src.resolve() != _model_dir(models_dir, model_id).resolve():
                raise UsageError(f"{dest} already exists and is not {src}; not imported")
        else:
            _install(models_dir, model_id, artifact, meta_bytes, whatif)
        index["models"][model_id] = {
            "artifact_sha256": meta["artifact_sha256"],
            "metadata_sha256": _sha256(meta_bytes),
            "created_at": meta.get("created_at"),
            "saved_at": _now(),
            "source": {"kind": "imported", "from": str(src.resolve()), "note": source_note.strip(),
                       "in_place": in_place},
        }
        index["format"] = FORMAT
        _write_index(models_dir, index)
    return model_id


def record_decision(models_dir, decision: dict) -> None:
    """Append a retraining decision (JSON-safe dict) to the index, with the
    time it was recorded, in effect at once. Decisions are never rewritten."""
    models_dir = Path(models_dir)
    with _locked(models_dir):
        index = _read_index(models_dir)
        entry = {"recorded_at": _now(), **decision}
        index.setdefault("decisions", []).append(json.loads(json.dumps(entry, allow_nan=False)))
        _write_index(models_dir, index)


# A lifecycle decision (retrain, promote) touches two records, the registry and the lot store's audit trail,
# which no single transaction spans. It is made in two phases, the lot store's commit being the decision:
#   1. begin_decision: the decision enters the index as "pending"; nothing enters service;
#   2. the caller writes the audit row, carrying the decision's id, in one store transaction;
#   3. settle_decision: in one index write (one atomic rename) the decision becomes "in effect" and a promoted
#      challenger enters service; or "abandoned" when step 2 failed (store busy), and nothing enters service.
# A process killed between the steps leaves a pending decision and the previous champion in service;
# settle_pending (run by retrain and verify) settles it by the store: in effect if its audit row exists,
# abandoned if not. This is the presumed-abort rule of two-phase commit (Gray & Reuter 1993, "Transaction
# Processing: Concepts and Techniques", ch. 10), with the lot store as the coordinator's log.

PENDING, IN_EFFECT, ABANDONED = "pending", "in effect", "abandoned"


def record_result(models_dir, model_id: str, name: str, data: bytes, *, write=None, prune=None) -> None:
    """Record in the index the SHA-256 of a result file kept beside the model
    (:mod:`linkage.models.reuse`), so that it is held to the same check as the
    model's own files: a result whose bytes differ from the index's record is
    not reused. ``write()``, when given, writes the file under the same lock
    as its record (two reports storing at once never leave one's record over
    the other's bytes); ``prune()``, when given, is called next under that
    lock and returns the names of result files it removed, whose records go."""
    models_dir = Path(models_dir)
    with _locked(models_dir):
        index = _read_index(models_dir)
        entry = index["models"].get(model_id)
        if entry is None:
            raise ModelNotFoundError(f"no model {model_id} in the registry {models_dir}")
        if write is not None:
            write()
        results = entry.setdefault("results", {})
        results[name] = _sha256(data)
        for gone in (prune() if prune is not None else []):
            results.pop(gone, None)
        _write_index(models_dir, index)


def recorded_artifact_sha256(models_dir, model_id: str) -> str | None:
    """The SHA-256 of ``model_id``'s artifact as the registry index recorded it when the model was saved,
    or None (no such model in the index). Reads the index only: the artifact is not read or hashed
    again (:func:`load` and :func:`verify` check the artifact against this record)."""
    entry = _read_index(Path(models_dir))["models"].get(model_id)
    return entry.get("artifact_sha256") if isinstance(entry, dict) else None


def result_intact(models_dir, model_id: str, name: str, data: bytes) -> bool:
    """Whether ``data`` are the bytes of a result file whose SHA-256 the index recorded (:func:`record_result`)."""
    entry = _read_index(Path(models_dir))["models"].get(model_id) or {}
    return (entry.get("results") or {}).get(name) == _sha256(data)


def begin_decision(models_dir, decision: dict) -> str:
    """Phase 1: record ``decision`` as pending; returns its id (a random hex string)."""
    import uuid

    models_dir = Path(models_dir)
    decision_id = uuid.uuid4().hex
    with _locked(models_dir):
        index = _read_index(models_dir)
        entry = {"decision_id": decision_id, "state": PENDING, "recorded_at": _now(), **decision}
        index.setdefault("decisions", []).append(json.loads(json.dumps(entry, allow_nan=False)))
        _write_index(models_dir, index)
    return decision_id


def settle_decision(models_dir, decision_id: str, *, recorded: bool) -> str:
    """Phase 3: put a pending decision in effect (``recorded``: its audit row was committed), promoting its
    challenger if the decision promoted it, or abandon it. One index write. Returns the new state."""
    models_dir = Path(models_dir)
    with _locked(models_dir):
        index = _read_index(models_dir)
        entry = next((d for d in index.get("decisions", []) if d.get("decision_id") == decision_id), None)
        if entry is None:
            raise ModelNotFoundError(f"no decision {decision_id} in the registry {models_dir}")
        if entry.get("state") != PENDING:
            return entry["state"]
        entry["state"] = IN_EFFECT if recorded else ABANDONED
        entry["settled_at"] = _now()
        challenger = index["models"].get(entry.get("challenger_id"))
        if recorded and entry.get("promoted") and challenger is not None:
            challenger["in_service"] = True
        _write_index(models_dir, index)
        return entry["state"]


def pending_decisions(models_dir) -> list[dict]:
    """Decisions begun and not settled (a process killed between the phases)."""
    return [d for d in decisions(models_dir) if d.get("state") == PENDING]


def decisions(models_dir) -> list[dict]:
    """Every retraining decision recorded in the registry, oldest first."""
    models_dir = Path(models_dir)
    if not models_dir.is_dir():
        return []
    return list(_read_index(models_dir).get("decisions", []))
