"""Where should 8 added lots go? Placements tried against random lots (issue 18).

Not a test, and not the plan's own criteria (``plan_benefit.py`` measures
those): simple placements of the 8 added lots, each target porosity met by the
candidate settings whose ribbon porosity the first fit's ribbon stage predicts
nearest (each candidate once, ``linkage.decide.plan_thompson.nearest``; the candidates and their predictions are
``linkage.decide.plan._candidates``'s, as the plan has them), against 8
random lots. Each campaign of ``linkage.synthetic``'s window scenario (a known
truth) is fitted (``train_chain``, seed 0, no bootstrap replicates, so the
point estimate's window is scored), each placement's 8 lots are simulated
from the truth with the same seed (only the settings differ), and each
augmented campaign is refitted. Error of an edge: signed, estimated − true
(``Truth.probability_window``, confidence 0.9, at screen 1.0 mm, 14 kN).

Scenario ``spread`` (the campaigns of ``plan_benefit.py``: roll force
stratified over 4-14 kN/cm): candidates over the training ranges, kept inside
the ribbon stage's domain; random lots as ``plan_benefit.py`` draws them.
Placements (lo, hi: the first fit's window):

* ``win_even``: 8 targets equally spaced from lo − 0.03 to hi + 0.03;
* ``win_even_in``: from lo to hi; ``win_even_wide``: from lo − 0.06 to hi + 0.06;
* ``win_maximin``: greedy, each lot where the distance to the nearest measured or
  chosen porosity is largest within lo − 0.03 to hi + 0.03;
* ``edges_pair``: lo ± 0.007, ± 0.02 and hi ± 0.007, ± 0.02;
* ``full_even``: equally spaced over the training lots' porosity range;
* ``cover``: the lots ``linkage plan --criterion cover`` proposes
  (``augment_design(..., criterion="cover", seed=campaign seed, window=the
  first fit's)``): the same lots as ``win_even`` (the settings compared on
  campaigns 2000-2009 by a script not kept; rows of both on 2000-2001, equal),
  run through the command's own code;
* ``oracle_edges`` and ``oracle_even``: references no plan can reach, since they
  use the truth: 4 lots at each *true* edge (± 0.003, ± 0.01), or 8 equally
  spaced over the true window ± 0.03, each target met by the candidate whose
  *true* mean porosity (``Truth.porosity_mean``) lies nearest. If these do not
  beat random lots by a third, no placement by porosity will.

Scenario ``narrow``: campaigns run over roll force 7-11 kN/cm only (gap 2.0,
2.5 or 3.0 mm, roll speed 3-7 rpm, screw at the nominal feed with 8 % scatter),
whose data stop short of the true window's edges; the added lots may use the
equipment's wider ranges (force 3-16, gap 1.5-3.5, speed 2-8; screw at the
nominal feed), candidates a scrambled Sobol' set over them with no domain
filter, random lots uniform over them. Placements ``win_even``,
``edges_pair`` and ``edges_out`` (lo − 0.04 … lo − 0.01 and hi + 0.01 … hi + 0.04).

    python tests/benchmarks/plan_placements.py FIRST_SEED STOP_SEED [--lots 16] [--scenario spread]
        [--designs random,win_even,...] >> rows.jsonl
    python tests/benchmarks/plan_placements.py --summary rows.jsonl [rows2.jsonl ...]
    python tests/benchmarks/plan_placements.py --pool rows.jsonl [--seeds 2000:2150]   # each seed once

With ``--bootstrap B`` (B lot-level bootstrap replicates in every fit) a row
also scores the window the tool reports, the lower bound's (``low``/``high``:
inside the true window by design), under ``"bound"``; ``--score bound`` makes
``--summary`` and ``--pool`` read those instead of the point estimate's.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

SPREAD = ["random", "win_even", "win_maximin", "edges_pair", "full_even"]
NARROW = ["random", "win_even", "edges_pair", "edges_out"]
EQUIPMENT = {"roll_force_kn_per_cm": (3.0, 16.0), "roll_gap_mm": (1.5, 3.5), "roll_speed_rpm": (2.0, 8.0)}


def maximin(eps_c, pool, existing, lo, hi, n):
    chosen, pts = [], list(existing)
    idx = pool[(eps_c[pool] >= lo) & (eps_c[pool] <= hi)]
    if len(idx) < n:
        idx = pool
    for _ in range(n):
        d = np.min(np.abs(eps_c[idx][:, None] - np.array(pts + [lo - 1e9])[None, :]), axis=1)
        # the ends count as points at half the distance, so they get filled too
        d = np.minimum(d, 2 * np.abs(eps_c[idx] - lo))
        d = np.minimum(d, 2 * np.abs(eps_c[idx] - hi))
        k = int(idx[np.argmax(d)])
        chosen.append(k)
        pts.append(float(eps_c[k]))
        idx = idx[idx != k]
    return chosen


def narrow_campaign(n, seed, f_lo=7.0, f_hi=11.0):
    rng = np.random.default_rng(seed + 500)
    force = f_lo + (f_hi - f_lo) * (rng.permutation(n) + rng.uniform(size=n)) / n
    gap = rng.choice([2.0, 2.5, 3.0], n)
    speed = rng.uniform(3, 7, n)
    return {"roll_force_kn_per_cm": np.round(force, 2), "roll_gap_mm": gap, "roll_speed_rpm": np.round(speed, 1),
            "screw_speed_rpm": np.round(2.2 * speed * gap * np.exp(rng.normal(0, .08, n)), 1),
            "mill_screen_mm": rng.choice([0.8, 1.0, 1.25], n, p=[.25, .5, .25]),
            "compression_force_kn": np.round(rng.uniform(10, 18, n), 1)}


def _with_screw(d):  # screw at the nominal feed for the roll speed and gap
    d = dict(d)
    d["screw_speed_rpm"] = np.round(2.2 * np.asarray(d["roll_speed_rpm"]) * np.asarray(d["roll_gap_mm"]), 1)
    return d


def run(first, stop, n_lots, scenario, designs, n_bootstrap=0):
    from plan_benefit import _combined, _random_settings
    from scipy.stats import qmc

    from linkage.decide.plan_thompson import nearest

    from linkage.assemble import assemble
    from linkage.decide.plan import POROSITY, _candidates, _ribbon_stage, augment_design
    from linkage.decide.window import find_window
    from linkage.models.lean import as_lean
    from linkage.models.train import train_chain
    from linkage.spec import Limit, Spec
    from linkage.synthetic import WINDOW_SETTINGS, WINDOW_SPEC, Truth, make_lots

    truth = Truth.window_scenario()
    spec = Spec(limits={k: Limit(*v) for k, v in WINDOW_SPEC.items()})
    s = dict(WINDOW_SETTINGS)
    tl, th = truth.probability_window(WINDOW_SPEC, s["mill_screen_mm"], s["compression_force_kn"], confidence=0.9)

    def fit(tables):
        table = assemble(tables)
        chain = train_chain(table, seed=0, n_bootstrap=n_bootstrap)
        return table, chain, find_window(chain, spec, settings=s, confidence=0.9)

    for seed in range(first, stop):
        t0 = time.perf_counter()
        given = narrow_campaign(n_lots, seed) if scenario == "narrow" else None
        lots = make_lots(n_lots, seed=seed, truth=truth, settings=given)
        table, chain, w0 = fit(lots.tables)
        stage = _ribbon_stage(as_lean(chain))
        inputs = list(stage.inputs)
        lo, hi = w0.point_low, w0.point_high
        if lo is None:
            print(json.dumps({"seed": seed, "skip": True}), flush=True)
            continue
        chosen_settings = {}
        if scenario == "narrow":
            names = list(EQUIPMENT)
            lo_r = np.array([EQUIPMENT[k][0] for k in names])
            hi_r = np.array([EQUIPMENT[k][1] for k in names])
            unit = qmc.Sobol(len(names), scramble=True, seed=seed).random(2048)
            cand = _with_screw({k: lo_r[j] + unit[:, j] * (hi_r[j] - lo_r[j]) for j, k in enumerate(names)})
            eps_c = stage.targets[POROSITY].predict(cand)
            pool = np.arange(len(eps_c))
            rng = np.random.default_rng(seed)
            chosen_settings["random"] = {k: np.round(v, 2) for k, v in
                                         _with_screw({k: rng.uniform(*EQUIPMENT[k], 8) for k in names}).items()}
            decimals = 2
        else:
            full = {k: tuple(float(v) for v in chain.training["ranges"][k]) for k in inputs}
            cand, _, eps_c, pool, _ = _candidates(stage, inputs, full, {}, 2048, 8, seed)
            chosen_settings["random"] = _random_settings(chain, full, 8, seed)
            decimals = 3
        existing = table[POROSITY].dropna().to_numpy(float)
        targets = {"win_even": np.linspace(lo - 0.03, hi + 0.03, 8), "win_even_in": np.linspace(lo, hi, 8),
                   "win_even_wide": np.linspace(lo - 0.06, hi + 0.06, 8),
                   "edges_pair": [lo - .02, lo - .007, lo + .007, lo + .02, hi - .02, hi - .007, hi + .007, hi + .02],
                   "edges_out": [lo - .04, lo - .03, lo - .02, lo - .01, hi + .01, hi + .02, hi + .03, hi + .04],
                   "full_even": np.linspace(existing.min(), existing.max(), 8),
                   "oracle_edges": [tl - .01, tl - .003, tl + .003, tl + .01, th - .01, th - .003, th + .003, th + .01],
                   "oracle_even": np.linspace(tl - 0.03, th + 0.03, 8)}
        for d in designs:
            if d == "random":
                continue
            if d == "cover":
                if scenario != "spread":
                    raise SystemExit("placement 'cover' is the command's own, on the spread scenario only")
                plan = augment_design(chain, table, spec, 8, settings=s, confidence=0.9, seed=seed, window=w0,
                                      criterion="cover")
                # back in the order chosen (the plan lists them in its randomised run order,
                # linkage.decide.plan._augmented), so each lot meets the same simulated noise as win_even's
                lots_chosen = [plan.lots[r] for r in np.argsort(np.random.default_rng([seed, 2]).permutation(8))]
                chosen_settings[d] = {k: np.array([lot.settings[k] for lot in lots_chosen]) for k in inputs}
                continue
            if d == "win_maximin":
                ch = maximin(eps_c, pool, existing, lo - 0.03, hi + 0.03, 8)
            elif d.startswith("oracle_"):
                true_eps = truth.porosity_mean(*(np.asarray(cand[k], float) for k in
                                                 ("roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm",
                                                  "screw_speed_rpm")))
                ch = nearest(true_eps, pool, targets[d])
            else:
                ch = nearest(eps_c, pool, targets[d])
            chosen_settings[d] = {k: np.round(np.asarray(cand[k], float)[ch], decimals) for k in cand}
        row = {"seed": seed, "lots": n_lots, "scenario": scenario, "before": (lo - tl, hi - th)}
        bound = {"before": _bound_error(w0, tl, th)} if n_bootstrap else None
        for d in designs:
            sett = {k: list(np.asarray(v, float)) for k, v in chosen_settings[d].items()} | {k: [s[k]] * 8 for k in s}
            new = make_lots(8, seed=seed + 10_000, truth=truth, settings=sett, lot_prefix="NEW", start="2026-06-01")
            _, _, w = fit(_combined(lots.tables, new.tables))
            row[d] = None if w.point_low is None else (w.point_low - tl, w.point_high - th)
            if bound is not None:
                bound[d] = _bound_error(w, tl, th)
        if bound is not None:
            row |= {"bootstrap": n_bootstrap, "bound": bound}
        row["seconds"] = round(time.perf_counter() - t0)
        print(json.dumps(row), flush=True)


def _bound_error(w, tl, th):
    """Signed error of the lower bound's window (the one the tool reports), or None where it has none."""
    return None if w.low.value is None else (w.low.value - tl, w.high.value - th)


NOT_PLACEMENTS = ("seed", "lots", "scenario", "seconds", "before", "bootstrap", "bound")


def _rows(files, score: str = "point", seeds: tuple[int, int] | None = None) -> list[dict]:
    """The rows of ``files`` (only campaigns ``seeds[0] <= seed < seeds[1]`` when given); with
    ``score="bound"`` each row's errors are the bound's window's (rows without it are left out), so that
    the tables below read either."""
    rows = [json.loads(line) for f in files for line in Path(f).read_text().splitlines() if '"skip"' not in line]
    if seeds is not None:
        rows = [r for r in rows if seeds[0] <= r["seed"] < seeds[1]]
    if score == "point":
        return rows
    out = []
    for r in rows:
        if "bound" in r and r["bound"]["before"] is not None:
            out.append({k: r[k] for k in ("seed", "lots", "scenario") if k in r}
                       | {"scenario": f"{r.get('scenario', 'spread')}, bound's window"} | r["bound"])
    return out


def summary(files, score: str = "point", seeds=None) -> str:
    """Per scenario: mean |error| of each placement (both edges and each edge), its mean reduction against the
    first fit, the ratio to random's, the paired difference to random (mean, standard error) and the
    campaigns where it did better than random."""
    rows = _rows(files, score, seeds)
    out = []

    def placements(r):
        return tuple(k for k in r if k not in NOT_PLACEMENTS)

    for scenario, designs in sorted({(r.get("scenario", "spread"), placements(r)) for r in rows}):
        rs = [r for r in rows if r.get("scenario", "spread") == scenario and placements(r) == designs]
        err = {d: np.array([abs(r[d][0]) + abs(r[d][1]) if r.get(d) else np.nan for r in rs]) for d in designs}
        before = np.array([abs(r["before"][0]) + abs(r["before"][1]) for r in rs])
        out += [f"### Scenario `{scenario}`, {rs[0]['lots']} lots + 8, placements {', '.join(designs)}: {len(rs)} "
                f"campaigns (seeds {', '.join(str(r['seed']) for r in rs)})", "",
                "| placement | mean error after | low edge | high edge | mean reduction | ratio to random | "
                "paired difference to random (SE) | better than random |", "|---|---|---|---|---|---|---|---|",
                f"| before ({rs[0]['lots']} lots) | {before.mean():.4f} | {np.mean([abs(r['before'][0]) for r in rs]):.4f} | "
                f"{np.mean([abs(r['before'][1]) for r in rs]):.4f} | | | | |"]
        red_r = before - err["random"]
        for d in designs:
            red = before - err[d]
            diff = red - red_r
            ok = ~np.isnan(diff)
            lo = np.nanmean([abs(r[d][0]) if r.get(d) else np.nan for r in rs])
            hi = np.nanmean([abs(r[d][1]) if r.get(d) else np.nan for r in rs])
            cmp = "" if d == "random" else (f"{np.mean(red[ok]) / np.mean(red_r[ok]):.2f} | {np.nanmean(diff):+.4f} "
                                            f"({np.nanstd(diff, ddof=1) / np.sqrt(ok.sum()):.4f}) | "
                                            f"{int(np.sum(diff[ok] > 0))} of {int(ok.sum())}")
            out.append(f"| {d} | {np.nanmean(err[d]):.4f} | {lo:.4f} | {hi:.4f} | {np.nanmean(red):.4f} | "
                       + (cmp if cmp else "1 | | ") + " |")
        out.append("")
    return "\n".join(out)


def _ratio_interval(red, red_r, n_boot: int = 10_000, seed: int = 0) -> tuple[float, float]:
    """95 % percentile bootstrap interval of mean(red) / mean(red_r), campaigns resampled in pairs (Efron &
    Tibshirani 1993, ch. 13; numpy's seeded generator)."""
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(red), size=(n_boot, len(red)))
    ratios = red[idx].mean(axis=1) / red_r[idx].mean(axis=1)
    return tuple(float(q) for q in np.quantile(ratios, [0.025, 0.975]))


def pool(files, score: str = "point", seeds=None) -> str:
    """Per scenario and placement, pooled over every campaign seed it ran on, each seed counted once (the
    first fit and the random lots of a seed are the same rows in every run that has them): campaigns, mean
    reductions of the placement and of random lots on those campaigns, their ratio, the paired difference
    (mean, standard error), campaigns better than random; and each edge's signed error, estimated − true
    (mean, and the share of campaigns above the truth), the first fit's and random's on their own seeds."""
    rows = _rows(files, score, seeds)
    out = []
    for scenario in sorted({r.get("scenario", "spread") for r in rows}):
        by = {}  # (placement, seed) -> (before, after); the first occurrence of a seed
        for r in (r for r in rows if r.get("scenario", "spread") == scenario):
            for d, v in r.items():
                if d not in ("seed", "lots", "scenario", "seconds", "bootstrap", "bound") and v is not None:
                    by.setdefault((d, r["seed"]), (r["before"], v))
        placements = sorted({d for d, _ in by} - {"before"}, key=lambda d: (d != "random", d))
        out += [f"### Scenario `{scenario}`, pooled over seeds (each once)", "",
                "| placement | campaigns | mean reduction | random's on the same campaigns | ratio (95 % CI) | paired "
                "difference (SE) | better than random | low edge: signed error (share above the truth) | high edge: "
                "the same |",
                "|---|---|---|---|---|---|---|---|---|"]
        for d in ["before", *placements]:
            seeds = sorted(s for p, s in by if p == d)

            def err(v):
                return abs(v[0]) + abs(v[1])

            low = np.array([by[(d, s)][1][0] for s in seeds])
            high = np.array([by[(d, s)][1][1] for s in seeds])
            signed = f"{low.mean():+.4f} ({np.mean(low > 0):.0%}) | {high.mean():+.4f} ({np.mean(high > 0):.0%})"
            if d in ("before", "random"):
                red = np.array([err(by[(d, s)][0]) - err(by[(d, s)][1]) for s in seeds])
                shown = "" if d == "before" else f"{red.mean():.4f}"
                out.append(f"| {d} | {len(seeds)} | {shown} | | | | | {signed} |")
                continue
            red = np.array([err(by[(d, s)][0]) - err(by[(d, s)][1]) for s in seeds])
            red_r = np.array([err(by[("random", s)][0]) - err(by[("random", s)][1]) for s in seeds])
            diff = red - red_r
            # below 30 campaigns random's mean reduction is too near zero in resamples for a ratio's interval
            ci = "({:.2f}-{:.2f})".format(*_ratio_interval(red, red_r)) if len(seeds) >= 30 else "(too few)"
            out.append(f"| {d} | {len(seeds)} | {red.mean():.4f} | {red_r.mean():.4f} | {red.mean() / red_r.mean():.2f} "
                       f"{ci} "
                       f"| {diff.mean():+.4f} ({diff.std(ddof=1) / np.sqrt(len(diff)):.4f}) | "
                       f"{int(np.sum(diff > 0))} of {len(diff)} | {signed} |")
        out.append("")
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("first", nargs="?", type=int)
    ap.add_argument("stop", nargs="?", type=int)
    ap.add_argument("--lots", type=int, default=16)
    ap.add_argument("--scenario", choices=["spread", "narrow"], default="spread")
    ap.add_argument("--designs", default=None, help="comma-separated placements (default: the scenario's)")
    ap.add_argument("--summary", nargs="+", default=None, help="rows files to summarise instead of running")
    ap.add_argument("--pool", nargs="+", default=None, help="rows files to pool by placement instead of running")
    ap.add_argument("--bootstrap", type=int, default=0, help="bootstrap replicates in every fit; rows then also "
                    "score the lower bound's window")
    ap.add_argument("--score", choices=["point", "bound"], default="point",
                    help="which window --summary and --pool read")
    ap.add_argument("--seeds", default=None, metavar="FIRST:STOP",
                    help="--summary and --pool read only campaigns FIRST <= seed < STOP")
    args = ap.parse_args(argv)
    seeds = tuple(int(v) for v in args.seeds.split(":")) if args.seeds else None
    if args.summary:
        print(summary(args.summary, args.score, seeds))
        return 0
    if args.pool:
        print(pool(args.pool, args.score, seeds))
        return 0
    designs = args.designs.split(",") if args.designs else (NARROW if args.scenario == "narrow" else SPREAD)
    run(args.first, args.stop, args.lots, args.scenario, designs, args.bootstrap)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
