"""The Python API: the whole job in a few calls, each writing the same records
as the command of the same name.

>>> import linkage
>>> lab = linkage.Workspace("site.db", models_dir="models")      # doctest: +SKIP
>>> lab.ingest("lab_exports/june")                                # doctest: +SKIP
>>> trained = lab.train()                                         # doctest: +SKIP
>>> window = lab.window("spec.toml", settings={"roll_gap_mm": 2.5})  # doctest: +SKIP

The functions here take the lot store (``store``) and the model registry
(``models_dir``) as arguments; :class:`Workspace` holds both and passes them
on. The commands (``linkage ingest``, ``train``, ...) call these functions
and print what they return, so a Python caller and a command leave the same
entries in the store's audit trail:

=================  ===================================================  ==============================
call               what it does                                         recorded in the store
=================  ===================================================  ==============================
:func:`ingest`     check a folder of lab exports, add it in one          ``ingest`` (by the store)
                   transaction
:func:`assemble`   one row per lot with the derived quantities           —
:func:`train`      fit the chain under grouped CV, register the model    ``train``
:func:`window`     the ribbon porosity window under a spec               ``window`` (not with
                                                                         ``record=False``)
:func:`whatif`     one what-if through the chain (:func:`whatif_rows`:   ``predict`` and the prediction
                   one per row)                                          (not with ``record=False``)
:func:`report`     the self-contained HTML report                        —
:func:`watch`      the drift watch                                       ``watch``
:func:`running`    guidance for a lot in progress from its at-line       ``running``
                   samples
:func:`plan`       the next lots: a new product's starting design, or    ``plan`` (a campaign's, when
                   the lots that narrow a campaign's window              the store exists)
:func:`space`      the map over two settings and the acceptable ranges   —
:func:`retrain`    a challenger, promoted only by the rule               ``retrain`` or ``promote``
:func:`audit`      the audit trail, as a DataFrame                       —
:func:`set_aside`  leave lots out of fitting and judging, with a reason  ``set-aside`` per lot
:func:`restore`    put set-aside lots back in use, with a reason         ``restore`` per lot
=================  ===================================================  ==============================

:func:`window`, :func:`whatif` and :func:`whatif_rows` refuse a ``store`` that
does not exist (``StorePathError``, exit code 2, nothing written) unless it is
the default ``linkage.db`` (then they run, not recorded) or ``record=False``
(``--no-record``: nothing is written in the store, which is still read where
the call reads it).

A spec is a :class:`~linkage.spec.Spec` or the path of a ``spec.toml``; a
model is a model id, ``"latest"`` (the newest model in service), or the
:class:`~linkage.results.Trained` that :func:`train` returned. Errors are the
library's (:mod:`linkage.exceptions`): bad input raises ``InputError``,
``SpecError`` or ``UsageError`` naming every problem, and nothing is written.
A call that records in a store holding seals but no anchor file is refused
(``StoreIntegrityError``) before its work: see :mod:`linkage.seal`.

This module imports neither pandas nor scikit-learn until a call needs them:
a what-if (``linkage predict``) runs on numpy alone.
"""

from __future__ import annotations

import contextlib
import functools
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Iterable, Mapping

from linkage.decide import defaults
from linkage.exceptions import LinkageError, StoreError, StoreIntegrityError
from linkage.report.kept import source_stamp
from linkage.results import Ingested, Retrained, Trained, Watched, WhatIfResult, Window
from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN, DEFAULT_FINES_CUTOFF_UM

#: linkage's source files as they were when this module was imported (:func:`linkage.report.kept.source_stamp`):
#: a report keeps or reuses figures only while the files on disk are still the code running
SOURCE_STAMP = source_stamp()
#: draws of each probability curve of the report (render_report's ``curve_draws``; part of the figures' key)
REPORT_CURVE_DRAWS = 400

if TYPE_CHECKING:
    import pandas as pd

    from linkage.models.chain import ChainSpec
    from linkage.models.fitted import FittedChain
    from linkage.spec import Spec

__all__ = ["Workspace", "ingest", "assemble", "train", "window", "whatif", "whatif_rows", "report", "watch",
           "retrain", "audit", "models", "record", "record_entry", "recording", "refuse_unanchored", "running",
           "transfer", "plan", "space", "set_aside", "restore"]

#: a progress callback: ``progress(label, done, total)``
Progress = Callable[[str, int, int], None]
DEFAULT_STORE = "linkage.db"
DEFAULT_MODELS_DIR = "models"


def _spec(spec) -> Spec | None:
    """A Spec as given, or read from a path."""
    if spec is None:
        return None
    from linkage.spec import Spec, read_spec

    return spec if isinstance(spec, Spec) else read_spec(Path(spec))


def _fitted(models_dir, model) -> FittedChain:
    """The fitted chain of ``model``: an id or "latest" (loaded from the
    registry, its hashes checked), a :class:`Trained`, or a fitted chain."""
    if model is None or isinstance(model, str):
        from linkage.models.registry import load

        return load(models_dir, model)
    return model.chain if isinstance(model, Trained) else model


def _check_settings(chain, settings: Mapping[str, float], more: list[str] = (),
                    refused: Mapping[str, str] | None = None) -> None:
    """Refuse ``--set`` values as ``predict`` refuses them
    (:func:`linkage.decide.whatif.check_values`: unknown names, values that
    are not finite or outside the physically possible range), with the
    problems in ``more`` (values that are no number, :func:`_given_settings`),
    every problem at once, exit code 2, before anything is computed or written.
    ``refused``: names the command does not take, with the rule (the window's
    :data:`linkage.decide.window.SCANNED`), left out of the valid names it lists."""
    from linkage.decide.whatif import check_values

    check_values(chain, dict(settings), more=list(more), refused=refused)


def _not_held_by_map(chain, x: str, y: str) -> dict[str, str]:
    """The names the map's ``--set`` does not take, with the rule: the two it maps and every predicted
    attribute (the map holds settings only; :func:`linkage.decide.space.design_space` refuses them too).
    ``chain``: the model's numbers or a fitted chain (a model object given to :func:`space`)."""
    from linkage.models.lean import as_lean

    lean = as_lean(chain)
    roots = set(lean.root_inputs())
    refused = {name: "is predicted, not a setting; the map holds settings only" for name in lean.all_targets()
               if name not in roots}
    refused.update({name: "is mapped; do not also give it with --set" for name in (x, y)})
    return refused


def _given_settings(settings: Mapping | None) -> tuple[dict[str, float], list[str]]:
    """``--set`` values as floats, and a problem for each that is no number (a text kept by
    ``parse_assignments(keep_text=True)``), to be reported with the model's checks (:func:`_check_settings`)."""
    return _whatif_numbers(dict(settings or {}))


def _time_and_q(spec: Spec | None, dissolution_time_min: float | None) -> dict:
    """The dissolution time point and Q to assemble with: the spec's, unless
    a time point is given."""
    if dissolution_time_min is None:
        dissolution_time_min = spec.dissolution_time_min if spec is not None else DEFAULT_DISSOLUTION_TIME_MIN
    q = spec.limits["dissolution_pct"].min if spec is not None and "dissolution_pct" in spec.limits else None
    return {"dissolution_time_min": dissolution_time_min, "dissolution_q_pct": q}


def _train_time_and_q(spec: Spec | None, given: float | None) -> dict:
    """The dissolution time point a model is trained at, and Q: the spec's
    time point when it sets a dissolution limit, else ``given``, else 30 min.
    A given time point that contradicts the spec's is refused."""
    from linkage.exceptions import UsageError
    from linkage.timepoint import spec_time_point

    from_spec = spec_time_point(spec)
    if from_spec is not None and given is not None and abs(from_spec - float(given)) > 1e-9:
        raise UsageError(f"--dissolution-time {float(given):g} contradicts the spec's [dissolution_pct] time_min = "
                         f"{from_spec:g}; give one of them")
    time_min = from_spec if from_spec is not None else given if given is not None else DEFAULT_DISSOLUTION_TIME_MIN
    q = spec.limits["dissolution_pct"].min if spec is not None and "dissolution_pct" in spec.limits else None
    return {"dissolution_time_min": float(time_min), "dissolution_q_pct": q}


def record_entry(store, action: str, *, model_id: str | None, inputs, outputs, lot: str | None = None,
                 prediction: bool = False) -> bool:
    """Append an entry to the store's audit trail (and, for a what-if, keep
    the prediction) when the store exists. Returns whether it was recorded:
    no store, no record (a what-if may be asked with no store at all). The actions of the store's own
    decisions (set-aside, restore, reanchor, ingest) are refused (``UsageError``, nothing written): their
    commands record them, under their rules."""
    from linkage.store import LotStore, reserved_action_refusal

    refusal = reserved_action_refusal(action)
    if refusal is not None:
        from linkage.exceptions import UsageError

        raise UsageError(refusal)
    if store is None or not Path(store).exists():
        return False

    with LotStore(store, create=False, for_writing=True) as s:
        if prediction:
            s.record_prediction(model_id, inputs, outputs, lot=lot)
        s.log(action, lot=lot, model_id=model_id, inputs=inputs, outputs=outputs)
    return True


#: :func:`record_entry` under its first name (in ``__all__`` since the API began; the calls whose keyword
#: ``record`` hides this name use :func:`record_entry`)
record = record_entry
_record_entry = record_entry  # kept for scripts written before its public name


def recording(store, record: bool | None, action: str) -> bool:
    """Whether a ``window`` or ``predict`` (``action``) goes into ``store``'s audit trail, decided before any
    work so that a mistyped store refuses the call instead of losing its record, nothing written:

    - ``record=False`` (``--no-record``): nothing is written in the store; it is still read where the call
      reads it (the stored spelling of a ``lot``);
    - ``record=True``: recorded; a store that does not exist is refused (``StorePathError``, exit code 2).
      The commands pass it when ``--store`` or ``$LINKAGE_STORE`` names the store;
    - ``record=None`` (the default): recorded, and a store that does not exist is refused, except the default
      ``linkage.db`` (what a command without ``--store`` uses): without it the call runs, not recorded
      (``recorded`` False; the command says so on stderr). ``store=None`` is no store: nothing recorded.

    A store that will be recorded in but holds seals without its anchor file is refused here too
    (:func:`refuse_unanchored`, exit code 6): its record would be refused at the end, after the work."""
    if record is False:
        return False
    if store is None:
        if record:
            from linkage.exceptions import UsageError

            raise UsageError(f"record=True needs a lot store to record this {action} in; give store=, or "
                             "record=False")
        return False
    if Path(store).exists():
        refuse_unanchored(store)
        return True
    if record is None and Path(store) == Path(DEFAULT_STORE):
        return False
    from linkage.exceptions import StorePathError

    raise StorePathError(f"no lot store at {store}: this {action} would not be recorded in an audit trail, so it "
                         "is refused and nothing was written. Point --store (or LINKAGE_STORE) at the lot store "
                         "(`linkage ingest FOLDER` creates one), or give --no-record (Python: record=False) to "
                         f"run this {action} without recording it")


def refuse_unanchored(store) -> None:
    """Before the work of a call that records in the store at its end (:func:`record`): a store that holds
    seals but no anchor file refuses every write (:func:`linkage.store.refuse_unanchored`, exit code 6), so
    it is refused here, before any work is done or any file written."""
    from linkage.store import refuse_unanchored as refuse

    refuse(store)


# kept for scripts written before the public names (DEVELOPERS.md named ``_recording``)
_recording = recording
_refuse_unanchored = refuse_unanchored


# --------------------------------------------------------------------------- the store


def ingest(folder, store=DEFAULT_STORE, *, reason: str | None = None, accept_unusual: bool = False,
           preview: bool = False) -> Ingested:
    """Check every file in ``folder`` and add its lots to the lot store at
    ``store`` (created on the first valid ingest) in one transaction. Every
    problem of the folder is raised at once (``InputError``), and then
    nothing is written. A stored lot the folder adds to or changes gets a
    new revision. One that only adds (a table, rows with new keys, blank
    cells filled: results in stages) needs no ``reason``; one that changes
    or removes a stored value needs one (a deviation or correction number),
    recorded with the revision. The result says which lots were added to
    (``lots_added_to``) and which changed (``lots_changed``). A value far
    from the product's recent lots (a likely unit mistake, see
    :mod:`linkage.plausible`), or one no measurement of its kind holds
    (sieve apertures below the smallest test sieve's: a stack in mm), is
    refused unless ``accept_unusual`` (with a ``reason``). The store logs
    the ingest in its audit trail.

    ``preview``: what this ingest would do, writing nothing (see
    :func:`_preview_ingest`): the same checks and refusals, raised alike,
    and a result with ``preview`` True, no ``ingest_id`` and the revised
    lots' differences (``result.changes``)."""
    from linkage.exceptions import UsageError
    from linkage.store import ACCEPT_NEEDS_REASON, EmptyStoreFile, LotStore, given_reason, open_to_record

    if accept_unusual and given_reason(reason) is None:
        raise UsageError(ACCEPT_NEEDS_REASON)  # before a first ingest creates the store
    folder, store = Path(folder), Path(store)
    exists = store.exists() and store.stat().st_size > 0  # an empty file is what a killed first ingest leaves
    if preview:
        return _preview_ingest(folder, store, exists, reason=reason, accept_unusual=accept_unusual)
    known: list[str] = []
    with contextlib.ExitStack() as stack:
        # a store without its anchor: refused; one of an earlier schema read as it is, not upgraded (open_to_record);
        # an SQLite file without a table: no store yet, made in it below once the folder is read
        try:
            existing = open_to_record(stack, store) if exists else None
        except EmptyStoreFile:
            existing = None
        known = [] if existing is None else existing.lot_ids()
        # the store is created only for valid input; values refused without history (a sieve stack in mm) are
        # refused here, before it is, unless taken deliberately
        checked = _read_folder_beside(folder, existing, known, accept_unusual)
        if existing is not None and existing.older_schema is not None:
            # a store written by an earlier linkage: the ingest decided on it as it is, by its own plan (the
            # preview's, LotStore._plan), so that a refused ingest leaves it as it was; opened for writing below,
            # which upgrades it (said), only to commit what was accepted. The current schema: one path, as before
            try:
                existing.ingest(checked, reason=reason, accept_unusual=accept_unusual, preview=True)
            except UsageError as exc:
                if getattr(exc, "preview", None) is None:
                    raise
                raise UsageError(str(exc)) from None  # the ingest's own refusal (--reason), without a preview
    with LotStore(store, for_writing=True) as lot_store:
        result = lot_store.ingest(checked, reason=reason, accept_unusual=accept_unusual)
    return Ingested(store=store, folder=folder, result=result, sources=checked.sources, spec=checked.spec)


def _read_folder_beside(folder: Path, lot_store, known: list[str], accept_unusual: bool):
    """:func:`linkage.read.read_folder`; a folder it refuses is refused with the values far from the store's
    history of its tables read whole beside the other problems (:meth:`LotStore.unusual_beside`; one refusal for
    the folder, not a second round once the first problems are mended). Without a store, or with
    ``accept_unusual``, the refusal as the reader made it."""
    from linkage.exceptions import InputError, Problem, StoreBusyError, StoreError
    from linkage.read import read_folder

    try:
        return read_folder(folder, known_lots=known, accept_unusual=accept_unusual)
    except InputError as exc:
        read = getattr(exc, "read", None)
        if lot_store is None or accept_unusual or read is None or not read.tables:
            raise
        try:
            beside = lot_store.unusual_beside(read, getattr(exc, "judged", []))
        except (StoreError, StoreBusyError) as failed:  # the folder's refusal stands; the store's problem is said
            store_name = Path(getattr(lot_store, "path", "the lot store")).name
            beside = [Problem(store_name, "the folder's values could not be compared with the store's history, "
                                          "a problem of the store, not of the folder; run 'linkage verify' on it. "
                                          f"{type(failed).__name__}: {failed}")]
        if not beside:
            raise
        raise InputError([*exc.problems, *beside]) from None


def _preview_ingest(folder: Path, store: Path, exists: bool, *, reason: str | None,
                    accept_unusual: bool) -> Ingested:
    """:func:`ingest` with ``preview``: the folder read as the ingest reads it, and the ingest decided by the
    store's own code (``LotStore.ingest(preview=True)``) on the store opened for reading only (or on a copy,
    :func:`_preview_store`), so that nothing is written: not the store, not its anchor file, not the audit
    trail. The ingest's own refusals are raised alike, with the same exit code, and marked ``ingest_refusal``
    (the CLI says so); they include the ingest's write refusals: a store without its anchor file (exit code 6),
    one this account cannot write, or a new store in a folder it cannot write (exit code 5). A store that does
    not exist is not created: the ingest is decided against an empty store in a temporary folder, removed
    after, as a first ingest would be decided. A folder that changes stored values without ``reason`` is refused
    (``UsageError``) as the ingest is, and the refusal carries the preview made all the same (``exc.preview``, an
    :class:`Ingested` whose ``result.needs_reason`` says why), which the CLI prints before the refusal."""
    from linkage.exceptions import UsageError

    import warnings

    from linkage.exceptions import StoreCaution

    with contextlib.ExitStack() as stack:
        with warnings.catch_warnings():  # said once, as the preview's cautions (its text, --json "cautions")
            warnings.simplefilter("ignore", StoreCaution)
            lot_store = _preview_store(stack, store, exists)
        with _ingest_refusal():
            if lot_store.unanchored is not None:  # the ingest opens the store for writing, refused at once
                from linkage.seal import unanchored_refusal

                raise StoreIntegrityError(unanchored_refusal(store, lot_store.unanchored["id"],
                                                             lot_store.unanchored["sha256"]))
            checked = _read_folder_beside(folder, lot_store, lot_store.lot_ids(), accept_unusual)
            if not exists and not os.access(store.parent, os.W_OK):  # where the ingest's first open fails
                raise StoreError(f"cannot create the lot store {store}: this account cannot write in folder "
                                 f"{store.parent}; nothing was written")
            try:
                result = lot_store.ingest(checked, reason=reason, accept_unusual=accept_unusual, preview=True)
            except UsageError as exc:  # wants --reason: the refusal carries the preview's whole report
                if getattr(exc, "preview", None) is not None:
                    exc.preview = Ingested(store=store, folder=folder, result=exc.preview, sources=checked.sources,
                                           spec=checked.spec, cautions=lot_store.cautions())
                raise
        cautions = lot_store.cautions()
    return Ingested(store=store, folder=folder, result=result, sources=checked.sources, spec=checked.spec,
                    cautions=cautions)


def _preview_store(stack: contextlib.ExitStack, store: Path, exists: bool):
    """The store a preview decides on, entered on ``stack``: the store itself opened for reading only; for a
    store of an earlier schema that needs its upgrade to be read (schema 1), an upgraded copy in a temporary
    folder (:func:`linkage.store.upgraded_copy`), as the ingest decides on it before it upgrades the store to
    commit; for a store that does not exist (or an SQLite file without a table, in which the ingest makes it), an
    empty one there. The temporary folder is removed when ``stack`` closes."""
    import tempfile

    from linkage.store import EmptyStoreFile, LotStore, StoreNeedsUpgrade, can_write, upgraded_copy

    if exists:
        version = None
        try:
            return stack.enter_context(LotStore(store, create=False, read_only=True))
        except EmptyStoreFile:  # an SQLite file without a table: the ingest makes the store in it, as in no file
            pass
        except StoreNeedsUpgrade as exc:
            if not can_write(store):
                exc.ingest_refusal = True  # the ingest can neither upgrade it nor write to it: its own refusal
                raise
            version = exc.version
        if version is not None:
            return upgraded_copy(stack, store, version)
    if store.is_dir() or not store.parent.is_dir():
        with _ingest_refusal():
            LotStore(store)  # raises the refusal of a first ingest (StorePathError) before it makes anything
    scratch = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="linkage-preview-")))
    return stack.enter_context(LotStore(scratch / store.name))


@contextlib.contextmanager
def _ingest_refusal():
    """Mark a :class:`LinkageError` raised inside as a refusal the ingest itself makes (``ingest_refusal``)."""
    try:
        yield
    except LinkageError as exc:
        exc.ingest_refusal = True
        raise


def assemble(store=DEFAULT_STORE, *, product: str | None = None, spec=None,
             fines_cutoff_um: float = DEFAULT_FINES_CUTOFF_UM,
             dissolution_time_min: float | None = None) -> pd.DataFrame:
    """One row per lot (the latest revision of each) with the derived
    quantities; see :func:`linkage.assemble.assemble`. With a ``spec``, its
    dissolution time point (unless ``dissolution_time_min`` is given) and its
    Q for the USP <711> verdict are used."""
    from linkage.assemble import assemble as assemble_table
    from linkage.exceptions import InsufficientDataError
    from linkage.store import current_tables_of, reading

    spec = _spec(spec)
    with reading(store) as lot_store:  # an older store read as it is, not upgraded (transfer and plan: by their record)
        tables = current_tables_of(lot_store, product)
    if not tables:
        raise InsufficientDataError(f"the store {store} holds no lots" + (f" of product {product}" if product
                                                                          else "") + "; nothing to assemble")
    table = assemble_table(tables, fines_cutoff_um=fines_cutoff_um, **_time_and_q(spec, dissolution_time_min))
    return _say_set_aside(table, tables.set_aside)


def _say_set_aside(table: pd.DataFrame, set_aside: dict) -> pd.DataFrame:
    """The assembled ``table`` with the lots set aside that it leaves out: ``attrs["set_aside_lots"]`` (their ids)
    and a note (``attrs["notes"]``, which ``linkage assemble`` prints)."""
    from linkage.store import set_aside_note

    table.attrs["set_aside_lots"] = list(set_aside)
    note = set_aside_note(set_aside)
    if note:
        table.attrs["notes"] = [*table.attrs.get("notes", []), note]
    return table


def set_aside(lots, store=DEFAULT_STORE, *, reason: str | None = None):
    """Set ``lots`` aside (``linkage set-aside``): their rows stay in the store unchanged, but every call that
    fits or judges lots (:func:`assemble`, and so train, retrain, watch, report, plan, transfer) leaves them out
    and says so, until :func:`restore`. Each decision is an audit entry ``set-aside`` (who, when, ``reason``),
    sealed like every record. Refused (``UsageError``, exit code 2, nothing written; every problem in one message)
    without a ``reason``, for a lot the store does not hold (every such lot named) and for a lot already set
    aside; a store without its anchor file is refused (``StoreIntegrityError``, exit code 6). Lots are found under
    a spelling that differs only in letter case and dash characters (‐ – — and the like), as an ingest finds them
    (:func:`linkage.lotid.lot_key`)."""
    return _set_aside_decision(lots, store, reason, restore=False)


def restore(lots, store=DEFAULT_STORE, *, reason: str | None = None):
    """Put set-aside ``lots`` back in use (``linkage restore``; an audit entry ``restore`` each); refused as
    :func:`set_aside` is, and for a lot that is not set aside."""
    return _set_aside_decision(lots, store, reason, restore=True)


def _set_aside_decision(lots, store, reason, *, restore: bool):
    import warnings

    from linkage.exceptions import StoreCaution, UsageError
    from linkage.results import SetAside
    from linkage.store import RESTORE, SET_ASIDE, LotStore, given_reason, set_aside_needs_reason

    action = RESTORE if restore else SET_ASIDE
    no_reason = given_reason(reason) is None
    # decided first on the store read only (schema 1: on an upgraded copy, as a preview decides), so that a refusal
    # opens no older store for writing (that would upgrade it, and make its anchor and lock files); every problem
    # of the decision in one refusal (decision_lots): the missing reason, unknown lots, lots in the wrong state
    with warnings.catch_warnings(), contextlib.ExitStack() as stack:
        warnings.simplefilter("ignore", StoreCaution)  # a store without its anchor file: its refusal below says it
        try:
            s = _preview_store(stack, Path(store), exists=True)
        except LinkageError as exc:
            if no_reason:  # nothing to write without one: said with what stops the store from being read
                raise UsageError(f"{set_aside_needs_reason(action, ending='', reason=reason)}; and {exc}") from None
            raise
        if s.unanchored is None or no_reason:
            s.decision_lots(lots, reason, action)
    with LotStore(store, create=False, for_writing=True) as s:  # a store without its anchor file: refused, exit 6
        decisions = s.restore(lots, reason) if restore else s.set_aside(lots, reason)
        still = s.set_aside_lots()
    return SetAside(action=action, decisions=decisions, store=Path(store), set_aside_now=list(still))


# --------------------------------------------------------------------------- models


@contextlib.contextmanager
def _cluster(backend: str | None, scheduler: str | None):
    """A Dask client for ``backend="dask"`` (at ``scheduler``, else Dask's
    configured address, else a local cluster); nothing otherwise."""
    from linkage.exceptions import UsageError

    if scheduler is not None and backend != "dask":
        raise UsageError("--scheduler goes with --backend dask")
    if backend != "dask":
        yield
        return
    try:
        from dask.distributed import Client
    except ImportError:
        raise UsageError("--backend dask needs Dask's distributed scheduler: install the 'distributed' extra "
                         "(pip install 'linkage[distributed]')") from None
    try:
        client = Client(scheduler)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UsageError(f"cannot reach the Dask scheduler {scheduler or '(from the Dask configuration)'}: "
                         f"{exc}") from None
    with client:
        yield


def train(store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, *, chain: ChainSpec | str | Path | None = None,
          product: str | None = None, seed: int = 0, coverage: float = 0.9, spec=None,
          dissolution_time_min: float | None = None, n_jobs: int | None = None, backend: str | None = None,
          scheduler: str | None = None, progress: Progress | None = None, group_by: str | None = None,
          materials: bool = True) -> Trained:
    """Train the chain on the lots in the store under cross-validation
    grouped by lot, register it in ``models_dir`` (in service: it becomes
    ``latest``) and log ``train`` in the store's audit trail.

    ``chain`` is a :class:`~linkage.models.chain.ChainSpec` or the path of a
    chain file (default: settings -> ribbon -> granules -> tablets);
    ``coverage`` the nominal coverage of the CV+ intervals; the lots are
    assembled at the ``spec``'s dissolution time point (else at
    ``dissolution_time_min``, default 30 min; the two must agree when both
    are given), which the model records: a spec at another time point is
    refused by every later call. A time point no vessel profile reaches is
    refused (no extrapolation). ``n_jobs``, ``backend`` ("loky", "threading",
    "dask") and ``scheduler`` say where the fold fits run; the model is the
    same. ``group_by`` names a column (a raw-material batch, a campaign) or
    ``month``: lots sharing its value stay together in every fold and in the
    conformal intervals (recorded with the model; see
    :mod:`linkage.models.grouping`). ``materials`` (default True; issue 19):
    where the process table carries extra numeric columns (raw-material
    attributes), try each as an input of each attribute, paired in the same
    grouped folds, and keep it only where the paired test says it helps
    (:mod:`linkage.models.materials`; at most two candidates refitted per attribute
    and column, the chain refitted only when a column is kept); False trains
    the chain as given.
    """
    from linkage.assemble import assemble as assemble_table
    from linkage.assemble import check_dissolution_time
    from linkage.exceptions import InsufficientDataError
    from linkage.decide.watch import design_at_training
    from linkage.models.chain import ChainSpec
    from linkage.models.registry import save
    from linkage.models.train import train_chain
    from linkage.store import LotStore, current_tables_of, open_to_record

    if chain is not None and not isinstance(chain, ChainSpec):
        chain = ChainSpec.from_toml(chain)
    spec = _spec(spec)
    at = _train_time_and_q(spec, dissolution_time_min)
    with contextlib.ExitStack() as stack:  # refused before the fit and the model; an older store not upgraded here
        tables = current_tables_of(open_to_record(stack, store), product)
    if not tables or "process" not in tables or tables["process"].empty:
        which = f" of product {product!r}" if product else ""
        raise InsufficientDataError(f"the store {store} holds no lots{which} to train on")
    check_dissolution_time(tables, at["dissolution_time_min"])
    table = _say_set_aside(assemble_table(tables, **at), tables.set_aside)
    if n_jobs is None:
        n_jobs = -1 if backend == "dask" else 1
    with _cluster(backend, scheduler):
        fit = train_chain
        if materials:
            from linkage.models.materials import train_with_materials as fit
        fitted = fit(table, chain, seed=seed, nominal_coverage=coverage, progress=progress,
                     n_jobs=n_jobs, backend=backend, dissolution_time_min=at["dissolution_time_min"],
                     group_by=group_by)
    fitted.training["set_aside_lots"] = list(tables.set_aside)  # recorded with the model: left out of its lots
    fitted.training["watch_design"] = design_at_training(fitted)  # the drift alarm's limit, simulated once here
    model_id = save(fitted, models_dir)
    with LotStore(store, create=False, for_writing=True) as lot_store:
        lot_store.log("train", model_id=model_id,
                      inputs={"models_dir": str(models_dir), "product": product, "seed": seed,
                              "coverage": coverage, "chain": fitted.chain.to_toml(),
                              "dissolution_time_min": at["dissolution_time_min"],
                              "group_by": fitted.training.get("group_by", "lot"),
                              "spec": spec.to_dict() if spec is not None else None,
                              "spec_file": spec.file if spec is not None else None,
                              "spec_sha256": spec.sha256 if spec is not None else None,
                              "lots": list(fitted.training["lots"]),
                              # the training lots' products (audit: a model of several is marked mixed)
                              "product_lots": fitted.training.get("product_lots"),
                              "lots_without_product": fitted.training.get("lots_without_product"),
                              "set_aside_lots": list(tables.set_aside),
                              "table_sha256": fitted.training["table_sha256"]},
                      outputs={t: {"selected": v.selected, "coverage": v.coverage}
                               for t, v in fitted.targets.items()})
    return Trained(model_id=model_id, models_dir=Path(models_dir), chain=fitted, store=Path(store))


def models(models_dir=DEFAULT_MODELS_DIR) -> pd.DataFrame:
    """The model registry, newest first (``linkage models``): one row per
    model with its status, lots, selected models, whether it is
    ``latest`` and its ``role`` (champion, superseded, not promoted ...)."""
    import pandas as pd

    from linkage.models.registry import list_models

    return pd.DataFrame(list_models(models_dir))


def retrain(store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, *, spec=None, product: str | None = None,
            tolerance: float = 0.10, force: bool = False, reason: str | None = None,
            progress: Progress | None = None) -> Retrained:
    """Fit a challenger on every lot and promote it over the champion only by
    the documented rule (``linkage retrain``); see
    :func:`linkage.decide.retrain.retrain`. Logs ``retrain`` or ``promote``."""
    from linkage.decide.retrain import retrain as run_retrain

    return Retrained(run_retrain(store, models_dir, product=product, spec=_spec(spec), force=force, reason=reason,
                                 tolerance=tolerance, progress=progress))


# --------------------------------------------------------------------------- decisions


def window(spec, *, store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, model="latest",
           settings: Mapping[str, float] | None = None, confidence: float = 0.9, n_draws: int = defaults.WINDOW_DRAWS,
           seed: int = 0, assurance: float = 0.9, record: bool | None = None) -> Window:
    """The ribbon porosity window where every limit of ``spec`` passes
    together with probability ``confidence``, and the roll force that lands
    in it (``linkage window``); settings not in ``settings`` are held
    coherently with them (their conditional mean over the training lots). The
    window rests on the lower bound at ``assurance`` of that probability (issue 12; :mod:`linkage.decide.bound`).
    Logged as ``window`` in the store's audit trail; ``record=False`` (``--no-record``) writes nothing in the store, and a
    store that does not exist is refused unless it is the default ``linkage.db`` (:func:`recording`)."""
    from linkage.decide.bound import check_assurance
    from linkage.decide.window import SCANNED, find_window

    will_record = recording(store, record, "window")  # before any work: a store that would lose or refuse the record
    assurance = check_assurance(assurance)
    spec = _spec(spec)
    settings, bad = _given_settings(settings)
    chain = _fitted(models_dir, model)
    _check_settings(chain, settings, bad, refused=SCANNED)
    result = find_window(chain, spec, settings=settings, confidence=confidence, n_draws=n_draws, seed=seed,
                         assurance=assurance)
    if model is None or isinstance(model, str):  # a model of the registry, loaded and checked here (issue 20)
        _keep(models_dir, result.model_id, "window", spec, result, "linkage window", settings=settings,
              confidence=confidence, n_draws=n_draws, seed=seed, assurance=assurance)  # for the report
    inputs = {"spec": spec.to_dict(), "spec_file": spec.file, "spec_sha256": spec.sha256, "settings": settings,
              "confidence": confidence, "seed": seed, "assurance": assurance}
    recorded = will_record and record_entry(store, "window", model_id=result.model_id, inputs=inputs,
                                            outputs=result.to_dict(curve=False))
    aside, note, unread = _set_aside_in_training(store, chain)
    return Window(result=result, recorded=recorded, store=None if store is None else Path(store),
                  set_aside_in_training=tuple(aside), set_aside_note=note, set_aside_unread=unread)


def _set_aside_in_training(store, chain) -> tuple[list[str], str | None, str | None]:
    """The lots of ``chain``'s training set (a fitted or a lean chain: ``training_lots``) that the store now holds
    set aside, the note that says so (:func:`linkage.store.set_aside_trained_note`, as ``watch`` and ``retrain``
    say it; ``window`` and ``space``), and why the store was not read for them (None when it was, or when
    ``store`` is None): it does not exist, or it could not be read (not a lot store, a newer one, damaged, busy;
    the command line says so: :func:`linkage.cli.common.note_set_aside_unread`). A store that fails its integrity
    check is refused (:class:`~linkage.exceptions.StoreIntegrityError`, exit code 6), as every command that
    reads it refuses it. An older store is not upgraded for a note (:func:`linkage.store.reading`)."""
    from linkage.exceptions import LinkageError, StoreIntegrityError
    from linkage.store import reading, set_aside_trained_note

    if store is None:
        return [], None, None
    if not Path(store).exists():
        return [], None, f"no lot store at {store}"
    try:
        with reading(store) as lot_store:
            aside = lot_store.set_aside_lots()
    except StoreIntegrityError:
        raise
    except LinkageError as exc:
        return [], None, str(exc)
    return (*set_aside_trained_note(aside, chain.training_lots, chain.model_id), None)


def transfer(store=DEFAULT_STORE, *, roll_diameter_mm: float, roll_width_mm: float, roll_gap_mm: float,
             porosity: float | None = None, window: tuple[float, float] | None = None, level: float = 0.95,
             product: str | None = None, internal_friction_deg: float = 40.0, wall_friction_deg: float = 25.0,
             n_draws: int = 4000, seed: int = 0):
    """The specific roll force that gives a ribbon porosity (or each edge of
    a window) on rolls of another diameter and width (``linkage transfer``):
    Johanson's rolling theory fitted to the store's lots of every compactor
    (:mod:`linkage.decide.transfer`). Logged as ``transfer``."""
    from linkage.decide.transfer import fit_ribbon_physics
    from linkage.decide.transfer import transfer as find

    refuse_unanchored(store)  # recorded at the end: a store that refuses the record is refused before the work
    lots = assemble(store, product=product)
    physics = fit_ribbon_physics(lots, internal_friction_deg=internal_friction_deg,
                                 wall_friction_deg=wall_friction_deg, source=f"lots of {store}")
    result = find(physics, roll_diameter_mm=roll_diameter_mm, roll_width_mm=roll_width_mm, roll_gap_mm=roll_gap_mm,
                  porosity=porosity, window=window, level=level, n_draws=n_draws, seed=seed)
    if lots.attrs.get("set_aside_lots"):  # said in the text and --json
        import dataclasses

        result = dataclasses.replace(result, set_aside_lots=tuple(lots.attrs["set_aside_lots"]))
    record(store, "transfer", model_id=None,
           inputs={"roll_diameter_mm": roll_diameter_mm, "roll_width_mm": roll_width_mm, "roll_gap_mm": roll_gap_mm,
                   "porosity": porosity, "window": None if window is None else list(window), "level": level,
                   "product": product, "seed": seed},
           outputs={k: v for k, v in result.to_dict().items() if k in ("targets", "model")})
    return result


def plan(n_lots: int, *, ranges: Mapping[str, tuple[float, float]] | None = None, spec=None, new: bool = False,
         store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, model="latest",
         settings: Mapping[str, float] | None = None, confidence: float = 0.9, assurance: float = 0.9,
         seed: int = 0, prefix: str = "PLAN", product: str | None = None, out=None, edges: str = "all",
         design: str = "maximin", criterion: str = "cover"):
    """The next lots to make (``linkage plan``; :mod:`linkage.decide.plan`).
    ``new``: a starting design over ``ranges`` with no lots or model
    (``design``: ``"maximin"`` or ``"factorial"``). Else the
    lots that narrow the window of ``model`` under ``spec`` fastest, over
    ``ranges`` (default: the training ranges), at its ``edges`` (``"all"`` or
    ``"porosity"``; the local criterion's), by ``criterion`` (``"cover"``, the
    default, which plans for the porosity edges only, ``"local"``, ``"target"``
    or ``"thompson"``, :func:`linkage.decide.plan.augment_design`). With ``out`` (a folder), the plan
    is written there as template tables and ``plan.json``. An augmentation is
    logged as ``plan`` in the store's audit trail."""
    from linkage.decide import plan as planning

    settings, bad = _given_settings(settings)
    if new and bad:
        from linkage.exceptions import UsageError

        raise UsageError("; ".join(bad))
    if new:
        result = planning.start_design(dict(ranges or {}), n_lots, seed=seed, held=settings, prefix=prefix,
                                       product=product, design=design)
        written = planning.write_plan(result, out) if out is not None else []
        return planning.Planned(result, written)
    from linkage.decide.bound import check_assurance

    refuse_unanchored(store)  # recorded at the end: refused before the work and the plan's files
    assurance = check_assurance(assurance)
    spec = _spec(spec)
    if spec is None:
        from linkage.exceptions import UsageError

        raise UsageError("planning the next lots of a campaign needs a spec (--spec); for a new product use --new")
    chain = _fitted(models_dir, model)
    from linkage.decide.window import SCANNED

    _check_settings(chain, settings, bad, refused=SCANNED)  # the plan's window holds them as window does
    if product is None:  # the lots the plan starts from: those of the one product the model was trained on
        product = chain.trained_product
    table = assemble(store, spec=spec, product=product)
    result = planning.augment_design(chain, table, spec, n_lots, ranges=dict(ranges or {}), settings=settings,
                                     confidence=confidence, assurance=assurance, seed=seed, prefix=prefix,
                                     product=product, edges=edges, criterion=criterion)
    result.set_aside_lots = list(table.attrs.get("set_aside_lots", []))
    from linkage.store import set_aside_note

    result.notes += [n for n in [set_aside_note(result.set_aside_lots, "left out of the lots the plan starts from")]
                     if n]
    written = planning.write_plan(result, out) if out is not None else []
    recorded = record(store, "plan", model_id=result.model_id,
                      inputs={"n_lots": n_lots, "ranges": {k: list(v) for k, v in (ranges or {}).items()},
                              "settings": settings, "confidence": confidence, "assurance": assurance, "seed": seed,
                              "edges": edges, "criterion": criterion, "spec_file": spec.file,
                              "spec_sha256": spec.sha256, "out": None if out is None else str(out)},
                      outputs={"lots": [lot.to_dict() for lot in result.lots], "edges": result.edges})
    return planning.Planned(result, written, recorded)


def space(spec, *, store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, model="latest", x: str = defaults.MAP_X,
          y: str = defaults.MAP_Y, n_grid: int = defaults.MAP_GRID, settings: Mapping[str, float] | None = None,
          confidence: float = 0.9, assurance: float = 0.9, seed: int = 0):
    """The map of P(all pass) and its lower bound over two settings, the
    applicability-domain mask and the acceptable ranges (``linkage space``;
    :func:`linkage.decide.space.design_space`). Runs on the model's numbers
    (``whatif.npz``) for an id. Returns a :class:`linkage.decide.space.SpaceResult`
    (``to_dict()``; :func:`linkage.decide.space.space_text` for its text). ``store``, when it is a lot store,
    is read (never written) for the model's training lots it now holds set aside, as ``window`` reads it
    (``set_aside_in_training``, ``set_aside_note``); ``None`` or a store that does not exist: none."""
    from linkage.decide.space import design_space

    settings, bad = _given_settings(settings)
    lean = _lean(models_dir, model)
    _check_settings(lean, settings, bad, refused=_not_held_by_map(lean, x, y))
    result = design_space(lean, _spec(spec), x=x, y=y, n_grid=n_grid, settings=settings,
                          confidence=confidence, assurance=assurance, seed=seed)
    if model is None or isinstance(model, str):  # a model of the registry, loaded and checked here (issue 20)
        _keep(models_dir, result.model_id, "space", _spec(spec), result, "linkage space", x=x, y=y, n_grid=n_grid,
              settings=settings, confidence=confidence, assurance=assurance, seed=seed)  # for the report
    aside, note, unread = _set_aside_in_training(store, lean)  # the store's state now: not kept with the map
    if not aside and unread is None:
        return result
    import dataclasses

    return dataclasses.replace(result, set_aside_in_training=tuple(aside), set_aside_note=note,
                               set_aside_unread=unread)


def _keep(models_dir, model_id, kind: str, spec, result, made_by: str, **arguments) -> None:
    """Store a result beside its model for a later report (:mod:`linkage.models.reuse`; best effort)."""
    from linkage.models.reuse import result_key, save_result

    if models_dir is not None and model_id and model_id != "unsaved":
        save_result(models_dir, model_id, kind, result_key(kind, models_dir, model_id, spec, **arguments), result,
                    made_by)


def _reuse(models_dir, model_id, kind: str, spec, **arguments):
    """A result stored by :func:`_keep` for exactly these arguments, or None."""
    from linkage.models.reuse import load_result, result_key

    if models_dir is None or not model_id:
        return None
    return load_result(models_dir, model_id, kind, result_key(kind, models_dir, model_id, spec, **arguments))


def _lean(models_dir, model):
    """What a what-if runs on: the model's numbers (``whatif.npz``, no
    scikit-learn) for an id, else the given chain."""
    if model is None or isinstance(model, str):
        from linkage.models.registry import load_whatif

        return load_whatif(models_dir, model)  # numbers only: no scikit-learn or pandas to import
    return model.chain if isinstance(model, Trained) else model


def _lot_spellings(lots, store) -> list[str | None]:
    """Each lot given for a what-if in the spelling it is recorded under: the
    stored lot's when the store holds it under the reader's lot identity
    (:func:`linkage.lotid.lot_key`; ``q26-005`` is ``Q26-005``), else as the
    reader would read it (a lot not made yet; a later ingest joins up by the
    same key). An id with an invisible character is refused."""
    return _stored_lots(lots, store)[0]


def _stored_lots(lots, store) -> tuple[list[str | None], dict]:
    """:func:`_lot_spellings` of ``lots``, and those of them the store holds set aside now (lot -> the decision in
    force), read in one opening of the store."""
    from linkage.lotid import reader_spelling

    spelled = [None if lot is None else reader_spelling(lot) for lot in lots]
    if store is None or not Path(store).exists() or all(lot is None for lot in spelled):
        return spelled, {}
    from linkage.store import reading

    with reading(store) as s:  # an older store read as it is: a recorded what-if upgrades it by its record only
        spelled = [None if lot is None else s.stored_spelling(lot) or lot for lot in spelled]
        aside = s.set_aside_lots()
    return spelled, {lot: aside[lot] for lot in spelled if lot in aside}


def _recorded_whatifs(results, lots, store, will_record: bool = True) -> list[WhatIfResult]:
    """The what-ifs, each stated for its lot in the store's spelling (read from the store whenever it exists)
    and, when ``will_record`` (:func:`recording`), recorded with its prediction."""
    out = []
    spelled, aside = _stored_lots(lots, store)
    for r, lot in zip(results, spelled):
        r.lot = lot  # stated on the result and its sheet, as recorded
        d = r.to_dict()
        recorded = will_record and record_entry(store, "predict", model_id=d["model_id"], lot=lot, inputs=d["inputs"],
                                                outputs=d, prediction=True)
        out.append(WhatIfResult(result=r, lot=lot, recorded=recorded, store=None if store is None else Path(store),
                                set_aside_note=_set_aside_whatif_note(lot, aside[lot], recorded) if lot in aside
                                else None))
    return out


def _set_aside_whatif_note(lot: str, decision: dict, recorded: bool) -> str:
    """What a what-if for a set-aside lot says: the lot is set aside, and the watch will not compare it."""
    from linkage.store import decision_shown

    return (f"lot {lot} is set aside ({decision_shown(decision)}): this what-if is "
            f"{'recorded for it' if recorded else 'not recorded'}, but 'linkage watch' leaves the lot out and does "
            "not compare the what-if with what it measured ('linkage restore LOT --reason TEXT' puts it back in use)")


def _whatif_numbers(values: Mapping) -> tuple[dict[str, float], list[str]]:
    """The values of a what-if as floats (a text by the one number rule,
    :mod:`linkage.numbers`), and a problem for each that is not a number."""
    from linkage.decide.whatif import _given_number
    from linkage.numbers import parse_plain_number

    out: dict[str, float] = {}
    bad: list[str] = []
    for k, v in values.items():
        number = parse_plain_number(v) if isinstance(v, str) else (
            "not a number" if isinstance(v, bytes) else _given_number(v))
        if isinstance(number, str):
            bad.append(f"{k}: {v!r} is {number}")
        else:
            out[str(k)] = number
    return out, bad


def _lean_or_refused(models_dir, model, problems: list[str]):
    """The lean model to check and predict with; when it cannot be loaded and
    the values already broke a rule, those problems are the error."""
    from linkage.exceptions import ModelNotFoundError, UsageError

    try:
        return _lean(models_dir, model)
    except ModelNotFoundError as exc:
        if problems:  # every problem at once: the values' and the model's
            raise UsageError("; ".join([*problems, str(exc)])) from None
        raise


def whatif(values: Mapping[str, float | str], *, spec=None, store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR,
           model="latest", level: float | None = None, seed: int = 0, lot: str | None = None,
           product: str | None = None, assurance: float = 0.9, record: bool | None = None) -> WhatIfResult:
    """Predict every downstream attribute from ``values`` (settings and/or
    measured values by name), with intervals at ``level`` (default: the
    model's nominal coverage), the chance of passing each limit of ``spec``
    with its lower bound at ``assurance``, and the applicability-domain
    verdict (``linkage predict``). Recorded in
    the store's predictions and audit trail (``predict``, for ``lot`` when
    given); ``record=False`` (``--no-record``) writes nothing in the store, and a
    store that does not exist is refused unless it is the default ``linkage.db``
    (:func:`recording`). ``lot`` and ``product`` are stated on
    the result and its sheet (product default: the model's, when it was
    trained on one; another product than the model's is refused)."""
    from linkage.decide.bound import check_assurance
    from linkage.decide.whatif import predict_whatif
    from linkage.exceptions import UsageError

    will_record = recording(store, record, "predict")  # before any work: a store that would lose or refuse the record
    assurance = check_assurance(assurance)
    if lot is not None:
        from linkage.lotid import reader_spelling

        reader_spelling(lot)  # an id with an invisible character is refused before any work
    if not values:
        raise UsageError("nothing to predict from: give --set NAME=VALUE (or --from-csv)")
    values, bad = _whatif_numbers(values)
    spec = _spec(spec)
    chain = _lean_or_refused(models_dir, model, bad)
    if bad:
        from linkage.decide.whatif import check_values

        check_values(chain, values, more=bad)  # every problem at once: numbers, names and ranges
    # names and values are checked by predict_whatif
    result = predict_whatif(chain, values, spec=spec, level=level, seed=seed, lot=lot, product=product,
                            assurance=assurance)
    return _recorded_whatifs([result], [lot], store, will_record)[0]


def whatif_rows(rows, *, lots: Iterable[str | None] | None = None, spec=None, store=DEFAULT_STORE,
                models_dir=DEFAULT_MODELS_DIR, model="latest", level: float | None = None,
                seed: int = 0, product: str | None = None, assurance: float = 0.9,
                record: bool | None = None) -> list[WhatIfResult]:
    """One what-if per row (``linkage predict --from-csv``): ``rows`` is a
    list of {name: value} dicts, a DataFrame whose columns are names, or the
    path of such a CSV, or such a file read by :func:`linkage.decide.whatif.read_rows`
    (whose optional ``lot`` and ``product`` columns name each row's lot and
    product; template columns that are no name of the model and empty in
    every row are ignored and listed in its ``ignored``).
    Every row is checked before any is predicted, and every problem of the
    rows is raised at once (``InputError``: file, row, column, value, rule).
    ``lots`` gives each row's lot (one lot for all when a single string).
    ``record`` as in :func:`whatif`."""
    from linkage.decide.whatif import CsvRows, predict_many, read_rows
    from linkage.lotid import reader_spelling

    will_record = recording(store, record, "predict")  # before any work: a store that would lose or refuse the record
    if isinstance(lots, str):
        reader_spelling(lots)  # an id with an invisible character is refused before any work
    csv_lots: list[str | None] | None = None
    if isinstance(rows, (str, Path)):
        rows = read_rows(rows)
    if isinstance(rows, CsvRows):  # its blank template columns ignored are listed in rows.ignored
        csv_lots = rows.lots
    else:
        rows = rows if hasattr(rows, "to_dict") else list(rows)
    n = len(rows)
    if lots is not None and csv_lots is not None and any(v is not None for v in csv_lots):
        from linkage.exceptions import UsageError

        raise UsageError("the file gives each row's lot in its lot column; --lot would replace them all: give one or "
                         "the other")
    if isinstance(lots, str):
        row_lots = [lots] * n
    elif lots is not None:
        row_lots = list(lots)
    else:
        row_lots = csv_lots if csv_lots is not None else [None] * n
    chain = _lean(models_dir, model)
    from linkage.decide.bound import check_assurance

    results = predict_many(chain, rows, spec=_spec(spec), level=level, seed=seed, product=product,
                           assurance=check_assurance(assurance))
    return _recorded_whatifs(results, row_lots, store, will_record)  # each row's lot stated on its result, as recorded


def _collector_paused(fn):
    """``fn`` run with the cyclic garbage collector paused (:func:`linkage.report.background.collector_paused`;
    the report's drawing turns it on for its own time)."""
    @functools.wraps(fn)
    def paused(*args, **kwargs):
        from linkage.report.background import collector_paused

        with collector_paused():
            return fn(*args, **kwargs)

    return paused


@_collector_paused  # loading the chain, reading the store, assembling: nearly nothing they make is garbage
def report(out=None, *, store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, model="latest", spec=None,
           confidence: float = 0.9, seed: int = 0, window: Window | None = None, assurance: float = 0.9,
           plan=None) -> Path:
    """Write the self-contained HTML report of ``model`` and its lots to
    ``out`` (default ``reports/report-<model id>.html``) and return the path
    (``linkage report``). The lots are the model's product's when it was
    trained on one. A ``window`` already found is drawn as is; else, with a
    ``spec``, the window is found at ``confidence``. A ``plan`` (what
    :func:`plan` returned, or the path of its ``plan.json``) adds a section
    with the planned lots."""
    from linkage.assemble import assemble as assemble_table
    from linkage.exceptions import InsufficientDataError, UsageError
    from linkage.report.html import render_report, write_report

    from linkage.decide.bound import check_assurance

    if not 0 < confidence < 1:
        raise UsageError(f"--confidence must lie between 0 and 1; got {confidence}")
    from linkage.timepoint import check_time_point, model_time_point

    assurance = check_assurance(assurance)
    spec = _spec(spec)
    if plan is not None:
        from linkage.report.plan_section import read_plan

        plan = read_plan(plan)  # a file that is not a plan is refused before any work
    chain = _fitted_to_report(models_dir, model, store)
    check_time_point(chain, spec, "report")
    product = chain.trained_product
    tables, lots, others, store_cautions, aside_rows, origin = _report_lots(store, product, chain)
    if not tables:
        of = f" of product {product}" if product else ""
        raise InsufficientDataError(f"the store {store} holds no lots{of}; nothing to report on")
    table = assemble_table(tables, **_time_and_q(spec, model_time_point(chain)[0]))  # the model's time point
    out = Path(out) if out is not None else Path("reports") / f"report-{chain.model_id}.html"
    found = window.result if isinstance(window, Window) else window
    registered = model is None or isinstance(model, str)  # loaded from the registry and checked: results kept
    window_args, space_args = _report_result_args(spec, confidence, seed, assurance)
    found, space, reused = _reused_results(models_dir, chain.model_id, spec, found, registered=registered,
                                           window_args=window_args, space_args=space_args)
    from linkage.decide import mewma

    # the drift watch's designs, simulated by an earlier report (keyed by the simulation's own settings too)
    simulation = mewma.simulation_settings()
    designs = _reuse(models_dir, chain.model_id, "mewma", None, **simulation)
    mewma.remember(designs.result if designs is not None else [])
    figures_key = None
    if registered:  # a model of the registry: its figures may be kept (issue 20)
        # the window and the map are what these arguments give (computed here, or kept under the same arguments);
        # a window handed in is hashed itself
        figures_key = _figures_key(models_dir, chain.model_id, spec, table, lots, given_window=window is not None,
                                   window=found, confidence=confidence, seed=seed, assurance=assurance,
                                   curve_draws=REPORT_CURVE_DRAWS, mewma=simulation, plan=plan,
                                   set_aside_rows=None if aside_rows is None
                                   else aside_rows.to_json(orient="records", date_format="iso"),
                                   window_args=window_args, space_args=space_args)
    kept_figures = _reuse_key(models_dir, chain.model_id, "figures", figures_key)
    rendered = render_report(chain, table, spec=spec, window=found, lots=lots, confidence=confidence, seed=seed,
                             curve_draws=REPORT_CURVE_DRAWS, assurance=assurance, plan=plan, space=space,
                             reused=reused, kept_figures=kept_figures, other_lots=others,
                             store_cautions=store_cautions, set_aside=tables.set_aside, set_aside_rows=aside_rows,
                             origin=origin, ribbon=tables.get("ribbon"))  # the watch's looks at each sample
    _keep_report_results(models_dir, chain.model_id, spec, rendered, registered=registered,
                         designs=[] if designs is None else designs.result, simulation=simulation,
                         window_args=window_args, space_args=space_args, figures_key=figures_key)
    return Path(write_report(rendered, out))


def _report_result_args(spec, confidence: float, seed: int, assurance: float) -> tuple[dict | None, dict | None]:
    """The arguments under which ``linkage window`` and ``linkage space`` keep their results (their defaults), so
    that a report finds what they kept; ``(None, None)`` without a spec (no window, no map)."""
    if spec is None:
        return None, None
    window_args = dict(settings={}, confidence=confidence, n_draws=defaults.WINDOW_DRAWS, seed=seed,
                       assurance=assurance)
    space_args = dict(x=defaults.MAP_X, y=defaults.MAP_Y, n_grid=defaults.MAP_GRID, settings={},
                      confidence=confidence, assurance=assurance, seed=seed)
    return window_args, space_args


def _reused_results(models_dir, model_id: str, spec, found, *, registered: bool, window_args, space_args):
    """The window (unless one was handed in: ``found``) and the map that ``linkage window``, ``linkage space`` or
    an earlier report kept beside a registry model under the same arguments, and the report's sentences saying so:
    ``(window, map, reused)``, each ``None`` where nothing was kept."""
    space, reused = None, {}
    if spec is None:
        return found, space, reused
    kept = None if found is not None or not registered else _reuse(models_dir, model_id, "window", spec,
                                                                     **window_args)
    if kept is not None:
        found, reused["window"] = kept.result, kept.sentence("the window and its probabilities")
    kept = _reuse(models_dir, model_id, "space", spec, **space_args) if registered else None
    if kept is not None:
        space, reused["space"] = kept.result, kept.sentence("the map and the acceptable ranges")
    return found, space, reused


def _keep_report_results(models_dir, model_id: str, spec, rendered, *, registered: bool, designs: list,
                         simulation: dict, window_args, space_args, figures_key) -> None:
    """Keep beside the model what the report computed that a later one can reuse: the drift watch's simulated
    designs (added to those kept), and for a registry model the window, the map and the figures (issue 20)."""
    computed = rendered.computed
    if "mewma" in computed:
        _keep(models_dir, model_id, "mewma", None, designs + computed["mewma"], "linkage report", **simulation)
    if "window" in computed and registered:
        _keep(models_dir, model_id, "window", spec, computed["window"], "linkage report", **window_args)
    if "space" in computed and registered:
        _keep(models_dir, model_id, "space", spec, computed["space"], "linkage report", **space_args)
    if "figures" in computed and figures_key is not None:
        from linkage.models.reuse import save_result

        save_result(models_dir, model_id, "figures", figures_key, computed["figures"], "linkage report",
                    only=True)  # one state of the lots kept: the figures are megabytes


def _fitted_to_report(models_dir, model, store) -> FittedChain:
    """:func:`_fitted`; where the models folder holds no model, the refusal says, of a store with fewer lots in use
    than training needs (:data:`linkage.models.train.MIN_LOTS`), that training cannot work yet instead of "train a
    model first" (a user test: a store of 4 lots)."""
    from linkage.exceptions import NoModelError

    try:
        return _fitted(models_dir, model)
    except NoModelError as exc:
        too_few = _too_few_to_train(store)
        if too_few is None:
            raise
        from linkage.models.registry import no_model_text

        raise NoModelError(no_model_text(exc.models_dir, exc.why, too_few), exc.models_dir, exc.why) from None


def _too_few_to_train(store) -> str | None:
    """What stands in for "or train a model first" when ``store`` holds fewer lots in use than training needs
    (None: enough lots, or a store that cannot be read: then the plain hint stands)."""
    import warnings

    from linkage.models.train import MIN_LOTS
    from linkage.store import reading

    if store is None or not Path(store).is_file():
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the refusal is the message; the store's cautions are another command's
            with reading(store) as lot_store:
                n = len(lot_store.lots(in_use=True))
    except (LinkageError, OSError):
        return None
    if n >= MIN_LOTS:
        return None
    return (f"No model can be trained on the lot store {store} yet: training needs at least {MIN_LOTS} lots with "
            f"every input and a target, and it holds {n} lot{'' if n == 1 else 's'} in use; ingest more lots, then "
            "'linkage train'")


def _report_lots(store, product, chain):
    """What the report reads of the store: the current tables of the lots in use (:func:`current_tables_of`),
    their :meth:`~linkage.store.LotStore.lots` rows, the lots of other products and the store's cautions (said in
    the report), and the process rows of the lots set aside since ``chain`` was trained on them (drawn where the
    model's cross-validation results hold them: :func:`linkage.report.html.set_aside_training_rows`), and how
    ``chain`` came to be by the audit trail's retrain entry of it (:func:`linkage.report.html.model_origin`; None
    when none names it)."""
    from linkage.report.html import model_origin, set_aside_training_rows
    from linkage.store import current_tables_of, reading

    with reading(store) as lot_store:  # the report records nothing in the store: an older one is not upgraded
        tables = current_tables_of(lot_store, product)
        lots = lot_store.lots(product=product, in_use=True)  # as the table: the lots in use
        others, store_cautions = lot_store.other_products(product), lot_store.cautions()  # said in the report
        aside_rows = set_aside_training_rows(lot_store, product, tables.set_aside, chain.training.get("lots"))
        # a forced promotion is said (a user test)
        origin = model_origin(lot_store.decisions_of(chain.model_id), chain.model_id)
    return tables, lots, others, store_cautions, aside_rows, origin


def _figures_key(models_dir, model_id, spec, table, lots, *, given_window: bool, window, window_args, space_args,
                 **settings) -> str | None:
    """The key the report's figures are kept under (:mod:`linkage.report.kept`): the window and the map
    enter by the arguments they are computed (or kept) with, a window handed in by its own content."""
    from linkage.report import kept

    try:
        how_window = kept.result_sha256(window) if given_window and window is not None else window_args
    except TypeError:  # a window object of no stored class: drawn, not kept
        return None
    return kept.figures_key(models_dir, model_id, spec, table=table, lots=lots, window=how_window,
                            space=space_args, stamp=SOURCE_STAMP, **settings)


def _reuse_key(models_dir, model_id, kind: str, key: str | None):
    """A result stored under ``key`` (:mod:`linkage.models.reuse`), or None."""
    from linkage.models.reuse import load_result

    return None if key is None else load_result(models_dir, model_id, kind, key)


def watch(*, store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR, model="latest", spec=None,
          product: str | None = None) -> Watched:
    """The drift watch (``linkage watch``): residual control charts of every
    lot in time order, ribbon porosity within and between lots (against the
    ``spec``'s window when given), new lots outside the domain, recorded
    what-ifs against what the lots measured. The lots are ``product``'s,
    by default the model's product when it was trained on one (as
    :func:`report` takes them); the store's lots of other products are left
    out, and a note says so. Logs ``watch``."""
    from linkage.assemble import assemble as assemble_table
    from linkage.decide.watch import revised_since_training, watch as run_watch
    from linkage.store import LotStore, current_tables_of, reading, restored_since_training, set_aside_notes
    from linkage.timepoint import check_time_point, model_time_point, time_point_text

    refuse_unanchored(store)  # logged at the end: a store that refuses the entry is refused before the work
    chain = _fitted(models_dir, model)
    spec = _spec(spec)
    found = None
    notes: list[str] = []
    if spec is not None:
        from linkage.decide.window import find_window
        from linkage.exceptions import UnsupportedConfidenceError

        check_time_point(chain, spec, "watch")
        try:
            w = find_window(chain, spec)
        except UnsupportedConfidenceError as exc:  # watch has no --confidence: watch without the window
            w = None
            notes.append(f"no porosity window: the watch looks for one at confidence {exc.confidence:g}, more than "
                         f"these lots can show ({exc.lots_text()}); ribbon samples are not judged against a "
                         "window. Add lots, or look at a window at a lower confidence with "
                         "'linkage window --confidence'")
        found = w.edges if w is not None else None
    if product is None:  # the lots of the one product the model was trained on (issue: other products charted)
        product = chain.trained_product
    elif chain.trained_product is not None and product != chain.trained_product:
        notes.append(f"the lots of {product!r} are charted against model {chain.model_id}, a model of "
                     f"{chain.trained_product!r}: alarms may say only that the products differ")
    from linkage.products import chain_counts, others_text

    with reading(store) as s:  # an older store read as it is: upgraded only by the entry below (a refusal leaves it)
        tables = current_tables_of(s, product)
        recorded = s.predictions()
        stored_lots = s.lots(product, in_use=True)  # a set-aside training lot is named apart (set_aside_notes)
        others = s.other_products(product)
    if others:
        notes.append(f"the store's {others_text(others)} are not watched: only the lots of {product!r} are "
                     "(--product to watch another product's)")
    aside, in_training = set_aside_notes(tables.set_aside, chain, notes, "not watched")
    table = assemble_table(tables, dissolution_time_min=model_time_point(chain)[0])  # the model's time point
    result = run_watch(chain, table, ribbon=tables.get("ribbon"), window=found, recorded=recorded)
    revised = revised_since_training(stored_lots, chain.training.get("lots") or [], chain.created_at)
    restored = restored_since_training(chain, result.new_lots, notes)
    with LotStore(store, create=False, for_writing=True) as s:
        s.log("watch", model_id=chain.model_id, inputs={"window": found, "product": product},
              outputs={"alarms": result.alarms, "alarmed_lots": result.alarmed_lots, "new_lots": result.new_lots,
                       "restored_since_training": restored,
                       "revised_since_training": [r["lot"] for r in revised], "set_aside_lots": aside})
    return Watched(result=result, n_lots=len(table), window=found, store=Path(store),
                   time_point=time_point_text(chain) if "dissolution_pct" in chain.targets else None, revised=revised,
                   notes=notes, trained_products=[{"product": p, "n_lots": n} for p, n in chain_counts(chain)],
                   set_aside=aside, set_aside_trained=in_training, restored=restored)


def _running_window(fitted, lean, spec, held: dict, seed: int, assurance: float) -> tuple[float, float]:
    """The porosity window of ``spec`` at the running lot's settings ``held`` (``linkage running --spec``);
    refused with what the user can do where the lots cannot show the default confidence or give no window."""
    from linkage.decide.window import find_window
    from linkage.exceptions import UnsupportedConfidenceError, UsageError

    try:
        found = find_window(fitted, spec, settings=held, seed=seed, assurance=assurance, command="running")
    except UnsupportedConfidenceError as exc:  # running has no --confidence: say what the user can do
        raise UsageError(f"no porosity window can be found at confidence {exc.confidence:g} on these lots "
                         f"(model {lean.model_id}: {exc.lots_text()}); give the window yourself with --window LOW:HIGH "
                         "(e.g. from 'linkage window --confidence' at a confidence the lots support), or "
                         "add lots") from exc
    if not found.found:
        raise UsageError(f"the spec gives no porosity window at these settings (model {lean.model_id}); "
                         "give --window LOW:HIGH")
    return found.low.value, found.high.value


def _check_running(spec, window, adjust: str, baseline: int) -> None:
    """The usage checks of :func:`running`: the window given one way (``window`` or ``spec``), inside (0, 1),
    an adjustable setting, a baseline of 2 samples or more."""
    from linkage.decide import running as guide
    from linkage.exceptions import UsageError

    if (spec is None) == (window is None):
        raise UsageError("give the porosity window: --window LOW:HIGH or --spec spec.toml (one of them)")
    if window is not None:
        low, high = (float(v) for v in window)
        if not 0 < low < high < 1:
            raise UsageError(f"--window must be LOW:HIGH with 0 < LOW < HIGH < 1 (porosity fractions); got "
                             f"{low:g}:{high:g}")
    if adjust not in guide.ADJUSTABLE:
        raise UsageError(f"--adjust must be one of {', '.join(guide.ADJUSTABLE)}; got {adjust!r}")
    if baseline < 2:
        raise UsageError(f"--baseline must be at least 2 samples; got {baseline}")


def _running_settings(lean, from_process: dict[str, float],
                      given: dict[str, float]) -> tuple[dict[str, float], dict[str, str]]:
    """The running lot's settings: its process row's that the model takes, then the given ones (which win);
    the ribbon stage's other inputs held as every command holds them (coherently with the given settings),
    with how each was held."""
    from linkage.decide import running as guide

    known = set(lean.root_inputs())
    values = {k: v for k, v in from_process.items() if k in known}
    values.update(given)
    target = lean.targets[guide.POROSITY]
    held: dict[str, str] = {}
    missing = [k for k in target.inputs if k not in values]
    if missing:  # held as every command holds them (coherently with the given settings)
        from linkage.decide.propagate import fill_settings

        filled, sources = fill_settings(lean, {k: v for k, v in values.items() if k in known})
        values.update({k: float(filled[k]) for k in missing})
        held = {k: sources[k] for k in missing}
    return values, held


def _stored_ribbon(store) -> tuple:
    """The store's current tables (the lots in use) and their ribbon table, an empty one when the store holds
    none: the training lots' within-lot spread of :func:`running`."""
    from linkage.store import reading

    with reading(store) as s:  # an older store read as it is: upgraded only by the record below
        stored = s.current_tables()  # the lots in use: a lot set aside is left out of the within-lot spread
        ribbon = stored.get("ribbon")
    if ribbon is None:
        import pandas as pd

        ribbon = pd.DataFrame(columns=["lot", "sample", "envelope_density_g_cm3", "skeletal_density_g_cm3",
                                       "sampled_at"])
    return stored, ribbon


def running(samples, *, settings: Mapping[str, float] | None = None, process=None, spec=None,
            window: tuple[float, float] | None = None, store=DEFAULT_STORE, models_dir=DEFAULT_MODELS_DIR,
            model="latest", adjust: str = "roll_force_kn_per_cm", baseline: int = 5,
            confirm_shift_sd: float = 1.0, alpha: float = 0.05, power: float = 0.9, seed: int = 0,
            assurance: float = 0.9, record: bool | None = None):
    """Guidance for a lot in progress (``linkage running``): its at-line
    samples (``samples``, a CSV or XLSX of the ribbon table) against the
    porosity window (``window`` as (low, high), or found under ``spec``) and
    the within-lot limits of the training lots in ``store``, whether the run
    is drifting, and a correction of ``adjust`` with its uncertainty and the
    samples to confirm it; see :mod:`linkage.decide.running`. The lot's
    settings come from its row of ``process`` (a process table) and
    ``settings`` (which win); the ribbon stage's other inputs are held as
    every command holds them (:func:`linkage.decide.propagate.fill_settings`:
    their conditional mean given the others, the training mean when none is
    given). Logged as ``running`` with the advice; ``record=False`` (``--no-record``) writes nothing in the
    store, which is still read (the training lots' within-lot SD), so it must exist either way."""
    from linkage.decide import running as guide
    from linkage.decide.whatif import check_values
    from linkage.exceptions import InputError

    _check_running(spec, window, adjust, baseline)
    # recorded at the end: a store that would refuse the record is refused before the work (a store that does not
    # exist is refused where it is read, after the input problems: it is needed for the within-lot SD)
    will_record = record is not False
    if will_record:
        refuse_unanchored(store)
    spec = _spec(spec)
    df, lot, problems = guide.read_samples(samples)
    if lot is not None and not problems:
        lot = _lot_spellings([lot], store)[0]  # q26-005 in the samples is the stored Q26-005
    from_process: dict[str, float] = {}
    if process is not None:
        from_process, more = guide.process_settings(process, lot)
        problems += more
    problems += guide.baseline_problems(samples, df, baseline)
    if problems:
        raise InputError(problems)
    fitted = None
    if window is None:  # the window is found on the fitted chain (its training ranges), the rest on its numbers
        fitted = _fitted(models_dir, model)
        model = fitted.model_id if model is None or isinstance(model, str) else fitted
    lean = _lean(models_dir, model)
    given, bad = _given_settings(settings)
    check_values(lean, given, more=bad)
    values, held = _running_settings(lean, from_process, given)
    if window is None:
        window = _running_window(fitted, lean, spec, {k: v for k, v in values.items() if k != guide.POROSITY},
                                 seed, assurance)
        source = f"window of {spec.file or 'the spec'}"
    else:
        source = "given (--window)"
    stage = next(st for st in lean.stages if guide.POROSITY in st.targets)
    stored, ribbon = _stored_ribbon(store)
    result = guide.advise(lean, df, values, window, ribbon, stage.residual_lots, lot=lot, window_source=source,
                          adjust=adjust, baseline=baseline, confirm_shift_sd=confirm_shift_sd, alpha=alpha,
                          power=power, held=held)
    result.set_aside_lots = list(stored.set_aside)
    import hashlib

    digest = hashlib.sha256(Path(samples).read_bytes()).hexdigest()
    inputs = {"samples_file": Path(samples).name, "samples_sha256": digest, "settings": values, "held": held,
              "window": list(window), "window_source": source, "adjust": adjust, "baseline": baseline,
              "confirm_shift_sd": confirm_shift_sd, "alpha": alpha, "power": power,
              "spec_sha256": None if spec is None else spec.sha256}
    result.recorded = will_record and record_entry(store, "running", model_id=lean.model_id, lot=lot, inputs=inputs,
                                                   outputs=result.to_dict())
    return result


def audit(store=DEFAULT_STORE, *, lot: str | None = None) -> pd.DataFrame:
    """The store's audit trail, oldest first (``linkage audit``): one row
    per entry with ``id``, ``at``, ``user``, ``action``, ``lot``,
    ``model_id``, ``inputs`` and ``outputs``; only entries about ``lot`` when
    given, with the ingests that created or revised it. A ``lot`` the store
    does not hold and no entry names is refused (``UsageError``, exit code 2)."""
    import pandas as pd

    from linkage.store import reading

    with reading(store) as s:
        rows = s.audit(lot, with_ingests=True, require_lot=True)
    return pd.DataFrame(rows, columns=["id", "at", "user", "action", "lot", "model_id", "inputs", "outputs"])


# --------------------------------------------------------------------------- a workspace


@dataclass
class Workspace:
    """A lot store and a model registry, and the job's calls on them.

    >>> lab = Workspace("site.db", models_dir="models")   # doctest: +SKIP
    >>> lab.ingest("lab_exports/june"); trained = lab.train()  # doctest: +SKIP

    Each method is the function of the same name in :mod:`linkage.api` with
    ``store`` and ``models_dir`` filled in; the store file is created by the
    first ingest.
    """

    store: Path = Path(DEFAULT_STORE)
    models_dir: Path = Path(DEFAULT_MODELS_DIR)

    def __post_init__(self):
        self.store = Path(self.store)
        self.models_dir = Path(self.models_dir)

    def ingest(self, folder, *, reason: str | None = None, accept_unusual: bool = False,
               preview: bool = False) -> Ingested:
        """See :func:`ingest`."""
        return ingest(folder, self.store, reason=reason, accept_unusual=accept_unusual, preview=preview)

    def assemble(self, **kwargs) -> pd.DataFrame:
        """See :func:`assemble`."""
        return assemble(self.store, **kwargs)

    def train(self, **kwargs) -> Trained:
        """See :func:`train`."""
        return train(self.store, self.models_dir, **kwargs)

    def models(self) -> pd.DataFrame:
        """See :func:`models`."""
        return models(self.models_dir)

    def retrain(self, **kwargs) -> Retrained:
        """See :func:`retrain`."""
        return retrain(self.store, self.models_dir, **kwargs)

    def window(self, spec, **kwargs) -> Window:
        """See :func:`window`."""
        return window(spec, store=self.store, models_dir=self.models_dir, **kwargs)

    def space(self, spec, **kwargs):
        """See :func:`space`."""
        return space(spec, store=self.store, models_dir=self.models_dir, **kwargs)

    def whatif(self, values: Mapping[str, float], **kwargs) -> WhatIfResult:
        """See :func:`whatif`."""
        return whatif(values, store=self.store, models_dir=self.models_dir, **kwargs)

    def whatif_rows(self, rows, **kwargs) -> list[WhatIfResult]:
        """See :func:`whatif_rows`."""
        return whatif_rows(rows, store=self.store, models_dir=self.models_dir, **kwargs)

    def report(self, out=None, **kwargs) -> Path:
        """See :func:`report`."""
        return report(out, store=self.store, models_dir=self.models_dir, **kwargs)

    def watch(self, **kwargs) -> Watched:
        """See :func:`watch`."""
        return watch(store=self.store, models_dir=self.models_dir, **kwargs)

    def running(self, samples, **kwargs):
        """See :func:`running`."""
        return running(samples, store=self.store, models_dir=self.models_dir, **kwargs)

    def audit(self, **kwargs) -> pd.DataFrame:
        """See :func:`audit`."""
        return audit(self.store, **kwargs)

    def set_aside(self, lots, *, reason: str | None = None):
        """See :func:`set_aside`."""
        return set_aside(lots, self.store, reason=reason)

    def restore(self, lots, *, reason: str | None = None):
        """See :func:`restore`."""
        return restore(lots, self.store, reason=reason)

    def plan(self, n_lots: int, **kwargs):
        """See :func:`plan`."""
        return plan(n_lots, store=self.store, models_dir=self.models_dir, **kwargs)
