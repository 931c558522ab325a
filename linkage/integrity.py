"""``linkage verify``: check the whole record, the lot store and the model registry, and say what was checked."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from linkage.exceptions import ModelIntegrityError, StoreIntegrityError


@dataclass
class VerifyResult:
    """What was checked, and every mismatch found (empty when the record is whole)."""

    store: str | None
    models_dir: str | None
    store_counts: dict = field(default_factory=dict)
    models_checked: int = 0
    store_problems: list[str] = field(default_factory=list)
    model_problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.store_problems and not self.model_problems

    def to_dict(self) -> dict:
        return {"ok": self.ok, "store": self.store, "models_dir": self.models_dir, "store_checked": self.store_counts,
                "models_checked": self.models_checked, "store_problems": self.store_problems,
                "model_problems": self.model_problems}

    def __repr__(self) -> str:
        verdict = "whole" if self.ok else f"{len(self.store_problems) + len(self.model_problems)} problem(s)"
        return f"VerifyResult({verdict}; store {self.store}, {self.models_checked} model(s))"


def verify_record(store: Path | None, models_dir: Path | None) -> VerifyResult:
    """Check every seal, record and raw row of the store (:meth:`LotStore.check_seals` with ``full``) and every
    model of the registry against its recorded hashes (:func:`linkage.models.registry.verify`)."""
    from linkage.store import LotStore

    result = VerifyResult(None if store is None else str(store), None if models_dir is None else str(models_dir))
    if store is not None:
        try:
            with LotStore(store, create=False) as lot_store:
                result.store_counts = lot_store.check_seals(full=True)
        except StoreIntegrityError as exc:
            result.store_problems = [line.strip().removeprefix("- ") for line in str(exc).splitlines()[1:]] or [
                str(exc)]
    if models_dir is not None and Path(models_dir).is_dir():
        from linkage.models import registry

        try:
            index = registry._read_index(Path(models_dir))
        except ModelIntegrityError as exc:
            result.model_problems.append(str(exc))
            return result
        for model_id in sorted(index["models"]):
            result.models_checked += 1
            try:
                registry.verify(models_dir, model_id, index)
            except LookupError as exc:
                result.model_problems.append(f"{model_id}: {exc}")
            except ModelIntegrityError as exc:
                result.model_problems.append(f"{model_id}: {exc}")
    return result
