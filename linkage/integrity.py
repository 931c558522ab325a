"""``linkage verify``: check the whole record, the lot store and the model registry, and say what was checked."""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

from linkage.exceptions import (ModelIntegrityError, ModelNotFoundError, StoreCaution, StoreIntegrityError,
                                UsageError)


@dataclass
class VerifyResult:
    """What was checked, and every mismatch found (empty when the record is whole)."""

    store: str | None
    models_dir: str | None
    store_counts: dict = field(default_factory=dict)
    models_checked: int = 0
    store_problems: list[str] = field(default_factory=list)
    model_problems: list[str] = field(default_factory=list)
    #: folders in the registry's folder that its index does not hold (never loaded; not an integrity failure)
    models_unregistered: list[str] = field(default_factory=list)
    #: why the registry was not checked (None when it was)
    models_not_checked: str | None = None
    #: what the check of the store could not cover (e.g. no anchor file: the removal of the newest records)
    store_cautions: list[str] = field(default_factory=list)
    #: the re-anchoring made (``--reanchor``; :meth:`linkage.store.LotStore.reanchor`'s answer), else None
    reanchored: dict | None = None

    @property
    def ok(self) -> bool:
        return not self.store_problems and not self.model_problems

    def to_dict(self) -> dict:
        return {"ok": self.ok, "store": self.store, "models_dir": self.models_dir, "store_checked": self.store_counts,
                "models_checked": self.models_checked, "store_problems": self.store_problems,
                "model_problems": self.model_problems, "models_unregistered": self.models_unregistered,
                "models_not_checked": self.models_not_checked, "store_cautions": self.store_cautions,
                "reanchored": self.reanchored}

    def __repr__(self) -> str:
        verdict = "whole" if self.ok else f"{len(self.store_problems) + len(self.model_problems)} problem(s)"
        return f"VerifyResult({verdict}; store {self.store}, {self.models_checked} model(s))"


def not_a_registry(models_dir: Path) -> str | None:
    """Why ``models_dir`` is not a model registry (no such folder; a folder without the registry's index and
    without model folders), or None when it is one. A folder that holds model folders but no index is a
    registry whose index is gone: it is checked, and its folders are listed as not registered."""
    from linkage.models import registry

    path = Path(models_dir)
    if not path.is_dir():
        return "no such folder" if not path.exists() else "not a folder"
    if (path / registry.INDEX).exists() or _unregistered(path, set()):
        return None
    return f"a folder without {registry.INDEX} and without model folders"


def _unregistered(models_dir: Path, registered: set[str]) -> list[str]:
    """Folders in the registry's folder that are not in its index (hidden ones are the registry's own: an
    interrupted save's ``.tmp-*``, which ``linkage models`` lists as incomplete)."""
    return sorted(p.name for p in models_dir.iterdir()
                  if p.is_dir() and not p.name.startswith(".") and p.name not in registered)


def verify_record(store: Path | None, models_dir: Path | None, *, registry_required: bool = True,
                  reanchor_reason: str | None = None) -> VerifyResult:
    """Check every seal, record and raw row of the store (:meth:`LotStore.check_seals` with ``full``) and every
    model of the registry against its recorded hashes (:func:`linkage.models.registry.verify`), and list the
    folders of the registry that its index does not hold.

    With ``reanchor_reason`` (``linkage verify --reanchor --reason TEXT``), a store with seals but no anchor
    file is anchored again when its check finds nothing (:meth:`LotStore.reanchor`: an audit entry
    ``reanchor`` records who, when, why and the newest seal the check found); ``reanchored`` says what was done. A
    store that fails its check is not anchored again; one whose anchor file is there is refused
    (:class:`~linkage.exceptions.UsageError`, exit code 2) before anything is checked.

    A ``models_dir`` that is not a registry (:func:`not_a_registry`) is refused with
    :class:`~linkage.exceptions.ModelNotFoundError` (exit code 2) before anything is checked, as every command
    that reads models refuses it; with ``registry_required=False`` (``linkage verify`` without
    ``--models-dir``: the default folder) the store alone is checked and ``models_not_checked`` says why."""
    from contextlib import ExitStack

    from linkage.store import REANCHOR_NEEDS_REASON, LotStore, given_reason, open_to_read

    if reanchor_reason is not None and given_reason(reanchor_reason) is None:
        raise UsageError(REANCHOR_NEEDS_REASON)
    result = VerifyResult(None if store is None else str(store), None if models_dir is None else str(models_dir))
    reason = None if models_dir is None else not_a_registry(models_dir)
    if reason is not None:
        if registry_required:
            raise ModelNotFoundError(f"no model registry at {models_dir} ({reason}); point --models-dir (or "
                                     "LINKAGE_MODELS_DIR) at the registry, or train a model first ('linkage train')")
        result.models_not_checked = reason
    if store is not None and reanchor_reason is not None:  # refused without a write (an older store: no upgrade)
        with warnings.catch_warnings(), ExitStack() as stack:
            warnings.simplefilter("ignore", StoreCaution)
            probe = open_to_read(stack, store)
            if probe.unanchored is None:
                raise UsageError(probe.nothing_to_reanchor())
    if store is not None:
        try:
            with ExitStack() as stack:
                with warnings.catch_warnings():  # verify says what the check could not cover in store_cautions
                    warnings.simplefilter("ignore", StoreCaution)
                    # verify records nothing (unless --reanchor): an older store is checked as it is, not upgraded
                    lot_store = (stack.enter_context(LotStore(store, create=False)) if reanchor_reason is not None
                                 else open_to_read(stack, store))
                if reanchor_reason is not None and lot_store.unanchored is None:
                    raise UsageError(lot_store.nothing_to_reanchor())
                result.store_counts = lot_store.check_seals(full=True)
                result.store_cautions = _anchor_cautions(Path(store), result.store_counts)
                if lot_store.from_copy:  # schema 1: no seals of its own; say what was and was not checked
                    result.store_counts = _unsealed_counts(result.store_counts)
                    result.store_cautions = [_unsealed_caution(Path(store), lot_store.older_schema,
                                                               result.store_counts)]
                elif lot_store.older_schema is not None:
                    result.store_cautions += lot_store.cautions()[-1:]
                if reanchor_reason is not None:
                    result.reanchored = lot_store.reanchor(reanchor_reason, checked=result.store_counts)
                    # the anchor file is there now: the caution of the check before no longer holds
                    result.store_cautions = _anchor_cautions(Path(store), result.store_counts)
        except StoreIntegrityError as exc:
            result.store_problems = [line.strip().removeprefix("- ") for line in str(exc).splitlines()[1:]] or [
                str(exc)]
    if models_dir is not None and reason is None:
        from linkage.models import registry

        try:
            index = registry._read_index(Path(models_dir))
        except ModelIntegrityError as exc:
            result.model_problems.append(str(exc))
            return result
        result.models_unregistered = _unregistered(Path(models_dir), set(index["models"]))
        for model_id in sorted(index["models"]):
            result.models_checked += 1
            try:
                registry.verify(models_dir, model_id, index)
            except LookupError as exc:
                result.model_problems.append(f"{model_id}: {exc}")
            except ModelIntegrityError as exc:
                result.model_problems.append(f"{model_id}: {exc}")
    return result


#: what a check of a store with no seals of its own (schema 1, checked on an upgraded copy whose seals were made
#: from the records as they stand) did not check against anything: the counts said as 0
NOT_CHECKED_UNSEALED = ("seals", "audit entries", "predictions", "ingests")


#: the singular of each count ``verify`` names (its --json keys stay as they are: plural)
_ONE = {"seals": "seal", "audit entries": "audit entry", "predictions": "prediction", "ingests": "ingest",
        "lot tables": "lot table", "raw rows": "raw row", "models": "model"}


def counted(n: int, what: str) -> str:
    """``n`` things as the verify text says them: '1 prediction', '0 predictions', '2 audit entries' (``what``: the
    plural, as the store's counts are keyed; a word without a singular here stays as it is)."""
    return f"{n} {_ONE.get(what, what) if n == 1 else what}"


def _unsealed_counts(counts: dict) -> dict:
    """The counts of a check of a schema 1 store made on its upgraded copy (:func:`linkage.store.upgraded_copy`):
    the seals, audit entries, predictions and ingests were sealed by the copy's upgrade from what they are now, so
    their check proves nothing and they are counted 0, and there is no newest seal; what was checked for real
    stays: SQLite's integrity_check and each lot table's content hash (recorded at its ingest) against its raw rows
    ("lot tables", "raw rows")."""
    out = {k: (0 if k in NOT_CHECKED_UNSEALED else v) for k, v in counts.items()}
    out["newest seal"] = {"id": None, "sha256": None}
    return out


def _unsealed_caution(store: Path, version: int, counts: dict) -> str:
    """What ``verify`` could and could not check of a store written before seals (schema 1)."""
    from linkage.store import NEXT_RECORD_UPGRADES

    return (f"{store} was written by an earlier linkage (store schema {version}, before seals) and holds no seals "
            "and no anchor: its ingests, audit entries and recorded predictions could not be checked against "
            "seals, nor the removal or rewriting of records ruled out. Checked: SQLite's integrity_check of its "
            "pages (as SQLite's backup copied them), and each lot table's content hash, recorded at its ingest, "
            f"against its raw rows ({counted(counts.get('lot tables', 0), 'lot tables')}, "
            f"{counted(counts.get('raw rows', 0), 'raw rows')}). Checked on an "
            "upgraded temporary copy; the store itself was not upgraded nor changed (an earlier linkage still reads "
            f"it); {NEXT_RECORD_UPGRADES} and seals its records as they then stand")


def _anchor_cautions(store: Path, counts: dict) -> list[str]:
    """A store with seals but no anchor file beside it (``<store>.seal``, :mod:`linkage.seal`): the removal of
    its newest records cannot be told from the store alone. Not a mismatch (a store copied without its anchor
    reads the same), so said as a caution rather than a failure (a second user test deleted the anchor and the
    newest records, and verify said everything matched)."""
    from linkage.seal import read_anchor, unanchored_caution

    newest = (counts or {}).get("newest seal") or {}
    if read_anchor(store) is not None or not newest.get("id"):
        return []
    return [unanchored_caution(store, newest.get("id"), newest.get("sha256"))]
