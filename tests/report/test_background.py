"""The report's second process (`linkage.report.background`): it gives what the report's own
process would have computed, and never makes the report wait on a child that hangs or dies.

The reference in each check is the direct call in this process (the module's stated contract:
"the child computes exactly what the report would").
"""

from __future__ import annotations

import os
import time

import numpy as np
import pytest

from linkage.report import background
from linkage.report.background import Background, Claims, SharedMap

forking = pytest.mark.skipif(
    background._cores() < 2 or not hasattr(os, "fork"), reason="needs fork and two cores"
)


def _square_sum(n: int) -> float:
    return float(np.sum(np.arange(n, dtype=float) ** 2))


def _sleep_then(value: int, seconds: float, parent: int) -> int:
    if os.getpid() != parent:  # only the child hangs; computed here it returns at once
        time.sleep(seconds)
    return value


def _fail_in_child(parent: int) -> str:
    if os.getpid() != parent:
        raise RuntimeError("child only")
    return "here"


@forking
def test_child_value_is_the_direct_call():
    job = Background(_square_sum, 1000)
    assert job._proc is not None
    assert job.result() == _square_sum(1000)


def test_without_fork_the_value_is_computed_here():
    job = Background(_square_sum, 10, fork=False)
    assert job._proc is None
    assert job.result() == _square_sum(10)


@forking
def test_a_failing_child_is_replaced_by_the_direct_call():
    assert Background(_fail_in_child, os.getpid()).result() == "here"


def _refuse_counting(path: str) -> None:
    """Raises a refusal of its inputs, leaving a line in ``path`` for each process that computed it."""
    from linkage.exceptions import UsageError

    with open(path, "a", encoding="utf-8") as fh:
        fh.write(f"{os.getpid()}\n")
    raise UsageError("no setting varies")


@forking
def test_a_refusal_in_the_child_is_raised_here_without_computing_again(tmp_path):
    """A LinkageError (the inputs refused) raised in the child is the one :meth:`result` raises, the same type
    and text as the direct call's, and the function ran once, in the child (the design-space map that cannot
    be made was computed three times before)."""
    from linkage.exceptions import UsageError

    counts = tmp_path / "calls.txt"
    with pytest.raises(UsageError, match="no setting varies"):
        Background(_refuse_counting, str(counts)).result()
    assert len(counts.read_text().split()) == 1 and int(counts.read_text().split()[0]) != os.getpid()


def _refuse_input(parent: int) -> None:
    from linkage.exceptions import InputError, Problem

    raise InputError([Problem(file="spec.toml", rule="min above max"), Problem(file="spec.toml", rule="no unit")])


@forking
def test_an_input_error_from_the_child_has_the_direct_calls_text():
    """An InputError handed back by pickle keeps its problems: the same type and text as the direct call's
    (rebuilt from its text it would wrap the text as a second problem); pickle itself is the reference."""
    import pickle

    from linkage.exceptions import InputError

    with pytest.raises(InputError) as direct:
        _refuse_input(os.getpid())
    back = pickle.loads(pickle.dumps(direct.value))
    assert type(back) is InputError and str(back) == str(direct.value) and back.problems == direct.value.problems
    with pytest.raises(InputError) as handed:
        Background(_refuse_input, os.getpid()).result()
    assert str(handed.value) == str(direct.value)


@forking
def test_a_hung_child_is_ended_and_the_value_computed_here():
    job = Background(_sleep_then, 7, 60.0, os.getpid(), timeout=0.5)
    child = job._proc
    started = time.monotonic()
    assert job.result() == 7
    assert time.monotonic() - started < 30
    assert not child.is_alive()


# ---- the figures shared out between the report's process and children forked along the way (issue 20,
# :class:`linkage.report.background.SharedMap`); the reference is the plain computation in one process

def _digest(i: int) -> str:
    import hashlib

    return hashlib.sha256(str(i).encode() * 20_000).hexdigest()  # some work, the same in every process


_PARENT = os.getpid()


def _digest_fails_in_a_child(i: int) -> str:
    if os.getpid() != _PARENT:
        raise RuntimeError("a child that fails")
    return _digest(i)


def _shared(fn, fork: bool, start_after=(3, 7)) -> list:
    shared = SharedMap(fn, fork=fork)
    for i in range(12):
        shared.add(i, cost=i % 4)
        if i in start_after:
            shared.start()  # children forked along the way, as the report does between sections
    return shared.finish()


def test_shared_map_is_the_plain_map_with_and_without_children():
    expected = [_digest(i) for i in range(12)]
    assert _shared(_digest, fork=True) == expected
    assert _shared(_digest, fork=False) == expected


@forking
def test_what_a_failing_child_took_on_is_done_in_the_parent():
    assert _shared(_digest_fails_in_a_child, fork=True) == [_digest(i) for i in range(12)]


@forking
def test_each_index_is_claimed_once():
    claims = Claims(size=8)
    assert [claims.claim(i) for i in (0, 1, 0, 7, 1)] == [True, True, False, True, False]
    assert claims.free(8) == 5
    assert claims.claim(8) and claims.claim(8)  # past the shared table: always the caller's


# ----------------------------------------------------------------- the collector while a report runs
# Regression tests of the collector's state around a report (no outside source: what is checked is that the
# state a caller had is what it has again, and that the objects of before are the ones left out). The use is the
# one the Python documentation of the gc module describes for a process that forks without exec: "call
# gc.freeze() right before fork()" (Python 3.12 Library Reference, gc.freeze).


def test_frozen_heap_leaves_out_what_exists_and_puts_everything_back():
    import gc

    before = gc.get_threshold()
    kept = [object() for _ in range(10)]  # noqa: F841 - objects that exist on entry
    assert gc.get_freeze_count() == 0
    with background.frozen_heap():
        frozen = gc.get_freeze_count()
        assert frozen > 0  # the objects of before are out of the collector's passes
        assert gc.get_threshold()[0] == max(before[0], background.YOUNG_THRESHOLD)
        assert gc.get_threshold()[1:] == before[1:]
        with background.frozen_heap():  # nested (a report inside a caller that froze): left as it is
            assert gc.get_freeze_count() == frozen
        assert gc.get_freeze_count() == frozen
    assert gc.get_freeze_count() == 0
    assert gc.get_threshold() == before


def test_frozen_heap_puts_everything_back_after_an_error():
    import gc

    before = gc.get_threshold()
    with pytest.raises(ZeroDivisionError):
        with background.frozen_heap():
            1 / 0
    assert gc.get_freeze_count() == 0 and gc.get_threshold() == before


def test_collector_paused_restores_the_state_it_found():
    import gc

    assert gc.isenabled()
    with background.collector_paused():
        assert not gc.isenabled()
    assert gc.isenabled()
    gc.disable()
    try:
        with background.collector_paused():
            assert not gc.isenabled()
        assert not gc.isenabled()  # a caller that had it off keeps it off
    finally:
        gc.enable()


def _freeze_count_here(parent: int) -> tuple[bool, int]:
    import gc

    return os.getpid() != parent, gc.get_freeze_count()


@forking
def test_a_child_leaves_what_it_inherits_out_of_its_collections():
    """The objects a child inherits from the report's process are frozen in the child (gc.freeze, the use the
    Python documentation of the gc module describes for fork without exec); this process is left as it was."""
    import gc

    in_child, frozen = Background(_freeze_count_here, os.getpid()).result()
    assert in_child and frozen > 0
    assert gc.get_freeze_count() == 0


def test_freeze_more_only_inside_the_frozen_heap_that_froze():
    import gc

    background.freeze_more()  # outside: nothing frozen, nothing to put back
    assert gc.get_freeze_count() == 0
    with background.frozen_heap():
        before = gc.get_freeze_count()
        made = [[i] for i in range(1000)]  # noqa: F841 - objects made since the heap was frozen
        background.freeze_more()
        assert gc.get_freeze_count() >= before + 1000
    assert gc.get_freeze_count() == 0  # all of it put back when the report ends


def test_frozen_heap_collects_inside_a_paused_collector_and_pauses_it_again():
    """api.report runs with the collector paused (loading, reading, assembling) and draws inside frozen_heap,
    where matplotlib's figures are garbage in cycles: collected there, paused again after."""
    import gc

    with background.collector_paused():
        with background.frozen_heap():
            assert gc.isenabled()
        assert not gc.isenabled() and gc.get_freeze_count() == 0
    assert gc.isenabled()


def test_the_report_entry_point_runs_with_the_collector_paused():
    import gc
    import inspect

    from linkage import api

    assert inspect.signature(api.report).parameters["store"].kind is inspect.Parameter.KEYWORD_ONLY  # the same
    seen = []
    with pytest.raises(ZeroDivisionError):  # paused inside, and on again after an error
        api._collector_paused(lambda: (seen.append(gc.isenabled()), 1 / 0))()
    assert seen == [False] and gc.isenabled()
