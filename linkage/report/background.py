"""A computation of the report run in a second process while the report draws.

The design-space map (:func:`linkage.decide.space.design_space`) does not
depend on anything the other sections compute, and it is the largest single
cost of the report; on a machine with two cores or more it runs in a forked
child process from the start of the report and is collected where its
section comes. The child computes exactly what the report would (same
function, same arguments, same seed), so the numbers do not depend on where
it ran. Where ``fork`` is not available (Windows, or one core), or the child
fails in any way, the computation runs in the report's own process when the
section asks for it, which also raises any error exactly as before. A child
that neither delivers nor ends within ``timeout`` seconds of being asked (a
hang, e.g. a lock held by another thread at the moment of the fork) is ended
and the value computed here, so a report never waits on it for ever.

The figures are drawn to PNG the same way (:class:`SharedMap`): children
forked as the sections go on, and the report's own process at the end,
each take the next figure that no process has taken yet, so no process
sits idle while another has a backlog; a figure gives the same bytes
wherever it is drawn, and what a child failed to deliver is drawn in the
report's own process.
"""

from __future__ import annotations

import gc
import multiprocessing
import os
from contextlib import contextmanager

#: Seconds :meth:`Background.result` waits for the child once asked, before it ends the child
#: and computes the value itself. Generous: the design-space map at 1,000 lots takes seconds.
WAIT_SECONDS = 600.0


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


def _run(send, fn, args, kwargs) -> None:  # in the child
    from linkage.exceptions import LinkageError

    # what the child inherits from the report's process outlives the child: out of its collector's passes, which
    # would otherwise walk it (and, writing their marks into it, copy its memory pages from the parent's)
    gc.freeze()

    try:
        value = ("ok", fn(*args, **kwargs))
    except LinkageError as exc:  # a refusal of these inputs: the parent raises it without computing again
        value = ("raised", exc) if _round_trips(exc) else ("failed", None)
    except BaseException:  # noqa: BLE001 - the parent computes it again and raises what it raises
        value = ("failed", None)
    try:
        send.send(value)
    except Exception:  # noqa: BLE001 - an unpicklable result: the parent computes it itself
        send.send(("failed", None))
    send.close()


def _round_trips(exc) -> bool:
    """Whether ``exc`` comes back from pickling as the same type with the same text (else the parent computes
    the value again and raises its own error, so the report's words never depend on where it ran)."""
    import pickle

    try:
        back = pickle.loads(pickle.dumps(exc))
    except Exception:  # noqa: BLE001 - any failure: not handed over
        return False
    return type(back) is type(exc) and str(back) == str(exc)


#: objects allocated between two collections of the youngest generation while a report runs (Python's default
#: is 700): matplotlib's artists come and go by the hundred thousand, most freed by reference counting anyway
YOUNG_THRESHOLD = 10_000


@contextmanager
def frozen_heap():
    """Inside: the objects that exist on entry (the fitted chain, the tables, the modules imported) are left out
    of Python's cyclic garbage collection (:func:`gc.freeze`) and put back on exit, and the youngest generation
    is collected every :data:`YOUNG_THRESHOLD` allocations instead of every 700.

    The report makes hundreds of thousands of short-lived objects (matplotlib's artists), which set off the
    collector's passes; a full pass walks every object of the process, the large and long-lived ones too, in
    the report's process and again in every child forked from it, where writing the collector's marks into
    those objects also copies their memory pages. Frozen, a pass walks only what was made since. Nothing is
    freed any later than it would be: what exists on entry outlives the report anyway. Where someone froze
    the heap already, it is left as it is (and so are the thresholds). The collector is on inside (the drawing
    makes garbage in cycles, matplotlib's figures), paused before or not (:func:`collector_paused`), and as it
    was after."""
    if gc.get_freeze_count():
        yield
        return
    thresholds, enabled = gc.get_threshold(), gc.isenabled()
    gc.freeze()
    gc.set_threshold(max(thresholds[0], YOUNG_THRESHOLD), *thresholds[1:])
    gc.enable()
    _FROZEN_HERE[0] = True
    try:
        yield
    finally:
        _FROZEN_HERE[0] = False
        gc.set_threshold(*thresholds)
        gc.unfreeze()
        if not enabled:
            gc.disable()


#: whether a :func:`frozen_heap` of this process froze the heap (and puts it back when it ends)
_FROZEN_HERE = [False]


def freeze_more() -> None:
    """Inside the :func:`frozen_heap` that froze the heap: the objects made since (the sections' numbers, the
    figures waiting to be drawn) frozen too, as they stand before the figures are drawn here or in a child
    forked now; they outlive the drawing, and its collections need not walk them. Elsewhere nothing."""
    if _FROZEN_HERE[0]:
        gc.freeze()


@contextmanager
def collector_paused():
    """No cyclic garbage collection inside (reference counting still frees what is dropped): for what a report
    does before it draws (loading the fitted chain, reading the store, assembling the table), whose imports and
    objects are nearly all kept, so that the collector's passes over the growing heap would find little to free.
    A :func:`frozen_heap` inside turns the collector on for its own time."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


class Background:
    """``fn(*args, **kwargs)`` started in a forked child (unless ``fork`` is false); :meth:`result`
    returns its value, or raises the :class:`linkage.exceptions.LinkageError` the child raised (the
    inputs refused: not computed again here)."""

    def __init__(self, fn, *args, fork: bool = True, timeout: float | None = None, **kwargs):
        self._call = (fn, args, kwargs)
        self._timeout = WAIT_SECONDS if timeout is None else float(timeout)
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
                # poll returns at once when the child has sent a value or has ended (end of file)
                ready = self._conn.poll(self._timeout)
                status, value = self._conn.recv() if ready else ("hung", None)
            except Exception:  # noqa: BLE001 - ended, broken or unreadable: computed here instead
                status, value = "lost", None
            self.close(wait=status in ("ok", "raised"))
            if status == "ok":
                return value
            if status == "raised":
                raise value
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


class Claims:
    """Which items (by index) some process has taken on: whichever process
    claims an index first does it, so a parent and the children it forks
    share out a list of jobs as they go, each taking the next one free, and
    none waits while another has a backlog. Shared memory made before the
    children are forked (``fork`` only); an index past ``size`` is always the
    caller's, so a parent never depends on a child for it."""

    def __init__(self, size: int = 4096):
        ctx = multiprocessing.get_context("fork")
        self.size = size
        self._taken = ctx.RawArray("b", size)
        self._lock = ctx.Lock()

    def free(self, n: int) -> int:
        """How many of the indices below ``n`` nobody has claimed yet."""
        return max(n - self.size, 0) + sum(1 for i in range(min(n, self.size)) if not self._taken[i])

    def claim(self, i: int) -> bool:
        """True when ``i`` was free (and is now the caller's)."""
        if i >= self.size:
            return True
        if not self._lock.acquire(timeout=30):  # a child ended holding it: do the job here (same value)
            return True
        try:
            if self._taken[i]:
                return False
            self._taken[i] = 1
            return True
        finally:
            self._lock.release()


def claimed_map(fn, items, claims: Claims) -> list:
    """``(i, fn(item))`` for each ``(i, item)`` of ``items`` that this process claims, in the order given."""
    return [(i, fn(item)) for i, item in items if claims.claim(i)]


class SharedMap:
    """``fn`` over items added as they come, shared between this process and
    children forked along the way (:meth:`start`), each child taking the
    items known when it was forked that nobody has taken yet; :meth:`finish`
    takes what is left here (beside one more child when there are at least
    ``2`` left) and returns every value in order. ``fn`` must give the same
    value wherever it runs (a figure drawn to PNG bytes). Without ``fork``
    (or on one core) everything is done in :meth:`finish`, in this process."""

    def __init__(self, fn, *, fork: bool = True):
        self.fn = fn
        self.items: list = []
        self.costs: list[float] = []
        self.fork = fork and "fork" in multiprocessing.get_all_start_methods() and _cores() >= 2
        self._claims = Claims() if self.fork else None
        self._children: list[Background] = []

    def add(self, item, cost: float = 1.0) -> int:
        """Queue ``item``; returns its index."""
        self.items.append(item)
        self.costs.append(float(cost))
        return len(self.items) - 1

    def _order(self) -> list[tuple[int, object]]:
        """The items, costliest first (the longest jobs started first finish the share-out evenly)."""
        order = sorted(range(len(self.items)), key=lambda i: -self.costs[i])
        return [(i, self.items[i]) for i in order]

    def start(self) -> None:
        """Fork a child that takes on the items so far that are still free."""
        if self.fork and self.items:
            freeze_more()
            self._children.append(Background(claimed_map, self.fn, self._order(), self._claims))

    def finish(self) -> list:
        """Every item's value, in the order added."""
        done: dict[int, object] = {}
        try:
            freeze_more()
            if self.fork and self._claims.free(len(self.items)) >= 2:
                self.start()
            if self.fork:
                done.update(claimed_map(self.fn, self._order(), self._claims))
            for child in self._children:  # a child that failed gives back nothing: done below
                done.update(child.result())
        finally:
            self.close()
        # what no child delivered (none forked, or one failed) is done here
        return [done[i] if i in done else self.fn(item) for i, item in enumerate(self.items)]

    def close(self) -> None:
        """End every child still working (a report that failed half way)."""
        for child in self._children:
            child.close()
        self._children = []
