"""A computation of the report run in a second process while the report draws.

The design-space map (:func:`linkage.decide.space.design_space`) does not
depend on anything the other sections compute, and it is the largest single
cost of the report; on a machine with two cores or more it runs in a forked
child process from the start of the report and is collected where its
section comes. The child computes exactly what the report would (same
function, same arguments, same seed), so the numbers do not depend on where
it ran. Where ``fork`` is not available (Windows, or one core), or the child
fails in any way, the computation runs in the report's own process when the
section asks for it, which also raises any error exactly as before.
"""

from __future__ import annotations

import multiprocessing
import os


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


def _run(send, fn, args, kwargs) -> None:  # in the child
    try:
        value = ("ok", fn(*args, **kwargs))
    except BaseException:  # noqa: BLE001 - the parent computes it again and raises what it raises
        value = ("failed", None)
    try:
        send.send(value)
    except Exception:  # noqa: BLE001 - an unpicklable result: the parent computes it itself
        send.send(("failed", None))
    send.close()


class Background:
    """``fn(*args, **kwargs)`` started in a forked child (unless ``fork`` is false); :meth:`result`
    returns its value."""

    def __init__(self, fn, *args, fork: bool = True, **kwargs):
        self._call = (fn, args, kwargs)
        self._proc = self._conn = None
        if fork and "fork" in multiprocessing.get_all_start_methods() and _cores() >= 2:
            ctx = multiprocessing.get_context("fork")
            self._conn, send = ctx.Pipe(duplex=False)
            self._proc = ctx.Process(target=_run, args=(send, fn, args, kwargs), daemon=True)
            self._proc.start()
            send.close()

    def result(self):
        """The child's value; computed here when there is no child or it did not deliver."""
        if self._proc is not None:
            try:
                status, value = self._conn.recv()
            except (EOFError, OSError):
                status, value = "lost", None
            self.close(wait=status == "ok")
            if status == "ok":
                return value
        fn, args, kwargs = self._call
        return fn(*args, **kwargs)

    def close(self, wait: bool = False) -> None:
        """End the child (it may be waiting to deliver a value nobody asked for); ``wait``: it
        has delivered, let it exit by itself."""
        if self._proc is not None:
            if wait:
                self._proc.join(timeout=10)
            if self._proc.is_alive():
                self._proc.terminate()
            self._proc.join()
            self._conn.close()
            self._proc = None


def _every_other(fn, items, start: int) -> list:
    return [fn(item) for item in items[start::2]]


def split_map(fn, items, *, fork: bool = True) -> list:
    """``[fn(item) for item in items]``, the odd items in a forked child while
    this process does the even ones (when ``fork`` and the machine allow it;
    else all here). ``fn`` must give the same value wherever it runs (here:
    a figure drawn to PNG bytes)."""
    items = list(items)
    if len(items) < 2:
        return [fn(item) for item in items]
    child = Background(_every_other, fn, items, 1, fork=fork)
    try:
        even = _every_other(fn, items, 0)
        odd = child.result()
    finally:
        child.close()
    out = [None] * len(items)
    out[0::2], out[1::2] = even, odd
    return out
