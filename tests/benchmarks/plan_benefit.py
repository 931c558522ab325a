"""Do the planned lots narrow the window faster than random ones? (issue 18)

For each seeded campaign of linkage.synthetic's window scenario (a known
truth): ``make_lots(n, seed)`` is assembled and trained (seed 0; B bootstrap
replicates, 0 by default to save time, so the window is the point
estimate's), and the window is found at the scenario's settings (confidence
0.9). Then two ways of adding 8 lots, each simulated from the truth
(``make_lots(..., settings=...)``, same seed for both so only the settings
differ):

* planned: the lots :func:`linkage.decide.plan.augment_design` proposes over
  the training ranges of the ribbon settings;
* random: 8 lots drawn uniformly within the same ranges, kept only inside the
  ribbon stage's applicability domain as the planned candidates are (so both
  ways choose from the same ground; a random draw of four free settings is
  otherwise mostly outside the lots' correlation structure).

Each augmented campaign is retrained and its window found again. The error of
the window is |low − true low| + |high − true high| in ribbon porosity against
``Truth.probability_window`` (the true window at confidence 0.9); a campaign
whose window is not found is listed and left out of the means. The
acceptance asks that the planned lots reduce the error by at least a third
more than the random ones, on average.

Not a test. Writes reports/plan-benefit.md.

    python tests/benchmarks/plan_benefit.py [--lots 24] [--campaigns 4] [--bootstrap 0]
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
import pandas as pd


def _combined(a: dict, b: dict) -> dict:
    return {k: pd.concat([a[k], b[k]], ignore_index=True) for k in a if k in b} | \
        {k: v for k, v in a.items() if k not in b} | {k: v for k, v in b.items() if k not in a}


def _error(w, true_low, true_high):
    """Error of the point estimate's window (the lower bound's window, when the model has replicates, is
    narrower than the true window by design)."""
    if w.point_low is None:
        return None
    return abs(w.point_low - true_low) + abs(w.point_high - true_high)


def _p_error(w, truth, s, spec, true_low, true_high, half_width=0.03):
    """Mean |P(all pass) estimated − true| over the grid points within ``half_width`` of a true edge."""
    band = (np.abs(w.grid - true_low) <= half_width) | (np.abs(w.grid - true_high) <= half_width)
    p_true = truth.p_pass_all(w.grid[band], spec, s["mill_screen_mm"], s["compression_force_kn"])
    return float(np.mean(np.abs(w.p_all[band] - p_true)))


def _random_settings(chain, ranges: dict, n: int, seed: int) -> dict:
    """``n`` settings uniform in ``ranges``, inside the ribbon stage's domain where enough are."""
    from linkage.decide.plan import POROSITY
    from linkage.models.lean import as_lean

    stage = next(s for s in as_lean(chain).stages if POROSITY in s.targets)
    rng = np.random.default_rng(seed)
    m = 4096
    cand = {k: rng.uniform(lo, hi, m) for k, (lo, hi) in ranges.items()}
    ok = np.array([v["in_domain"] for v in stage.domain.check(cand)], dtype=bool)
    idx = np.flatnonzero(ok)[:n] if ok.sum() >= n else np.arange(n)
    return {k: np.round(v[idx], 3) for k, v in cand.items()}


def pool(rows_file: Path, out: Path) -> int:
    """Pool the campaigns of a ``--rows`` file by (lots, criterion, edges,
    bootstrap): mean reductions of the edge error, their ratio, the paired
    difference's mean, SD and standard error, and a two-sided paired t-test
    (scipy.stats.ttest_rel) of planned against random reductions."""
    from scipy.stats import ttest_rel

    rows = [json.loads(line) for line in rows_file.read_text(encoding="utf-8").splitlines() if line.strip()]
    groups: dict[tuple, dict] = {}
    for r in rows:  # a campaign run twice keeps its last row
        groups.setdefault((r["lots"], r["criterion"], r["edges"], r["bootstrap"]), {})[r["seed"]] = r
    lines = [f"## Pooled ({rows_file.name})", ""]
    for (lots, criterion, edges, b), by_seed in sorted(groups.items()):
        done = [r for r in by_seed.values() if None not in (r["before"], r["planned"], r["random"])]
        red_p = np.array([r["before"] - r["planned"] for r in done])
        red_r = np.array([r["before"] - r["random"] for r in done])
        d = red_p - red_r
        seeds = ", ".join(str(r["seed"]) for r in sorted(done, key=lambda r: r["seed"]))
        head = (f"- {lots} lots + 8, criterion {criterion}" + (f" (edges {edges})" if criterion == "local" else "")
                + f", B = {b}: {len(done)} campaigns (seeds {seeds})")
        if len(done) < 2:
            lines.append(head + ".")
            continue
        table = ["", "  | campaign seed | error before | after planned | after random |", "  |---|---|---|---|"]
        table += [f"  | {r['seed']} | {r['before']:.4f} | {r['planned']:.4f} | {r['random']:.4f} |"
                  for r in sorted(done, key=lambda r: r["seed"])]
        t = ttest_rel(red_p, red_r)
        ratio = red_p.mean() / red_r.mean() if red_r.mean() > 0 else float("nan")
        lines.append(head + f"; mean reduction of the edge error planned {red_p.mean():.4f}, random "
                     f"{red_r.mean():.4f} (ratio {ratio:.2f}; the acceptance asks ≥ 1.33); planned − random: mean "
                     f"{d.mean():.4f}, SD {d.std(ddof=1):.4f}, standard error {d.std(ddof=1) / np.sqrt(len(d)):.4f}, "
                     f"paired t-test p = {t.pvalue:.2f}; planned better in {int((d > 0).sum())} of {len(d)}.")
        lines += table + [""]
    text = "\n".join(lines) + "\n\n"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text((out.read_text(encoding="utf-8") if out.exists() else "") + text, encoding="utf-8")
    print(text)
    return 0


def main(argv=None) -> int:
    from linkage.assemble import assemble
    from linkage.decide.plan import augment_design
    from linkage.decide.window import find_window
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SETTINGS, WINDOW_SPEC, Truth, make_lots

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--lots", type=int, default=24)
    ap.add_argument("--added", type=int, default=8)
    ap.add_argument("--campaigns", type=int, default=4)
    ap.add_argument("--first-seed", type=int, default=1800)
    ap.add_argument("--bootstrap", type=int, default=0,
                    help="bootstrap replicates of the campaign's first fit (the plan's criterion 'target' uses "
                         "them); the refits after the added lots take none (only the point window is scored)")
    ap.add_argument("--criterion", choices=["local", "target", "thompson"], default="local",
                    help="augment_design's criterion")
    ap.add_argument("--out", type=Path, default=Path("reports/plan-benefit.md"))
    ap.add_argument("--edges", choices=["all", "porosity"], default="all",
                    help="the edges the plan narrows (augment_design's edges)")
    ap.add_argument("--rows", type=Path, default=None, help="also append each campaign's row as JSON to this file")
    ap.add_argument("--pool", type=Path, default=None,
                    help="no campaigns: pool the rows of a --rows file by criterion and add the summary to --out")
    ap.add_argument("--append", action="store_true", help="add this run to the report instead of replacing it")
    args = ap.parse_args(argv)
    if args.pool is not None:
        return pool(args.pool, args.out)
    truth = Truth.window_scenario()
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    s = dict(WINDOW_SETTINGS)
    conf = 0.9
    true_low, true_high = truth.probability_window(WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"],
                                                   confidence=conf)

    def fit_window(tables, n_bootstrap=0):
        table = assemble(tables)
        chain = train_chain(table, seed=0, n_bootstrap=n_bootstrap)
        return table, chain, find_window(chain, spec, settings=s, confidence=conf)

    rows = []
    for c in range(args.campaigns):
        seed = args.first_seed + c
        t0 = time.perf_counter()
        lots = make_lots(args.lots, seed=seed, truth=truth)
        table, chain, w0 = fit_window(lots.tables, args.bootstrap)
        plan = augment_design(chain, table, spec, args.added, settings=s, confidence=conf, seed=seed, window=w0,
                              edges=args.edges, criterion=args.criterion)
        planned = {k: [lot.settings[k] for lot in plan.lots] for k in plan.ranges}
        planned |= {k: [s[k]] * len(plan.lots) for k in s}
        random = _random_settings(chain, plan.ranges, args.added, seed) | {k: [s[k]] * args.added for k in s}
        errors = {"before": _error(w0, true_low, true_high)}
        p_errors = {"before": _p_error(w0, truth, s, WINDOW_SPEC, true_low, true_high)}
        for kind, settings in (("planned", planned), ("random", random)):
            new = make_lots(args.added, seed=seed + 10_000, truth=truth, settings=settings, lot_prefix="NEW",
                            start="2026-06-01")
            _, _, w = fit_window(_combined(lots.tables, new.tables))
            errors[kind] = _error(w, true_low, true_high)
            p_errors[kind] = _p_error(w, truth, s, WINDOW_SPEC, true_low, true_high)
        rows.append({"seed": seed, **errors, **{f"p_{k}": v for k, v in p_errors.items()},
                     "seconds": time.perf_counter() - t0,
                     "informs": sorted({lot.informs for lot in plan.lots})})
        print(rows[-1], flush=True)
        if args.rows is not None:  # one JSON line per campaign, to pool runs
            with args.rows.open("a", encoding="utf-8") as fh:
                fh.write(json.dumps({**rows[-1], "lots": args.lots, "criterion": args.criterion,
                                     "edges": args.edges, "bootstrap": args.bootstrap}) + "\n")

    done = [r for r in rows if None not in (r["before"], r["planned"], r["random"])]
    red_p = [r["before"] - r["planned"] for r in done]
    red_r = [r["before"] - r["random"] for r in done]
    what = f"criterion: {args.criterion}" if args.criterion != "local" else f"plan edges: {args.edges}"
    lines = [f"## {args.lots} lots, then {args.added} ({what}); campaign seeds {args.first_seed}–"
             f"{args.first_seed + args.campaigns - 1}", "",
             f"Window scenario of linkage.synthetic at {s}; confidence {conf}; B = {args.bootstrap} bootstrap "
             "replicates in the first fit (for the plan), none in the refits; the point estimate's window is "
             "scored. True window "
             f"{true_low:.4f} – {true_high:.4f} (Truth.probability_window). Each campaign: {args.lots} lots, then "
             f"{args.added} more, planned (linkage.decide.plan.augment_design) or random within the same ranges "
             "and the ribbon stage's domain, simulated from the truth with the same seed. Error = |low − true low| "
             "+ |high − true high| in ribbon porosity. Written by tests/benchmarks/plan_benefit.py.", "",
             "P error = mean |P(all pass) − true P| over the scanned porosities within 0.03 of a true edge "
             "(Truth.p_pass_all, 20,000 draws).", "",
             "| campaign seed | error before | error after planned | after random | P error before | after planned "
             "| after random | seconds |",
             "|---|---|---|---|---|---|---|---|"]

    def f(v):
        return "no window" if v is None else f"{v:.4f}"

    for r in rows:
        lines.append(f"| {r['seed']} | {f(r['before'])} | {f(r['planned'])} | {f(r['random'])} | {r['p_before']:.4f} "
                     f"| {r['p_planned']:.4f} | {r['p_random']:.4f} | {r['seconds']:.0f} |")
    lines.append("")
    if done:
        mp, mr = float(np.mean(red_p)), float(np.mean(red_r))
        ratio = mp / mr if mr > 0 else float("nan")
        diff = np.subtract(red_p, red_r)
        sd = float(np.std(diff, ddof=1)) if len(done) > 1 else float("nan")
        holds = mr > 0 and mp >= 4 / 3 * mr or (mr <= 0 < mp)
        lines += [f"- Campaigns with a window in all three fits: {len(done)} of {len(rows)}.",
                  f"- Mean error: before {np.mean([r['before'] for r in done]):.4f}, after planned "
                  f"{np.mean([r['planned'] for r in done]):.4f}, after random {np.mean([r['random'] for r in done]):.4f}.",
                  f"- Mean reduction of the error: planned {mp:.4f}, random {mr:.4f}"
                  + (f" (ratio {ratio:.2f})" if mr > 0 else "") + ".",
                  f"- P error near the true edges: before {np.mean([r['p_before'] for r in rows]):.4f}, after planned "
                  f"{np.mean([r['p_planned'] for r in rows]):.4f}, after random {np.mean([r['p_random'] for r in rows]):.4f} "
                  f"(all {len(rows)} campaigns).",
                  f"- Paired difference of the reductions (planned − random) over the campaigns: mean "
                  f"{np.mean(diff):.4f}, SD {sd:.4f}, standard error {sd / np.sqrt(len(done)):.4f}.",
                  f"- Planned lots did better than random in {sum(p > q for p, q in zip(red_p, red_r))} of {len(done)} "
                  "campaigns.",
                  f"- Acceptance (planned reduction at least 4/3 of random's, on average): "
                  f"{'holds' if holds else 'does not hold'} on these {len(done)} campaigns.",
                  "- Few campaigns on a shared 2-core machine: the spread between campaigns is large against the "
                  "means; read the ratio with that in mind."]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    head = "# Planned against random lots: error of the window edges\n\n"
    before = args.out.read_text(encoding="utf-8") if args.append and args.out.exists() else head
    args.out.write_text(before + "\n".join(lines) + "\n\n", encoding="utf-8")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
