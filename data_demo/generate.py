"""Write the demo scenario: a fictional roller-compaction campaign.

Product QZ-417 (invented), made at the invented Fernhollow site on a pilot
and a production compactor: 48 lots drawn from the known truth of
:mod:`linkage.synthetic` (its window scenario), with the mess real data have
(a missing test, a re-measured lot, optional unit weights and vessel data, raw
material columns). See ``data_demo/README.md``.

Run from the repository root::

    python data_demo/generate.py            # rewrites data_demo/lots, remeasured, truth
    python data_demo/generate.py --out DIR  # writes the same files under DIR

Seeded and deterministic: two runs give byte-identical files. Everything is
built in memory first, so nothing is written if a step fails.
"""

from __future__ import annotations

import argparse
import io
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from linkage.synthetic import (
    WINDOW_SETTINGS,
    WINDOW_SPEC,
    Truth,
    make_lots,
    remeasure_ribbon,
    spec_toml,
)

HERE = Path(__file__).resolve().parent
SEED = 417
N_LOTS = 48
PRODUCT = "QZ-417 200 mg"
LOT_PREFIX = "Q26"
START = "2026-01-05"
#: share of lots with individual tablet weights / dissolution vessel data
UNITS_SHARE = 0.35
VESSELS_SHARE = 0.5
#: the lot whose first ribbon results were biased and were measured again
REMEASURED_LOT = "Q26-017"
#: envelope-density bias of the first (wrong) results of that lot [g/cm3]
FIRST_RESULT_BIAS_G_CM3 = 0.035
#: the lot whose friability test was not done
NO_FRIABILITY_LOT = "Q26-031"
CONFIDENCE = 0.9
#: the demo's spec: the window scenario's, plus a breaking-force ("hardness") minimum as sites write it; at the
#: window settings it does not bind inside the campaign's porosity range (the true window is unchanged), but
#: lots pressed at low compression force fail it
DEMO_SPEC = {**WINDOW_SPEC, "breaking_force_n": (100.0, None)}
#: dissolution judged as a lab judges it: the USP <711> stages on units (Q = the minimum), simulated unit by unit;
#: the truth's windows below judge lot means (the generator has no unit-level truth for the demo's lots)
DISSOLUTION_JUDGE = "stages"


def _csv(frame: pd.DataFrame) -> str:
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False, lineterminator="\n")
    return buffer.getvalue()


def _r(x, digits=4):
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else round(float(x), digits)


def build() -> dict[str, str]:
    """Every demo file as relative path -> text."""
    truth = Truth.window_scenario()
    lots = make_lots(N_LOTS, seed=SEED, truth=truth, design="campaign", with_units=UNITS_SHARE,
                     with_vessels=VESSELS_SHARE, start=START, product=PRODUCT, lot_prefix=LOT_PREFIX,
                     raw_materials=True)
    tables = {name: frame.copy() for name, frame in lots.tables.items()}

    # the re-measured lot: the first results carry a bias, remeasured/ holds the correct ones
    corrected = remeasure_ribbon(lots, REMEASURED_LOT, seed=SEED + 1)
    ribbon = tables["ribbon"]
    first = ribbon["lot"] == REMEASURED_LOT
    ribbon.loc[first, "envelope_density_g_cm3"] = np.round(
        ribbon.loc[first, "envelope_density_g_cm3"] + FIRST_RESULT_BIAS_G_CM3, 4)

    # a missing friability test; and dissolution missing on a lot without vessel data
    tablets = tables["tablets"]
    tablets.loc[tablets["lot"] == NO_FRIABILITY_LOT, "friability_pct"] = np.nan
    with_vessels = set(tables["dissolution"]["lot"])
    no_dissolution_lot = next(lot for lot in tablets["lot"][::-1] if lot not in with_vessels)
    tablets.loc[tablets["lot"] == no_dissolution_lot, "dissolution_pct"] = np.nan

    files = {f"lots/{name}.csv": _csv(frame) for name, frame in tables.items()}
    files["lots/spec.toml"] = spec_toml(DEMO_SPEC, truth.dissolution_time_min, dissolution_judge=DISSOLUTION_JUDGE)
    files["remeasured/ribbon.csv"] = _csv(corrected)

    # the known truth, for checking what the tool finds (not an input)
    lot_truth = lots.lot_truth.copy()
    corrected_eps = float(np.mean(1.0 - corrected["envelope_density_g_cm3"] / corrected["skeletal_density_g_cm3"]))
    lot_truth.loc[lot_truth["lot"] == REMEASURED_LOT, "ribbon_porosity"] = corrected_eps
    numeric = lot_truth.select_dtypes("number").columns
    lot_truth[numeric] = lot_truth[numeric].round(6)
    files["truth/lot_truth.csv"] = _csv(lot_truth)

    screen, force = WINDOW_SETTINGS["mill_screen_mm"], WINDOW_SETTINGS["compression_force_kn"]
    mean_edges = truth.limiting_attributes(DEMO_SPEC, screen, force)
    prob_edges = truth.limiting_attributes(DEMO_SPEC, screen, force, confidence=CONFIDENCE)
    summary = {
        "about": "True porosity window of the demo truth (linkage.synthetic.Truth.window_scenario). "
                 "Not an input; for checking the tool's estimate.",
        "spec": {k: {"min": lo, "max": hi} for k, (lo, hi) in DEMO_SPEC.items()},
        "judged_here": "every attribute on its lot mean; the spec judges dissolution by the USP <711> stages "
                       "(judge = stages), which the tool simulates on units, so its dense edge may lie a little "
                       "inside the mean-judged one",
        "settings": WINDOW_SETTINGS,
        "mean_window": {side: {"ribbon_porosity": _r(edge), "limited_by": name}
                        for side, (edge, name) in mean_edges.items()},
        "probability_window": {"confidence": CONFIDENCE,
                               **{side: {"ribbon_porosity": _r(edge), "limited_by": name}
                                  for side, (edge, name) in prob_edges.items()}},
        "noise_sd": {k: _r(v, 6) for k, v in truth.noise_sd.items()},
        "campaign_porosity_range": [_r(lot_truth["ribbon_porosity"].min()),
                                    _r(lot_truth["ribbon_porosity"].max())],
        "messiness": {
            "remeasured_lot": REMEASURED_LOT,
            "first_result_envelope_bias_g_cm3": FIRST_RESULT_BIAS_G_CM3,
            "missing_friability_lot": NO_FRIABILITY_LOT,
            "missing_dissolution_lot": no_dissolution_lot,
            "lots_with_unit_weights": int(tables["tablet_weights"]["lot"].nunique()),
            "lots_with_vessel_data": int(tables["dissolution"]["lot"].nunique()),
        },
    }
    files["truth/window.json"] = json.dumps(summary, indent=2) + "\n"
    return files


def write(out: Path) -> list[Path]:
    """Build every file, then write them under ``out``; returns the paths."""
    files = build()
    written = []
    for relative, text in files.items():
        path = Path(out) / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(text.encode("utf-8"))
        written.append(path)
    return written


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write into (default: data_demo/)")
    args = parser.parse_args(argv)
    for path in write(args.out):
        print(path)


if __name__ == "__main__":
    main()
