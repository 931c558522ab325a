"""Material attributes (issue 19 item 4; ``train``'s default since then): each
extra numeric column of the process table is tried as an input of each
attribute, refitted in the same grouped folds, and kept only where the paired
test says it helps. Checked against the known truth of the synthetic lots
(linkage.synthetic: blend moisture moves ribbon porosity by the slope given to
``make_lots``; ``make_batch_lots``' d50 moves dissolution; every other
material column moves nothing) and the paired test against scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from linkage.assemble import assemble
from linkage.models.chain import ChainSpec
from linkage.models.materials import (extra_columns, paired_test, train_with_materials, with_columns,
                                      with_columns_by_target)
from linkage.synthetic import make_batch_lots, make_lots


def test_extra_columns_are_the_numeric_ones_no_template_or_chain_names():
    table = assemble(make_batch_lots(12, seed=1, lots_per_batch=3).tables)
    assert extra_columns(table, ChainSpec.default()) == ["blend_moisture_pct", "api_d50_um", "lubricant_pct"]
    # a chain that already names one leaves it out
    chain = with_columns(ChainSpec.default(), ["api_d50_um"], ["tablets"])
    assert "api_d50_um" in chain.stages[2].inputs and "api_d50_um" not in chain.stages[0].inputs
    assert extra_columns(table, chain) == ["blend_moisture_pct", "lubricant_pct"]


def test_the_paired_test_is_the_one_sided_paired_t_test():
    """Reference: scipy.stats.ttest_rel(alternative="greater") (Student's paired t-test, which for one-step
    errors is the Diebold–Mariano test with the Harvey, Leybourne & Newbold 1997 correction)."""
    rng = np.random.default_rng(0)
    for shift in (0.0, 0.3, -0.2):
        a = rng.chisquare(1, 40)
        b = np.clip(a - shift + rng.normal(0, 0.5, 40), 0, None)
        mine, ref = paired_test(a, b), stats.ttest_rel(a, b, alternative="greater")
        assert mine["t"] == pytest.approx(ref.statistic, rel=1e-12)
        assert mine["p"] == pytest.approx(ref.pvalue, rel=1e-10)
        assert mine["mean_difference"] == pytest.approx(np.mean(a - b), rel=1e-12)
    # a refit that left the column out differs only by round-off: no difference, p = 1 (not a coin toss)
    a = rng.chisquare(1, 30)
    same = paired_test(a, a * (1 + 1e-10 * rng.standard_normal(30)))
    assert same["mean_difference"] == 0.0 and same["p"] == 1.0


def test_attributes_that_keep_other_columns_get_a_stage_of_their_own():
    chain = ChainSpec.default()
    out = with_columns_by_target(chain, {"dissolution_pct": ["api_d50_um"], "ribbon_porosity": ["blend_moisture_pct"],
                                         "friability_pct": ["lubricant_pct"]})
    stages = {st.name: (st.inputs, list(st.targets)) for st in out.stages}
    tablets = chain.stages[2]
    assert list(stages) == ["ribbon", "granules", "tablets", "tablets_materials", "tablets_materials_2"]
    assert stages["ribbon"][0] == chain.stages[0].inputs + ["blend_moisture_pct"]  # the stage's only attribute
    assert stages["tablets_materials"] == (tablets.inputs + ["lubricant_pct"], ["friability_pct"])
    assert stages["tablets_materials_2"] == (tablets.inputs + ["api_d50_um"], ["dissolution_pct"])
    assert sorted(t for st in out.stages for t in st.targets) == sorted(chain.targets())


def test_without_extra_columns_the_chain_is_trained_once_and_says_so():
    table = assemble(make_lots(12, seed=2).tables)
    fitted = train_with_materials(table, seed=0, candidates=["mean"], n_bootstrap=0)
    assert fitted.training["materials"]["columns"] == [] and "no extra numeric column" in \
        fitted.training["materials"]["reason"]


@pytest.mark.slow
def test_when_nothing_is_kept_the_model_is_the_one_train_gives_without_the_comparison():
    from linkage.models.train import train_chain

    table = assemble(make_lots(24, seed=5, raw_materials=True).tables)
    kw = dict(seed=0, candidates=["mean", "linear_select"], n_bootstrap=5)
    fitted = train_with_materials(table, **kw)
    m = fitted.training["materials"]
    assert m["columns"] == ["blend_moisture_pct", "api_d50_um", "lubricant_pct"] and m["kept"] == {}
    plain = train_chain(table, **kw)
    assert [st.name for st in fitted.stages] == [st.name for st in plain.stages]
    for name, t in plain.targets.items():
        assert fitted.targets[name].candidates == t.candidates
        np.testing.assert_array_equal(fitted.targets[name].oof.to_numpy(), t.oof.to_numpy())
    np.testing.assert_array_equal(fitted.bootstrap["counts"], plain.bootstrap["counts"])
    # every (attribute, column) pair was refitted once per outer fold and candidate, and reported
    assert m["refits"] > 0 and set(m["targets"]) == set(plain.targets)
    for row in m["targets"].values():
        assert set(row["columns"]) == set(m["columns"])


#: the blend-moisture slope on ribbon porosity of the scenario below [porosity per % moisture]: invented, of a
#: size that moves the lots' porosity by about 1.4 times its lot-to-lot noise (moisture SD 0.4 %)
MOISTURE_SLOPE = -0.03


@pytest.mark.slow
def test_a_column_that_acts_on_a_stage_is_kept_there():
    """Blend moisture moves ribbon porosity (and nothing else directly). Over 4 seeded 48-lot campaigns the ribbon
    stage keeps it in at least 3 (measured: seeds 1, 2, 3; in seed 0 p = 0.009 against the level 0.008), and where
    kept, the chain's porosity moves with moisture as the truth does (slope within 0.01 of it)."""
    from linkage.decide.whatif import predict_whatif

    kept = 0
    for seed in range(4):
        table = assemble(make_lots(48, seed=seed, raw_materials=True,
                                   moisture_porosity_per_pct=MOISTURE_SLOPE).tables)
        fitted = train_with_materials(table, seed=0, n_bootstrap=0)
        m = fitted.training["materials"]
        if "blend_moisture_pct" not in m["kept"].get("ribbon_porosity", []):
            continue
        kept += 1
        ribbon = fitted.stages[0]
        assert ribbon.name == "ribbon" and "blend_moisture_pct" in ribbon.inputs
        assert m["targets"]["ribbon_porosity"]["final"]["inputs"] == ribbon.inputs
        at = {k: float(np.median(table[k])) for k in ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm",
                                                       "screw_speed_rpm")}
        wet = predict_whatif(fitted, {**at, "blend_moisture_pct": 3.6}, contributions=False)
        dry = predict_whatif(fitted, {**at, "blend_moisture_pct": 2.4}, contributions=False)
        slope = (wet.predictions["ribbon_porosity"]["value"] - dry.predictions["ribbon_porosity"]["value"]) / 1.2
        assert abs(slope - MOISTURE_SLOPE) < 0.01, (seed, slope)
    assert kept >= 3, kept


@pytest.mark.slow
def test_pure_noise_columns_are_dropped_in_most_seeds():
    """The material columns of make_lots move nothing in the truth. Over 4 seeded 48-lot campaigns (3 columns × 8
    attributes each, 96 pairs) at most one (attribute, column) pair may be kept (measured: none, also over seeds
    4 and 5)."""
    kept = []
    for seed in range(4):
        table = assemble(make_lots(48, seed=seed, raw_materials=True).tables)
        m = train_with_materials(table, seed=0, n_bootstrap=0).training["materials"]
        kept += [(seed, t, c) for t, cols in m["kept"].items() for c in cols]
    assert len(kept) <= 1, kept


@pytest.mark.slow
def test_the_drug_substance_d50_is_kept_for_dissolution_and_nowhere_else():
    lots = make_batch_lots(72, seed=3, lots_per_batch=2, batch_sd_pct=0.0, d50_effect_pct_per_um=-0.6)
    table = assemble(lots.tables)
    fitted = train_with_materials(table, seed=0, candidates=["mean", "linear_select", "pls"], n_bootstrap=0)
    m = fitted.training["materials"]
    assert m["kept"] == {"dissolution_pct": ["api_d50_um"]}  # nothing else depends on a material column
    stages = {st.name: (st.inputs, list(st.targets)) for st in fitted.stages}
    assert list(stages) == ["ribbon", "granules", "tablets", "tablets_materials"]
    assert stages["tablets_materials"][1] == ["dissolution_pct"] and "api_d50_um" in stages["tablets_materials"][0]
    from linkage.decide.whatif import predict_whatif

    coarse = predict_whatif(fitted, {"ribbon_porosity": 0.3, "api_d50_um": 58.0}, contributions=False)
    fine = predict_whatif(fitted, {"ribbon_porosity": 0.3, "api_d50_um": 32.0}, contributions=False)
    assert coarse.predictions["dissolution_pct"]["value"] < fine.predictions["dissolution_pct"]["value"] - 5


@pytest.mark.slow
def test_train_tries_the_material_columns_by_default_and_not_with_no_materials(ingested):
    import json

    from linkage.cli.main import cli

    store, models, runner = ingested(make_batch_lots(16, seed=5, lots_per_batch=2, batch_sd_pct=0.0,
                                                     d50_effect_pct_per_um=-0.6))
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models), "--json"])
    assert r.exit_code == 0, r.output
    m = json.loads(r.stdout)["materials"]
    assert m["columns"] == ["blend_moisture_pct", "api_d50_um", "lubricant_pct"] and set(m["targets"])
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models), "--materials"])
    assert r.exit_code == 0 and "Material columns" in r.output  # still accepted
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models), "--no-materials", "--json"])
    assert r.exit_code == 0 and json.loads(r.stdout)["materials"] is None


def _older_lots_without(columns: list[str], n_lots: int, n_old: int, seed: int, *, add: dict | None = None,
                        other_regime: bool = True, **kwargs):
    """The assembled table of ``make_lots(n_lots, seed, **kwargs)`` with the extra process columns ``add``
    (name -> values per lot, process-table order), and ``columns`` missing on the first ``n_old`` lots; with
    ``other_regime``, those older lots' breaking force 1.4 times and friability twice what the truth gives: an
    earlier regime that a fit on every lot describes worse than a fit on the newer lots alone (invented
    sizes). Returns the table and the older lots."""
    lots = make_lots(n_lots, seed=seed, **kwargs)
    tables = dict(lots.tables)
    process = tables["process"].copy()
    for name, values in (add or {}).items():
        process[name] = np.asarray(values, float)
    old = list(process["lot"].iloc[:n_old])
    process.loc[process["lot"].isin(old), columns] = np.nan
    tablets = tables["tablets"].copy()
    if other_regime:
        tablets.loc[tablets["lot"].isin(old), "breaking_force_n"] *= 1.4
        tablets.loc[tablets["lot"].isin(old), "friability_pct"] *= 2.0
    tables.update(process=process, tablets=tablets)
    return assemble(tables), old


@pytest.mark.slow
def test_a_noise_column_missing_on_older_lots_is_compared_on_the_same_lots_and_not_kept():
    """Regression (user test): a pure-noise column missing on 4 older lots of 52 was kept for tensile strength,
    friability and breaking force, because the errors with it (refits on the 48 lots that have it) were paired
    with the chain's errors without it (fitted on all 52, the 4 older lots of another regime among them): the
    test measured leaving those lots out, not the column. A paired comparison needs both arms on the same units
    and the same training sets (Diebold & Mariano 1995, J. Bus. Econ. Stat. 13:253: the loss differential of
    two forecasts of the same observations); now the refits without the column are on the same 48 lots and
    folds, and the noise is kept nowhere."""
    import json

    from linkage.results import materials_lines, train_json

    noise = np.random.default_rng(100).normal(0.0, 1.0, 52)
    table, old = _older_lots_without(["noise_x"], 52, 4, seed=0, add={"noise_x": noise})
    fitted = train_with_materials(table, seed=0, n_bootstrap=0)
    m = json.loads(json.dumps(train_json(fitted)["materials"]))  # what train --json prints
    assert m["kept"] == {}, m["kept"]
    assert m["missing_on"] == {"noise_x": old}
    for row in m["targets"].values():
        rec = row["columns"]["noise_x"]
        assert rec["n_lots_compared"] == 48 and rec["n_lots_attribute"] == 52 and rec["lots_without_column"] == old
        for one in rec["by_candidate"].values():  # both arms of every paired test on the same 48 lots
            if "vs_selected" in one:
                assert one["n_lots"] == one["vs_selected"]["n"] == 48
                assert one["without_from"].startswith("refitted without the column on the same lots")
    text = "\n".join(materials_lines(m))
    assert "noise_x is missing on 4 lots (" + ", ".join(old) + ")" in text
    assert "on the 48 of 52 lots that have it" in text
    # each column's line gives both tests that decide, with the level (a review: the second test, which refused,
    # was not shown); where linear_select is the best candidate, its test without the column is on the line
    c_lines = [line for line in text.splitlines() if line.strip().startswith("noise_x:") and "with (" in line]
    recs = [r["columns"]["noise_x"] for r in m["targets"].values() if "rmse_with" in r["columns"].get("noise_x", {})]
    assert c_lines and len(c_lines) == len(recs) and all("; level " in line for line in c_lines)
    second = [v for v in recs if "p_same_candidate" in v]
    assert sum(f"; against {v['candidate']} without it {v['rmse_same_candidate_without']:.4g}, p = " in line
               for line in c_lines for v in second) == len(second) > 0
    assert [st.name for st in fitted.stages] == ["ribbon", "granules", "tablets"]  # the chain without the column


@pytest.mark.slow
def test_a_kept_column_missing_on_some_lots_leaves_them_out_of_that_stage_and_says_so():
    """Blend moisture moves ribbon porosity (slope as above) but is missing on 4 older lots of 52: it is still
    found on the 48 that have it (measured: p = 0.004 against the level 0.008, seed 1), and the refitted ribbon
    stage, which needs it, is fitted on those 48; the 4 lots are named in its notes, not left out silently."""
    table, old = _older_lots_without(["blend_moisture_pct"], 52, 4, seed=1, other_regime=False, raw_materials=True,
                                     moisture_porosity_per_pct=MOISTURE_SLOPE)
    fitted = train_with_materials(table, seed=0, n_bootstrap=0)
    m = fitted.training["materials"]
    assert "blend_moisture_pct" in m["kept"].get("ribbon_porosity", []), m["kept"]
    final = m["targets"]["ribbon_porosity"]["final"]
    assert final["n_lots"] == fitted.targets["ribbon_porosity"].n_lots == 48 and final["lots_left_out"] == old
    assert any(", ".join(old) in note for note in fitted.targets["ribbon_porosity"].notes)
    assert fitted.targets["granule_d50_um"].n_lots == 52  # the lots stay in the stages that do not need it
