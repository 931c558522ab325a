"""Options shared by several commands, and the one place where library
errors become messages and exit codes."""

from __future__ import annotations

import contextlib
import functools
import os
import sys
import warnings
from pathlib import Path

import click

from linkage.exceptions import (IO_EXIT_CODE, LinkageError, LinkageWarning, StoreCaution, StoreIntegrityError,
                                StoreUpgraded, UsageError)

STORE_ENV = "LINKAGE_STORE"
MODELS_ENV = "LINKAGE_MODELS_DIR"


def store_option(f):
    return click.option(
        "--store",
        type=click.Path(dir_okay=False, path_type=Path),
        default=lambda: os.environ.get(STORE_ENV) or "linkage.db",  # an empty variable is unset
        show_default="linkage.db, or $LINKAGE_STORE",
        help="SQLite lot store file.",
    )(f)


def no_record_option(f):
    return click.option(
        "--no-record", "no_record", is_flag=True,
        help="Write nothing in the lot store: no audit entry, no recorded prediction (e.g. a what-if with a model "
             "received without its lots). The store, when it exists, is still read where the command reads it. "
             "Without it, a store named by --store or $LINKAGE_STORE must exist (refused, exit 2, otherwise); "
             "without either, a missing linkage.db is noted on stderr and nothing is recorded.",
    )(f)


def record_wanted(no_record: bool) -> bool | None:
    """The ``record=`` of :mod:`linkage.api` for a command with ``--no-record``: False with it; True when the
    user named the store (``--store``, or ``$LINKAGE_STORE`` set non-empty), so that a store that does not exist
    is refused; None for the default store (not recorded when it does not exist)."""
    if no_record:
        return False
    return True if store_named() else None


def store_named() -> bool:
    """Whether the user named the lot store of the running command: ``--store``, or ``$LINKAGE_STORE`` set
    non-empty (not the default ``linkage.db``)."""
    source = click.get_current_context().get_parameter_source("store")
    return source is not click.core.ParameterSource.DEFAULT or bool(os.environ.get(STORE_ENV))


def note_set_aside_unread(store, unread: str | None) -> None:
    """Say on stderr that the model's training lots now set aside were not looked for (``window``, ``space``:
    ``set_aside_unread``, why the store was not read): a store that does not exist, when the user named it (the
    default linkage.db may lack); a store that could not be read, always. Nothing when it was read."""
    if unread is None:
        return
    if not Path(store).exists():
        if store_named():
            tell_progress(f"Note: no lot store at {store}; the model's training lots now set aside were not looked "
                          "for.")
        return
    tell_progress(f"Note: the lot store {store} could not be read ({unread.rstrip('.')}); the model's training "
                  "lots now set aside were not looked for.")


def models_dir_option(f):
    return click.option(
        "--models-dir",
        type=click.Path(file_okay=False, path_type=Path),
        default=lambda: os.environ.get(MODELS_ENV) or "models",  # an empty variable is unset
        show_default="models/, or $LINKAGE_MODELS_DIR",
        help="Model registry folder.",
    )(f)


def tell_progress(message: str) -> None:
    """A line on stderr (progress, a note, a warning, an error's words) that never stops the work or changes
    the exit code: where stderr's reader has stopped reading (``linkage demo 2>&1 | head -2``), the line is
    dropped and the work goes on, so that every file and record is written before the command ends."""
    if _progress_silenced:
        return
    try:
        click.echo(message, err=True)
    except BrokenPipeError:
        _silence_progress()


#: set once stderr's reader has stopped reading: later progress is not written
_progress_silenced: list[bool] = []


def _silence_progress() -> None:
    _progress_silenced.append(True)
    _to_devnull(sys.stderr)  # later writes to stderr (Python's own flush at exit included) go nowhere


def _to_devnull(stream) -> None:
    """Point ``stream``'s file descriptor at devnull, so that writes to it (Python's flush at exit included)
    go nowhere instead of raising BrokenPipeError; nothing to do for a stream without a file descriptor (a
    test's buffer)."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, stream.fileno())
    except (AttributeError, OSError, ValueError):
        return


@contextlib.contextmanager
def progress_bars(title: str | None = None):
    """A ``progress(label, done, total)`` callback for the library's long
    steps, drawing bars on stderr: one bar titled ``title`` for every call,
    or, without a title, one bar per label. A bar closes when it is full, and
    every bar when the block ends (an error included)."""
    bars: dict[str, object] = {}
    open_: set[str] = set()

    def close(key: str) -> None:
        if key in open_:
            open_.discard(key)
            bars[key].__exit__(None, None, None)

    def progress(label: str, done: int, total: int) -> None:
        if _progress_silenced:  # stderr's reader stopped reading: the work goes on without bars
            return
        try:
            draw(label, done, total)
        except BrokenPipeError:
            _silence_progress()

    def draw(label: str, done: int, total: int) -> None:
        key = title or label
        if key not in bars:
            bars[key] = click.progressbar(length=total, label=title or f"  {label}", file=sys.stderr)
            bars[key].__enter__()
            open_.add(key)
        if key in open_:
            bar = bars[key]
            bar.update(done - bar.pos)
            if done >= total:
                close(key)

    try:
        yield progress
    finally:
        for key in list(open_):
            try:
                close(key)
            except BrokenPipeError:
                _silence_progress()


def json_option(f):
    return click.option("--json", "as_json", is_flag=True, help="Print JSON instead of text.")(f)


def handle_errors(f):
    """Turn a LinkageError into its message on stderr and its exit code, and
    an OSError (the operating system refused a read or a write: disk full,
    permissions, a folder that cannot be made) into its file, its reason and
    exit code 5 (:data:`linkage.exceptions.EXIT_CODES`). Anything else is a
    bug and keeps its traceback (exit code 1). A :class:`LinkageWarning`
    raised on the way is printed once, as one ``Warning:`` line (a
    :class:`~linkage.exceptions.StoreCaution`: ``caution, store:``, left out
    when a ``StoreIntegrityError`` about the store ends the command). A
    store the command upgraded to record in it (a
    :class:`~linkage.exceptions.StoreUpgraded` warning) is said so, and its
    caution of an earlier read ("read as it is, not upgraded") left out."""

    @functools.wraps(f)
    def wrapper(*args, **kwargs):
        caught: list = []
        said: set[str] = set()
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", LinkageWarning)
                _caught.append(caught)
                try:
                    return f(*args, **kwargs)
                finally:
                    _caught.pop()
        except LinkageError as exc:
            if isinstance(exc, StoreIntegrityError):  # it says more than a caution about the same store
                said.update(f"{w.category.label}: {w.message}" for w in caught
                            if issubclass(w.category, StoreCaution))
            tell_progress(f"Error: {exc}")  # stderr's reader may have stopped too: the code still says it
            raise SystemExit(exc.exit_code) from None
        except BrokenPipeError:
            _stop_quietly()
        except OSError as exc:
            reason = exc.strerror or str(exc)
            if exc.filename is None and _writing_stdout(exc):
                tell_progress(stdout_failed(reason))
                raise SystemExit(IO_EXIT_CODE) from None
            what = f" {exc.filename}" if exc.filename is not None else ""
            tell_progress(f"Error: cannot read or write{what}: {reason}")
            raise SystemExit(IO_EXIT_CODE) from None
        finally:  # a linkage warning is one plain line on stderr, once; any other is shown as Python shows it
            upgraded = {_same_file(w.message.path) for w in caught if issubclass(w.category, StoreUpgraded)}
            for w in caught:
                if _same_file(getattr(w.message, "older_schema_of", None)) in upgraded - {None}:
                    continue  # "read as it is, not upgraded": no longer so, the upgrade is said instead
                if issubclass(w.category, LinkageWarning):
                    line = f"{w.category.label}: {w.message}"
                    if line not in said:  # a store opened twice by one command cautions once
                        said.add(line)
                        tell_progress(line)  # never a second error where stderr is closed
                else:
                    warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)

    return wrapper


#: the warnings caught so far by each command running under :func:`handle_errors`, the innermost last
_caught: list[list] = []


def _same_file(path) -> str | None:
    """``path`` as one text per file (resolved), to compare the store a warning names; None stays None."""
    return None if path is None else str(Path(path).resolve())


def with_store_upgraded(payload):
    """A command's ``--json`` ``payload`` (a dict) with ``store_upgraded: {"from": 2, "to": 3}`` added when the
    running command upgraded a lot store written by an earlier linkage to record in it (a
    :class:`~linkage.exceptions.StoreUpgraded` warning, said on stderr too); unchanged otherwise, and for a
    payload that is not a dict (a list of results: stderr says it)."""
    found = next((w.message for w in (_caught[-1] if _caught else []) if issubclass(w.category, StoreUpgraded)),
                 None)
    if found is None or not isinstance(payload, dict):
        return payload
    return {**payload, "store_upgraded": {"from": found.version_from, "to": found.version_to}}


def stdout_failed(reason: str) -> str:
    """The error line when writing a command's output to standard output failed (``> /dev/full``: no space
    left on device). A command does its work (files written whole, records made) before it prints its result
    (see :func:`_stop_quietly`), so what it did by then is kept: said, lest the user run it again and record it
    twice. Not claimed done: a command that prints and then refuses (a preview that needs --reason, verify
    finding a problem) is cut short by the failed print, its refusal unsaid."""
    return (f"Error: cannot write the command's output to standard output: {reason}. What the command did before "
            "it printed (files written, records made, if any) is kept; see 'linkage audit' before running it "
            "again, lest it be recorded twice.")


def _writing_stdout(exc: BaseException) -> bool:
    """Whether ``exc`` was raised by ``click.echo`` writing to standard output (every command prints through
    it, and it flushes each time), rather than by the work writing a file."""
    tb = exc.__traceback__
    while tb is not None:
        frame = tb.tb_frame
        if frame.f_code.co_name == "echo" and frame.f_globals.get("__name__") == "click.utils" \
                and not frame.f_locals.get("err"):
            stream = frame.f_locals.get("file")
            try:
                if stream is sys.stdout or stream.fileno() == sys.__stdout__.fileno():
                    return True
            except (AttributeError, OSError, ValueError):
                return False
        tb = tb.tb_next
    return False


def _stop_quietly() -> None:
    """The reader of stdout stopped reading (``linkage lots | head -2``): stop as common Unix tools do, with
    no message. Python's note on SIGPIPE (https://docs.python.org/3/library/signal.html#note-on-sigpipe):
    point stdout at devnull, so that the flush at interpreter exit cannot raise a second BrokenPipeError.
    Its recipe exits 1; we exit 0, since code 1 means a bug here (README, "Exit codes") and the reader
    chose to stop (a pipeline's status is its last command's anyway). Every command writes its files
    and records before it prints its result, and its progress lines never stop it (:func:`tell_progress`,
    :func:`progress_bars`), so nothing is left undone when the output is cut short."""
    _to_devnull(sys.stdout)
    raise SystemExit(0)


def check_output(path: Path, *, folder: bool = False) -> None:
    """Refuse, before any work, an output path that cannot be written: a
    component of it that is a file, an existing folder where a file is
    wanted (or the reverse), a nearest existing folder that is not
    writable, or ``-`` (read elsewhere as standard output, which an output
    file or folder never is here). Raises :class:`~linkage.exceptions.UsageError` (exit code 2)."""
    path = Path(path)
    what = "output folder" if folder else "output file"
    if str(path) == "-":  # not standard output: a command's output file is written whole, then named
        raise UsageError(f"{what} '-': standard output is not taken here; give a {what.split()[1]} name (its full path "
                         "for one named '-'); nothing was written")
    if path.exists():
        if folder and not path.is_dir():
            raise UsageError(f"{what} {path} is a file, not a folder; nothing was written")
        if not folder and path.is_dir():
            raise UsageError(f"{what} {path} is a folder; give a file name; nothing was written")
    parent = path if folder else path.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if parent.exists() and not parent.is_dir():
        raise UsageError(f"cannot write the {what} {path}: {parent} is a file, not a folder; nothing was written")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise UsageError(f"cannot write the {what} {path}: folder {parent} is not writable; nothing was written")


class FiniteFloat(click.FloatRange):
    """A float option that must be finite (NaN and inf pass click's own
    FloatRange, since every comparison with NaN is false)."""

    name = "finite float"

    def convert(self, value, param, ctx):
        import math

        number = click.FLOAT.convert(value, param, ctx)
        if not math.isfinite(number):
            self.fail(f"{value!r} is not a finite number.", param, ctx)
        return super().convert(number, param, ctx)


#: a probability or coverage strictly between 0 and 1
PROBABILITY = FiniteFloat(0, 1, min_open=True, max_open=True)
