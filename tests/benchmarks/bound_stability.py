"""Stability of the lower bound on P(all pass) (issue 12, item 1), and the
time ``find_window`` takes with it, on the demo's lots.

The chain is trained once on the demo scenario (seed 0). Its bootstrap
replicates are then drawn twice more with other seeds (B replicates each,
:func:`linkage.models.bootstrap.bootstrap_chain`), and the window is found
with each set of replicates and with two Monte Carlo seeds. Reported: the
largest and the mean absolute difference of the bound ``p_all_low`` over the
porosity grid between the two bootstrap seeds (same draws seed), the same
between the two draws seeds (same replicates), the difference of the window
edges, and the CPU and wall time of ``find_window``.

Not a test (pytest does not collect it). Writes reports/bound-stability.md.

    python tests/benchmarks/bound_stability.py [--replicates 200]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np


def demo_chain():
    from linkage.assemble import assemble
    from linkage.demo import DEMO_DATA
    from linkage.models.train import _prepare, train_chain
    from linkage.read import read_folder
    from linkage.store import LotStore

    first = read_folder(DEMO_DATA / "lots")
    with tempfile.TemporaryDirectory() as d, LotStore(Path(d) / "lots.db") as store:
        store.ingest(first)
        store.ingest(read_folder(DEMO_DATA / "remeasured"), reason="benchmark: the demo lot re-measured")
        tables = store.current_tables()
    spec = first.spec
    table = assemble(tables, dissolution_time_min=spec.dissolution_time_min,
                     dissolution_q_pct=spec.limits["dissolution_pct"].min)
    chain = train_chain(table, seed=0)
    data, _ = _prepare(table, chain.chain)
    return chain, data, spec


def main(argv=None) -> int:
    from linkage.decide.window import find_window
    from linkage.models.bootstrap import bootstrap_chain

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--out", type=Path, default=Path("reports/bound-stability.md"))
    args = ap.parse_args(argv)
    chain, data, spec = demo_chain()
    results = {}
    timings = []
    for boot_seed in (1, 2):
        chain.bootstrap = bootstrap_chain(chain, data, n_replicates=args.replicates, seed=boot_seed)
        for draws_seed in (0, 1):
            wall, cpu = time.perf_counter(), time.process_time()
            w = find_window(chain, spec, seed=draws_seed)
            timings.append((time.perf_counter() - wall, time.process_time() - cpu))
            results[boot_seed, draws_seed] = w
    grid = results[1, 0].grid

    def diff(a, b):
        d = np.abs(np.asarray(a.p_all_low) - np.asarray(b.p_all_low))
        near = (np.asarray(a.p_all_low) >= 0.8) | (np.asarray(b.p_all_low) >= 0.8)
        return (float(d.max()), float(d.mean()), float(grid[int(np.argmax(d))]),
                float(d[near].max()) if near.any() else float("nan"))

    def edges(a, b):
        return max(abs(a.low.value - b.low.value), abs(a.high.value - b.high.value)) if a.found and b.found else None

    def force(a, b):
        ra, rb = a.roll_force, b.roll_force
        if ra.get("low") is None or rb.get("low") is None:
            return None
        return max(abs(ra["low"] - rb["low"]), abs(ra["high"] - rb["high"]))

    rows = []
    for label, a, b in (("bootstrap seed 1 vs 2 (draws seed 0)", results[1, 0], results[2, 0]),
                        ("bootstrap seed 1 vs 2 (draws seed 1)", results[1, 1], results[2, 1]),
                        ("draws seed 0 vs 1 (bootstrap seed 1)", results[1, 0], results[1, 1])):
        mx, mean, at, near = diff(a, b)
        e, f = edges(a, b), force(a, b)
        rows.append(f"| {label} | {mx:.4f} (at porosity {at:.3f}) | {near:.4f} | {mean:.4f} | "
                    f"{'—' if e is None else f'{e:.4f}'} | {'—' if f is None else f'{f:.3f}'} |")
    w = results[1, 0]
    text = [
        "# Stability of the lower bound on P(all pass)",
        "",
        f"Demo scenario, {chain.training['n_lots']} lots, chain trained with seed 0; B = {args.replicates} "
        "lot-level bootstrap replicates drawn with seeds 1 and 2; `find_window` at confidence 0.9, assurance 0.9, "
        f"{w.n_draws} draws, {len(grid)} porosity grid points. Written by tests/benchmarks/bound_stability.py.",
        "",
        "| compared | largest difference of p_all_low over the grid | largest where the bound is ≥ 0.8 "
        "| mean difference | window edges (porosity) | roll force edges (kN/cm) |",
        "|---|---|---|---|---|---|",
        *rows,
        "",
        f"Window (bootstrap seed 1, draws seed 0): {w.low.value:.3f} – {w.high.value:.3f}; point estimate "
        f"{w.point_low:.3f} – {w.point_high:.3f}; roll force {w.roll_force.get('low')} – {w.roll_force.get('high')} "
        "kN/cm.",
        "",
        "`find_window` with the bound, wall / CPU seconds per call: "
        + ", ".join(f"{a:.2f} / {c:.2f}" for a, c in timings) + " (the machine may have been shared).",
        "",
    ]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text("\n".join(text), encoding="utf-8")
    print("\n".join(text))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
