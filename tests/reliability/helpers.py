"""Tools of the reliability tests: a warm process that forks and SIGKILLs
commands, a dump of a lot store, a watchdog for hangs, and the "clear error"
checks.

Why a warm process (the *forker*): importing pandas, scikit-learn and linkage
takes seconds, and the kill tests start a command dozens of times. The forker
is one ``python`` process started by the test; it imports linkage once, then
for each request forks a child that runs the real ``linkage`` command line
(``cli.main([...])``, the same click entry point as the installed script), and
after a chosen delay stops the child (SIGSTOP), notes the POSIX locks it holds
(``/proc/locks``), and kills it with SIGKILL. The forker is the child's parent
and reaps it, so a pid is never signalled after it could have been reused.

SQLite's WAL write lock is an exclusive fcntl lock on byte 120 of the
``-shm`` file (SQLite source, ``src/os_unix.c`` ``UNIX_SHM_BASE`` = 120 and
``src/wal.c`` ``WAL_WRITE_LOCK`` = 0; from memory, checked here by observing
that the lock is held exactly while an ingest's transaction is open). A child
killed while holding it was killed inside a write transaction.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import signal
import sqlite3
import subprocess
import sys
import threading
from pathlib import Path

from linkage.exceptions import LinkageError

#: findings still open (numbers of tests/reliability/FINDINGS.md). Where a test has to step
#: around one to check everything else, it does so only while the number is here; each is pinned by a
#: test marked xfail(strict=True). When a finding is fixed, remove its number and flip that mark.
OPEN_FINDINGS: set[int] = set()

#: byte of the -shm file that SQLite's unix VFS locks for the WAL write lock
WAL_WRITE_LOCK_BYTE = 120

_FORKER = r"""
import json, os, signal, sys, time
warm = json.loads(sys.argv[1])
import importlib
for name in warm:
    importlib.import_module(name)
from linkage.cli.main import cli

def held_locks(pid):
    out = []
    try:
        with open("/proc/locks") as fh:
            for line in fh:
                tok = line.split()
                if "->" in tok:
                    continue  # a waiter, not a holder
                for i, t in enumerate(tok):
                    if t in ("POSIX", "FLOCK", "OFDLCK"):
                        if len(tok) > i + 6 and tok[i + 3] == str(pid):
                            out.append([t, tok[i + 2], tok[i + 4], tok[i + 5], tok[i + 6]])
                        break
    except OSError:
        return None
    return out

for line in sys.stdin:
    req = json.loads(line)
    t0 = time.monotonic()
    pid = os.fork()
    if pid == 0:
        code = 98
        try:
            fd = os.open(req["log"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
            os.dup2(fd, 1)
            os.dup2(fd, 2)
            os.chdir(req["cwd"])
            try:
                if req["mode"] == "cli":
                    cli.main(req["args"], prog_name="linkage", standalone_mode=True)
                    code = 0
                else:
                    exec(compile(req["code"], "<forked>", "exec"), {"ARGS": req["args"]})
                    code = 0
            except SystemExit as exc:
                code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
        except BaseException:
            import traceback
            traceback.print_exc()
            code = 99
        finally:
            try:
                sys.stdout.flush()
                sys.stderr.flush()
            finally:
                os._exit(code)
    kill_after = req.get("kill_after")
    after_lock = req.get("kill_after_lock")
    killed, locks, span, next_look = False, [], None, 0.0
    while True:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            break
        now = time.monotonic() - t0
        if (req.get("watch") or after_lock is not None) and now >= next_look:
            # does the child hold the lock (by default SQLite's WAL write lock: byte 120 of a -shm file)?
            next_look = now + 0.002
            kind, mode, first = req.get("lock") or ("POSIX", "WRITE", "120")
            held = held_locks(pid) or []
            if any(k == kind and m == mode and a == first for k, m, _, a, b in held):
                span = [now, now] if span is None else [span[0], now]
                if after_lock is not None and kill_after is None:
                    kill_after = now + after_lock
        if kill_after is not None and now >= kill_after:
            os.kill(pid, signal.SIGSTOP)
            locks = held_locks(pid)
            os.kill(pid, signal.SIGKILL)
            killed = True
            _, status = os.waitpid(pid, 0)
            break
        time.sleep(0.0005)
    sys.stdout.write(json.dumps({
        "pid": pid, "killed": killed, "elapsed": time.monotonic() - t0, "locks": locks, "write_lock_span": span,
        "code": os.WEXITSTATUS(status) if os.WIFEXITED(status) else None,
        "signal": os.WTERMSIG(status) if os.WIFSIGNALED(status) else None,
    }) + "\n")
    sys.stdout.flush()
"""


class Forker:
    """A warm Python process that runs linkage commands in forked children
    and kills them on request (see the module notes).

    ``warm`` lists modules to import once before any fork.
    """

    def __init__(self, workdir: Path, warm: list[str]):
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1",
                   PYTHONHASHSEED="0")
        env.pop("LINKAGE_STORE", None)
        env.pop("LINKAGE_MODELS_DIR", None)
        self._proc = subprocess.Popen([sys.executable, "-c", _FORKER, json.dumps(warm)], stdin=subprocess.PIPE,
                                      stdout=subprocess.PIPE, text=True, env=env, cwd=self.workdir)
        self._lock = threading.Lock()
        self.runs = 0

    def run(self, args: list[str], kill_after: float | None = None, *, code: str | None = None,
            log: Path | None = None, watch: bool = False, kill_after_lock: float | None = None,
            lock: tuple[str, str, str] | None = None) -> dict:
        """Run ``linkage ARGS`` (or ``code`` with ``ARGS`` bound) in a forked
        child; SIGKILL it ``kill_after`` seconds after the fork unless it has
        ended. Returns pid, killed, elapsed, exit code or signal, and the
        locks it held when it was stopped. ``watch`` also reports
        ``write_lock_span``: the first and last moment (seconds after the
        fork) the child was seen holding SQLite's WAL write lock.
        ``kill_after_lock`` kills the child that many seconds after it was
        first seen holding that lock (inside its write transaction). ``lock``
        names another lock to watch: (kind, mode, first byte) as
        /proc/locks shows them, e.g. ("FLOCK", "WRITE", "0")."""
        req = {"mode": "cli" if code is None else "code", "args": [str(a) for a in args], "code": code,
               "kill_after": kill_after, "kill_after_lock": kill_after_lock, "cwd": str(self.workdir),
               "watch": watch, "lock": lock,
               "log": str(log if log is not None else self.workdir / "child.log")}
        with self._lock:
            if self._proc.poll() is not None:
                raise RuntimeError(f"the forker process ended (exit {self._proc.returncode})")
            self._proc.stdin.write(json.dumps(req) + "\n")
            self._proc.stdin.flush()
            line = self._proc.stdout.readline()
        if not line:
            raise RuntimeError("the forker process ended without answering")
        self.runs += 1
        return json.loads(line)

    def close(self) -> None:
        if self._proc.poll() is None:
            self._proc.stdin.close()
            try:
                self._proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self._proc.kill()  # the process this object started, by its handle
                self._proc.wait()
        self._proc.stdout.close()


def held_wal_write_lock(result: dict, store: Path) -> bool | None:
    """Whether the killed child held the store's WAL write lock (None when
    the locks could not be read)."""
    locks = result.get("locks")
    if locks is None:
        return None
    shm = Path(f"{store}-shm")
    inode = shm.stat().st_ino if shm.exists() else None
    for kind, mode, devino, start, end in locks:
        if kind == "POSIX" and mode == "WRITE" and start == end == str(WAL_WRITE_LOCK_BYTE):
            if inode is None or devino.rsplit(":", 1)[-1] == str(inode):
                return True
    return False


# --------------------------------------------------------------------------- the store, read raw


def _connect(path: Path) -> sqlite3.Connection:
    """Plain sqlite3, never creating a file that is not there (mode=rw)."""
    return sqlite3.connect(f"file:{Path(path).resolve()}?mode=rw", uri=True)


def dump(path: Path) -> dict[str, list[tuple]]:
    """Every row of every table of a store, in rowid order, read with plain
    sqlite3 (not through linkage). Tables of a lot store are append-only, so an
    earlier dump must be a prefix of a later one."""
    con = _connect(path)
    try:
        names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
        return {n: con.execute(f'SELECT rowid, * FROM "{n}" ORDER BY rowid').fetchall() for n in names}
    finally:
        con.close()


def integrity(path: Path) -> tuple[str, list]:
    """SQLite's own checks: PRAGMA integrity_check and foreign_key_check."""
    con = _connect(path)
    try:
        return con.execute("PRAGMA integrity_check").fetchone()[0], con.execute("PRAGMA foreign_key_check").fetchall()
    finally:
        con.close()


def lot_set(path: Path) -> set[str]:
    con = _connect(path)
    try:
        return {r[0] for r in con.execute("SELECT lot FROM lots")}
    finally:
        con.close()


def is_prefix(before: dict, after: dict) -> bool:
    return all(after.get(t, [])[: len(rows)] == rows for t, rows in before.items())


def write_batch(folder: Path, n_lots: int, seed: int, prefix: str) -> tuple[set[str], dict[str, int]]:
    """Synthetic lots (linkage.synthetic.make_lots) written as an ingest
    folder; returns their lot ids and the rows of each table."""
    from linkage.synthetic import make_lots

    lots = make_lots(n_lots, seed=seed, lot_prefix=prefix)
    lots.write_csv(folder)
    return set(lots.tables["process"]["lot"]), {t: len(df) for t, df in lots.tables.items()}


def rows_of(store: Path, lots: set[str]) -> dict[str, int]:
    """Raw rows per table held for ``lots`` (read with plain sqlite3)."""
    con = _connect(store)
    try:
        from linkage.store_rows import read_row_texts  # the rows as stored (schema 3: in row_blocks records)

        out: dict[str, int] = {}
        owner = {tid: (lot, tbl) for tid, lot, tbl in con.execute("SELECT id, lot, tbl FROM lot_tables")}
        for tid in read_row_texts(con)[0].tolist():
            lot, tbl = owner[tid]
            if lot in lots:
                out[tbl] = out.get(tbl, 0) + 1
        return out
    finally:
        con.close()


# --------------------------------------------------------------------------- hangs and clear errors


class Hang(BaseException):
    """A call ran past its time bound. A BaseException, like
    KeyboardInterrupt, so that no ``except Exception`` inside the code under
    test (pandas has several) can swallow it."""


@contextlib.contextmanager
def time_limit(seconds: float, what: str = "call"):
    """Fail with :class:`Hang` if the block runs longer than ``seconds``
    (SIGALRM; the main thread only, which is where pytest runs tests)."""
    if threading.current_thread() is not threading.main_thread() or not hasattr(signal, "setitimer"):
        yield
        return

    def on_alarm(signum, frame):
        raise Hang(f"{what} did not finish within {seconds:g} s")

    old = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds, 0.5)  # and again every 0.5 s until the block ends
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def clear_or_ok(call, *args, **kwargs):
    """Run ``call``; return ("ok", result) or ("refused", LinkageError).

    Anything else (a bare pandas, numpy, sqlite3, csv or openpyxl exception)
    propagates and fails the test: that is the traceback a user would see.
    A refusal must say something: a message with text beyond the class name.
    """
    try:
        return "ok", call(*args, **kwargs)
    except LinkageError as exc:
        assert str(exc).strip(), f"{type(exc).__name__} without a message"
        return "refused", exc


def run_cli(args: list, env: dict | None = None):
    """Run the command line in-process (click's CliRunner) and check the
    contract for users: a clean exit code and no traceback in what they see."""
    from click.testing import CliRunner

    from linkage.cli.main import cli

    result = CliRunner().invoke(cli, [str(a) for a in args], env=env, catch_exceptions=True)
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise AssertionError(f"linkage {' '.join(map(str, args))} raised {type(result.exception).__name__}: "
                             f"{result.exception}") from result.exception
    assert "Traceback" not in result.output, result.output
    return result


def posix_fork() -> bool:
    """The kill tests need fork() and /proc/locks (Linux)."""
    return hasattr(os, "fork") and Path("/proc/locks").exists()


def finite_json(obj) -> bool:
    """True when no number in a JSON-like object is NaN or infinite."""
    if isinstance(obj, dict):
        return all(finite_json(v) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return all(finite_json(v) for v in obj)
    if isinstance(obj, float):
        return math.isfinite(obj)
    return True


#: the input template on four invented lots (a copy of ../shared/template-example kept in the repository)
TEMPLATE_EXAMPLE = Path(__file__).resolve().parents[1] / "data" / "template-example"


def template_folder(tmp_path: Path, name: str = "in") -> Path:
    """A fresh copy of the template example to edit."""
    import shutil

    folder = tmp_path / name
    shutil.copytree(TEMPLATE_EXAMPLE, folder)
    return folder


def add_process_column(folder: Path, header: str, cell) -> None:
    """Append a column to the folder's process.csv; ``cell(i)`` gives the cell of data row i (1 = first)."""
    path = folder / "process.csv"
    lines = path.read_text().splitlines()
    lines[0] += f",{header}"
    lines[1:] = [f"{line},{cell(i)}" for i, line in enumerate(lines[1:], start=1)]
    path.write_text("\n".join(lines) + "\n")
