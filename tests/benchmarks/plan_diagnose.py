"""One campaign of tests/benchmarks/plan_benefit.py taken apart (issue 18): the
window, the selected models of the two limiting attributes, the realised
porosity of the added lots, P(all pass) and the mean predictions at the true
edges, before and after planned or random lots.

Not a test. Prints only; reports/plan-benefit.md quotes a run of it.

    python tests/benchmarks/plan_diagnose.py [SEED] [LOTS]
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np


def main(argv=None) -> int:
    from linkage.assemble import assemble
    from linkage.decide.plan import augment_design
    from linkage.decide.window import find_window
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SETTINGS, WINDOW_SPEC, Truth, make_lots

    argv = sys.argv[1:] if argv is None else argv
    seed = int(argv[0]) if argv else 1812
    n_lots = int(argv[1]) if len(argv) > 1 else 16
    found = importlib.util.spec_from_file_location("plan_benefit", Path(__file__).with_name("plan_benefit.py"))
    bench = importlib.util.module_from_spec(found)
    found.loader.exec_module(bench)

    truth = Truth.window_scenario()
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    s = dict(WINDOW_SETTINGS)
    true_low, true_high = truth.probability_window(WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"],
                                                   confidence=0.9)
    g = truth.granules_mean(np.array([true_low, true_high]), s["mill_screen_mm"])
    tm = truth.tablets_mean(np.array([true_low, true_high]), g["granule_d50_um"], g["fines_pct"],
                            s["compression_force_kn"])
    print(f"true window {true_low:.4f} - {true_high:.4f}; true mean dissolution at the low edge "
          f"{tm['dissolution_pct'][0]:.2f}, weight RSD at the high edge {tm['weight_rsd_pct'][1]:.3f}")

    def fit(tables, tag):
        table = assemble(tables)
        chain = train_chain(table, seed=0, n_bootstrap=0)
        w = find_window(chain, spec, settings=s)
        i_lo, i_hi = np.argmin(abs(w.grid - true_low)), np.argmin(abs(w.grid - true_high))
        print(f"{tag}: window {w.low.value:.4f} - {w.high.value:.4f}; selected "
              f"{ {a: chain.targets[a].selected for a in ('dissolution_pct', 'weight_rsd_pct')} }; "
              f"P(all) at the true edges {w.p_all[i_lo]:.4f}, {w.p_all[i_hi]:.4f}; mean dissolution at the low "
              f"edge {w.bands['dissolution_pct']['mean'][i_lo]:.2f}, weight RSD at the high edge "
              f"{w.bands['weight_rsd_pct']['mean'][i_hi]:.3f}")
        return table, chain, w

    lots = make_lots(n_lots, seed=seed, truth=truth)
    table, chain, w0 = fit(lots.tables, "before")
    plan = augment_design(chain, table, spec, 8, settings=s, seed=seed, window=w0, criterion="local")
    planned = {k: [lot.settings[k] for lot in plan.lots] for k in plan.ranges} | {k: [s[k]] * 8 for k in s}
    random = bench._random_settings(chain, plan.ranges, 8, seed) | {k: [s[k]] * 8 for k in s}
    for kind, settings in (("planned", planned), ("random", random)):
        new = make_lots(8, seed=seed + 10_000, truth=truth, settings=settings, lot_prefix="NEW", start="2026-06-01")
        print(f"{kind} lots' true porosity: {np.round(new.lot_truth['ribbon_porosity'].to_numpy(), 3)}")
        fit(bench._combined(lots.tables, new.tables), kind)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
