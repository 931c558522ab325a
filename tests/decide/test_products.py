"""A store holding several products (a user test): ``retrain`` and ``watch`` take the model's product by default,
``retrain`` refuses another, ``train`` and ``predict`` say when a model was trained on several products, and the
report says how many lots of other products it leaves out.

No outside reference: these are rules of the lot record and of the commands' scope (which lots a command reads),
checked against counts taken here from the synthetic campaigns that make the store (their own ``process`` tables,
counted with pandas). The store: 30 lots of one product (24 before the model, 6 after), 8 of a second product whose
dissolution is 15 points lower, and 4 without a product name (as the template example's lots are).

Fits are the real ones (:func:`linkage.models.train.train_chain`) with two candidates and 20 bootstrap replicates
instead of every candidate and 200, to keep the tests quick: what is tested is which lots they are given.
"""

from __future__ import annotations

import json
from functools import partial
from html import escape

import pytest
from click.testing import CliRunner

from linkage import api
from linkage.cli.main import cli
from linkage.models import registry
from linkage.synthetic import Truth, make_lots

A, B = "QA-1 100 mg", "NB-2 50 mg"
CHEAP = dict(candidates=["mean", "linear_select"], n_bootstrap=20)


def _write(tables, folder, lots=None):
    folder.mkdir(parents=True, exist_ok=True)
    for name, df in tables.items():
        (df if lots is None else df[df["lot"].isin(lots)]).to_csv(folder / f"{name}.csv", index=False)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """The store above and a champion trained on product A's first 24 lots (``api.train(product=A)``)."""
    from linkage.models import train as training

    root = tmp_path_factory.mktemp("products")
    a = make_lots(30, seed=11, product=A, lot_prefix="QA")
    b = make_lots(8, seed=12, truth=Truth().shifted("dissolution_pct", -15.0), product=B, lot_prefix="NB",
                  start="2026-03-02")
    x = make_lots(4, seed=13, lot_prefix="EX", start="2026-04-06")
    order = list(a.tables["process"]["lot"])
    _write(a.tables, root / "a1", order[:24])
    _write(a.tables, root / "a2", order[24:])
    _write(b.tables, root / "b")
    _write(x.tables, root / "x")
    db, models = root / "lots.db", root / "models"
    api.ingest(root / "a1", db)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(training, "train_chain", partial(training.train_chain, **CHEAP))
        champion = api.train(db, models, product=A, materials=False).model_id
    for folder in ("a2", "b", "x"):
        api.ingest(root / folder, db)
    counts = {A: len(a.tables["process"]), B: len(b.tables["process"]), None: len(x.tables["process"])}
    return dict(root=root, db=db, models=models, champion=champion, new=order[24:], a_lots=order,
                b_lots=list(b.tables["process"]["lot"]), x_lots=list(x.tables["process"]["lot"]), counts=counts)


def _cheap(monkeypatch):
    from linkage.models import train as training

    monkeypatch.setattr(training, "train_chain", partial(training.train_chain, **CHEAP))


def test_the_store_is_what_the_campaigns_hold(store):
    from linkage.store import LotStore

    with LotStore(store["db"], create=False) as s:
        assert s.product_counts() == store["counts"]
    champion = registry.load(store["models"], store["champion"])
    assert champion.trained_product == A and champion.training["product_lots"] == {A: 24}
    assert champion.training["lots_without_product"] == 0


def test_watch_takes_the_models_product_by_default(store):
    """The user test: 'watch' charted the other product's and the unnamed lots against the model (13 alarms);
    it watches the model's product's lots and names the others it left out."""
    watched = api.watch(store=store["db"], models_dir=store["models"], model=store["champion"])
    assert watched.n_lots == store["counts"][A]
    assert sorted(watched.result.new_lots) == sorted(store["new"])
    others = store["counts"][B] + store["counts"][None]
    assert any(f"{others} lots of other products ('{B}': {store['counts'][B]}, no product: "
               f"{store['counts'][None]}) are not watched" in n for n in watched.notes)
    # an explicit product is watched, with a note that the model is another product's
    other = api.watch(store=store["db"], models_dir=store["models"], model=store["champion"], product=B)
    assert sorted(other.result.new_lots) == sorted(store["b_lots"])
    assert any(f"a model of {A!r}" in n for n in other.notes)


def test_retrain_refuses_another_product_than_the_champions(store):
    """A challenger of another product is not comparable with the champion: refused, exit 2, nothing written
    (a refusal: no outside source)."""
    before = {m["model_id"] for m in registry.list_models(store["models"])}
    r = CliRunner().invoke(cli, ["retrain", "--store", str(store["db"]), "--models-dir", str(store["models"]),
                                 "--product", B])
    assert r.exit_code == 2, r.output
    assert "not comparable" in r.output and repr(A) in r.output
    assert {m["model_id"] for m in registry.list_models(store["models"])} == before


def test_retrain_takes_the_champions_product_by_default(store, monkeypatch):
    """The user test: 'New lots since the champion: 18' (its product's 6, the other product's 8 and 4 unnamed)
    and a challenger trained on every lot of the store. Only the champion's product's lots count and are fitted."""
    _cheap(monkeypatch)
    models = store["root"] / "models-retrain"
    import shutil

    shutil.copytree(store["models"], models)
    decided = api.retrain(store["db"], models)
    d = decided.to_dict()
    assert d["product"] == A and sorted(d["new_lots"]) == sorted(store["new"])
    assert f"New lots since the champion: {len(store['new'])} (product {A})" in decided.text()
    challenger = registry.load(models, d["challenger_id"])
    assert sorted(challenger.training["lots"]) == sorted(store["a_lots"])
    assert challenger.trained_product == A
    assert any("12 lots of other products" in n for n in d["notes"])


def test_train_on_several_products_says_so(store, monkeypatch):
    """'train' without --product on a store of several products trains on all of them (a platform model may be
    meant) and says so: a note on stderr, ``products`` and ``products_note`` in --json; 'predict' with the model
    says what it was trained on."""
    _cheap(monkeypatch)
    models = store["root"] / "models-mixed"
    r = CliRunner().invoke(cli, ["train", "--store", str(store["db"]), "--models-dir", str(models),
                                 "--no-materials", "--json"])
    assert r.exit_code == 0, r.output
    c = store["counts"]
    said = (f"trained on 2 products: {B!r} ({c[B]} lots), {A!r} ({c[A]} lots), and {c[None]} lots with no "
            "product")
    assert f"Note: {said}" in r.stderr and "--product" in r.stderr
    d = json.loads(r.stdout)
    assert {(p["product"], p["n_lots"]) for p in d["products"]} == set(c.items())
    assert said in d["products_note"]
    assert registry.load(models, d["model_id"]).trained_product is None
    p = CliRunner().invoke(cli, ["predict", "--models-dir", str(models), "--set", "roll_force_kn_per_cm=8"])
    assert p.exit_code == 0, p.output
    assert f"Model {said}; give --product" in p.stdout
    pj = json.loads(CliRunner().invoke(cli, ["predict", "--models-dir", str(models), "--set",
                                             "roll_force_kn_per_cm=8", "--product", B, "--json"]).stdout)
    assert {(t["product"], t["n_lots"]) for t in pj["trained_products"]} == set(c.items())


def test_a_model_of_one_product_says_nothing_of_products(store, monkeypatch):
    """Trained with --product: no note, and 'predict' prints no line on products (as before)."""
    r = CliRunner().invoke(cli, ["predict", "--models-dir", str(store["models"]), "--model", store["champion"],
                                 "--set", "roll_force_kn_per_cm=8"])
    assert r.exit_code == 0, r.output
    assert "trained on" not in r.stdout
    d = registry.load(store["models"], store["champion"])
    from linkage.results import products_json

    assert products_json(d.training) == {"products": [{"product": A, "n_lots": 24}], "products_note": None}


def test_the_report_says_how_many_lots_of_other_products_it_leaves_out(store):
    """The lots section names the store's lots of other products, not shown."""
    from linkage.report.html import _Builder, _data_section
    from linkage.store import LotStore

    champion = registry.load(store["models"], store["champion"])
    table = api.assemble(store["db"], product=A)
    with LotStore(store["db"], create=False) as s:
        lots, others = s.lots(product=A), s.other_products(champion.trained_product)
    b = _Builder(parallel=False)
    _data_section(b, champion, table, lots, others)
    html = "".join(b.parts)
    c = store["counts"]
    said = (f"The store also holds {c[B] + c[None]} lots of other products ({B!r}: {c[B]}, no product: "
            f"{c[None]}); they are not shown: the report keeps to the product of the model, {A}.")
    assert escape(said) in html  # the template escapes the quotes as html.escape does
    b = _Builder(parallel=False)
    _data_section(b, champion, table, lots, [])
    assert "The store also holds" not in "".join(b.parts)


def test_a_model_of_several_products_is_marked_mixed_in_models_audit_and_watch(store, monkeypatch):
    """A model trained on several products was said to be so only by 'train' and 'predict'. It is now marked
    mixed in 'linkage models' (a line under the model; --json ``products``, ``mixed_products``), in the audit
    entry of its training ('trained on 42 lots, mixed (...)'; the entry's inputs gain ``product_lots`` and
    ``lots_without_product``) and in 'watch' (a line; --json ``trained_products``, ``mixed_products``); a model of
    one product is not. The counts are the campaigns' own (see the module's notes). Regression test of labels."""
    _cheap(monkeypatch)
    models = store["root"] / "models-marked"
    r = CliRunner().invoke(cli, ["train", "--store", str(store["db"]), "--models-dir", str(models),
                                 "--no-materials", "--json"])
    assert r.exit_code == 0, r.output
    mixed = json.loads(r.stdout)["model_id"]
    c = store["counts"]
    shown = {(p, n) for p, n in c.items()}
    said = f"trained on 2 products: {B!r} ({c[B]} lots), {A!r} ({c[A]} lots), and {c[None]} lots with no product"
    listed = json.loads(CliRunner().invoke(cli, ["models", "--models-dir", str(models), "--json"]).stdout)["models"]
    [row] = [m for m in listed if m["model_id"] == mixed]
    assert row["mixed_products"] is True and {(p["product"], p["n_lots"]) for p in row["products"]} == shown
    text = CliRunner().invoke(cli, ["models", "--models-dir", str(models)]).stdout
    assert f"    mixed: {said}" in text
    one = json.loads(CliRunner().invoke(cli, ["models", "--models-dir", str(store["models"]), "--json"]).stdout)
    [champion] = [m for m in one["models"] if m["model_id"] == store["champion"]]
    assert champion["mixed_products"] is False and champion["products"] == [{"product": A, "n_lots": 24}]
    assert "mixed:" not in CliRunner().invoke(cli, ["models", "--models-dir", str(store["models"])]).stdout

    audit = CliRunner().invoke(cli, ["audit", "--store", str(store["db"])]).stdout
    [line] = [l for l in audit.splitlines() if mixed in l and " train " in l]
    total = sum(c.values())
    assert f"trained on {total} lots, mixed ({B!r}: {c[B]}, {A!r}: {c[A]}, no product: {c[None]})" in line
    [own] = [l for l in audit.splitlines() if store["champion"] in l and " train " in l]
    assert "trained on 24 lots" in own and "mixed" not in own

    w = CliRunner().invoke(cli, ["watch", "--store", str(store["db"]), "--models-dir", str(models), "--json"])
    assert w.exit_code == 0, w.output
    d = json.loads(w.stdout)
    assert d["mixed_products"] is True and {(p["product"], p["n_lots"]) for p in d["trained_products"]} == shown
    assert "alarms" in d and "notes" in d  # the keys it had are kept
    wt = CliRunner().invoke(cli, ["watch", "--store", str(store["db"]), "--models-dir", str(models)]).stdout
    assert f"Model {mixed} is mixed: {said}" in wt
    own = api.watch(store=store["db"], models_dir=store["models"], model=store["champion"])
    assert own.to_dict()["mixed_products"] is False and "mixed" not in own.text()


def test_set_aside_lots_of_other_products_are_not_counted_as_left_out_for_their_product(store, tmp_path):
    """A lot of another product set aside is left out for being set aside, not for its product: the notes of
    watch and the report's count of other products' lots count the lots in use (the store's own scope rule: no
    outside source; the counts are the campaigns' own, taken with pandas in the fixture)."""
    import shutil

    from linkage import seal
    from linkage.store import LotStore

    path = tmp_path / "lots.db"
    shutil.copy(store["db"], path)
    shutil.copy(seal.anchor_path(store["db"]), seal.anchor_path(path))
    api.set_aside(store["b_lots"][0], path, reason="DEV-1: wrong blend")
    c = store["counts"]
    with LotStore(path, create=False) as s:
        assert s.product_counts() == c
        assert s.product_counts(in_use=True) == {**c, B: c[B] - 1}
        assert s.other_products(A) == [(B, c[B] - 1), (None, c[None])]
    watched = api.watch(store=path, models_dir=store["models"], model=store["champion"])
    assert any(f"{c[B] - 1 + c[None]} lots of other products ('{B}': {c[B] - 1}, no product: {c[None]}) are not "
               "watched" in n for n in watched.notes), watched.notes
