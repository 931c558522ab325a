"""Fixtures of the reliability group, and the counts it prints at the end.

Each test adds to named counters (kills survived, fuzz cases tried, files
refused, ...); ``pytest_terminal_summary`` prints them after the run, so the
numbers behind each promise of the README are in the test output.
"""

from __future__ import annotations

from collections import Counter

import pytest

#: counter name -> what it counts, in the order they are printed
COUNTS = {
    "ingest kills survived": "SIGKILLs of `linkage ingest` after which the store opened, passed "
                             "integrity_check and held all or none of the ingest",
    "  of which inside the write transaction": "the killed process held SQLite's WAL write lock",
    "  of which after the commit": "the ingest had landed whole",
    "first-ingest kills survived": "SIGKILLs while a new store was being created",
    "  of which left an empty store file (see #15)": "kills that left a 0-byte store file",
    "train kills survived": "SIGKILLs of `linkage train`; the registry never resolved a partial model",
    "  of which inside registry.save": "the killed train held the registry's write lock",
    "registry save kills survived": "SIGKILLs inside registry.save; `latest` always verified and loaded",
    "  half-written models left behind (never resolved)": "interrupted saves found on disk after a kill",
    "concurrent ingests landed": "ingests run at the same time as another ingest and readers",
    "concurrent reads checked": "reads during concurrent ingests that saw a consistent store",
    "store busy refusals": "writers refused with exit code 3 and a 'store busy' message",
    "  refused by the creation race (finding #16)": "first ingests refused as 'not a linkage lot store'",
    "fuzz cases tried": "generated or hand-made hostile inputs fed to a reader, spec or chain parser",
    "files refused": "of those, refused with a clear linkage error (the others read successfully)",
    "artifacts refused": "model ids, paths or files refused by the registry before any unpickling",
    "degenerate data sets handled": "single lot, too few lots, constant target, one porosity, missing column",
    "reproducibility runs compared": "training runs whose CV results and predictions were compared byte for byte",
    "settings errors caught before work": "bad spec or settings refused before the store or a model was touched",
    "tamper cases detected": "edits made behind linkage's back (SQL with triggers dropped, bytes of the file) "
                             "that stopped the next command with exit code 6 and that `linkage verify` named",
}

_counter: Counter = Counter()


@pytest.fixture(scope="session")
def counts() -> Counter:
    """Session counters; the summary at the end prints them."""
    return _counter


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    if not _counter:
        return
    terminalreporter.section("reliability counts")
    width = max(len(k) for k in COUNTS)
    for name in COUNTS:
        if name in _counter:
            terminalreporter.write_line(f"{name:<{width}}  {_counter[name]:>6}")
    for name in sorted(set(_counter) - set(COUNTS)):
        terminalreporter.write_line(f"{name:<{width}}  {_counter[name]:>6}")


@pytest.fixture(scope="session")
def small_chain_toml() -> str:
    """A one-stage chain: roll force and gap -> ribbon porosity. Training it
    on a few lots takes about a second, so the kill and artifact tests can
    train real models."""
    return ('[[stage]]\nname = "ribbon"\ninputs = ["roll_force_kn_per_cm", "roll_gap_mm"]\n'
            'targets = ["ribbon_porosity"]\n')


@pytest.fixture(scope="session")
def trained_small_session(small_chain_toml):
    """A real FittedChain of the small chain on 6 synthetic lots (seed 2),
    trained once; tests take a copy (``trained_small``)."""
    import warnings

    from linkage.assemble import assemble
    from linkage.models.chain import ChainSpec
    from linkage.models.train import train_chain
    from linkage.synthetic import make_lots

    table = assemble(make_lots(6, seed=2).tables)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return train_chain(table, ChainSpec.from_toml_text(small_chain_toml), seed=0)


@pytest.fixture
def no_env(monkeypatch):
    """Commands must not pick up a store or registry from the environment."""
    monkeypatch.delenv("LINKAGE_STORE", raising=False)
    monkeypatch.delenv("LINKAGE_MODELS_DIR", raising=False)


@pytest.fixture
def trained_small(trained_small_session):
    """A copy of the small trained chain that a test may change (saving sets
    its model id; some tests set a newer creation time)."""
    import copy

    return copy.deepcopy(trained_small_session)
