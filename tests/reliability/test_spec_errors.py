"""Spec and settings errors: min above max, an unknown attribute, a limit in
the wrong unit range, a bad setting. Each is a clear error (file, line,
attribute, value and rule; exit code 2) given before any work is done: no
store created or opened, no model loaded, no training run.

"Before any work" is shown by pointing the command at a store or registry
that does not exist: the error must be the spec's (or the setting's), not
"no lot store" or "no model registry".
"""

from __future__ import annotations

import pytest

from linkage.exceptions import SpecError
from linkage.models import registry
from linkage.spec import read_spec
from linkage.synthetic import make_lots

from .helpers import run_cli

pytestmark = pytest.mark.reliability

BAD_SPEC = """# three mistakes
[ribbon_porosity]
min = 20
max = 30

[dissolution_pct]
min = 90
max = 80

[friabilty_pct]
max = 1

[tensile_strength_mpa]
min = 1.7
"""


def test_every_spec_mistake_is_named_at_once(tmp_path):
    path = tmp_path / "spec.toml"
    path.write_text(BAD_SPEC)
    with pytest.raises(SpecError) as info:
        read_spec(path)
    text = str(info.value)
    problems = info.value.problems
    assert len(problems) == 4
    # porosity given in percent: outside 0..1, with the hint (line 3 is its min; line 2 its table)
    assert "spec.toml, line 3, table [ribbon_porosity], key 'min', value 20" in text and "wrong unit range" in text
    assert "write 0.20 for 20%" in text
    # min above max (line 7 is the min)
    assert "line 7, table [dissolution_pct], key 'min', value 90: [dissolution_pct] min 90 is above max 80" in text
    # unknown attribute (a typo) with the nearest valid one, and the list of valid ones
    assert "line 10, table [friabilty_pct]: unknown quality attribute [friabilty_pct] (did you mean " \
           "'friability_pct'?); valid: ribbon_porosity" in text


@pytest.mark.parametrize("text, words", [
    ("[dissolution_pct]\nmax = 500\n", "wrong unit range"),
    ("[friability_pct]\nmax = -1\n", "wrong unit range"),
    ("[tensile_strength_mpa]\nmin = 1700\n", "wrong unit range"),  # kPa for MPa
    ("[dissolution_pct]\nmin = 80\ntime_min = 0\n", "time_min must be in"),
    ("[weight_rsd_pct]\nmax = \"2\"\n", "must be a number"),
    ("[weight_rsd_pct]\nmax = true\n", "must be a number"),
    ("[weight_rsd_pct]\nmax = nan\n", "must be a number"),
    ("[weight_rsd_pct]\nlimit = 2\n", "unknown key 'limit'"),
    ("[weight_rsd_pct]\n", "neither min nor max"),
    ("", "no limits"),
    ("[weight_rsd_pct\nmax = 2\n", "not valid TOML"),
])
def test_spec_rules(tmp_path, text, words, counts):
    path = tmp_path / "spec.toml"
    path.write_text(text)
    with pytest.raises(SpecError, match=words):
        read_spec(path)
    counts["settings errors caught before work"] += 1


@pytest.fixture
def setup(tmp_path, trained_small):
    """A lab folder with a bad spec.toml, a good spec, a real model."""
    lab = tmp_path / "lab"
    make_lots(6, seed=1).write_csv(lab)
    (lab / "spec.toml").write_text(BAD_SPEC)
    bad, good = tmp_path / "bad.toml", tmp_path / "good.toml"
    bad.write_text(BAD_SPEC)
    good.write_text("[ribbon_porosity]\nmin = 0.2\nmax = 0.4\n")
    models = tmp_path / "models"
    registry.save(trained_small, models)
    return {"lab": lab, "bad": bad, "good": good, "models": models, "none_db": tmp_path / "none.db",
            "none_models": tmp_path / "no-models", "store": tmp_path / "lots.db"}


def test_a_bad_spec_stops_every_command_before_work(setup, counts, no_env):
    s = setup
    result = run_cli(["ingest", s["lab"], "--store", s["store"]])
    assert result.exit_code == 2 and "min 90 is above max 80" in result.stderr
    assert not s["store"].exists()  # nothing written: the data files were fine, the spec was not
    for args in (["assemble", "--spec", s["bad"], "--store", s["none_db"]],
                 ["window", "--spec", s["bad"], "--models-dir", s["none_models"]],
                 ["predict", "--spec", s["bad"], "--set", "roll_gap_mm=2", "--models-dir", s["none_models"]],
                 ["train", "--chain", s["bad"], "--store", s["none_db"], "--models-dir", s["none_models"]]):
        result = run_cli(args)
        assert result.exit_code == 2, (args, result.output)
        assert "bad.toml" in result.stderr, (args, result.output)
        assert "no lot store" not in result.stderr and "no model registry" not in result.stderr
    assert not s["none_db"].exists() and not s["none_models"].exists()
    counts["settings errors caught before work"] += 5


@pytest.mark.parametrize("args, words", [
    (["predict", "--set", "roll_gap_mm=abc"], "'abc' is not a number"),
    (["predict", "--set", "roll_gap_mm"], "is not NAME=VALUE"),
    (["predict", "--set", "roll_gap_mm=nan"], "not a finite number"),
    (["predict", "--set", "roll_gap_mm=1e999"], "not a finite number"),
    (["predict", "--set", "tablet_hardness=5"], "unknown name 'tablet_hardness'"),
    (["predict", "--set", "roll_gap_mm=200"], "outside the possible range"),
    (["predict", "--set", "roll_gap_mm=2", "--level", "2"], "Invalid value for '--level'"),
    (["window", "--spec", "GOOD", "--confidence", "1.5"], "Invalid value for '--confidence'"),
    (["window", "--spec", "GOOD", "--confidence", "nan"], "is not a finite number"),
    (["window", "--spec", "GOOD", "--draws", "5"], "Invalid value for '--draws'"),
])
def test_a_bad_setting_is_refused(setup, args, words, counts, no_env):
    args = [setup["good"] if a == "GOOD" else a for a in args]
    result = run_cli([*args, "--models-dir", setup["models"]])
    assert result.exit_code == 2, result.output
    assert words in result.output, result.output
    counts["settings errors caught before work"] += 1


@pytest.mark.parametrize("args, words", [
    (["--coverage", "1.5"], "coverage"),
    (["--coverage", "nan"], "coverage"),
    (["--jobs", "0"], "n_jobs"),
])
def test_a_bad_training_setting_is_refused_before_training(setup, args, words, counts, no_env):
    """Checked before the cross-validation starts (the store is read)."""
    assert run_cli(["ingest", setup["lab"], "--store", setup["store"]]).exit_code == 2  # the bad spec.toml
    (setup["lab"] / "spec.toml").unlink()
    assert run_cli(["ingest", setup["lab"], "--store", setup["store"]]).exit_code == 0
    result = run_cli(["train", "--store", setup["store"], "--models-dir", setup["none_models"], *args])
    assert result.exit_code == 2 and words in result.stderr, result.output
    assert "Cross-validating" not in result.output and not setup["none_models"].exists()
    counts["settings errors caught before work"] += 1


@pytest.mark.parametrize("value", ["-5", "0", "nan"])
def test_an_impossible_dissolution_time_is_refused(setup, value, small_chain_toml, tmp_path, counts, no_env):
    (setup["lab"] / "spec.toml").unlink()
    assert run_cli(["ingest", setup["lab"], "--store", setup["store"]]).exit_code == 0
    chain = tmp_path / "chain.toml"
    chain.write_text(small_chain_toml)
    result = run_cli(["train", "--store", setup["store"], "--models-dir", setup["none_models"], "--chain", chain,
                      "--dissolution-time", value])
    counts["settings errors caught before work"] += 1
    assert result.exit_code == 2 and "dissolution" in result.stderr, result.output


@pytest.mark.parametrize("value", ["nan", "inf", "1e400"])
def test_a_non_finite_fines_cutoff_is_refused(setup, value, counts, no_env):
    (setup["lab"] / "spec.toml").unlink()
    assert run_cli(["ingest", setup["lab"], "--store", setup["store"]]).exit_code == 0
    result = run_cli(["assemble", "--store", setup["store"], "--fines-cutoff-um", value])
    counts["settings errors caught before work"] += 1
    assert result.exit_code == 2 and "fines" in result.output.lower(), result.output


@pytest.mark.parametrize("args", [
    ["train", "--coverage", "1.5", "--store", "NONE_DB", "--models-dir", "NONE_MODELS"],
    ["window", "--spec", "GOOD", "--confidence", "1.5", "--models-dir", "NONE_MODELS"],
    ["predict", "--set", "roll_gap_mm=2", "--level", "2", "--models-dir", "NONE_MODELS"],
])
def test_settings_are_checked_before_the_store_or_registry_is_opened(setup, args, counts, no_env):
    names = {"NONE_DB": setup["none_db"], "NONE_MODELS": setup["none_models"], "GOOD": setup["good"]}
    result = run_cli([names.get(a, a) for a in args])
    counts["settings errors caught before work"] += 1
    assert result.exit_code == 2, result.output
    assert "no lot store" not in result.stderr and "no model registry" not in result.stderr, result.output
