"""The drift watch names the training lots revised after the model was trained (a user test found that neither
``watch`` nor ``retrain`` said so: the model was fitted on values the store no longer holds as current).

No outside reference: the check is a rule of the lot record (a revision stored after the model's ``created_at``,
both ISO 8601 times with their UTC offset, compared as instants by :meth:`datetime.datetime.fromisoformat`).
"""

from __future__ import annotations

import pandas as pd
import pytest


def test_only_training_lots_revised_after_the_model_are_named():
    from linkage.decide.watch import revised_lines, revised_since_training

    lots = pd.DataFrame({
        "lot": ["A", "B", "C", "D", "E"],
        "revision": [1, 2, 2, 3, 2],
        # B after training, C before, D after but not a training lot, E after (written in another UTC offset)
        "updated_at": ["2026-01-02T00:00:00+00:00", "2026-01-03T00:00:00.5+00:00", "2026-01-01T00:00:00+00:00",
                       "2026-01-04T00:00:00+00:00", "2026-01-02T03:00:00+02:00"],
    })
    trained_at = "2026-01-02T00:00:00.000001+00:00"
    found = revised_since_training(lots, ["A", "B", "C", "E"], trained_at)
    # E: 03:00 at +02:00 is 01:00 UTC, after 00:00 UTC
    assert found == [{"lot": "B", "revision": 2, "revised_at": "2026-01-03T00:00:00.5+00:00"},
                     {"lot": "E", "revision": 2, "revised_at": "2026-01-02T03:00:00+02:00"}]
    assert revised_since_training(lots, ["A", "C"], trained_at) == []
    (line,) = revised_lines(found, "m-1")
    assert line.startswith("!! 2 lot(s) model m-1 was trained on were revised after it was trained: B (revision 2")
    # the times as every text shows them (to the second, in UTC: 03:00 at +02:00 is 01:00 UTC); regression of the
    # text, no outside source needed
    assert "B (revision 2, 2026-01-03 00:00:00 UTC), E (revision 2, 2026-01-02 01:00:00 UTC)" in line
    assert revised_lines([], "m-1") == []


@pytest.mark.slow
def test_watch_names_a_training_lot_revised_after_training(tmp_path):
    import linkage
    from linkage.synthetic import make_lots

    campaign = make_lots(24, seed=3)
    first = tmp_path / "lots"
    campaign.write_csv(first)
    lab = linkage.Workspace(tmp_path / "lots.db", models_dir=tmp_path / "models")
    lab.ingest(first)
    lab.train(seed=0, materials=False)
    before = lab.watch()
    assert before.to_dict()["revised_since_training"] == [] and "!!" not in before.text()
    # a correction of one training lot's tablet results, ingested with its reason (a new revision of the lot)
    lot = str(campaign.tables["tablets"]["lot"].iloc[0])
    fix = tmp_path / "fix"
    fix.mkdir()
    for name in ("process", "ribbon", "granules", "tablets"):
        frame = campaign.tables[name]
        part = frame[frame["lot"].astype(str) == lot].copy()
        if name == "tablets":
            part["breaking_force_n"] = part["breaking_force_n"] * 0.8
        part.to_csv(fix / f"{name}.csv", index=False)
    lab.ingest(fix, reason="DEV-0001 transcription error")
    after = lab.watch()
    revised = after.to_dict()["revised_since_training"]
    assert [r["lot"] for r in revised] == [lot] and revised[0]["revision"] == 2
    assert f"!! 1 lot(s) model {after.result.model_id} was trained on were revised" in after.text()
    logged = lab.audit()
    assert list(logged.loc[logged["action"] == "watch"].iloc[-1]["outputs"]["revised_since_training"]) == [lot]
    # the entry records the lots the alarm names (an added key; the watch's audit line names them)
    assert logged.loc[logged["action"] == "watch"].iloc[-1]["outputs"]["alarmed_lots"] == after.result.alarmed_lots
    # retrain says it too: the champion was fitted on the lot's earlier values
    notes = lab.retrain(force=True, reason="test").to_dict()["notes"]
    assert any(n.startswith(f"1 of the champion's training lots were revised after it was trained ({lot} revision 2)")
               for n in notes)


def test_the_watch_states_the_training_lots_its_design_rests_on():
    """A design simulated from p + 3 lots where the model had fewer says so, and names the lots there are
    (no outside reference: wording; the p + 3 floor is linkage.decide.mewma.design's, below which a p-attribute
    correlation estimated from the lots cannot be inverted)."""
    from linkage.decide.watch import stated_reference

    d = {"attributes": 8, "n_reference": 11, "parameters": "estimated from 11 training lots (…)"}
    few = stated_reference(d, 7)
    assert few["n_reference_lots"] == 7 and few["parameters"].startswith("estimated from 7 training lots; the "
                                                                         "limit is simulated as if from 11")
    many = stated_reference({**d, "n_reference": 40, "parameters": "estimated from 40 training lots (…)"}, 40)
    assert many["parameters"] == "estimated from 40 training lots (…)" and many["n_reference_lots"] == 40
