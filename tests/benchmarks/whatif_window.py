#!/usr/bin/env python
"""Speed of the what-if and the window with the bound (issue 12's lower
bound, issue 8's what-if targets). Not a test: pytest does not collect it.

    python tests/benchmarks/whatif_window.py --work /tmp/wsp
    python tests/benchmarks/whatif_window.py --work /tmp/wsp --trees /tmp/base,. --json /tmp/wsp/m.json

``--work`` holds the models measured: the 1,000-lot model of bench.py
(``make_lots(1000, seed=1, truth=Truth.window_scenario())``, ingested and
trained as bench.py's steps do, in ``lots-1000``, ``store-1000.db``,
``models-1000``) and the demo (``linkage demo --out WORK/demo``); each is
built when missing. ``--trees`` lists source trees (each put first on
PYTHONPATH in turn, the same Python and libraries), to set a change beside
its base in the same run. For each tree:

* in process, one what-if (``ribbon_porosity = 0.3``, the spec, the lean
  form of ``registry.load_whatif``): the first call, then the median of 30,
  wall and CPU time (``time.process_time``), on both models;
* ``linkage predict --set ribbon_porosity=0.3 --spec ... --models-dir ...
  --store ...`` on both models, interleaved with a bare ``python -c "import
  numpy, pandas, sklearn"``, 7 runs each: the medians of wall and of CPU
  time (the child's user + system);
* ``linkage window --spec ... --models-dir ... --store ...`` on the demo,
  3 runs, wall and CPU;
* ``find_window(chain, spec, confidence=0.9, seed=0)`` on the 1,000-lot
  fitted chain, in process after loading it, 3 runs, wall and CPU.

CPU time is given beside wall time because a shared machine's load
stretches the wall time of every process (the load average at the start
and end of each tree is recorded).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve()
REPO = HERE.parents[2]
BARE_IMPORT = "import numpy, pandas, sklearn"

INPROC = """
import json, statistics, sys, time
import linkage
assert linkage.__file__.startswith(sys.argv[3]), (linkage.__file__, sys.argv[3])
from pathlib import Path
from linkage.decide.whatif import predict_whatif
from linkage.models.registry import load_whatif
from linkage.spec import read_spec
chain = load_whatif(Path(sys.argv[1]), "latest")
spec = read_spec(Path(sys.argv[2]))
def one():
    c0, t0 = time.process_time(), time.perf_counter()
    predict_whatif(chain, {"ribbon_porosity": 0.30}, spec=spec)
    return time.perf_counter() - t0, time.process_time() - c0
first = one()
runs = [one() for _ in range(30)]
heavy = sorted(m for m in ("sklearn", "pandas", "scipy") if m in sys.modules)
print(json.dumps({"first_s": first[0], "first_cpu_s": first[1], "median_s": statistics.median(r[0] for r in runs),
                  "median_cpu_s": statistics.median(r[1] for r in runs), "runs": len(runs), "heavy": heavy}))
"""

WINDOW = """
import json, statistics, sys, time
import linkage
assert linkage.__file__.startswith(sys.argv[3]), (linkage.__file__, sys.argv[3])
from pathlib import Path
from linkage.decide.window import find_window
from linkage.models.registry import load
from linkage.spec import read_spec
chain = load(Path(sys.argv[1]), "latest")
spec = read_spec(Path(sys.argv[2]))
runs = []
for _ in range(3):
    c0, t0 = time.process_time(), time.perf_counter()
    w = find_window(chain, spec, confidence=0.9, seed=0)
    runs.append((time.perf_counter() - t0, time.process_time() - c0))
print(json.dumps({"median_s": statistics.median(r[0] for r in runs), "median_cpu_s": statistics.median(r[1] for r in runs),
                  "runs": len(runs), "edges": [w.low.value, w.high.value]}))
"""


def _env(tree: Path) -> dict:
    return {**os.environ, "PYTHONPATH": str(tree)}


def _timed(cmd: list[str], env: dict) -> tuple[float, float, str]:
    """Wall and CPU (user + system of the child) time of a command, and its
    stdout; run from the tree on PYTHONPATH (``python -c`` puts the current
    folder first on sys.path: elsewhere it could import another linkage)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, cwd=env["PYTHONPATH"])
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed (exit {proc.returncode}):\n{proc.stderr[-2000:]}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, proc.stdout


def _linkage() -> list[str]:
    script = Path(sys.executable).with_name("linkage")
    return [str(script)] if script.exists() else [sys.executable, "-m", "linkage"]


def build(work: Path, tree: Path) -> None:
    """The 1,000-lot model and store (bench.py's steps) and the demo, when missing."""
    bench = [sys.executable, str(tree / "tests" / "benchmarks" / "bench.py")]
    env = _env(tree)
    if not (work / "models-1000").exists():
        for step in (["_generate", "1000", str(work / "lots-1000")],
                     ["_ingest", str(work / "lots-1000"), str(work / "store-1000.db")],
                     ["_train", str(work / "lots-1000"), str(work / "models-1000"), "all", "no"]):
            _timed([*bench, *step], env)
    if not (work / "demo" / "models").exists():
        _timed([*_linkage(), "demo", "--out", str(work / "demo")], env)


def measure(tree: Path, work: Path, cli_runs: int = 7) -> dict:
    env = _env(tree)
    models = {"1000": (work / "models-1000", work / "lots-1000" / "spec.toml", work / "store-1000.db"),
              "demo": (work / "demo" / "models", tree / "data_demo" / "lots" / "spec.toml",
                       work / "demo" / "demo-lots.db")}
    out: dict = {"tree": str(tree), "load_start": os.getloadavg()}
    for name, (mdir, spec, _) in models.items():
        out[f"inprocess_{name}"] = json.loads(_timed([sys.executable, "-c", INPROC, str(mdir), str(spec), str(tree)], env)[2])
    cli: dict = {"bare": [], "demo": [], "1000": []}
    for _ in range(cli_runs):
        cli["bare"].append(_timed([sys.executable, "-c", BARE_IMPORT], env)[:2])
        for name, (mdir, spec, store) in models.items():
            cli[name].append(_timed([*_linkage(), "predict", "--set", "ribbon_porosity=0.3", "--spec", str(spec),
                                     "--models-dir", str(mdir), "--store", str(store)], env)[:2])
    out["cli"] = {k: {"median_s": statistics.median(r[0] for r in v), "median_cpu_s": statistics.median(r[1] for r in v),
                      "runs": len(v)} for k, v in cli.items()}
    mdir, spec, store = models["demo"]
    runs = [_timed([*_linkage(), "window", "--spec", str(spec), "--models-dir", str(mdir), "--store", str(store)],
                   env)[:2] for _ in range(3)]
    out["window_demo_cli"] = {"median_s": statistics.median(r[0] for r in runs),
                              "median_cpu_s": statistics.median(r[1] for r in runs), "runs": len(runs)}
    mdir, spec, _ = models["1000"]
    out["find_window_1000"] = json.loads(_timed([sys.executable, "-c", WINDOW, str(mdir), str(spec), str(tree)], env)[2])
    out["load_end"] = os.getloadavg()
    return out


def table(results: list[dict]) -> str:
    rows = [("in process, what-if, 1,000 lots: median (first call)", lambda r: r["inprocess_1000"], True),
            ("in process, what-if, demo: median (first call)", lambda r: r["inprocess_demo"], True),
            ("`linkage predict`, 1,000 lots", lambda r: r["cli"]["1000"], False),
            ("`linkage predict`, demo", lambda r: r["cli"]["demo"], False),
            ("bare `python -c \"import numpy, pandas, sklearn\"`", lambda r: r["cli"]["bare"], False),
            ("`linkage window`, demo", lambda r: r["window_demo_cli"], False),
            ("`find_window`, 1,000 lots, in process", lambda r: r["find_window_1000"], False)]
    head = "| what | " + " | ".join(f"{Path(r['tree']).name}: wall s (CPU s)" for r in results) + " |"
    lines = [head, "|---|" + "---:|" * len(results)]
    for label, get, first in rows:
        cells = []
        for r in results:
            d = get(r)
            cell = f"{d['median_s']:.3f} ({d['median_cpu_s']:.3f})"
            if first:
                cell += f"; first {d['first_s']:.3f} ({d['first_cpu_s']:.3f})"
            cells.append(cell)
        lines.append(f"| {label} | " + " | ".join(cells) + " |")
    for r in results:
        c = r["cli"]
        lines.append("")
        lines.append(f"{Path(r['tree']).name}: what-if CLI / bare import, wall: 1,000 lots "
                     f"{c['1000']['median_s'] / c['bare']['median_s']:.2f}×, demo {c['demo']['median_s'] / c['bare']['median_s']:.2f}×; "
                     f"CPU: 1,000 lots {c['1000']['median_cpu_s'] / c['bare']['median_cpu_s']:.2f}×, demo "
                     f"{c['demo']['median_cpu_s'] / c['bare']['median_cpu_s']:.2f}×. Load average (1, 5, 15 min) "
                     f"at the start {', '.join(f'{x:.2f}' for x in r['load_start'])}, at the end "
                     f"{', '.join(f'{x:.2f}' for x in r['load_end'])}.")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--work", required=True, help="folder of the models measured (built when missing)")
    ap.add_argument("--trees", default=str(REPO), help="source trees measured in turn, comma-separated")
    ap.add_argument("--cli-runs", type=int, default=7)
    ap.add_argument("--json", default=None, help="also write every figure to this JSON file")
    args = ap.parse_args(argv)
    work = Path(args.work).resolve()
    work.mkdir(parents=True, exist_ok=True)
    trees = [Path(t).resolve() for t in args.trees.split(",")]
    build(work, trees[-1])
    results = [measure(t, work, args.cli_runs) for t in trees]
    print(table(results))
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
