"""Champion and challenger (issue 6): the promotion rule, the recorded
decision, and the window moving the right way after a raw-material change."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.decide.retrain import Comparison, decide
from linkage.exceptions import UsageError
from linkage.models import registry
from linkage.store import LotStore
from linkage.synthetic import WINDOW_SPEC, Truth, make_lots, spec_toml

CHANGE_AT = 60


def _comparison(r_new, r_old, se, name="dissolution_pct", passed=True):
    test = {"n": 30, "champion_rmse": r_old, "challenger_rmse": r_new, "rmse_ratio": r_new / r_old, "margin": 0.1,
            "alpha": 0.05, "mean_difference": -1.0, "statistic": -3.0, "df": 29,
            "p_value": 0.01 if passed else 0.4, "passed": passed}
    return Comparison(name, "pls", "pls", r_new, r_old, se, r_old, None, None, 0,
                      r_new <= r_old + se, r_new <= 1.1 * r_old, test)


def test_the_same_folds_comparison_is_reported_but_does_not_decide():
    """Issue 19: a challenger worse on the same folds but shown not worse on the new lots is promoted; one
    better on the same folds but not shown on the new lots is refused (the prospective test decides)."""
    ok, reasons = decide([_comparison(2.5, 2.0, 0.1, passed=True)])
    assert ok and reasons[0] == "the challenger meets the promotion rule" and "not used" in reasons[1]
    ok, reasons = decide([_comparison(1.5, 2.0, 0.1, passed=False)])
    assert not ok and "NOT SHOWN" in reasons[1]


def test_force_needs_a_reason():
    with pytest.raises(UsageError, match="needs a reason"):
        decide([_comparison(3.0, 2.0, 0.1)], force=True, reason=" ")
    ok, reasons = decide([_comparison(3.0, 2.0, 0.1)], force=True, reason="supplier change approved")
    assert ok and reasons[0] == "promotion forced: supplier change approved"


def _write(tables, lots, folder, spec=None):
    folder.mkdir(parents=True, exist_ok=True)
    for name, df in tables.items():
        df[df["lot"].isin(lots)].to_csv(folder / f"{name}.csv", index=False)
    if spec is not None:
        (folder / "spec.toml").write_text(spec_toml(spec), encoding="utf-8")


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    """Lots before a raw-material change ingested and trained on; then the
    lots after it ingested. Dissolution drops by 8 points from the change on."""
    root = tmp_path_factory.mktemp("drift")
    lots = make_lots(84, seed=5, truth=Truth.window_scenario(), raw_material_change_at=CHANGE_AT,
                     raw_material_delta=-8.0)
    order = list(lots.tables["process"]["lot"])
    _write(lots.tables, order[:CHANGE_AT], root / "before", WINDOW_SPEC)
    _write(lots.tables, order[CHANGE_AT:], root / "after")
    store, models = root / "lots.db", root / "models"
    runner = CliRunner()
    for folder in ("before",):
        assert runner.invoke(cli, ["ingest", str(root / folder), "--store", str(store)]).exit_code == 0
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models)])
    assert r.exit_code == 0, r.output
    champion = registry.load(models, "latest").model_id
    assert runner.invoke(cli, ["ingest", str(root / "after"), "--store", str(store)]).exit_code == 0
    return root, store, models, champion, order


def test_watch_flags_the_change_within_a_few_lots(campaign):
    root, store, models, champion, order = campaign
    r = CliRunner().invoke(cli, ["watch", "--store", str(store), "--models-dir", str(models), "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    chart = d["attributes"]["dissolution_pct"]
    flagged = [p["lot"] for p in chart["points"] if p["phase"] == "new" and p["flags"]]
    assert flagged and order.index(flagged[0]) <= CHANGE_AT + 4


def test_retrain_records_a_decision_and_the_window_moves_right(campaign):
    root, store, models, champion, order = campaign
    spec_path = root / "before" / "spec.toml"
    r = CliRunner().invoke(cli, ["retrain", "--store", str(store), "--models-dir", str(models),
                                 "--spec", str(spec_path), "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["champion_id"] == champion and d["challenger_id"] != champion
    assert d["reasons"] and d["rule"]
    assert len(d["new_lots"]) == len(order) - CHANGE_AT
    diss = d["targets"]["dissolution_pct"]
    # the champion never saw the new lots: its prospective bias is the shift, downwards
    assert diss["n_new"] == len(order) - CHANGE_AT and diss["prospective_bias"] < -3
    # issue 19: the paired test on those lots; the challenger's out-of-fold errors know the shift, the champion's
    # do not, so the challenger is shown not worse (indeed much better) on dissolution
    test = diss["prospective"]
    assert test["n"] == len(order) - CHANGE_AT and set(test["lots"]) == set(d["new_lots"])
    assert test["challenger_rmse"] < test["champion_rmse"] and test["passed"]
    assert d["promotion_test"]["margin"] == d["tolerance"] and d["promotion_test"]["min_new_lots"] >= 2
    # lower dissolution makes the dense side fail sooner: the low edge moves up
    moved = d["window_moved"]["moved"]
    assert moved["low"] is not None and moved["low"] > 0
    # the decision is in the registry, both models are kept
    recorded = registry.decisions(models)
    assert recorded[-1]["challenger_id"] == d["challenger_id"]
    ids = {m["model_id"] for m in registry.list_models(models)}
    assert {champion, d["challenger_id"]} <= ids
    latest = registry.load(models, "latest").model_id
    assert latest == (d["challenger_id"] if d["promoted"] else champion)
    # issue 20: the challenger keeps the watch's alarm design as train keeps it (the design for its own lots)
    from linkage.decide.watch import design_at_training

    challenger = registry.load(models, d["challenger_id"])
    assert challenger.training["watch_design"] == design_at_training(challenger)
    assert challenger.training["watch_design"]["design"]["n_reference_lots"] > \
        registry.load(models, champion).training["watch_design"]["design"]["n_reference_lots"]
    # and retrain --json says it, as train --json says its model's (a new-user test: it was only in the model)
    assert d["challenger_watch_design"] == challenger.training["watch_design"]
    assert recorded[-1]["challenger_watch_design"] == d["challenger_watch_design"]  # the registry's decision
    # and in the audit trail
    with LotStore(store, create=False) as s:
        actions = [e["action"] for e in s.audit()]
    assert actions.count("ingest") >= 2 and "train" in actions
    assert actions[-1] in ("promote", "retrain")


def test_a_challenger_that_is_not_promoted_is_kept_but_not_latest(campaign, monkeypatch):
    root, store, models, champion, _ = campaign
    from linkage.decide import retrain as rt

    original = rt.compare

    def every_attribute_worse(champ, chal, table, *, tolerance):
        out = original(champ, chal, table, tolerance=tolerance)
        for c in out:
            if c.prospective is not None:
                c.prospective["passed"] = False  # as if none were shown not worse: the rule must refuse
        return out

    monkeypatch.setattr(rt, "compare", every_attribute_worse)
    before = registry.load(models, "latest").model_id
    decision = rt.retrain(store, models)
    assert not decision.promoted
    assert decision.reasons[0].startswith("the challenger does not meet the promotion rule")
    assert registry.load(models, "latest").model_id == before
    row = next(m for m in registry.list_models(models) if m["model_id"] == decision.challenger_id)
    assert row["in_service"] is False and row["status"] == "ok"
    # a user test: `models` said nothing of which model is which, and `audit` put the rejected challenger in the
    # model column of a retrain that changed nothing (refusals and wording: no outside source)
    roles = {m["model_id"]: m["role"] for m in registry.list_models(models)}
    assert roles[decision.challenger_id] == "not promoted" and roles[before] == "champion"
    assert all(roles[m] == "superseded" for m in roles if m not in (before, decision.challenger_id))
    listing = CliRunner().invoke(cli, ["models", "--models-dir", str(models)]).output
    assert "role not promoted: a challenger that retrain kept" in listing and "role champion:" in listing
    text = CliRunner().invoke(cli, ["audit", "--store", str(store)]).output.splitlines()
    header, last = text[0].split(), next(line for line in reversed(text) if line.split()[5:6] == ["retrain"])
    assert header[:2] == ["id", "at"] and "outcome" in header and "reason" in header and "model" in header
    assert last.split()[6] == before  # id, at (date, time, UTC), user, action, model: the champion that stays
    assert f"not promoted, champion stays; challenger {decision.challenger_id} kept" in last


# ---- atomic lifecycle decisions (issue 15 item 4): two phases, the store's audit row being the decision
# (presumed abort, Gray & Reuter 1993, "Transaction Processing", ch. 10)


def _promote_everything(monkeypatch):
    from linkage.decide import retrain as rt

    monkeypatch.setattr(rt, "decide", lambda comparisons, **kw: (True, ["promoted for the test"]))
    return rt


def test_a_busy_store_leaves_the_champion_in_service_and_no_record(campaign, monkeypatch):
    root, store, models, champion, _ = campaign
    _promote_everything(monkeypatch)
    from linkage.exceptions import StoreBusyError

    before = registry.load(models, "latest").model_id
    with LotStore(store, create=False) as s:
        audit_before = len(s.audit())

    def busy(self, *a, **kw):
        raise StoreBusyError("store busy: test")

    monkeypatch.setattr(LotStore, "log", busy)
    result = CliRunner().invoke(cli, ["retrain", "--store", str(store), "--models-dir", str(models)])
    assert result.exit_code == 3 and "store busy" in result.stderr
    monkeypatch.undo()
    assert registry.load(models, "latest").model_id == before  # nothing entered service
    last = registry.decisions(models)[-1]
    assert last["state"] == registry.ABANDONED and last["promoted"] is True
    assert next(m for m in registry.list_models(models) if m["model_id"] == last["challenger_id"])["in_service"] is False
    with LotStore(store, create=False) as s:
        assert len(s.audit()) == audit_before
    # a retry makes one decision, not two promotions
    rt2 = _promote_everything(monkeypatch)
    decision = rt2.retrain(store, models)
    assert registry.load(models, "latest").model_id == decision.challenger_id
    assert [d["state"] for d in registry.decisions(models)[-2:]] == [registry.ABANDONED, registry.IN_EFFECT]


@pytest.mark.parametrize("killed_after_audit", [False, True])
def test_a_kill_between_the_phases_is_settled_by_the_store(campaign, monkeypatch, killed_after_audit):
    """A kill is simulated by an exception no handler catches (BaseException), after the audit row committed or
    before; the registry is left with a pending decision, the champion in service. The next retrain settles it by
    the audit trail before it does anything else."""
    root, store, models, champion, _ = campaign
    rt = _promote_everything(monkeypatch)
    before = registry.load(models, "latest").model_id

    class Killed(BaseException):
        pass

    if killed_after_audit:
        def kill(*a, **kw):
            raise Killed()
        monkeypatch.setattr(registry, "settle_decision", kill)
    else:
        def kill(self, *a, **kw):
            raise Killed()
        monkeypatch.setattr(LotStore, "log", kill)
    with pytest.raises(Killed):
        rt.retrain(store, models)
    monkeypatch.undo()
    [pending] = registry.pending_decisions(models)
    assert registry.load(models, "latest").model_id == before  # still the champion while pending
    settled = rt.settle_pending(store, models)
    expected = registry.IN_EFFECT if killed_after_audit else registry.ABANDONED
    assert settled == [(pending["decision_id"], expected)]
    latest = registry.load(models, "latest").model_id
    assert latest == (pending["challenger_id"] if killed_after_audit else before)
    with LotStore(store, create=False) as s:
        logged = [a for a in s.audit() if (a.get("inputs") or {}).get("decision_id") == pending["decision_id"]]
    assert len(logged) == (1 if killed_after_audit else 0)


def test_retrain_names_the_lots_the_watch_flagged_that_it_trains_on(campaign, tmp_path):
    """A user test: a forced promotion trained on the lot that raised the watch's alarm, said nothing of it, and
    afterwards `watch` said "No alarm on the lots since training": the alarm was visible only in the audit trail.
    `retrain` now names the lots it trains on that the watch's alarm flags against the champion (the watch's own
    computation, recomputed: the same lots `watch --json` signals on), in its text, its JSON (`alarmed_lots`) and
    its audit entry; a promotion says the watch will no longer show the alarm. No outside source: the reference
    is the watch's own output on the same store and champion."""
    root, store, models, champion, order = campaign
    only = tmp_path / "models"  # the original champion alone: earlier tests here may have promoted a challenger
    registry.import_model(models / champion, only, "the campaign's first champion")
    runner = CliRunner()
    watched = runner.invoke(cli, ["watch", "--store", str(store), "--models-dir", str(only), "--json"])
    assert watched.exit_code == 0, watched.output
    signalled = list(json.loads(watched.stdout)["mewma"]["signals"])
    assert signalled and all(order.index(lot) >= CHANGE_AT for lot in signalled)  # the change raised the alarm
    from linkage.api import retrain

    done = retrain(store, only, force=True, reason="new supplier qualified, CC-118")  # what the command prints
    d, text = done.to_dict(), done.text()
    assert d["promoted"] and d["forced"] and d["champion_id"] == champion
    assert [a["lot"] for a in d["alarmed_lots"]] == signalled and all(a["signal"] for a in d["alarmed_lots"])
    assert any("no longer shows this alarm" in n and signalled[0] in n for n in d["notes"])
    assert (f"Trained on {len(signalled)} lot(s) the watch's alarm flags against the champion: "
            + ", ".join(signalled)) in text
    assert all(f"  ! lot {lot}: " in text for lot in signalled)
    with LotStore(store, create=False) as s:
        entry = s.audit()[-1]
    assert entry["action"] == "promote" and [a["lot"] for a in entry["inputs"]["alarmed_lots"]] == signalled
    after = runner.invoke(cli, ["watch", "--store", str(store), "--models-dir", str(only)])
    assert "No alarm on the lots since training" in after.output  # why retrain had to say it
    audit = runner.invoke(cli, ["audit", "--store", str(store)]).output.splitlines()
    promoted = next(line for line in reversed(audit) if line.split()[5:6] == ["promote"])  # id, date, time, UTC, user
    assert f"promoted by force over {champion}; trained on {len(signalled)} lot(s) the watch flagged" in promoted
    assert promoted.rstrip().endswith("new supplier qualified, CC-118")
    roles = {m["model_id"]: m["role"] for m in registry.list_models(only)}
    assert roles == {champion: "superseded", d["challenger_id"]: "champion"}
    listing = runner.invoke(cli, ["models", "--models-dir", str(only)]).output
    assert "role superseded: in service before a newer champion; used only when named with --model ID" in listing
