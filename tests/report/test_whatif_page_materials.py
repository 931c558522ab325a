"""The what-if page of a model that keeps a material column (issue 19 item 4): the column is one more setting of
the page, and the page agrees with `predict --json` to 1e-9 with it given and held (the reference is linkage's
own Python what-if, as in test_whatif_page.py, whose helpers this reuses)."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from .test_whatif_page import _COMPARED, _cli, _compare, _predict_json, _set_controls, browser  # noqa: F401


@pytest.fixture(scope="module")
def moist(moist_model, tmp_path_factory):
    page = tmp_path_factory.mktemp("moist-page") / "page.html"
    r = _cli(["predict", "--spec", str(moist_model.spec), "--models-dir", str(moist_model.models_dir), "--page",
              str(page)])
    assert r.exit_code == 0, r.output
    return SimpleNamespace(models_dir=moist_model.models_dir), moist_model.spec, page


@pytest.mark.slow
@pytest.mark.browser
def test_the_page_takes_the_material_column_and_agrees_with_predict_json(browser, moist):  # noqa: F811
    demo_like, spec, page = moist
    browser.open(page.as_uri())
    settings = browser.evaluate("window.linkageModel.settings")
    names = [s["name"] for s in settings]
    assert "blend_moisture_pct" in names
    rng = np.random.default_rng(19)
    moisture = next(s for s in settings if s["name"] == "blend_moisture_pct")
    force = next(s for s in settings if s["name"] == "roll_force_kn_per_cm")
    cases = [{"roll_force_kn_per_cm": float(rng.uniform(force["low"], force["high"])),
              "blend_moisture_pct": float(rng.uniform(moisture["low"], moisture["high"]))},
             {"roll_force_kn_per_cm": float(rng.uniform(force["low"], force["high"]))}]  # moisture held
    for values in cases:
        shown = _set_controls(browser, values)["result"]
        py = _predict_json((demo_like, spec), values)
        part = {k: py[k] for k in _COMPARED}
        problems = _compare(part, shown)
        assert not problems, (values, problems[:10])
        # the comparison is not vacuous: the page computed the column's value and the porosity it moves
        assert shown["inputs"]["blend_moisture_pct"]["source"] == py["inputs"]["blend_moisture_pct"]["source"]
        assert abs(shown["predictions"]["ribbon_porosity"]["value"] - py["predictions"]["ribbon_porosity"]["value"]) \
            <= 1e-9
    assert py["inputs"]["blend_moisture_pct"]["source"] != "given"  # the last case held it
