"""Every command that takes a spec and a model, or --set values, refuses what
``predict`` refuses (a user test of linkage, four bugs).

1. A spec judging dissolution at another time point than the model's is
   refused by ``space`` and ``predict --page`` too (exit 2, nothing written),
   as by ``window`` and ``predict`` (:func:`linkage.timepoint.check_time_point`).
2. ``--set`` values outside the physically possible range
   (:data:`linkage.schema.PHYSICAL_BOUNDS`, the definitions cited in
   ``tests/decide/test_physical.py``) are refused by ``window``, ``space`` and
   ``plan`` as by ``predict`` (:func:`linkage.decide.whatif.check_values`).
3. A setting given beside ``ribbon_porosity`` (so the ribbon stage is not
   run) is still checked against its training range: outside it the what-if
   is out of the domain and promises nothing.
4. ``judges`` and "Judged:" list only judged attributes; a spec of which the
   model judges nothing is refused by ``predict`` as by ``window``.

Most are regression tests of a refusal: they need no outside source (the
refusal itself is the rule). The training ranges in item 3 are checked
against the training table itself (pandas' min and max of the lots the
chain was trained on), not against the model's own record of them.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from linkage.cli.main import cli
from linkage.exceptions import SpecError, UsageError

FORCE = "roll_force_kn_per_cm"


def _run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def _t45(folder):
    path = folder / "t45.toml"
    path.write_text("[dissolution_pct]\nmin = 80\ntime_min = 45\n", encoding="utf-8")
    return path


# --------------------------------------------------------------- 1. the time point

def test_space_and_the_page_refuse_a_spec_at_another_time_point(saved_model, tmp_path):
    from linkage.api import space
    from linkage.models.registry import load_whatif
    from linkage.report.page import page_payload

    models_dir, model_id, _ = saved_model
    spec = _t45(tmp_path)
    # the library: Python callers are refused as the command line is
    with pytest.raises(SpecError, match="at 45 min.*at 30 min"):
        space(spec, models_dir=models_dir, model=model_id, n_grid=5)
    from linkage.spec import read_spec

    with pytest.raises(SpecError, match="at 45 min.*at 30 min"):
        page_payload(load_whatif(models_dir, model_id), read_spec(spec))
    # the command line: exit 2, naming both time points, nothing written
    r = _run("space", "--spec", spec, "--grid", 5, "--models-dir", models_dir)
    assert r.exit_code == 2, r.output
    assert "space: the spec judges dissolution_pct at 45 min" in r.output and "at 30 min" in r.output
    page = tmp_path / "p.html"
    r = _run("predict", "--page", page, "--spec", spec, "--models-dir", models_dir,
             "--store", tmp_path / "none.db")
    assert r.exit_code == 2, r.output
    assert "at 45 min" in r.output and "at 30 min" in r.output
    assert not page.exists()


# --------------------------------------------------------------- 2. physically impossible --set values

def test_window_space_and_plan_refuse_impossible_settings_as_predict(saved_model, tmp_path):
    from linkage import api

    models_dir, model_id, spec = saved_model
    where = ["--models-dir", models_dir]
    store = ["--store", tmp_path / "none.db"]  # plan reads the store only after checking the settings
    # predict refuses it: the reference behaviour
    r = _run("predict", "--set", "roll_gap_mm=20", *where, "--no-record")
    assert r.exit_code == 2 and "outside the possible range 0 < roll_gap_mm <= 15" in r.output, r.output
    # every problem at once
    both = ["--set", "roll_speed_rpm=-3", "--set", "roll_gap_mm=20"]
    for args in (["window", "--spec", spec, *both, "--json", *where, "--no-record"],
                 ["space", "--spec", spec, "--grid", 5, *both, *where],
                 ["plan", "--lots", 2, "--spec", spec, *both, "--out", tmp_path / "planneg", *where, *store]):
        r = _run(*args)
        assert r.exit_code == 2, (args[0], r.output)
        assert "roll_speed_rpm = -3.0 is outside the possible range" in r.output, (args[0], r.output)
        assert "roll_gap_mm = 20.0 is outside the possible range" in r.output, (args[0], r.output)
    assert not (tmp_path / "planneg").exists()
    # the library refuses Python callers the same way
    for call in (lambda: api.window(spec, store=None, models_dir=models_dir, model=model_id,
                                    settings={"roll_speed_rpm": -3}),
                 lambda: api.space(spec, models_dir=models_dir, model=model_id, n_grid=5,
                                   settings={"roll_speed_rpm": -3}),
                 lambda: api.plan(2, spec=spec, store=tmp_path / "none.db", models_dir=models_dir, model=model_id,
                                  settings={"roll_speed_rpm": -3})):
        with pytest.raises(UsageError, match="roll_speed_rpm = -3.0 is outside the possible range"):
            call()


def _listed(output: str, intro: str) -> list[str]:
    """The names a refusal lists after ``intro`` (up to the next ';' or ')')."""
    assert intro in output, output
    tail = " ".join(output.split())  # click may wrap nothing, but the terminal text is read as one line
    tail = tail.split(intro, 1)[1]
    for end in (";", ")"):
        tail = tail.split(end, 1)[0]
    return [n.strip() for n in tail.split(",")]


def test_set_names_listed_are_names_the_command_takes(saved_model, tmp_path):
    """A user test: window's refusal of an unknown --set name listed ribbon_porosity among the valid names, and
    window refuses --set ribbon_porosity (the window is a porosity range: porosity cannot be held). Each command
    now lists only what its --set takes; checked by giving each listed name back to the command (the refusal
    itself is the rule: no outside source needed)."""
    from linkage.decide.whatif import valid_names
    from linkage.models.registry import load

    models_dir, model_id, spec = saved_model
    where = ["--models-dir", models_dir]
    names = valid_names(load(models_dir, model_id))
    assert "ribbon_porosity" in names  # predict takes it: a measured porosity replaces the prediction
    r = _run("predict", "--set", "roll_forse=9", *where, "--no-record")
    assert r.exit_code == 2 and "ribbon_porosity" in _listed(r.output, "valid names are:"), r.output
    # window and plan: ribbon_porosity is refused with its reason, every problem at once, and not offered
    for args in (["window", "--spec", spec, "--json", *where, "--no-record"],
                 ["plan", "--lots", 2, "--spec", spec, "--out", tmp_path / "plan", *where,
                  "--store", tmp_path / "none.db"]):
        r = _run(*args, "--set", "roll_forse=9")
        assert r.exit_code == 2, (args[0], r.output)
        listed = _listed(r.output, "valid names are:")
        assert "ribbon_porosity" not in listed and "roll_force_kn_per_cm" in listed, (args[0], r.output)
        assert sorted(listed) == sorted(n for n in names if n != "ribbon_porosity"), (args[0], r.output)
        r = _run(*args, "--set", "roll_forse=9", "--set", "ribbon_porosity=0.3")
        assert r.exit_code == 2, (args[0], r.output)
        assert "ribbon_porosity is what the window scans" in r.output, (args[0], r.output)
        assert "unknown name 'roll_forse'" in r.output, (args[0], r.output)
    assert not (tmp_path / "plan").exists()
    # space: the two mapped settings are refused with --set, so they are not offered either
    r = _run("space", "--spec", spec, "--grid", 5, "--set", "roll_forse=9", *where)
    assert r.exit_code == 2, r.output
    listed = _listed(r.output, "valid names are:")
    assert FORCE not in listed and "roll_gap_mm" not in listed and "ribbon_porosity" not in listed, r.output
    assert "roll_speed_rpm" in listed, r.output
    r = _run("space", "--spec", spec, "--grid", 5, "--set", "ribbon_porosity=0.3", "--set", "roll_gap_mm=2", *where)
    assert r.exit_code == 2, r.output
    assert "ribbon_porosity is predicted, not a setting" in r.output and "roll_gap_mm is mapped" in r.output


# --------------------------------------------------------------- 3. a setting given beside ribbon porosity

def test_a_setting_given_with_porosity_is_checked_against_its_training_range(scenario, saved_model):
    from linkage.decide.held import held_point
    from linkage.decide.whatif import predict_whatif
    from linkage.decide.window import find_window
    from linkage.models.lean import as_lean

    _, chain, spec, table = scenario
    lo, hi = float(table[FORCE].min()), float(table[FORCE].max())  # the training lots themselves
    far = hi + 3 * (hi - lo)
    reason = f"ribbon stage: {FORCE} = {far:.4g} kN/cm is above the training range {lo:.4g}–{hi:.4g}"
    lean = as_lean(chain)
    alone = predict_whatif(lean, {FORCE: far}, spec=spec)
    assert reason in alone.domain_reasons  # the stage runs: the reason the fix must also give
    both = predict_whatif(lean, {"ribbon_porosity": 0.3, FORCE: far}, spec=spec)
    assert not both.in_domain and not both.promise
    assert reason in both.domain_reasons
    assert both.held_point["in_domain"] is False and reason in both.held_point["reasons"]
    assert both.domain["ribbon"]["in_domain"] is False
    # the fitted chain gives the same verdict as its lean form
    fitted = predict_whatif(chain, {"ribbon_porosity": 0.3, FORCE: far}, spec=spec)
    assert fitted.domain_reasons == both.domain_reasons
    # and held_point (window, space) agrees
    held = held_point(lean, {k: v["value"] for k, v in both.inputs.items()})
    assert held["in_domain"] is False and reason in held["reasons"]
    # a force inside the training range with porosity given stays in the domain, and promises as before
    inside = predict_whatif(lean, {"ribbon_porosity": 0.3, FORCE: (lo + hi) / 2}, spec=spec)
    assert inside.domain["ribbon"]["in_domain"] is True
    assert not any(r.startswith("ribbon stage") for r in inside.domain_reasons)
    # the window's held point, at a given force outside the training range, is outside the domain too
    w = find_window(chain, spec, settings={FORCE: far}, n_draws=200)
    assert w.held_point["in_domain"] is False and reason in w.held_point["reasons"]
    # on the command line
    models_dir, _, spec_path = saved_model
    r = _run("predict", "--set", "ribbon_porosity=0.3", "--set", f"{FORCE}={far!r}", "--spec", spec_path, "--json",
             "--models-dir", models_dir, "--no-record")
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["in_domain"] is False and d["promise"] is False and reason in d["domain_reasons"]
    assert d["held_point"]["in_domain"] is False


# --------------------------------------------------------------- 4. judged attributes only

def test_judges_lists_only_judged_attributes_and_a_spec_judging_nothing_is_refused(saved_model, tmp_path):
    models_dir, _, spec_path = saved_model
    where = ["--models-dir", models_dir, "--no-record"]
    mixed = tmp_path / "mixed.toml"
    mixed.write_text(spec_path.read_text(encoding="utf-8") + "\n[granule_d90_um]\nmax = 900\n", encoding="utf-8")
    r = _run("predict", "--set", "roll_force_kn_per_cm=9", "--spec", mixed, "--json", *where)
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert "granule_d90_um" in d["not_modelled"]
    assert "granule_d90_um" not in d["judges"]
    assert set(d["judges"]) == set(d["attributes"])
    r = _run("predict", "--set", "roll_force_kn_per_cm=9", "--spec", mixed, *where)
    assert r.exit_code == 0, r.output
    lines = r.output.splitlines()
    start = lines.index("Judged:") + 1
    judged = [line for line in lines[start:] if line.startswith("  ")][:len(d["attributes"]) + 1]
    assert "!! Not judged: granule_d90_um (not predicted by this model's chain)." in lines
    assert [line.split(":")[0].strip() for line in judged] == list(d["judges"]), judged
    # a spec naming only an attribute the model does not predict: refused by predict as by window
    only = tmp_path / "only.toml"
    only.write_text("[granule_d90_um]\nmax = 900\n", encoding="utf-8")
    for args in (["predict", "--set", "roll_force_kn_per_cm=9", "--spec", only, "--json", *where],
                 ["window", "--spec", only, *where]):
        r = _run(*args)
        assert r.exit_code == 2, (args[0], r.output)
