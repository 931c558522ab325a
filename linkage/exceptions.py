"""Exceptions of linkage, one place for all of them.

They subclass built-ins (as scikit-learn's do), so a caller's ordinary
``except ValueError`` still catches bad input. The CLI turns every
:class:`LinkageError` into a message and an exit code; nothing else does.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass


#: The exit codes of the ``linkage`` command, documented in README.md
#: ("Exit codes") and DEVELOPERS.md; ``tests/test_cli_exit_codes.py`` checks
#: each against a command that ends with it.
EXIT_CODES: dict[int, str] = {
    0: "success",
    1: "an unexpected error: a bug in linkage (the traceback is printed; please report it)",
    2: "bad input or usage: every problem listed, nothing written (this includes a --store that names no "
       "lot store, no trained model, and an output path whose folder cannot be made)",
    3: "store busy: another process held the lot store's write lock for more than 10 s",
    4: "a model file failed its integrity check",
    5: "a file could not be read or written: the lot store is damaged, or the operating system refused a "
       "read or a write (disk full, permissions, a folder that cannot be created)",
    6: "the lot store failed its integrity check: a record changed, removed or added behind linkage's back; or a "
       "write to a store whose anchor file is missing (the removal of its newest records cannot be ruled out)",
}

#: exit code when the operating system refuses a read or write (an ``OSError``)
IO_EXIT_CODE = 5


class LinkageError(Exception):
    """Base class of every error linkage raises on purpose."""

    exit_code = 1
    #: True on a refusal an ingest's preview raises because the ingest itself would make it (bad input, a
    #: missing --reason, a store it may not write): ``linkage.api.ingest(..., preview=True)`` sets it; False on
    #: a failure of the preview itself (a store that cannot be opened or read)
    ingest_refusal = False


@dataclass(frozen=True)
class Problem:
    """One broken rule in one cell of one input file.

    ``row`` is the spreadsheet row as a person sees it: the header is row 1,
    the first data row is row 2. ``None`` where the problem is not a cell's
    (a missing column, a file-level rule). ``cell`` is the cell's A1
    reference (``C4``) where the file is a workbook sheet, else ``None``.

    A problem of a TOML file (``toml=True``; made by :func:`toml_problem`)
    is placed as the file has it: ``row`` is its line (first = 1), ``table``
    and ``key`` where it is, said "line", "table [...]" and "key '...'" (a
    user test: spec.toml's errors spoke of rows and columns); ``column`` is
    kept as before for code that reads it, and not said.
    """

    file: str
    rule: str
    row: int | None = None
    column: str | None = None
    value: object = None
    cell: str | None = None
    table: str | None = None
    key: str | None = None
    toml: bool = False

    def __str__(self) -> str:
        where = self.file
        if self.row is not None:
            where += f", line {self.row}" if self.toml else f", row {self.row}"
        if self.column is not None and not self.toml:
            where += f", column '{self.column}'"
        if self.table is not None:
            where += f", table [{self.table}]"
        if self.key is not None:
            where += f", key '{self.key}'"
        if self.cell is not None:
            where += f", cell {self.cell}"
        shown = "" if self.value is None else f", value {shown_value(self.value)}"
        return f"{where}{shown}: {self.rule}"


def toml_problem(file: str, rule: str, *, line: int | None = None, table: str | None = None,
                 key: str | None = None, value: object = None, column: str | None = None) -> Problem:
    """A broken rule of a TOML file (spec.toml, a chain file, columns.toml), placed by its ``line``, ``table``
    and ``key`` as the file has them. ``line`` is kept as the problem's ``row`` and ``column`` as given (what
    the reader called it before: the spec's table, the mapping's header, the chain's key), so that code reading
    those finds them where it did; the message says line, table and key only."""
    return Problem(file, rule, row=line, column=column, value=value, table=table, key=key, toml=True)


def shown_value(value: object) -> str:
    """A cell's value in a message as a person sees it in the file: text quoted (``'EX-001'``), a date of a
    workbook in ISO 8601 (``2026-01-05``, with the time where it is not midnight: ``2026-01-05 14:30``),
    TRUE/FALSE as a spreadsheet shows them, a number as Python writes it (``1.5``), never a Python repr such
    as ``datetime.datetime(2026, 1, 5, 0, 0)``."""
    if hasattr(value, "item") and getattr(value, "shape", None) == ():  # a numpy scalar: its Python value
        value = value.item()
    if isinstance(value, str):
        return repr(value)
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, dt.datetime):
        if value.time() == dt.time(0):
            return value.date().isoformat()
        return value.isoformat(sep=" ", timespec="minutes" if value.second == value.microsecond == 0 else "auto")
    if isinstance(value, (dt.date, dt.time)):
        return value.isoformat()
    if isinstance(value, dt.timedelta):  # a workbook duration cell
        return str(value)
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, int):
        return str(value)
    return str(value)


def shown_time(at) -> str:
    """A recorded time (ISO 8601; one without an offset is UTC, as linkage records it) as the texts show it:
    ``YYYY-MM-DD HH:MM:SS UTC``; text that is no ISO 8601 time as it is (the set-aside texts, the report's
    heading, the what-if page and sheet)."""
    try:
        when = dt.datetime.fromisoformat(str(at))
    except ValueError:
        return str(at)
    when = when.replace(tzinfo=dt.timezone.utc) if when.tzinfo is None else when.astimezone(dt.timezone.utc)
    return f"{when:%Y-%m-%d %H:%M:%S} UTC"


class InputError(LinkageError, ValueError):
    """Bad input: every problem of a file (or of a run) at once. Exit code 2."""

    exit_code = 2

    def __init__(self, problems: list[Problem] | Problem | str):
        if isinstance(problems, str):
            problems = [Problem(file="input", rule=problems)]
        elif isinstance(problems, Problem):
            problems = [problems]
        self.problems = list(problems)
        super().__init__(self._text())

    def __reduce__(self):
        # pickled with its problems, not its text (the report's second process hands errors back by pickle;
        # rebuilt from the text it would wrap the text in a second problem)
        return type(self), (self.problems,)

    def _text(self) -> str:
        n = len(self.problems)
        head = f"{n} problem{'s' if n != 1 else ''} found; nothing was written."
        return "\n".join([head, *(f"  - {p}" for p in self.problems)])


class SpecError(InputError):
    """A specification file breaks a rule (unknown attribute, min above max...)."""


class UsageError(LinkageError, ValueError):
    """A command was called with names or values it cannot use. Exit code 2."""

    exit_code = 2


class UnsupportedConfidenceError(UsageError):
    """A confidence above n/(n + 1), n the fewest lots with an out-of-fold residual among the judged attributes
    (:func:`linkage.decide.window.check_confidence_supported`). A :class:`UsageError` (exit code 2) where the
    user chose the confidence (window, space, plan); a caller that used a default the user cannot change
    (watch, running --spec) tells it apart and says what to do instead."""

    def __init__(self, message: str, *, confidence: float, attribute: str, n_lots: int):
        super().__init__(message)
        self.confidence = confidence
        self.attribute = attribute
        self.n_lots = n_lots

    @property
    def most(self) -> float:
        """n/(n + 1): the highest confidence these lots can show."""
        return self.n_lots / (self.n_lots + 1)

    def lots_text(self) -> str:
        """Why, in words every refusal of it shares: the attribute, its residual lots and the limit."""
        return confidence_lots_text(self.attribute, self.n_lots)

    def __reduce__(self):
        return _unsupported_confidence, (str(self), self.confidence, self.attribute, self.n_lots)


def confidence_lots_text(attribute: str, n_lots: int) -> str:
    """Why a confidence above n/(n + 1) is refused, in words: the attribute, its residual lots and the limit."""
    return (f"{attribute} has out-of-fold residuals on {n_lots} lots, and a probability above "
            f"n/(n + 1) = {n_lots / (n_lots + 1):.4f} cannot be told from 1 on them")


def _unsupported_confidence(message, confidence, attribute, n_lots):
    return UnsupportedConfidenceError(message, confidence=confidence, attribute=attribute, n_lots=n_lots)


class StoreBusyError(LinkageError, RuntimeError):
    """Another process holds the lot store's write lock for too long."""

    exit_code = 3


class StoreError(LinkageError, RuntimeError):
    """The lot store cannot be read or written: SQLite reports it damaged,
    or refuses to open it. Exit code 5."""

    exit_code = IO_EXIT_CODE


class StorePathError(StoreError):
    """``--store`` names no lot store this linkage can use: no file there (a
    command that only reads), a folder, another kind of file, a store written
    by a newer linkage, or a folder that does not exist. Exit code 2."""

    exit_code = 2


class StoreIntegrityError(StoreError):
    """The lot store's records do not match their seals: a stored row, an
    audit entry or a recorded prediction was changed, removed or added
    outside linkage, or the seal chain was cut. Nothing is read or written
    past the check."""

    exit_code = 6


class EmptyStoreFile(StorePathError):
    """An SQLite file without a table where a lot store was named, opened by a command that must not write
    (``read_only`` or ``upgrade=False``): refused as no store at all is (``create=False``; exit code 2), since
    making the store in it would write it. A command that writes (an ingest) makes the store in it."""


class StoreNeedsUpgrade(StoreError):
    """A store of an earlier schema that cannot be read as it is where it is opened for reading only
    (``LotStore(read_only=True)`` or ``upgrade=False``; schema 1, before seals): the first command that records in
    it with write access upgrades it. Exit code 5, as :class:`StoreError`; an ingest's preview, the commands that
    only read and what the recording commands read before their record decide on an upgraded copy instead
    (:func:`linkage.store_open.upgraded_copy`). ``version``: the store's schema."""

    version: int = 1


class ModelIntegrityError(LinkageError, RuntimeError):
    """A model artifact does not match the hash the registry recorded for it,
    or lies outside the registry. It is never loaded (joblib runs code)."""

    exit_code = 4


class ModelNotFoundError(LinkageError, LookupError):
    """No model with that id in the registry."""

    exit_code = 2


class NoModelError(ModelNotFoundError):
    """The models folder holds no model to use as ``latest``: no registry there, or none of its models complete
    (exit code 2). ``models_dir`` is the folder looked in and ``why`` its state, so that a caller that knows more
    (the report: a store with too few lots to train on) can say it in place of the plain hint
    (:func:`linkage.models.registry.no_model_text`)."""

    exit_code = 2

    def __init__(self, text: str, models_dir=None, why: str = ""):
        self.models_dir, self.why = models_dir, why
        super().__init__(text)

    def __reduce__(self):
        return type(self), (str(self), self.models_dir, self.why)


class InsufficientDataError(LinkageError, ValueError):
    """Too few lots (or too little variation) to do what was asked."""

    exit_code = 2


class NoVerifiedModelError(ModelIntegrityError, ModelNotFoundError):
    """``latest`` is the newest model in service, and it fails its integrity
    check: an integrity failure (exit code 4), not a missing model. No older
    model is used in its place; the message names the model, the file and the
    check, and how to go on (``--model ID`` names another model explicitly)."""

    exit_code = 4


class ModelIdError(ModelNotFoundError):
    """A model id that is no model id: a path, ``..``, a hidden name. Bad input (exit code 2), refused before
    the registry is read; a :class:`ModelNotFoundError`, so every caller that passes over a missing model
    (``latest``, ``linkage models``, ``linkage verify``) passes over it too."""

    exit_code = 2


class LinkageWarning(UserWarning):
    """Something the user should know that does not stop the command (the
    command line prints it as ``Warning: ...``, without Python's file and line)."""

    #: the word the command line puts before the message
    label = "Warning"


class StoreCaution(LinkageWarning):
    """What the check of the lot store could not cover, said by a command that only reads it (a store with
    seals but no anchor file: the removal of its newest records cannot be ruled out). The command line prints
    it as one ``caution, store: ...`` line, the words ``linkage verify`` uses."""

    label = "caution, store"


class StoreUpgraded(LinkageWarning):
    """A lot store written by an earlier linkage was upgraded to the current schema in place, by a command about to
    record in it (:meth:`linkage.store.LotStore._upgrade`): said, never silent, since an earlier linkage refuses
    the store after it ("written by a newer linkage"). The command line prints it as one ``caution, store: ...``
    line (and adds ``store_upgraded`` to the ``--json`` of a command that has one). Not a :class:`StoreCaution`: it
    says what was done to the store, not what a check could not cover, so it is never left out.
    ``path``, ``version_from`` and ``version_to``: the store and its schemas before and after."""

    label = "caution, store"

    def __init__(self, message: str, path=None, version_from: int | None = None, version_to: int | None = None):
        super().__init__(message)
        self.path, self.version_from, self.version_to = path, version_from, version_to
