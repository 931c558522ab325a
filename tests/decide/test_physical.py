"""Physically possible predictions (issue 12 item 3) and no promise outside
the applicability domain (item 4).

The bounds are definitions, not fitted numbers: porosity = 1 − envelope /
skeletal density lies in (0, 1) and solid fraction = 1 − porosity likewise
(e.g. Johanson 1965, J. Appl. Mech. 32:842, for the solid fraction of a
ribbon); fines and friability are shares of a mass, 0–100 % (USP <1216>
friability is a percent weight loss); an RSD, a size, a strength is ≥ 0;
dissolution is 0 to the template's 150 % of label claim (linkage.schema).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
from click.testing import CliRunner
from hypothesis import given, settings, strategies as st

from linkage.cli.main import cli
from linkage.decide.propagate import simulate
from linkage.decide.whatif import predict_whatif
from linkage.models.lean import as_lean, physical_range, project
from linkage.schema import PHYSICAL_BOUNDS

FAR = {"roll_force_kn_per_cm": 20.0, "roll_gap_mm": 4.0}


def _inside(name, v):
    lo, hi, lo_open, hi_open = PHYSICAL_BOUNDS[name]
    v = np.asarray(v, float)
    ok_lo = v > lo if lo_open else v >= lo
    ok_hi = v < hi if hi_open else v <= hi
    return bool(np.all(ok_lo & ok_hi))


def test_each_bound_projects_values_and_infinite_ends():
    for name, (lo, hi, lo_open, hi_open) in PHYSICAL_BOUNDS.items():
        v = np.array([-math.inf, lo - 57.0, lo, (lo + min(hi, lo + 1.0)) / 2, hi, hi + 57.0, math.inf])
        out, moved = project(name, v)
        assert _inside(name, out), name
        # a value inside is left alone, bit for bit; every value outside is moved
        mid = v[3]
        assert out[3] == mid and not moved[3]
        assert moved[0] and moved[1]
        if math.isfinite(hi):
            assert moved[-1] and moved[-2]
        else:
            assert out[-1] == math.inf  # no upper bound: an unbounded end stays unbounded
    assert physical_range("ribbon_porosity") == (1e-6, 1 - 1e-6)
    assert physical_range("weight_rsd_pct")[0] == 0.0
    assert physical_range("dissolution_pct") == (0, 150)
    assert physical_range("some_extra_column") == (-math.inf, math.inf)
    assert np.isnan(project("fines_pct", [math.nan])[0][0]) and not project("fines_pct", [math.nan])[1][0]


def test_fitted_and_lean_agree_bit_for_bit_far_out(scenario):
    _, chain, _, _ = scenario
    lean = as_lean(chain)
    rng = np.random.default_rng(3)
    for name, t in chain.targets.items():
        lo_hi = {c: chain.training["ranges"][c] for c in t.inputs}
        X = pd.DataFrame({c: rng.uniform(lo - 3 * (hi - lo), hi + 3 * (hi - lo), 200) for c, (lo, hi) in lo_hi.items()})
        cols = {c: X[c].to_numpy() for c in t.inputs}
        a, b = t.predict(X), lean.targets[name].predict(cols)
        assert np.array_equal(a, b), name
        (l1, h1), (l2, h2) = t.interval(X), lean.targets[name].interval(cols)
        assert np.array_equal(l1, l2) and np.array_equal(h1, h2), name
        if name in PHYSICAL_BOUNDS:
            assert _inside(name, a) and _inside(name, l1) and _inside(name, h1), name


@settings(max_examples=25, deadline=None)
@given(st.floats(0.1, 60.0), st.floats(0.1, 15.0), st.floats(0.1, 100.0), st.floats(0.1, 500.0),
       st.floats(0.1, 10.0), st.floats(0.1, 100.0))
def test_every_output_physical_for_any_settings(scenario, force, gap, roll, screw, screen, press):
    _, chain, spec, _ = scenario
    lean = as_lean(chain)
    values = {"roll_force_kn_per_cm": force, "roll_gap_mm": gap, "roll_speed_rpm": roll,
              "screw_speed_rpm": screw, "mill_screen_mm": screen, "compression_force_kn": press}
    values = {k: v for k, v in values.items() if k in lean.root_inputs()}
    w = predict_whatif(lean, values, spec=spec, n_draws=400, contributions=False)
    for name, p in w.predictions.items():
        if name in PHYSICAL_BOUNDS:
            assert _inside(name, [p["value"], p["low"], p["high"]]), (name, p)
    d = simulate(lean, {k: [v] for k, v in values.items()}, n_draws=400)
    for name in d.raw:
        if name in PHYSICAL_BOUNDS:
            assert _inside(name, d.values[name]) and _inside(name, d.means[name]), name


def test_far_out_of_domain_whatif_promises_nothing(saved_model):
    models_dir, model_id, spec_path = saved_model
    args = ["predict", "--models-dir", str(models_dir), "--no-record",
            "--spec", str(spec_path)] + [a for k, v in FAR.items() for a in ("--set", f"{k}={v}")]
    text = CliRunner().invoke(cli, args)
    assert text.exit_code == 0, text.output
    assert "no probability is promised" in text.output
    assert "P(every specification passes together)" not in text.output
    out = CliRunner().invoke(cli, args + ["--json"])
    d = json.loads(out.stdout if hasattr(out, "stdout") else out.output)
    assert d["promise"] is False and d["in_domain"] is False
    assert d["promise_reasons"] and any("roll_force_kn_per_cm" in r for r in d["promise_reasons"])
    for name, p in d["predictions"].items():
        if name in PHYSICAL_BOUNDS:
            assert _inside(name, [v for v in (p["value"], p["low"], p["high"]) if v is not None]), (name, p)


def test_window_with_held_settings_outside_promises_nothing(scenario):
    from linkage.decide.window import find_window

    _, chain, spec, _ = scenario
    lo, hi = chain.training["ranges"]["compression_force_kn"]
    inside = find_window(chain, spec, n_draws=300)
    out = find_window(chain, spec, settings={"compression_force_kn": hi + 3 * (hi - lo)}, n_draws=300)
    assert out.promise is False and any("compression_force_kn" in r for r in out.promise_reasons)
    assert out.to_dict()["promise"] is False
    assert inside.to_dict()["promise"] is inside.promise
