"""How the model in service came to be, said in the report (a user test): after ``linkage retrain --force --reason
…`` promoted a challenger that did not meet the promotion rule and was trained on lots the watch had flagged, the
report written afterwards said nothing of it: no "promoted", no superseded model, no reason; the model card listed
the training lots only. The report now reads the store's audit trail (the ``promote``/``retrain`` entry that
``linkage retrain`` records under the challenger's id) and says, in "At a glance" and the model card, that the
model was promoted by force over model X, with the recorded reason and the lots the watch had flagged; a model no
entry names (trained by ``linkage train``) gets no new text.

Regression tests of a text: no outside source. The reference is what ``retrain`` itself returned and recorded
(:class:`linkage.decide.retrain.RetrainDecision`) on the same store.
"""

from __future__ import annotations

import html
import re

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.models import registry
from linkage.synthetic import WINDOW_SPEC, Truth, make_lots

CHANGE_AT = 60
NEW = 4  # lots after the change: fewer than the promotion rule's 5, so only a forced promotion promotes


def _write(tables, lots, folder):
    folder.mkdir(parents=True, exist_ok=True)
    for name, df in tables.items():
        df[df["lot"].isin(lots)].to_csv(folder / f"{name}.csv", index=False)


@pytest.fixture(scope="module")
def forced(tmp_path_factory):
    """Lots before a raw-material change trained on; 4 lots after it ingested (the watch flags them: dissolution
    drops by 8 points; too few for the promotion rule); then a forced promotion of the challenger fitted on all of them. Seeded (make_lots seed 5,
    the training seed 0)."""
    root = tmp_path_factory.mktemp("forced")
    lots = make_lots(84, seed=5, truth=Truth.window_scenario(), raw_material_change_at=CHANGE_AT,
                     raw_material_delta=-8.0)
    order = list(lots.tables["process"]["lot"])
    _write(lots.tables, order[:CHANGE_AT], root / "before")
    _write(lots.tables, order[CHANGE_AT:CHANGE_AT + NEW], root / "after")
    store, models = root / "lots.db", root / "models"
    runner = CliRunner()
    assert runner.invoke(cli, ["ingest", str(root / "before"), "--store", str(store)]).exit_code == 0
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models)])
    assert r.exit_code == 0, r.output
    champion = registry.load(models, "latest").model_id
    assert runner.invoke(cli, ["ingest", str(root / "after"), "--store", str(store)]).exit_code == 0
    from linkage.api import retrain

    decision = retrain(store, models, force=True, reason="QA-2026-77 <supplier> change approved")
    return store, models, champion, decision.to_dict()


def _parts(store, model):
    """The "At a glance" and model card sections of the report of ``model``, as text, and the origin read."""
    from linkage.api import _report_lots
    from linkage.assemble import assemble
    from linkage.report.html import _Builder, _glance, _model_card

    chain = registry.load(store.parent / "models", model)
    tables, *_, origin = _report_lots(store, chain.trained_product, chain)  # what api.report reads of the store
    table = assemble(tables)
    b = _Builder(parallel=False)
    _glance(b, chain, table, None, None, origin=origin)
    glance = "".join(str(p) for p in b.parts)
    b.close()
    b = _Builder(parallel=False)
    _model_card(b, chain, None, None, origin=origin)
    card = "".join(str(p) for p in b.parts)
    b.close()
    text = lambda h: html.unescape(re.sub(r"<[^>]+>", "", h))  # noqa: E731
    return text(glance), text(card), origin


def test_a_forced_promotion_is_said_with_the_superseded_model_the_reason_and_the_flagged_lots(forced):
    store, models, champion, d = forced
    assert d["promoted"] and d["forced"] and d["alarmed_lots"]  # the user test's case: flagged lots trained on
    assert any("NOT SHOWN" in r for r in d["reasons"])  # and the rule not met
    glance, card, origin = _parts(store, d["challenger_id"])  # the model in service after the forced promotion
    assert origin["champion"] == champion and origin["forced"] and origin["promoted"]
    flagged = [a["lot"] for a in d["alarmed_lots"]]
    for text in (glance, card):
        assert "Promoted by force" in text and "linkage retrain --force" in text
        assert f"superseding model {champion}" in text
        assert "reason recorded: “QA-2026-77 <supplier> change approved”" in text
        assert f"{len(flagged)} lot(s) the drift watch had flagged against model {champion}" in text
        assert all(lot in text for lot in flagged[:12])
        assert "although it did not meet the promotion rule (not shown for " in text
    assert "how it came into service" in card


def test_a_model_no_retrain_entry_names_gets_no_new_text(forced):
    store, models, champion, _ = forced
    glance, card, origin = _parts(store, champion)  # trained by `linkage train`: the audit has no retrain entry of it
    assert origin is None
    assert "Promoted" not in glance + card and "how it came" not in card and "superseding" not in glance + card


def test_a_challenger_left_out_of_service_says_so(forced):
    """A retrain without --force after the forced promotion: no new lots, so the rule does not promote its
    challenger (the champion stays); the report of that challenger (``--model ID``) says it was not promoted and
    which model stayed in service."""
    store, models, _, d = forced
    from linkage.api import retrain

    again = retrain(store, models).to_dict()
    assert not again["promoted"] and again["champion_id"] == d["challenger_id"]
    glance, card, origin = _parts(store, again["challenger_id"])
    assert origin["promoted"] is False and "how it came" in card
    for text in (glance, card):
        assert "A challenger fitted by linkage retrain" in text and "not promoted" in text
        assert f"model {d['challenger_id']} stayed in service" in text and "Promoted" not in text


def test_the_report_reads_only_the_entries_of_its_model_and_says_the_same_as_from_the_whole_trail(forced):
    """The report asks the store for the ``promote``/``retrain`` entries of its model only
    (:meth:`linkage.store.LotStore.decisions_of`, one query) instead of the whole trail parsed: the entries are
    those of the whole trail (:meth:`~linkage.store.LotStore.audit`) of those actions naming that model, in order,
    and the origin said from them is the one said from the whole trail. The reference is the store's own audit."""
    store, models, champion, d = forced
    from linkage.report.html import model_origin
    from linkage.store import reading

    with reading(store) as lot_store:
        trail = lot_store.audit()
        got = {model: lot_store.decisions_of(model) for model in (d["challenger_id"], champion, "no-such-model")}
    assert [a["action"] for a in got[d["challenger_id"]]][:1] == ["promote"] and got["no-such-model"] == []
    for model, entries in got.items():
        assert entries == [a for a in trail if a["action"] in ("promote", "retrain") and a["model_id"] == model]
        assert model_origin(entries, model) == model_origin(trail, model)
