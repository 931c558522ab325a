"""A user test of `linkage running` (the at-line check of a lot being made) found three faults; each test here
fails without its mend. They are regression tests of behaviour: where no outside source is named, none is needed
(the reference is the command's own stated rule, or another command of the project). The model is trained on
synthetic lots of a known truth (:class:`linkage.synthetic.Truth`), as in ``test_running_lot.py``.

1. Current settings far outside training (roll force 30 kN/cm; training about 4–14): it said nothing of the domain
   or of the measured level 30 within-lot SD away from the model's expectation, and printed a tight suggestion.
2. A change within its uncertainty of zero was printed without saying that no change is needed.
3. There was no ``--no-record``: every trial run added an audit entry.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

import linkage
from linkage.cli.main import cli
from linkage.synthetic import Truth, make_lots

pytestmark = pytest.mark.slow

LOT = "RUN-LIM"
SETTINGS = {"roll_force_kn_per_cm": 8.0, "roll_gap_mm": 2.5, "roll_speed_rpm": 5.0, "screw_speed_rpm": 27.5}


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A store of 40 synthetic lots and a model trained on them (seeded)."""
    folder = tmp_path_factory.mktemp("running_limits")
    truth = Truth()
    make_lots(40, seed=5, truth=truth).write_csv(folder / "lots")
    ws = linkage.Workspace(folder / "lots.db", models_dir=folder / "models")
    ws.ingest(folder / "lots")
    ws.train(seed=0)
    return folder, ws, truth


def samples_at(truth: Truth, n: int, rate: float, seed: int) -> pd.DataFrame:
    """n at-line samples 25 min apart of a lot at SETTINGS, true mean the truth's plus ``rate`` per sample."""
    rng = np.random.default_rng(seed)
    eps = (float(truth.porosity_mean(*SETTINGS.values())) + rate * np.arange(n)
           + truth.porosity_replicate_sd * rng.standard_normal(n))
    skeletal = np.full(n, float(truth.skeletal_density_g_cm3))
    times = pd.date_range("2026-03-02T08:00", periods=n, freq="25min")
    return pd.DataFrame({"lot": LOT, "sample": [str(i + 1) for i in range(n)],
                         "sampled_at": times.strftime("%Y-%m-%dT%H:%M:%S"),
                         "envelope_density_g_cm3": np.round((1 - eps) * skeletal, 4),
                         "skeletal_density_g_cm3": skeletal})


def run(ws, *args):
    r = CliRunner().invoke(cli, ["running", *map(str, args), "--store", str(ws.store), "--models-dir",
                                 str(ws.models_dir)], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    return r


def test_settings_outside_training_are_said_first_and_the_suggestion_is_not_supported(lab, tmp_path):
    """Fault 1. The lot is made at 8 kN/cm but declared at 30 kN/cm (outside training): the domain verdict is the
    what-if's own (`linkage predict` at the same settings gives the same reasons for the ribbon stage: the
    reference is that command), the text says so before the samples, the level is beyond the model's stated
    threshold (twice the prediction interval's half-width), and no suggestion is printed as if it held."""
    folder, ws, truth = lab
    atline = tmp_path / "atline.csv"
    samples_at(truth, 10, 0.0, seed=11).to_csv(atline, index=False)
    sets = [f"--set={k}={v}" for k, v in dict(SETTINGS, roll_force_kn_per_cm=30).items()]
    d = json.loads(run(ws, atline, *sets, "--window", "0.25:0.35", "--json").stdout)
    assert d["domain"]["in_domain"] is False
    assert any(r.startswith("roll_force_kn_per_cm = 30") and "above the training range" in r
               for r in d["domain"]["reasons"])
    p = CliRunner().invoke(cli, ["predict", *[f"--set={k}={v!r}" for k, v in d["settings"].items()], "--json",
                                 "--no-record", "--store", str(ws.store), "--models-dir", str(ws.models_dir)],
                           catch_exceptions=False)
    assert p.exit_code == 0, p.output
    whatif = json.loads(p.stdout[p.stdout.index("{"):])
    ribbon_stage = next(k for k, v in whatif["domain"].items() if v.get("reasons") and
                        any("roll_force" in r for r in v["reasons"]))
    assert d["domain"]["reasons"] == whatif["domain"][ribbon_stage]["reasons"]
    fit = d["model_fit"]
    assert fit["describes_lot"] is False and not fit["far_low"] <= d["centre"] <= fit["far_high"]
    assert fit["far_high"] - fit["expected"] == pytest.approx(2 * (fit["high"] - fit["expected"]))
    c = d["correction"]
    assert c["supported"] is False and len(c["unsupported_reasons"]) >= 2
    assert c["suggested"] > 0  # still computed, kept with its flag
    text = run(ws, atline, *sets, "--window", "0.25:0.35").stdout
    lines = text.splitlines()
    first_warning = next(i for i, line in enumerate(lines) if line.startswith("WARNING:"))
    table = next(i for i, line in enumerate(lines) if line.startswith("sample "))
    assert first_warning < table
    assert "outside the ribbon stage's applicability domain" in lines[first_warning]
    assert "extrapolations, not supported" in lines[first_warning]
    assert any("the model does not describe this lot" in line for line in lines[:table])
    assert "Suggested roll_force_kn_per_cm" not in text and "No supported correction" in text


def test_a_change_within_its_uncertainty_of_zero_says_no_change_is_needed_and_when_the_trend_leaves(lab, tmp_path):
    """Fault 2. A run drifting upward whose level now is the window's centre: the change's 95 % interval holds 0,
    and the text says no change is needed now. The trend's exit from the window is checked against the
    least-squares line of numpy.polyfit (the reference) on the samples' porosities and hours."""
    folder, ws, truth = lab
    atline = tmp_path / "atline_up.csv"
    frame = samples_at(truth, 12, 0.5 * truth.porosity_replicate_sd, seed=7)
    frame.to_csv(atline, index=False)
    sets = [f"--set={k}={v}" for k, v in SETTINGS.items()]
    first = json.loads(run(ws, atline, *sets, "--window", "0.25:0.35", "--json").stdout)
    assert first["drift"]["drifting"] and first["drift"]["direction"] == "upward"
    level = first["level"]["value"]
    low, high = level - 0.04, level + 0.04  # the level now at the window's centre
    d = json.loads(run(ws, atline, *sets, "--window", f"{low!r}:{high!r}", "--json").stdout)
    c = d["correction"]
    assert abs(c["change"]) <= 1.959963984540054 * c["se"]
    assert c["no_change_needed"] is True and c["supported"] is True, (c["unsupported_reasons"], d["model_fit"])
    text = run(ws, atline, *sets, "--window", f"{low!r}:{high!r}").stdout
    assert "No change needed now (the suggested change is within its uncertainty of zero)." in text
    eps = 1 - frame["envelope_density_g_cm3"] / frame["skeletal_density_g_cm3"]
    hours = np.arange(len(frame)) * 25 / 60
    rate, intercept = np.polyfit(hours, eps, 1)
    at_last = intercept + rate * hours[-1]
    ex = d["level"]["window_exit"]
    assert ex["side"] == "upper" and ex["edge"] == pytest.approx(high)
    assert ex["hours_after_last_sample"] == pytest.approx((high - at_last) / rate, rel=1e-6)
    assert f"the level would reach the window's upper edge {high:.3f}" in text
    # a change outside its uncertainty of zero is not called no change
    far = json.loads(run(ws, atline, *sets, "--window", f"{low - 0.03!r}:{high - 0.03!r}", "--json").stdout
                     )["correction"]
    assert abs(far["change"]) > 1.959963984540054 * far["se"] and far["no_change_needed"] is False


def test_no_record_adds_no_audit_entry(lab, tmp_path):
    """Fault 3: `running --no-record` writes nothing in the store (as `window`/`predict --no-record`); without it
    the run is recorded."""
    folder, ws, truth = lab
    atline = tmp_path / "atline_rec.csv"
    samples_at(truth, 8, 0.0, seed=3).to_csv(atline, index=False)
    sets = [f"--set={k}={v}" for k, v in SETTINGS.items()]

    def entries() -> int:
        trail = ws.audit()
        return int((trail["action"] == "running").sum())

    before = entries()
    r = run(ws, atline, *sets, "--window", "0.25:0.35", "--json", "--no-record")
    assert json.loads(r.stdout)["recorded"] is False
    assert "--no-record" in r.stderr and entries() == before
    r = run(ws, atline, *sets, "--window", "0.25:0.35", "--json")
    assert json.loads(r.stdout)["recorded"] is True and entries() == before + 1
