"""Material attributes (issue 19 item 4, ``train --materials``): the extra
numeric columns of the process table are tried as inputs of every stage and
kept only where grouped CV says they help. Checked against the known truth of
the synthetic lots: the drug substance's d50 moves dissolution (slope
-0.6 %/µm), nothing else moves anything."""

from __future__ import annotations

import pytest

from linkage.assemble import assemble
from linkage.models.chain import ChainSpec
from linkage.models.materials import extra_columns, train_with_materials, with_columns
from linkage.synthetic import make_batch_lots


def test_extra_columns_are_the_numeric_ones_no_template_or_chain_names():
    table = assemble(make_batch_lots(12, seed=1, lots_per_batch=3).tables)
    assert extra_columns(table, ChainSpec.default()) == ["blend_moisture_pct", "api_d50_um", "lubricant_pct"]
    # a chain that already names one leaves it out
    chain = with_columns(ChainSpec.default(), ["api_d50_um"], ["tablets"])
    assert "api_d50_um" in chain.stages[2].inputs and "api_d50_um" not in chain.stages[0].inputs
    assert extra_columns(table, chain) == ["blend_moisture_pct", "lubricant_pct"]


@pytest.mark.slow
def test_material_columns_are_kept_where_they_act_and_nowhere_else():
    lots = make_batch_lots(72, seed=3, lots_per_batch=2, batch_sd_pct=0.0, d50_effect_pct_per_um=-0.6)
    table = assemble(lots.tables)
    fitted = train_with_materials(table, seed=0, candidates=["mean", "pls"], n_bootstrap=0)
    m = fitted.training["materials"]
    assert m["columns"] == ["blend_moisture_pct", "api_d50_um", "lubricant_pct"]
    diss = m["targets"]["dissolution_pct"]
    assert diss["with"]["rmse"] < diss["without"]["rmse"] - diss["without"]["rmse_se"]
    assert m["kept_for"] == ["dissolution_pct"]  # no other attribute depends on them in the truth
    stages = {st.name: (st.inputs, list(st.targets)) for st in fitted.stages}
    assert list(stages) == ["ribbon", "granules", "tablets", "tablets_materials"]
    assert stages["tablets_materials"][1] == ["dissolution_pct"] and "api_d50_um" in stages["tablets_materials"][0]
    assert "api_d50_um" not in stages["tablets"][0] and "dissolution_pct" not in stages["tablets"][1]
    assert fitted.metadata()["training"]["materials"]["kept_for"] == ["dissolution_pct"]
    # the chain answers a what-if with the material column set, and the d50 moves dissolution the right way
    from linkage.decide.whatif import predict_whatif

    coarse = predict_whatif(fitted, {"ribbon_porosity": 0.3, "api_d50_um": 58.0}, contributions=False)
    fine = predict_whatif(fitted, {"ribbon_porosity": 0.3, "api_d50_um": 32.0}, contributions=False)
    assert coarse.predictions["dissolution_pct"]["value"] < fine.predictions["dissolution_pct"]["value"] - 5


def test_without_extra_columns_the_chain_is_trained_once_and_says_so():
    from linkage.synthetic import make_lots

    table = assemble(make_lots(12, seed=2).tables)
    fitted = train_with_materials(table, seed=0, candidates=["mean"], n_bootstrap=0)
    assert fitted.training["materials"]["columns"] == [] and "no extra numeric column" in \
        fitted.training["materials"]["reason"]


@pytest.mark.slow
def test_train_materials_on_the_command_line(ingested):
    import json

    from linkage.cli.main import cli

    store, models, runner = ingested(make_batch_lots(16, seed=5, lots_per_batch=2, batch_sd_pct=0.0,
                                                     d50_effect_pct_per_um=-0.6))
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models), "--materials", "--json"])
    assert r.exit_code == 0, r.output
    m = json.loads(r.stdout)["materials"]
    assert m["columns"] == ["blend_moisture_pct", "api_d50_um", "lubricant_pct"] and set(m["targets"])
    text = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models)]).output
    assert "Material columns" not in text  # without --materials nothing is tried
