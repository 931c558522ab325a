"""Drift watch on a synthetic raw-material change (issue 6 acceptance: the
watch flags a dissolution shift within a few lots)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from linkage.assemble import assemble
from linkage.charts import Reference
from linkage.decide.watch import porosity_within, predictions_vs_measured, watch
from linkage.models.train import train_chain
from linkage.synthetic import make_lots

CHANGE_AT = 40  # lots from index 40 on (the 41st lot) carry the raw-material change


@pytest.fixture(scope="module")
def drift():
    lots = make_lots(56, seed=3, raw_material_change_at=CHANGE_AT, raw_material_delta=-6.0)
    table = assemble(lots.tables)
    order = list(lots.tables["process"]["lot"])
    before = table[table["lot"].isin(order[:CHANGE_AT])]
    chain = train_chain(before, seed=0)
    return lots, table, chain, order


def test_dissolution_shift_is_flagged_within_a_few_lots(drift):
    lots, table, chain, order = drift
    result = watch(chain, table, ribbon=lots.tables["ribbon"])
    chart = result.charts["dissolution_pct"]
    flagged_new = [lot for lot in chart.lots if lot in result.new_lots and chart.flags.get(lot)]
    assert flagged_new, "the shift was not flagged"
    first = order.index(flagged_new[0])
    assert CHANGE_AT <= first <= CHANGE_AT + 4, (flagged_new[0], first)
    # the flag is a downward one, as the change lowered dissolution
    assert any("downward" in r or "beyond" in r for r in chart.flags[flagged_new[0]])
    assert any(a.startswith("dissolution_pct, lot") for a in result.other_signals)
    # issue 19: the designed scheme (MEWMA of the residual vector) alarms within a few lots of the change too,
    # and names dissolution among the attributes furthest out; no alarm before the change
    signalled = list(result.mewma["signals"])
    assert signalled and CHANGE_AT <= order.index(signalled[0]) <= CHANGE_AT + 4, signalled[:3]
    assert "dissolution_pct" in result.mewma["signals"][signalled[0]]
    assert result.alarms[0].startswith(f"MEWMA of the {len(result.charts)} residuals, lot {signalled[0]}")
    assert all(order.index(lot) >= CHANGE_AT for lot in signalled)


def test_the_watch_states_its_design(drift):
    """Issue 19: the output states the design (ARL0 for all attributes together, run lengths for 1 and 2 SD);
    the design's p is the number of charted attributes and the residual correlation is a correlation matrix."""
    from linkage.results import Watched

    lots, table, chain, order = drift
    result = watch(chain, table)
    d = result.to_dict()
    assert d["design"]["attributes"] == len(result.charts) and d["design"]["arl0_target"] == 200
    corr = np.array(d["mewma"]["correlation"])
    assert np.allclose(np.diag(corr), 1) and np.all(np.linalg.eigvalsh(corr) > 0)
    text = Watched(result=result, n_lots=len(table)).text()
    assert "in-control ARL 200 lots for all attributes together" in text and "a 2 SD shift in" in text
    assert "Other looks" in text


def test_no_alarm_on_attributes_the_change_did_not_touch(drift):
    lots, table, chain, order = drift
    result = watch(chain, table)
    # tensile strength is untouched: at most an occasional false alarm (3 sigma: ~0.3% a point)
    chart = result.charts["tensile_strength_mpa"]
    new_flags = [lot for lot in result.new_lots if "beyond 3 sigma" in chart.flags.get(lot, [])]
    assert len(new_flags) <= 1


def test_training_lots_use_out_of_fold_residuals(drift):
    _, table, chain, _ = drift
    result = watch(chain, table)
    chart = result.charts["dissolution_pct"]
    oof = chain.targets["dissolution_pct"].residuals
    for lot, phase, r in zip(chart.lots, chart.phase, chart.residual):
        if phase == "training":
            assert r == pytest.approx(oof[lot])
    # limits are the training residuals' mean ± 3 SD
    ref = Reference.from_values(oof.dropna())
    assert chart.limits == pytest.approx((ref.mu0 - 3 * ref.sigma, ref.mu0 + 3 * ref.sigma))


def test_within_lot_sample_leaving_the_window_is_flagged():
    ribbon = pd.DataFrame({
        "lot": ["A"] * 4 + ["B"] * 4,
        "sample": ["1", "2", "3", "4"] * 2,
        "sampled_at": pd.to_datetime(["2026-01-01 08:00", "2026-01-01 09:00", "2026-01-01 10:00",
                                      "2026-01-01 11:00"] * 2),
        "envelope_density_g_cm3": [1.05, 1.05, 1.06, 1.05, 1.05, 1.05, 1.05, 0.90],
        "skeletal_density_g_cm3": [1.50] * 8,
    })
    rows = porosity_within(ribbon, trained_lots={"A"}, window=(0.25, 0.36), lots=["B"])
    assert [r["sample"] for r in rows] == ["1", "2", "3", "4"]
    # porosity 1 − 0.90/1.50 = 0.40: outside the window, and far from the lot's earlier samples
    last = rows[-1]["flags"]
    assert any("outside the window" in f for f in last)
    assert any("within-lot SD" in f for f in last)
    assert rows[0]["flags"] == []


def test_recorded_prediction_is_compared_with_the_measurement():
    table = pd.DataFrame({"lot": ["L1", "L2"], "dissolution_pct": [84.0, np.nan]})
    recorded = [
        {"lot": "L1", "model_id": "m", "outputs": {"predictions": {"dissolution_pct": {"value": 86, "low": 82,
                                                                                         "high": 90}}}},
        {"lot": "L2", "model_id": "m", "outputs": {"predictions": {"dissolution_pct": {"value": 86, "low": 82,
                                                                                         "high": 90}}}},
    ]
    out = predictions_vs_measured(recorded, table)
    assert out == [{"lot": "L1", "attribute": "dissolution_pct", "model_id": "m", "predicted": 86, "low": 82,
                    "high": 90, "measured": 84.0, "inside_interval": True, "settings_differ": {},
                    "at_lot_settings": None}]


def test_a_whatif_recorded_under_another_spelling_of_the_lot_is_that_lots():
    """README, "One lot, one spelling": `Q26-005`, `q26-005` and `Q26–005` (an en dash, U+2013) are one lot
    (Unicode NFKC, Unicode Standard Annex #15; dash-like characters read as '-'; full case folding). A what-if
    recorded as `predict --lot q26-005` used to be missing from the watch of lot Q26-005; now every spelling is
    matched and named as the lot is stored."""
    table = pd.DataFrame({"lot": ["Q26-005", "Q26-006"], "dissolution_pct": [84.0, 90.0]})
    pred = {"predictions": {"dissolution_pct": {"value": 86, "low": 82, "high": 90}}}
    recorded = [{"lot": spelling, "model_id": "m", "outputs": pred} for spelling in
                ("q26-005", "Q26\u2013005", "\uff31\uff12\uff16-005", "Q26-005", "Q26-007")]
    out = predictions_vs_measured(recorded, table)
    assert [e["lot"] for e in out] == ["Q26-005"] * 4
    assert all(e["measured"] == 84.0 for e in out)


def test_a_whatif_at_other_settings_is_noted_and_predicted_again_at_the_lot_settings(drift):
    """Issue 19 item 5: a what-if made at a roll force the lot did not run at is noted, with the value it ran
    at, and the watched model predicts again at the lot's own settings (the same numbers as a what-if asked
    at those settings)."""
    from linkage.decide.whatif import predict_whatif
    from linkage.decide.watch import whatif_settings_lines

    lots, table, chain, order = drift
    lot = order[-1]
    row = table.set_index("lot").loc[lot]
    settings = chain.chain.root_inputs()
    ran = {c: float(row[c]) for c in settings if c in row.index and np.isfinite(row[c])}
    asked = dict(ran, roll_force_kn_per_cm=ran["roll_force_kn_per_cm"] + 2.0)
    made = predict_whatif(chain, asked, contributions=False)
    recorded = [{"lot": lot, "model_id": chain.model_id, "inputs": made.to_dict()["inputs"],
                 "outputs": made.to_dict()},
                {"lot": order[-2], "model_id": chain.model_id, "outputs": made.to_dict()}]  # no inputs: no note
    out = predictions_vs_measured(recorded, table, chain)
    mine = [e for e in out if e["lot"] == lot]
    assert mine and all(set(e["settings_differ"]) == {"roll_force_kn_per_cm"} for e in mine)
    d = mine[0]["settings_differ"]["roll_force_kn_per_cm"]
    assert d["ran_at"] == pytest.approx(ran["roll_force_kn_per_cm"]) and d["what_if"] == pytest.approx(
        ran["roll_force_kn_per_cm"] + 2.0) and d["source"] == "given"
    again = predict_whatif(chain, ran, contributions=False).predictions
    for e in mine:
        q = again[e["attribute"]]
        assert e["at_lot_settings"]["predicted"] == pytest.approx(q["value"])
        assert e["at_lot_settings"]["inside_interval"] == (q["low"] <= e["measured"] <= q["high"])
        assert "did not run at" in whatif_settings_lines(e)[0]
    assert all(e["settings_differ"] == {} and e["at_lot_settings"] is None for e in out if e["lot"] != lot)


def test_new_lots_out_of_domain_are_named(drift):
    lots, table, chain, _ = drift
    odd = table.iloc[[-1]].copy()
    odd["lot"] = "ODD-1"
    odd["roll_force_kn_per_cm"] = 40.0
    result = watch(chain, pd.concat([table, odd], ignore_index=True))
    verdicts = [d for d in result.domain if d["lot"] == "ODD-1" and d["stage"] == "ribbon"]
    assert verdicts and not verdicts[0]["in_domain"]
    assert any("roll_force_kn_per_cm" in r for r in verdicts[0]["reasons"])


def test_an_alarm_says_what_to_do_next_and_the_text_writes_micrometres(drift):
    """A user test: the watch named the drifting lots but gave no next step, while README said to retrain (which
    takes a raw-material shift into the model as normal); and its text wrote "590.6 um" where the other texts
    write µm. The alarmed lots are a key of ``--json`` and of the audit entry. Regression of the wording: no
    outside source needed."""
    from dataclasses import replace

    from linkage.results import ALARM_NEXT_STEP, Watched

    lots, table, chain, order = drift
    result = watch(chain, table, ribbon=lots.tables["ribbon"])
    assert result.alarms and result.alarmed_lots == list(result.mewma["signals"])
    assert result.to_dict()["alarmed_lots"] == result.alarmed_lots
    away = {"lot": order[-1], "stage": "tablets", "in_domain": False,
            "reasons": ["granule_d50_um = 590.6 um is above the training range 143.3–500 um"]}
    shown = replace(result, domain=[*result.domain, away])
    text = Watched(result=shown, n_lots=len(table)).text()
    lines = text.splitlines()
    last_alarm = max(i for i, line in enumerate(lines) if line.startswith("  ! "))
    assert lines[last_alarm + 1] == ALARM_NEXT_STEP
    assert "assignable cause" in ALARM_NEXT_STEP and "before retraining" in ALARM_NEXT_STEP
    assert "granule_d50_um = 590.6 µm is above the training range 143.3–500 µm" in text and " um" not in text
    # --json keeps the text as recorded
    assert any("590.6 um" in r for d in shown.to_dict()["domain"] for r in d["reasons"])
    # no alarm, no next step
    quiet = replace(result, mewma={**result.mewma, "signals": {}})
    assert quiet.alarmed_lots == [] and ALARM_NEXT_STEP not in Watched(result=quiet, n_lots=len(table)).text()


def test_the_alarms_design_is_simulated_at_training_and_read_by_the_watch(drift, monkeypatch):
    """Issue 20: the multivariate alarm's limit is a function of the model alone (charted attributes, training
    lots), so `train` simulates it once and keeps it in the model's training record; the watch then reads it and
    simulates nothing, with the same numbers as its own simulation. Checked against the simulation itself
    (mewma.design, Lowry et al. 1992's scheme with h by simulation): the same h and run lengths."""
    from linkage.decide import mewma
    from linkage.decide.watch import design_at_training

    lots, table, chain, order = drift
    kept = design_at_training(chain)
    assert kept["simulation"] == {"runs": mewma.RUNS, "runs_estimated": mewma.RUNS_ESTIMATED, "seed": mewma.SEED,
                                  "design_version": mewma.DESIGN_VERSION}
    saved_kept, saved_training = dict(mewma._KEPT), chain.training
    try:
        mewma._KEPT.clear()
        mewma._design.cache_clear()
        simulated = watch(chain, table).mewma["design"]  # no kept design: simulated here
        assert {k: simulated[k] for k in ("h", "arl", "attributes", "n_reference")} == \
            {k: kept["design"][k] for k in ("h", "arl", "attributes", "n_reference")}
        mewma._KEPT.clear()
        mewma._design.cache_clear()

        def no_simulation(*args, **kwargs):
            raise AssertionError("the design kept at training was simulated again")

        monkeypatch.setattr(mewma, "_simulate", no_simulation)
        chain.training = {**saved_training, "watch_design": kept}
        read = watch(chain, table).mewma["design"]
        assert read == simulated
        # a design kept under other simulation settings (an earlier linkage's) is not read: simulated again
        mewma._KEPT.clear()
        for other in ({"runs": 1}, {"design_version": mewma.DESIGN_VERSION + 1}):
            chain.training = {**saved_training, "watch_design": {**kept, "simulation": {**kept["simulation"], **other}}}
            with pytest.raises(AssertionError, match="simulated again"):
                watch(chain, table)
        # a table whose lots chart fewer attributes (one attribute never measured) needs another design: simulated
        chain.training = {**saved_training, "watch_design": kept}
        fewer = table.assign(friability_pct=np.nan)
        with pytest.raises(AssertionError, match="simulated again"):
            watch(chain, fewer)
    finally:
        chain.training = saved_training
        mewma._KEPT.clear()
        mewma._KEPT.update(saved_kept)
        mewma._design.cache_clear()


def test_each_ribbon_sample_is_judged_against_its_lots_earlier_samples_as_pandas_computes_them():
    """porosity_within, against pandas' own groupby and shifted expanding mean (the mean of each lot's earlier
    samples in time order) and the pooled within-lot SD: the same samples in the same order, the same porosity,
    and a flag exactly where |porosity - mean of the earlier samples| > 3 SD (at least two earlier samples) or
    the porosity leaves the window (NIST/SEMATECH e-Handbook §6.3.2: limits at 3 SD of the within-group spread)."""
    from linkage.decide.watch import pooled_within_sd

    lots = make_lots(30, seed=5)
    ribbon = lots.tables["ribbon"].copy()
    trained = set(sorted(ribbon["lot"].astype(str).unique())[:20])
    # a jump within a new lot: its last sample some 0.07 more porous than its earlier ones
    counts = ribbon.groupby("lot")["sample"].transform("size")
    last = ribbon[(~ribbon["lot"].astype(str).isin(trained)) & (counts >= 3)].index[-1]
    ribbon.loc[last, "envelope_density_g_cm3"] *= 0.9
    window = (0.28, 0.30)
    got = porosity_within(ribbon, trained, window)
    df = ribbon.assign(lot=ribbon["lot"].astype(str),
                       porosity=1 - ribbon["envelope_density_g_cm3"] / ribbon["skeletal_density_g_cm3"])
    df = df.sort_values(["lot", "sampled_at"], kind="stable")
    earlier = df.groupby("lot")["porosity"].transform(lambda s: s.expanding().mean().shift())
    n_earlier = df.groupby("lot").cumcount()
    sigma = pooled_within_sd(ribbon, trained)[0]
    assert [(g["lot"], g["porosity"]) for g in got] == list(zip(df["lot"], df["porosity"]))
    drift = ((n_earlier >= 2) & ((df["porosity"] - earlier).abs() > 3 * sigma)).tolist()
    outside = (~df["porosity"].between(*window)).tolist()
    assert [any("more than 3 within-lot SD" in f for f in g["flags"]) for g in got] == drift
    assert [any("outside the window" in f for f in g["flags"]) for g in got] == outside
    assert any(drift) and any(outside) and not all(outside)  # both kinds of flag are met
