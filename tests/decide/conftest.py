"""One chain trained on the known-truth window scenario, shared by the
decision tests (training is the slow part)."""

from __future__ import annotations

import pytest

from linkage.assemble import assemble
from linkage.models.registry import save
from linkage.models.train import train_chain
from linkage.spec import Limit, Spec
from linkage.synthetic import WINDOW_SPEC, Truth, make_lots


@pytest.fixture(scope="session")
def scenario():
    truth = Truth.window_scenario()
    lots = make_lots(160, seed=11, truth=truth)
    table = assemble(lots.tables)
    chain = train_chain(table, seed=0)
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    return truth, chain, spec, table


@pytest.fixture(scope="session")
def saved_model(scenario, tmp_path_factory):
    """(models_dir, model_id, spec_path) of the scenario's chain in a registry."""
    from linkage.synthetic import spec_toml

    _, chain, _, _ = scenario
    folder = tmp_path_factory.mktemp("registry")
    models_dir = folder / "models"
    model_id = save(chain, models_dir)
    spec_path = folder / "spec.toml"
    spec_path.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    return models_dir, model_id, spec_path
