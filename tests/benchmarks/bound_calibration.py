"""Does the window of the lower bound keep its promise? A few seeded
synthetic campaigns with the true chain known (issue 12, item 1; the full
calibration study is item 6's).

For each campaign: ``make_lots(n, seed)`` from linkage.synthetic's window
scenario, assembled and trained (seed 0, B = 200 bootstrap replicates), and
the window found at the scenario's settings (confidence 0.9, assurance 0.9).
At 25 porosities across each reported window (the bound's and the point
estimate's) the true probability of passing every limit is computed from the
generator's own model (``Truth.p_pass_all``, 20,000 draws). A window "holds"
when the true probability is at least the confidence everywhere in it (less
0.005 for the Monte Carlo of the truth). Three windows per campaign: the one
linkage reports (its bound simultaneous over the window), the one the
pointwise bound would give (each porosity alone at the assurance), and the
point estimate's. Also reported: how often a window
is reported at all, and the mean absolute error of the point estimate of
P(all pass) over the porosity grid.

Not a test. Writes reports/bound-calibration.md.

    python tests/benchmarks/bound_calibration.py [--lots 60] [--campaigns 8]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np


def main(argv=None) -> int:
    from linkage.assemble import assemble
    from linkage.decide.window import _segments, find_window
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SETTINGS, WINDOW_SPEC, Truth, make_lots

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--lots", type=int, nargs="+", default=[60])
    ap.add_argument("--campaigns", type=int, default=8)
    ap.add_argument("--out", type=Path, default=Path("reports/bound-calibration.md"))
    args = ap.parse_args(argv)
    truth = Truth.window_scenario()
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    s = WINDOW_SETTINGS
    conf = 0.9
    true_low, true_high = truth.probability_window(WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"],
                                                   confidence=conf)
    lines = ["# Calibration of the lower bound on seeded synthetic campaigns", "",
             f"Window scenario of linkage.synthetic at {dict(s)}; confidence {conf}, assurance 0.9, B = 200. "
             f"True window {true_low:.3f} – {true_high:.3f}. Written by tests/benchmarks/bound_calibration.py.", "",
             "| lots | campaign seed | reported window (simultaneous bound) | min true P in it "
             "| pointwise-bound window | min true P in it | point window | min true P in it "
             "| MAE of point P(all) | seconds |",
             "|---|---|---|---|---|---|---|---|---|---|"]
    summary = []
    for n in args.lots:
        held = {"bound": [0, 0], "pointwise": [0, 0], "point": [0, 0]}
        maes = []
        for c in range(args.campaigns):
            t0 = time.perf_counter()
            lots = make_lots(n, seed=1000 + c, truth=truth)
            chain = train_chain(assemble(lots.tables), seed=0)
            w = find_window(chain, spec, settings=dict(s), confidence=conf)
            p_true_grid = truth.p_pass_all(w.grid, WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"])
            maes.append(float(np.mean(np.abs(w.p_all - p_true_grid))))
            cells = []
            runs = _segments(w.grid, w.p_all_low_pointwise, conf)
            pw = max((r[1] for r in runs), key=lambda r: r[1] - r[0]) if runs else (None, None)
            for kind, lo, hi in (("bound", w.low.value, w.high.value), ("pointwise", *pw),
                                 ("point", w.point_low, w.point_high)):
                if lo is None:
                    cells += ["none", "—"]
                    continue
                eps = np.linspace(lo, hi, 25)
                p = truth.p_pass_all(eps, WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"])
                held[kind][0] += 1
                held[kind][1] += int(p.min() >= conf - 0.005)
                cells += [f"{lo:.3f} – {hi:.3f}", f"{p.min():.3f}"]
            lines.append(f"| {n} | {1000 + c} | " + " | ".join(cells) + f" | {maes[-1]:.3f} | "
                         f"{time.perf_counter() - t0:.0f} |")
            print(lines[-1], flush=True)
        summary.append(f"- {n} lots, {args.campaigns} campaigns: the reported window (simultaneous bound) was "
                       f"reported in {held['bound'][0]} and held in {held['bound'][1]} of them; the pointwise bound's "
                       f"in {held['pointwise'][0]} and held in {held['pointwise'][1]}; the point estimate's window was "
                       f"reported in {held['point'][0]} and held in {held['point'][1]}; mean absolute error of the "
                       f"point P(all pass) over the grid {np.mean(maes):.3f}.")
    lines += ["", *summary, ""]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text("\n".join(lines), encoding="utf-8")
    print("\n".join(summary))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
