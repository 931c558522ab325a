"""Validation that respects how lots are related (issue 19 item 3):
``train --group-by COLUMN`` for the outer and inner folds and the conformal
intervals, recorded with the model; the forward-in-time check; and the
acceptance scenario of lots sharing raw-material batches."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from linkage.assemble import assemble
from linkage.exceptions import InputError, UsageError
from linkage.models.chain import ChainSpec, StageSpec
from linkage.models.grouping import lot_groups
from linkage.models.train import train_chain
from linkage.synthetic import make_batch_lots

#: one stage, dissolution from two settings and the batch's certificate d50 (which tells batches apart)
CHAIN = ChainSpec(stages=[StageSpec(name="tablets", inputs=["roll_force_kn_per_cm", "compression_force_kn",
                                                            "api_d50_um"], targets=["dissolution_pct"])])


def test_groups_from_a_column_and_from_the_month():
    table = pd.DataFrame({"lot": ["A", "B", "C"], "api_batch": ["X", "X", "Y"],
                          "manufactured_at": ["2026-01-30T06:00:00", "2026-02-02T06:00:00", "2026-02-03T06:00:00"]})
    assert lot_groups(table, "api_batch") == {"A": "X", "B": "X", "C": "Y"}
    assert lot_groups(table, "month") == {"A": "2026-01", "B": "2026-02", "C": "2026-02"}
    assert lot_groups(table, None) is None and lot_groups(table, "lot") is None


def test_bad_group_columns_are_refused_with_every_problem():
    table = pd.DataFrame({"lot": ["A", "B", "C"], "api_batch": ["X", None, " "]})
    with pytest.raises(UsageError, match="no column 'campaign'"):
        lot_groups(table, "campaign")
    with pytest.raises(InputError) as exc:
        lot_groups(table, "api_batch")
    text = str(exc.value)
    assert "row 3" in text and "row 4" in text and "lot B has no api_batch" in text


@pytest.fixture(scope="module")
def batch_table():
    return assemble(make_batch_lots(96, seed=4, lots_per_batch=8, batch_sd_pct=6.0).tables)


def test_outer_and_inner_folds_keep_a_batch_together_and_the_model_records_it(batch_table):
    from linkage.models.train import _jobs, _plan_target

    fitted = train_chain(batch_table, CHAIN, seed=0, group_by="api_batch", candidates=["pls"], n_bootstrap=0)
    t = fitted.targets["dissolution_pct"]
    batch = dict(zip(batch_table["lot"], batch_table["api_batch"]))
    fold_of_batch = {}
    for lot, fold in t.cv["folds"].items():
        assert fold_of_batch.setdefault(batch[lot], fold) == fold  # every lot of a batch in one outer fold
    assert t.cv["group_by"] == "api_batch" and t.cv["n_groups"] == 12
    assert t.cv["scheme"] == "leave-one-group-out by api_batch"
    assert fitted.training["group_by"] == "api_batch" and fitted.training["groups"] == batch
    assert fitted.metadata()["targets"]["dissolution_pct"]["cv"]["group_by"] == "api_batch"
    # the inner folds (hyperparameters, nested CV+) group by the batch too: scikit-learn GroupKFold on the labels
    from sklearn.model_selection import GroupKFold

    from linkage.models.cv import inner_splits

    data = batch_table.assign(lot=batch_table["lot"].astype(str)).sort_values("lot").reset_index(drop=True)
    plan = _plan_target(data, CHAIN.stages[0], "dissolution_pct", ["pls"], 0, lot_groups(data, "api_batch"),
                        "api_batch")
    for job in _jobs([plan], 0, 0.1):
        labels = np.asarray(job.lots_train)
        assert set(labels) <= set(batch.values())
        for (tr, te), (tr2, te2) in zip(inner_splits(labels), GroupKFold(n_splits=5).split(labels, groups=labels)):
            assert set(labels[tr]).isdisjoint(labels[te]) and np.array_equal(te, te2)


def test_forward_check_fits_the_earlier_lots_and_scores_the_later(batch_table):
    """With only the mean candidate the forward prediction is the earlier lots' mean: RMSE and bias of the later
    lots against it, by numpy directly."""
    fitted = train_chain(batch_table, CHAIN, seed=0, candidates=["mean"], n_bootstrap=0)
    f = fitted.targets["dissolution_pct"].forward
    t = batch_table.assign(when=pd.to_datetime(batch_table["manufactured_at"])).sort_values("when")
    y = t["dissolution_pct"].to_numpy(float)
    k = int(np.floor(2 / 3 * len(y)))
    assert (f["n_train"], f["n_test"]) == (k, len(y) - k)
    err = y[:k].mean() - y[k:]
    assert f["rmse"] == pytest.approx(np.sqrt(np.mean(err**2))) and f["bias"] == pytest.approx(err.mean())
    assert f["train_until"] < f["test_from"]
    assert f["rmse_over_cv"] == pytest.approx(f["rmse"] / fitted.targets["dissolution_pct"].candidates["mean"]["rmse"])


def test_train_group_by_on_the_command_line(ingested):
    from linkage.cli.main import cli
    from linkage.models import registry
    from linkage.store import LotStore

    store, models, runner = ingested(make_batch_lots(40, seed=6, lots_per_batch=5))
    bad = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models), "--group-by", "nope"])
    assert bad.exit_code == 2 and "no column 'nope'" in bad.output
    assert not models.exists() or not registry.list_models(models)
    r = runner.invoke(cli, ["train", "--store", str(store), "--models-dir", str(models), "--group-by", "api_batch",
                            "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["group_by"] == "api_batch" and d["targets"]["dissolution_pct"]["cv"]["group_by"] == "api_batch"
    assert "rmse" in d["targets"]["dissolution_pct"]["forward"]
    text = runner.invoke(cli, ["models", "--models-dir", str(models)]).output
    assert text  # the registry lists it
    meta = registry.verify(models, registry.load(models, "latest").model_id)[0]
    assert meta["training"]["group_by"] == "api_batch"
    assert all(t["cv"]["group_by"] == "api_batch" for t in meta["targets"].values())
    assert all(t["forward"] and ("rmse" in t["forward"] or "reason" in t["forward"]) for t in meta["targets"].values())
    with LotStore(store, create=False) as s:
        assert [a for a in s.audit() if a["action"] == "train"][-1]["inputs"]["group_by"] == "api_batch"


@pytest.mark.slow
def test_acceptance_group_by_batch_covers_new_batches_where_grouping_by_lot_does_not():
    """Issue 19 acceptance. 480 lots in 40 drug-substance batches of 12 with a batch effect on dissolution
    (SD 8 %), trained on dissolution from two settings and the batch's d50 (which tells batches apart; the
    candidates PLS and boosting), three seeds. The 90 % intervals are scored on 1200 lots of 100 new batches.
    Grouped by batch, each seed's coverage lies in 0.85-0.95 (the nominal 0.90 of CV+, Barber et al. 2021);
    grouped by lot, boosting learns the seen batches' effects from d50, the intervals are too narrow for a new
    batch, and the coverage over the three seeds is below 0.85."""
    by_batch, by_lot = [], []
    for seed in range(3):
        train = assemble(make_batch_lots(480, seed=seed, lots_per_batch=12, batch_sd_pct=8.0).tables)
        new = assemble(make_batch_lots(1200, seed=seed + 1000, lots_per_batch=12, batch_sd_pct=8.0,
                                       batch_prefix="NEW").tables)
        y = new["dissolution_pct"].to_numpy(float)
        for group_by, out in (("api_batch", by_batch), (None, by_lot)):
            fitted = train_chain(train, CHAIN, seed=0, group_by=group_by, candidates=["pls", "boosting"],
                                 n_bootstrap=0)
            t = fitted.targets["dissolution_pct"]
            low, high = t.interval(new[t.inputs], 0.9)
            out.append(float(np.mean((low <= y) & (y <= high))))
    assert all(0.85 <= c <= 0.95 for c in by_batch), by_batch
    assert np.mean(by_lot) < 0.85, by_lot
