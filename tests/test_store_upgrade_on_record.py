"""A store written by an earlier linkage is upgraded only by a command that records in it, and the upgrade is said.

A store of schema 1 (before seals, ``tests/data/store-v1.db``) or 2 (``tests/data/store-v2.db`` with its anchor
file) is given to each command that writes, in a way that makes it refuse (bad input, a missing --reason, too few
lots, a missing registry, a model of another product): every file of the store's folder is hashed before and after
(names and SHA-256: no anchor file, lock, -wal or -shm added, no byte changed) and the schema read back. Before
this change, each of these refusals upgraded the store in place (schema 2 -> 3, its anchor moved to the upgrade
seal, ``<store>.seal.lock`` made), after which an earlier linkage refused it, while the command said "Nothing was
written". An accepted ingest upgrades it, and says so on stderr and in ``--json`` (``store_upgraded``).

These are regression tests of refusals and of the project's own contract (a refused command writes nothing; an
upgrade is said): they need no outside source. The reference for "unchanged" is the bytes of the files themselves.
"""

from __future__ import annotations

import json
import shutil
import warnings

import pytest

from linkage import api, seal
from linkage.exceptions import StoreUpgraded
from linkage.store import SCHEMA_VERSION, LotStore
from tests.reliability.helpers import run_cli
from tests.test_store_migration import DATA, EXAMPLE, _corrected
from tests.test_store_read_old import _copy, _files, _schema, trained_lab

OLD = [("store-v1.db", 1), ("store-v2.db", 2)]
SPEC = DATA.parent.parent / "data_demo" / "lots" / "spec.toml"


@pytest.fixture(params=OLD, ids=["schema1", "schema2"])
def old(request, tmp_path):
    """(the old store alone in its folder, its schema)."""
    fixture, version = request.param
    store = _copy(fixture, tmp_path / "db")
    assert _schema(store) == version
    return store, version


def _bad_folder(where):
    """The example folder with one ribbon density cell that is no number (``12x``): refused, exit code 2."""
    shutil.copytree(EXAMPLE, where)
    path = where / "ribbon.csv"
    lines = path.read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    j = header.index("envelope_density_g_cm3")
    cells = lines[1].split(",")
    cells[j] = "12x"
    lines[1] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return where


#: refusals that need no model: (id, arguments before --store, a function of tmp_path giving more arguments,
#: a piece of the error)
QUICK = [
    ("ingest without --reason", lambda t: ["ingest", EXAMPLE], "give --reason"),
    ("ingest of a bad folder", lambda t: ["ingest", _bad_folder(t / "bad")], "12x"),
    ("train with too few lots", lambda t: ["train", "--models-dir", t / "models"], "at least 5 lots"),
    ("window without a registry", lambda t: ["window", "--spec", SPEC, "--models-dir", t / "nonexist"],
     "no model registry"),
    ("predict without a registry", lambda t: ["predict", "--set", "roll_force_kn_per_cm=8", "--models-dir",
                                              t / "nonexist"], "no model registry"),
    ("transfer with too few lots", lambda t: ["transfer", "--roll-diameter-mm", "250", "--roll-width-mm", "50",
                                              "--gap-mm", "2", "--porosity", "0.3"], "at least 3 lots"),
]


@pytest.mark.parametrize("args, error", [q[1:] for q in QUICK], ids=[q[0] for q in QUICK])
def test_a_refused_command_leaves_an_older_store_as_it_was(old, args, error, tmp_path):
    """Regression: each of these refusals upgraded the store in place (and moved its anchor, made its lock file)."""
    store, version = old
    before = _files(store.parent)
    got = run_cli([*args(tmp_path), "--store", store])
    assert got.exit_code == 2 and error in got.stderr, got.output
    assert "upgraded to schema" not in got.stderr
    assert _files(store.parent) == before and _schema(store) == version


@pytest.fixture(scope="module")
def other_model(tmp_path_factory):
    """A model of product SYN-A, trained on twelve synthetic lots (linkage.synthetic.make_lots, seed 3) in a store of
    its own; the old stores' lots have no product, so a command that takes the model's product finds none."""
    return trained_lab(tmp_path_factory.mktemp("lab"), product="SYN-A")


OTHER_PRODUCT = [["watch"], ["plan", "--lots", "4", "--spec", "SPEC"], ["retrain"]]


@pytest.mark.slow
@pytest.mark.parametrize("args", OTHER_PRODUCT, ids=[a[0] for a in OTHER_PRODUCT])
def test_a_command_refused_for_a_model_of_another_product_leaves_an_older_store_as_it_was(old, other_model, args):
    """Regression: ``watch``, ``plan`` and ``retrain`` with a model of another product were refused (exit 2: no lot
    of that product in the store) after they had upgraded the store."""
    store, version = old
    models, spec = other_model
    before = _files(store.parent)
    got = run_cli([*[spec if a == "SPEC" else a for a in args], "--store", store, "--models-dir", models])
    assert got.exit_code == 2 and "no lot of product 'SYN-A'" in got.stderr, got.output
    assert _files(store.parent) == before and _schema(store) == version


def test_an_accepted_ingest_upgrades_the_store_and_says_so(old, tmp_path):
    """The ingest that records (``--reason`` given) upgrades the store, anchors it, and says so once on stderr and in
    ``--json`` (``store_upgraded``); the caution of its read before the upgrade ("not upgraded") is not said."""
    store, version = old
    fix = _corrected(tmp_path / "fix", lot="EX-002", change=2.0)
    done = run_cli(["ingest", fix, "--store", store, "--reason", "deviation D-2", "--json"])
    assert done.exit_code == 0, done.output
    assert json.loads(done.stdout)["store_upgraded"] == {"from": version, "to": SCHEMA_VERSION}
    said = f"was written by an earlier linkage (store schema {version}) and was upgraded to schema {SCHEMA_VERSION}"
    assert done.stderr.count(said) == 1 and "an earlier linkage no longer reads it" in done.stderr, done.stderr
    assert "not upgraded" not in done.stderr
    assert _schema(store) == SCHEMA_VERSION and seal.anchor_path(store).exists()
    again = run_cli(["ingest", fix, "--store", store, "--reason", "deviation D-2", "--json"])
    assert again.exit_code == 0 and again.stderr == "", again.output  # the current schema: nothing to say
    assert "store_upgraded" not in json.loads(again.stdout)


def test_the_library_says_the_upgrade_as_a_warning(old, tmp_path):
    """Python: the ingest's upgrade is a StoreUpgraded warning naming the store and both schemas; the text of a
    refusal before it names none, and ``LotStore.upgraded_from`` says what an opening for writing upgraded."""
    store, version = old
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with pytest.raises(Exception, match="give --reason"):
            api.ingest(EXAMPLE, store)
    assert not [w for w in caught if issubclass(w.category, StoreUpgraded)] and _schema(store) == version
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        api.ingest(EXAMPLE, store, reason="correction C-1")
    upgrades = [w.message for w in caught if issubclass(w.category, StoreUpgraded)]
    assert len(upgrades) == 1 and upgrades[0].path == store
    assert (upgrades[0].version_from, upgrades[0].version_to) == (version, SCHEMA_VERSION)
    twin = _copy(OLD[version - 1][0], tmp_path / "twin")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StoreUpgraded)
        with LotStore(twin, create=False) as s:
            assert s.upgraded_from == version
        with LotStore(twin, create=False) as s:
            assert s.upgraded_from is None


@pytest.mark.slow
def test_a_recorded_window_upgrades_the_store_it_records_in_and_says_so(old, other_model):
    """A window recorded in the older store (its audit entry) upgrades it, said on stderr and in ``--json``."""
    store, version = old
    models, spec = other_model
    got = run_cli(["window", "--spec", spec, "--store", store, "--models-dir", models, "--json"])
    assert got.exit_code == 0, got.output
    assert json.loads(got.stdout)["store_upgraded"] == {"from": version, "to": SCHEMA_VERSION}
    assert got.stderr.count(f"upgraded to schema {SCHEMA_VERSION}") == 1, got.stderr
    assert _schema(store) == SCHEMA_VERSION
    assert [a["action"] for a in api.audit(store).to_dict("records")][-1] == "window"
