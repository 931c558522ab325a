"""A second user test of the decisions (six bugs), each fixed with a test that failed before the fix.

N3. ``watch --spec`` and ``running --spec`` find the window at the default confidence 0.9, which they do not
    let the user change; on a model of 8 lots or fewer the refusal of a confidence above n/(n + 1)
    (:func:`linkage.decide.window.check_confidence_supported`) made them exit 2 with advice to use
    ``--confidence``, an option they lack. Now watch runs without the window and says why; running says no
    window can be found and names its ``--window LOW:HIGH``. ``window`` still refuses (exit 2).
N1. ``predict`` with a spec of the acceptance value alone crashed (a bound of None written as a percent) and
    its JSON promised with no bound. The bound is now computed as the window computes it (the lot-level
    factor judges no attribute; the unit-level factor, :func:`linkage.decide.bound.with_unit_level`).
N2. ``window`` (and ``plan``) with a judged attribute given by ``--set`` crashed (KeyError). A given value is
    not predicted, so not judged (as ``predict`` does not judge it): it is listed in ``not_modelled`` with
    the reason.
N4. ``predict`` with a spec every predicted attribute of which is given by ``--set`` promised on nothing;
    now refused (exit 2), as a spec of which the model predicts nothing is.
N6. ``window``, ``space``, ``plan`` and ``running`` reported only the first ``--set`` value that is no
    number; now every problem at once, as ``predict``.
Minor: ``plan`` and ``running`` name themselves in their time-point refusal (it said ``window:``).

These are regression tests of refusals and crashes: they need no outside source, except where noted at the
check (the window of N2 compared with the window of a spec without the given attribute: the same
computation by definition; the bound of N1 at most its point estimate, as every lower bound is).

Set-up: the demo's lots Q26-001 to Q26-007 (7 lots: n/(n + 1) = 0.875 < 0.9), ingested and trained with
the demo's spec, as the user test did.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

import linkage
from linkage.cli.main import cli
from linkage.exceptions import UnsupportedConfidenceError, UsageError

SEVEN = [f"Q26-00{i}" for i in range(1, 8)]


def _run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture(scope="module")
def seven(tmp_path_factory):
    """(folder, store, models_dir, spec path, samples path) of a 7-lot demo workspace."""
    from linkage import api

    folder = tmp_path_factory.mktemp("seven")
    lots = folder / "lots"
    lots.mkdir()
    source = linkage.DEMO_DATA / "lots"
    for path in source.glob("*.csv"):
        lines = path.read_text(encoding="utf-8").splitlines()
        keep = [lines[0]] + [row for row in lines[1:] if row.split(",", 1)[0] in SEVEN]
        (lots / path.name).write_text("\n".join(keep) + "\n", encoding="utf-8")
    spec = folder / "spec.toml"
    spec.write_text((source / "spec.toml").read_text(encoding="utf-8"), encoding="utf-8")
    store, models = folder / "lots.db", folder / "models"
    api.ingest(lots, store)
    api.train(store, models, spec=spec)
    ribbon = (lots / "ribbon.csv").read_text(encoding="utf-8").splitlines()
    samples = folder / "samples.csv"
    samples.write_text("\n".join([ribbon[0]] + [r.replace("Q26-007", "Q26-099") for r in ribbon[1:]
                                                if r.startswith("Q26-007,")]) + "\n", encoding="utf-8")
    return folder, store, models, spec, samples


# --------------------------------------------------------------- N3

def test_watch_runs_without_the_window_and_says_why_on_few_lots(seven):
    folder, store, models, spec, _ = seven
    r = _run("watch", "--spec", spec, "--store", store, "--models-dir", models)
    assert r.exit_code == 0, r.output
    assert "Note: no porosity window" in r.output and "7 lots" in r.output
    assert "Porosity window used" not in r.output
    r = _run("watch", "--spec", spec, "--store", store, "--models-dir", models, "--json")
    assert r.exit_code == 0, r.output
    notes = json.loads(r.output)["notes"]
    assert len(notes) == 1 and "confidence 0.9" in notes[0]


def test_running_says_what_to_do_when_no_window_can_be_found_on_few_lots(seven):
    folder, store, models, spec, samples = seven
    where = ["--store", store, "--models-dir", models, "--baseline", 2]
    r = _run("running", samples, "--spec", spec, *where)
    assert r.exit_code == 2, r.output
    assert "no porosity window can be found at confidence 0.9" in r.output and "--window LOW:HIGH" in r.output
    assert "--confidence 0.9 asks" not in r.output  # not the advice of an option running lacks
    r = _run("running", samples, "--window", "0.25:0.35", *where, "--json")  # the way out it names works
    assert r.exit_code == 0, r.output


def test_window_still_refuses_and_the_refusal_has_its_own_class(seven):
    from linkage import api

    folder, store, models, spec, _ = seven
    with pytest.raises(UnsupportedConfidenceError, match="residuals on 7 lots") as got:
        api.window(spec, store=store, models_dir=models)
    assert isinstance(got.value, UsageError) and got.value.n_lots == 7
    r = _run("window", "--spec", spec, "--store", store, "--models-dir", models)
    assert r.exit_code == 2 and "asks more than the lots can show" in r.output, r.output


# --------------------------------------------------------------- N1

def test_predict_with_a_spec_of_the_acceptance_value_alone_bounds_it(seven):
    folder, store, models, _, _ = seven
    spec = folder / "av.toml"
    spec.write_text("[acceptance_value]\nmax = 15\n", encoding="utf-8")
    where = ["--set", "ribbon_porosity=0.3", "--spec", spec, "--store", store, "--models-dir", models]
    r = _run("predict", *where)
    assert r.exit_code == 0, r.output
    assert "P(every specification passes together)" in r.output
    r = _run("predict", *where, "--json")
    assert r.exit_code == 0, r.output
    d = json.loads(r.output)
    low = d["p_pass_all_bound"]["low"]
    assert low is not None and low <= d["p_pass_all"] + 1e-12  # a lower bound, at most its point estimate
    assert d["promise"] is d["in_domain"]  # the bound is there: only the domain can take the promise
    html = folder / "av.html"
    r = _run("predict", *where, "--html", html)
    assert r.exit_code == 0 and html.exists(), r.output


# --------------------------------------------------------------- N4

def test_predict_refuses_a_spec_whose_every_attribute_is_given(seven):
    folder, store, models, _, _ = seven
    spec = folder / "rp.toml"
    spec.write_text("[ribbon_porosity]\nmin = 0.25\nmax = 0.35\n", encoding="utf-8")
    r = _run("predict", "--set", "ribbon_porosity=0.3", "--spec", spec, "--store", store, "--models-dir", models,
             "--json")
    assert r.exit_code == 2, r.output
    assert "given with --set (ribbon_porosity)" in r.output and "nothing to judge" in r.output
    # porosity predicted (not given): judged, as before
    r = _run("predict", "--set", "roll_gap_mm=2.5", "--spec", spec, "--store", store, "--models-dir", models,
             "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.output)["attributes"] == ["ribbon_porosity"]


# --------------------------------------------------------------- N6 and the time point's command name

def test_every_set_problem_at_once_in_window_space_plan_and_running(seven):
    folder, store, models, spec, samples = seven
    where = ["--models-dir", models]
    bad = ["--set", "roll_gap_mm=abc", "--set", "roll_speed_rpm=-3"]
    for args in (["window", "--spec", spec, *bad, "--store", store],
                 ["space", "--spec", spec, "--grid", 5, *bad],
                 ["plan", "--lots", 2, "--spec", spec, *bad, "--store", store],
                 ["running", samples, "--window", "0.25:0.35", "--baseline", 2, *bad, "--store", store]):
        r = _run(*args, *where)
        assert r.exit_code == 2, (args[0], r.output)
        assert "roll_gap_mm: 'abc' is not a number" in r.output, (args[0], r.output)
        assert "roll_speed_rpm = -3.0 is outside the possible range" in r.output, (args[0], r.output)


def test_plan_and_running_name_themselves_in_the_time_point_refusal(seven):
    folder, store, models, _, samples = seven
    t45 = folder / "t45.toml"
    t45.write_text("[dissolution_pct]\nmin = 80\ntime_min = 45\n", encoding="utf-8")
    where = ["--store", store, "--models-dir", models]
    r = _run("plan", "--lots", 2, "--spec", t45, *where)
    assert r.exit_code == 2 and "plan: the spec judges dissolution_pct at 45 min" in r.output, r.output
    r = _run("running", samples, "--spec", t45, "--baseline", 2, *where)
    assert r.exit_code == 2 and "running: the spec judges dissolution_pct at 45 min" in r.output, r.output


# --------------------------------------------------------------- N2

def test_window_with_a_judged_attribute_given_does_not_judge_it(scenario, saved_model):
    from linkage.decide.window import find_window
    from linkage.spec import Spec

    _, chain, spec, _ = scenario
    given = {"tensile_strength_mpa": 0.5}
    w = find_window(chain, spec, settings=given, n_draws=200)
    assert "tensile_strength_mpa" in w.not_modelled and "tensile_strength_mpa" not in w.attributes
    assert "given with --set" in w.to_dict()["not_modelled_reasons"]["tensile_strength_mpa"]
    # the same window as that of the spec without the given attribute (the same computation by definition)
    without = Spec(limits={k: v for k, v in spec.limits.items() if k != "tensile_strength_mpa"})
    other = find_window(chain, without, settings=given, n_draws=200)
    assert (w.low.value, w.high.value) == (other.low.value, other.high.value)
    assert w.p_all.tolist() == other.p_all.tolist()
    # every judged attribute given: refused, nothing to judge
    only = Spec(limits={"tensile_strength_mpa": spec.limits["tensile_strength_mpa"]})
    with pytest.raises(UsageError, match="given with --set"):
        find_window(chain, only, settings=given, n_draws=200)
    models_dir, _, spec_path = saved_model
    r = _run("window", "--spec", spec_path, "--set", "dissolution_pct=90", "--models-dir", models_dir,
             "--no-record", "--json")
    assert r.exit_code == 0, r.output
    d = json.loads(r.output[r.output.index("{"):])  # after the note that nothing was recorded (--no-record)
    assert d["not_modelled_reasons"]["dissolution_pct"].startswith("given with --set")


def test_lot_given_beside_a_file_with_a_lot_column_is_refused(tmp_path):
    """--lot would replace every row's lot of a --from-csv file that names them: refused, as a contradicting
    --product is (the session's review found the lot column overridden without a word). A refusal: no outside
    reference."""
    from linkage.api import whatif_rows
    from linkage.exceptions import UsageError

    path = tmp_path / "rows.csv"
    path.write_text("lot,roll_force_kn_per_cm\nA-1,8\nA-2,9\n", encoding="utf-8")
    with pytest.raises(UsageError, match="--lot would replace them all"):
        whatif_rows(path, lots="B-7", store=tmp_path / "none.db", models_dir=tmp_path / "models", record=False)
