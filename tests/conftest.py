"""Fixtures shared by more than one test folder."""

from __future__ import annotations

from types import SimpleNamespace

import pytest


@pytest.fixture(scope="session")
def moist_model(tmp_path_factory):
    """A saved model that keeps a material column (issue 19 item 4): a 48-lot campaign of linkage.synthetic whose
    blend moisture moves ribbon porosity by -0.03 per %, trained with the material comparison (which keeps the
    moisture for ribbon porosity on this seed). ``table``, ``chain``, ``models_dir``, ``model_id``, ``spec``
    (the window scenario's spec file)."""
    from linkage.assemble import assemble
    from linkage.models import registry
    from linkage.models.materials import train_with_materials
    from linkage.synthetic import WINDOW_SPEC, make_lots, spec_toml

    table = assemble(make_lots(48, seed=2, raw_materials=True, moisture_porosity_per_pct=-0.03).tables)
    chain = train_with_materials(table, seed=0, candidates=["mean", "log_linear", "linear_select"], n_bootstrap=20)
    assert chain.training["materials"]["kept"].get("ribbon_porosity") == ["blend_moisture_pct"]
    folder = tmp_path_factory.mktemp("moist")
    model_id = registry.save(chain, folder / "models")
    spec = folder / "spec.toml"
    spec.write_text(spec_toml(WINDOW_SPEC), encoding="utf-8")
    return SimpleNamespace(table=table, chain=chain, models_dir=folder / "models", model_id=model_id, spec=spec)
