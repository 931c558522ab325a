#!/usr/bin/env python
"""Performance benchmark of linkage (issue 8). Not a test: pytest does not
collect it (no ``test_`` name); run it yourself on the machine to measure.

    python tests/benchmarks/bench.py                   # everything; about an hour on a 2-core machine
    python tests/benchmarks/bench.py --quick           # 100 and 1,000 lots only, a few minutes
    python tests/benchmarks/bench.py --sizes 100,1000 --train-sizes 100 --out /tmp/b.md

What it measures, each step in a fresh Python process (so that a step's peak
memory is its own and nothing is warm that a user's run would not have):

* ingest + assemble of synthetic lots (``linkage.synthetic.make_lots`` on the
  known-truth window scenario: 3-5 ribbon replicates and an 11-row sieve
  analysis per lot, written as CSV files): reading and checking the folder
  (``read_folder``), writing the lot store (``LotStore.ingest``), reading
  the current tables back and assembling one row per lot, as
  ``linkage ingest`` and ``linkage assemble`` do. Peak memory is the larger
  of the two processes' (ingest; assemble), interpreter and libraries
  included. The growth exponent is the slope of log(time) on log(lots).
* ``train_chain`` of the whole default chain (n_jobs=1), and in the same
  process the "bare" scikit-learn fits of the same estimators on the same
  folds (see :func:`bare_fits` for exactly what they include); the overhead
  ratio is train time over bare time.
* ``find_window`` and ``build_report`` with the 1,000-lot model and store.
* one what-if (a measured ribbon porosity, every other setting at its
  training median, with the spec): in process (the first call, then the
  median of repeated calls), and as ``linkage predict`` from the shell,
  interleaved with a bare ``python -c "import numpy, pandas, sklearn"``.
* the demo's first report (issue 20): ``linkage report`` from the shell in
  a ``linkage demo`` workspace, the window and map kept beside the model
  (one warm-up run computes them), the kept figures removed before each
  timed run so that every figure is drawn; wall clock and CPU of the child.

Every figure printed or written comes from this run; the medians are over
the stated number of runs. The table goes to reports/benchmarks.md.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
SEED = 1
WHATIF = {"ribbon_porosity": 0.30}
WHATIF_CLI = ["--set", "ribbon_porosity=0.3"]
BARE_IMPORT = "import numpy, pandas, sklearn"

# targets of the issue (2-core machine)
TARGET_CLI_S = 1.0
TARGET_CLI_RATIO = 1.5
TARGET_INPROCESS_MS = 50.0
TARGET_TRAIN_RATIO = 1.3
TARGET_TRAIN_1000_S = 60.0
TARGET_INGEST_S = 30.0
TARGET_INGEST_MB = 2048.0
# issue 20's (2-core machine): ingest + assemble of 100,000 lots, and the report at 1,000 lots
TARGET_INGEST_20_S = 20.0
TARGET_INGEST_20_MB = 1024.0
TARGET_REPORT_1000_S = 5.0
TARGET_DEMO_REPORT_S = 3.0
#: the demo's report, as a user runs it in the workspace ``linkage demo`` made (reports/demo)
DEMO_REPORT_ARGS = ["report", "--spec", "spec.toml", "--store", "demo-lots.db", "--models-dir", "models"]
#: most lots per ingest folder (11 sieve rows a lot stay under linkage.read.MAX_ROWS)
CHUNK_LOTS = 25_000


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def _emit(payload: dict) -> None:
    print("BENCH " + json.dumps(payload), flush=True)


# ---------------------------------------------------------------------------
# steps, each run as `bench.py _<step> ...` in its own process
# ---------------------------------------------------------------------------
def step_generate(n: int, folder: str) -> None:
    """The lots as CSV in ``folder``; above :data:`CHUNK_LOTS` lots, in
    ``folder/part-1``, ``part-2``, ... of at most that many lots each (one file
    holds at most 500,000 data rows, ``linkage.read.MAX_ROWS``: a site's
    history goes in as several ingests, as it would from exports by period)."""
    import dataclasses

    from linkage.synthetic import WINDOW_SPEC, Truth, make_lots

    lots = make_lots(n, seed=SEED, truth=Truth.window_scenario())
    ids = list(lots.tables["process"]["lot"])
    chunks = [ids[i:i + CHUNK_LOTS] for i in range(0, len(ids), CHUNK_LOTS)]
    if len(chunks) == 1:
        lots.write_csv(folder, spec=WINDOW_SPEC)
    else:
        for k, chunk in enumerate(chunks, start=1):
            keep = set(chunk)
            part = dataclasses.replace(lots, tables={name: t[t["lot"].isin(keep)] for name, t in lots.tables.items()})
            part.write_csv(Path(folder) / f"part-{k}", spec=WINDOW_SPEC)
        Path(folder, "spec.toml").write_text(Path(folder, "part-1", "spec.toml").read_text())
    _emit({"rows": {k: len(v) for k, v in lots.tables.items()}, "parts": len(chunks)})


def ingest_folders(folder) -> list[Path]:
    """The folders ``linkage ingest`` is run on, in order."""
    parts = sorted(Path(folder).glob("part-*"), key=lambda p: int(p.name.split("-")[1]))
    return parts or [Path(folder)]


def step_ingest(folder: str, store: str) -> None:
    from linkage.read import read_folder
    from linkage.store import LotStore

    t0 = time.perf_counter()
    known = []
    if Path(store).exists():  # as `linkage ingest`: the lots already stored, for the cross-check
        with LotStore(Path(store), create=False) as s:
            known = s.lot_ids()
    checked = read_folder(Path(folder), known_lots=known)
    t1 = time.perf_counter()
    with LotStore(Path(store)) as s:  # synthetic lots have tails the plausibility rule refuses: taken, as a site would
        s.ingest(checked, accept_unusual=True, reason="benchmark: synthetic lots")
    t2 = time.perf_counter()
    _emit({"read_s": t1 - t0, "store_s": t2 - t1, "peak_mb": _peak_mb()})


def step_assemble(store: str, spec_path: str) -> None:
    from linkage.assemble import assemble
    from linkage.spec import read_spec
    from linkage.store import LotStore

    spec = read_spec(Path(spec_path))
    t0 = time.perf_counter()
    with LotStore(Path(store), create=False) as s:  # as `linkage assemble --spec`
        tables = s.current_tables()
    t1 = time.perf_counter()
    q = spec.limits["dissolution_pct"].min if "dissolution_pct" in spec.limits else None
    table = assemble(tables, dissolution_time_min=spec.dissolution_time_min, dissolution_q_pct=q)
    t2 = time.perf_counter()
    _emit({"current_s": t1 - t0, "assemble_s": t2 - t1, "lots": len(table), "peak_mb": _peak_mb()})


def _table(folder: str):
    from linkage.assemble import assemble
    from linkage.read import read_folder

    checked = read_folder(Path(folder))
    return assemble(checked.tables, dissolution_time_min=checked.spec.dissolution_time_min)


def step_train(folder: str, models_dir: str, candidates: str, bare: str) -> None:
    from linkage.decide.watch import design_at_training
    from linkage.models.registry import save
    from linkage.models.train import train_chain

    table = _table(folder)
    names = None if candidates == "all" else candidates.split(",")
    t0 = time.perf_counter()
    fitted = train_chain(table, seed=0, candidates=names)
    train_s = time.perf_counter() - t0
    out = {"train_s": train_s, "selected": {k: v.selected for k, v in fitted.targets.items()}}
    # as `linkage train` keeps it with the model: the watch's alarm design, simulated once (issue 20)
    t0 = time.perf_counter()
    fitted.training["watch_design"] = design_at_training(fitted)
    out["watch_design_s"] = time.perf_counter() - t0
    if models_dir != "-":
        out["model_id"] = save(fitted, Path(models_dir))
    if bare == "bare":
        t0 = time.perf_counter()
        out["fits"] = bare_fits(table, seed=0, candidates=names, kind="sklearn")
        out["bare_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        bare_fits(table, seed=0, candidates=names, kind="linkage")
        out["own_s"] = time.perf_counter() - t0
    out["peak_mb"] = _peak_mb()
    _emit(out)


def bare_fits(table, seed: int = 0, candidates=None, kind: str = "sklearn") -> int:
    """The estimator fits ``train_chain`` makes, done directly on numpy
    arrays; returns the number of fits.

    ``kind="sklearn"``: with scikit-learn's own estimators (and scipy's
    ``curve_fit`` for the Ryshkewitch–Duckworth curve): ``DummyRegressor``;
    ``PLSRegression(scale=True)``; ``StandardScaler`` →
    ``PolynomialFeatures(2)`` → ``Ridge`` (the same model as the project's
    quadratic ridge: standardised inputs, squares and pairwise products,
    unpenalised intercept); ``HistGradientBoostingRegressor`` with the
    project's settings. ``kind="linkage"``: with the project's own estimator
    classes through ``CandidateSpec.fit_predict_grid``, which is what
    ``train_chain`` calls for each inner fold; the difference to train time
    is then only the orchestration around the fits.

    Included: for every target of the default chain, the lots with all its
    inputs; the same outer folds (``linkage.models.cv.outer_splits``, same
    seed) plus the full-data fit, and inside each the same inner folds
    (``inner_splits``); every candidate that applies, with the same grid,
    fitted the way ``train_chain`` fits it (one boosting fit of 20 trees with
    staged predictions for 5/10/20; one PLS fit at the largest number of
    components, fewer from its rotations; one ridge fit per penalty; one
    curve fit; the mean); the inner out-of-fold predictions, the choice of
    the grid point by inner RMSE, the refit on the outer training lots and
    the prediction of the held-out lots; all under one BLAS/OpenMP thread,
    as ``train_chain`` runs its jobs.

    Not included (that is what the overhead ratio measures): checking and
    sorting the table, the applicability-domain models, the nested CV+
    intervals (predictions of the inner models at the held-out lots and
    their rank rule), the metrics and the one-SE choice among candidates,
    and building the fitted-chain record.
    """
    import warnings

    import numpy as np
    from scipy.optimize import curve_fit
    from sklearn.cross_decomposition import PLSRegression
    from sklearn.dummy import DummyRegressor
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.linear_model import Ridge
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import PolynomialFeatures, StandardScaler
    from threadpoolctl import threadpool_limits

    from linkage.models.candidates import BOOSTING_STAGES, CANDIDATES, min_samples_leaf_for
    from linkage.models.chain import ChainSpec
    from linkage.models.cv import SIMPLICITY_ORDER, inner_splits, outer_splits

    chain = ChainSpec.default()
    names = list(SIMPLICITY_ORDER) if candidates is None else [c for c in SIMPLICITY_ORDER
                                                                if c in set(candidates) | {"mean"}]
    fits = 0

    def fit_grid(name, grid, inputs, monotone, Xtr, ytr, Xev):
        """predictions (G, len(Xev)) of every grid point fitted on (Xtr, ytr)"""
        nonlocal fits
        if kind == "linkage":
            fits += 1 if name in ("mean", "rd_baseline", "pls", "boosting") else len(grid)
            return CANDIDATES[name].fit_predict_grid(grid, Xtr, ytr, [Xev], inputs=inputs, monotone=monotone,
                                                     seed=seed)[0]
        if name == "mean":
            fits += 1
            return DummyRegressor().fit(Xtr, ytr).predict(Xev)[None, :]
        if name == "rd_baseline":
            j = inputs.index("ribbon_porosity")
            e, s = Xtr[:, j], ytr
            pos = s > 0
            slope, icpt = np.polyfit(e[pos], np.log(s[pos]), 1)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                (s0, k), _ = curve_fit(lambda x, a, b: a * np.exp(-b * x), e, s, p0=(np.exp(icpt), -slope),
                                       maxfev=10_000)
            fits += 1
            return (s0 * np.exp(-k * Xev[:, j]))[None, :]
        if name == "pls":
            keep = np.ptp(Xtr, axis=0) > 0
            top = min(max(g["n_components"] for g in grid), int(keep.sum()), len(ytr) - 1)
            pls = PLSRegression(n_components=top, scale=True).fit(Xtr[:, keep], ytr)
            fits += 1
            z = (Xev[:, keep] - pls._x_mean) / pls._x_std
            out = []
            for g in grid:
                a = min(g["n_components"], top)
                beta = pls.x_rotations_[:, :a] @ pls.y_loadings_[0, :a]
                out.append(z @ beta * pls._y_std[0] + pls._y_mean[0])
            return np.vstack(out)
        if name == "quadratic_ridge":
            out = []
            for g in grid:
                model = make_pipeline(StandardScaler(), PolynomialFeatures(2, include_bias=False),
                                      Ridge(alpha=g["alpha"])).fit(Xtr, ytr)
                fits += 1
                out.append(model.predict(Xev))
            return np.vstack(out)
        if name == "boosting":
            cst = [int(monotone.get(c, 0)) for c in inputs]
            model = HistGradientBoostingRegressor(
                learning_rate=0.2, max_iter=max(BOOSTING_STAGES), max_depth=2, max_leaf_nodes=4,
                min_samples_leaf=min_samples_leaf_for(len(ytr)), l2_regularization=0.0, early_stopping=False,
                monotonic_cst=cst if any(cst) else None, random_state=seed).fit(Xtr, ytr)
            fits += 1
            want = [g["max_iter"] for g in grid]
            return np.vstack([p for i, p in enumerate(model.staged_predict(Xev), start=1) if i in want])
        raise KeyError(name)

    with threadpool_limits(limits=1):
        for stage in chain.stages:
            for target in stage.targets:
                cols = list(stage.inputs) + [target]
                values = table[cols].to_numpy(float)
                have = np.all(np.isfinite(values), axis=1)
                X, y = values[have, :-1], values[have, -1]
                lots = table["lot"].astype(str).to_numpy(dtype=object)[have]
                inputs = list(stage.inputs)
                monotone = dict(stage.monotone.get(target, {}))
                usable = [c for c in names if CANDIDATES[c].not_applicable(inputs, X, y) is None]
                splits, _ = outer_splits(lots, seed)
                for tr, te in [*splits, (np.arange(len(y)), None)]:
                    Xtr, ytr = X[tr], y[tr]
                    inner = inner_splits(lots[tr])
                    for name in usable:
                        grid = CANDIDATES[name].grid(len(ytr), X.shape[1])
                        oof = np.empty((len(grid), len(ytr)))
                        for itr, ite in inner:
                            oof[:, ite] = fit_grid(name, grid, inputs, monotone, Xtr[itr], ytr[itr], Xtr[ite])
                        best = grid[int(np.argmin(np.sqrt(np.mean((oof - ytr) ** 2, axis=1))))]
                        Xev = X[te] if te is not None else Xtr[:1]
                        fit_grid(name, [best], inputs, monotone, Xtr, ytr, Xev)
    return fits


def step_decide(models_dir: str, store: str, spec_path: str, runs: int) -> None:
    from linkage.assemble import assemble
    from linkage.decide.window import find_window
    from linkage.models.registry import load
    from linkage.report.html import build_report
    from linkage.spec import read_spec
    from linkage.store import LotStore

    chain = load(Path(models_dir), "latest")
    spec = read_spec(Path(spec_path))
    with LotStore(Path(store), create=False) as s:
        tables, lots = s.current_tables(), s.lots()
    q = spec.limits["dissolution_pct"].min if "dissolution_pct" in spec.limits else None
    table = assemble(tables, dissolution_time_min=spec.dissolution_time_min, dissolution_q_pct=q)
    window_s, report_s = [], []
    found = None
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(runs):
            t0 = time.perf_counter()
            w = find_window(chain, spec, confidence=0.9, seed=0)  # as `linkage window --spec`
            window_s.append(time.perf_counter() - t0)
            found = w.found
            t0 = time.perf_counter()
            build_report(chain, table, spec=spec, lots=lots, out_path=Path(tmp) / "report.html", confidence=0.9,
                         seed=0)  # as `linkage report --spec`
            report_s.append(time.perf_counter() - t0)
        # `linkage report --spec` once more, through the API, reusing the window and the map that the first
        # call keeps beside the model (what `linkage window` and `linkage space` keep too; issue 20)
        from linkage.api import report as api_report

        api_report(Path(tmp) / "first.html", store=store, models_dir=models_dir, spec=spec)
        results = Path(models_dir) / chain.model_id / "results"
        reused_s, figures_kept_s = [], []
        for _ in range(runs):
            for kept in results.glob("figures-*.npz"):  # the figures drawn each time, as before they were kept
                kept.unlink()
            t0 = time.perf_counter()
            api_report(Path(tmp) / "again.html", store=store, models_dir=models_dir, spec=spec)
            reused_s.append(time.perf_counter() - t0)
        # and run again on the unchanged workspace: the figures the last call drew are kept too (issue 20)
        for _ in range(runs):
            t0 = time.perf_counter()
            api_report(Path(tmp) / "again.html", store=store, models_dir=models_dir, spec=spec)
            figures_kept_s.append(time.perf_counter() - t0)
    _emit({"window_s": window_s, "report_s": report_s, "report_reused_s": reused_s,
           "report_figures_kept_s": figures_kept_s, "window_found": found, "peak_mb": _peak_mb()})


def step_whatif(models_dir: str, spec_path: str, runs: int, form: str = "lean") -> None:
    """One what-if, in process: on the registry's lean form
    (``registry.load_whatif``, what ``linkage predict`` uses), or on the
    fitted chain as trained (``registry.load``; converted on each call)."""
    t0 = time.perf_counter()
    from linkage.decide.whatif import predict_whatif
    from linkage.models.registry import load, load_whatif
    from linkage.spec import read_spec

    chain = (load_whatif if form == "lean" else load)(Path(models_dir), "latest")
    spec = read_spec(Path(spec_path))
    load_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    predict_whatif(chain, dict(WHATIF), spec=spec)
    first_s = time.perf_counter() - t0
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        predict_whatif(chain, dict(WHATIF), spec=spec)
        times.append(time.perf_counter() - t0)
    heavy = sorted(m for m in ("sklearn", "pandas", "scipy", "shap") if m in sys.modules)
    _emit({"import_and_load_s": load_s, "first_s": first_s, "times_s": times, "form": form,
           "heavy_imported": heavy, "shap_imported": "shap" in sys.modules, "peak_mb": _peak_mb()})


STEPS = {"_generate": step_generate, "_ingest": step_ingest, "_assemble": step_assemble, "_train": step_train,
         "_decide": step_decide, "_whatif": step_whatif}


# ---------------------------------------------------------------------------
# the driver
# ---------------------------------------------------------------------------
def run_step(*args) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), *map(str, args)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("BENCH ")]
    if proc.returncode != 0 or not lines:
        raise RuntimeError(f"step {args[0]} failed (exit {proc.returncode}):\n{proc.stderr[-3000:]}")
    return json.loads(lines[-1][len("BENCH "):])


def linkage_command() -> list[str]:
    script = Path(sys.executable).with_name("linkage")
    if script.exists():
        return [str(script)]
    found = shutil.which("linkage")
    if found:
        return [found]
    return [sys.executable, "-c", "import sys; from linkage.cli.main import cli; sys.exit(cli())"]


def wall(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True)
    elapsed = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed (exit {proc.returncode}):\n{proc.stderr[-2000:]}")
    return elapsed


def demo_environment() -> dict:
    """The children's environment for the demo's report: this one without
    PYTHONDONTWRITEBYTECODE, so that the compiled modules are used as a
    user's installation uses them (PYTHONPATH kept: the tree measured)."""
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def timed_child(cmd: list[str], cwd: Path, env: dict) -> tuple[float, float]:
    """Wall clock and CPU (user + system, from RUSAGE_CHILDREN before and
    after: the child and the processes it waited for) of one command."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True)
    elapsed = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} in {cwd} failed (exit {proc.returncode}):\n{proc.stderr[-2000:]}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return elapsed, cpu


def demo_report(work: Path, runs: int, log) -> dict:
    """The demo's first report (issue 20), as reports/benchmarks.md's section
    "The demo's first report on this machine" measures it: ``linkage demo``
    in a folder of the work dir; the package's modules compiled; one warm-up
    ``linkage report`` in reports/demo, which computes the window and the map
    and keeps them beside the model (as a user's first report after
    ``linkage window``/``space`` reuses them); then ``runs`` timed runs of the
    same command, each after removing ``models/*/results/figures-*.npz`` so
    that every figure is drawn."""
    env = demo_environment()
    py = [sys.executable, "-m", "linkage"]
    package = subprocess.run([sys.executable, "-c", "import linkage, os; print(os.path.dirname(linkage.__file__))"],
                             cwd=work, env=env, capture_output=True, text=True, check=True).stdout.strip()
    subprocess.run([sys.executable, "-m", "compileall", "-q", package], env=env, check=True,
                   stdout=subprocess.DEVNULL)
    base = work / "demo"
    base.mkdir(parents=True, exist_ok=True)
    demo_s, _ = timed_child([*py, "demo"], base, env)
    folder = base / "reports" / "demo"
    warmup_s, warmup_cpu = timed_child([*py, *DEMO_REPORT_ARGS], folder, env)
    log(f"demo made in {demo_s:.1f} s; warm-up report {warmup_s:.2f} s")
    wall_s, cpu_s, removed = [], [], []
    for _ in range(runs):
        kept = list(folder.glob("models/*/results/figures-*.npz"))
        for path in kept:
            path.unlink()
        removed.append(len(kept))
        elapsed, cpu = timed_child([*py, *DEMO_REPORT_ARGS], folder, env)
        wall_s.append(elapsed)
        cpu_s.append(cpu)
        log(f"demo's report, run {len(wall_s)}: {elapsed:.2f} s wall, {cpu:.2f} s CPU")
    return {"runs_s": wall_s, "median_s": med(wall_s), "cpu_s": cpu_s, "median_cpu_s": med(cpu_s),
            "figures_files_removed": removed, "warmup_s": warmup_s, "warmup_cpu_s": warmup_cpu,
            "demo_s": demo_s, "package": package,
            "command": " ".join(["python -m linkage", *DEMO_REPORT_ARGS])}


def machine() -> dict:
    cpu = "unknown"
    mem_gb = None
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                mem_gb = int(line.split()[1]) / 1024 / 1024
                break
    except OSError:
        pass
    from importlib import metadata

    versions = {}
    for dist in ("linkage", "numpy", "pandas", "scipy", "scikit-learn", "joblib", "shap"):
        try:
            versions[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            versions[dist] = "not installed"
    commit = None
    try:
        commit = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"], capture_output=True,
                                text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(REPO), "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True).stdout.strip()
        if dirty:
            commit += " (with uncommitted changes)"
    except (OSError, subprocess.CalledProcessError):
        pass
    return {"cpus": os.cpu_count(), "cpu": cpu, "mem_gb": mem_gb, "system": f"{platform.system()} "
            f"{platform.machine()}", "python": platform.python_version(), "versions": versions, "commit": commit}


def fit_exponent(sizes, times) -> float | None:
    import numpy as np

    pts = [(n, t) for n, t in zip(sizes, times) if t and t > 0]
    if len(pts) < 2:
        return None
    x = np.log([p[0] for p in pts])
    y = np.log([p[1] for p in pts])
    return float(np.polyfit(x, y, 1)[0])


def med(values) -> float:
    return float(statistics.median(values))


def fmt(v, digits=2) -> str:
    if v is None:
        return "—"
    if isinstance(v, str):
        return v
    if abs(v) >= 100:
        return f"{v:,.0f}"
    return f"{v:.{digits}f}"


def verdict(ok: bool | None) -> str:
    return "—" if ok is None else ("holds" if ok else "**misses**")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="100,1000,10000,100000", help="lot counts for ingest + assemble")
    ap.add_argument("--train-sizes", default="100,1000,10000", help="lot counts for train (1000 is needed "
                    "for the window, report and what-if steps)")
    ap.add_argument("--runs", type=int, default=3, help="runs of each timed step (medians)")
    ap.add_argument("--large-runs", type=int, default=1,
                    help="runs of train at 10,000 lots and more (each takes minutes)")
    ap.add_argument("--whatif-runs", type=int, default=30, help="in-process what-ifs after the first")
    ap.add_argument("--cli-runs", type=int, default=7, help="runs of the what-if CLI and of the bare import")
    ap.add_argument("--no-boosting-whatif", action="store_true",
                    help="skip the what-if with a chain whose every attribute uses boosting")
    ap.add_argument("--no-bare", action="store_true",
                    help="time train_chain alone, without the bare scikit-learn fits beside it (they cover the "
                         "candidates of issue 8 only: dummy, PLS, quadratic ridge, boosting, the Ryshkewitch-"
                         "Duckworth curve, and stop at a later candidate)")
    ap.add_argument("--demo-runs", type=int, default=5,
                    help="timed runs of the demo's first report (issue 20), after one warm-up; 0 skips the step")
    ap.add_argument("--quick", action="store_true", help="sizes 100 and 1,000 only, 2 runs")
    ap.add_argument("--out", default=str(REPO / "reports" / "benchmarks.md"), help="markdown file to write")
    ap.add_argument("--work", default=None, help="work folder (default: a temporary one, removed at the end)")
    ap.add_argument("--json", default=None, help="also write every raw figure to this JSON file")
    args = ap.parse_args(argv)
    if args.quick:
        args.sizes, args.train_sizes, args.runs = "100,1000", "100,1000", 2
    sizes = [int(s) for s in args.sizes.split(",") if s]
    train_sizes = [int(s) for s in args.train_sizes.split(",") if s]
    if 1000 not in sizes:
        sizes = sorted(set(sizes) | {1000})
    if 1000 not in train_sizes:
        train_sizes = sorted(set(train_sizes) | {1000})
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="linkage-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    started = dt.datetime.now(dt.timezone.utc)
    info = machine()
    info["load_start"] = os.getloadavg()
    log = lambda *a: print(*a, file=sys.stderr, flush=True)  # noqa: E731
    log(f"linkage benchmark in {work}; {info['cpus']} CPUs, {info['cpu']}")
    res: dict = {"ingest": {}, "train": {}, "decide": None, "whatif": {}, "cli": None, "demo": None}
    try:
        # ---- ingest + assemble
        for n in sizes:
            folder = work / f"lots-{n}"
            gen = run_step("_generate", n, folder)
            runs = []
            for r in range(args.runs):
                store = work / f"store-{n}.db"
                for suffix in ("", "-wal", "-shm", ".seal", ".seal.lock"):  # and the anchor: refused beside a new store
                    Path(f"{store}{suffix}").unlink(missing_ok=True)
                parts = [run_step("_ingest", part, store) for part in ingest_folders(folder)]
                a = {"read_s": sum(x["read_s"] for x in parts), "store_s": sum(x["store_s"] for x in parts),
                     "peak_mb": max(x["peak_mb"] for x in parts), "ingests": len(parts),
                     "per_ingest_s": [x["read_s"] + x["store_s"] for x in parts]}
                b = run_step("_assemble", store, folder / "spec.toml")
                runs.append({**a, **b})
                log(f"ingest+assemble {n} lots, run {r + 1}: "
                    f"{a['read_s'] + a['store_s'] + b['current_s'] + b['assemble_s']:.2f} s")
            keys = ("read_s", "store_s", "current_s", "assemble_s")
            totals = [sum(x[k] for k in keys) for x in runs]
            res["ingest"][n] = {"raw_rows": sum(gen["rows"].values()), "rows": gen["rows"], "runs": len(runs),
                                "ingests": runs[0]["ingests"], "per_ingest_s": runs[0]["per_ingest_s"],
                                **{k: med([x[k] for x in runs]) for k in keys},
                                "total_s": med(totals), "totals": totals,
                                "peak_mb": max(max(x["peak_mb"] for x in runs), 0.0)}
        # ---- train
        for n in train_sizes:
            folder = work / f"lots-{n}"
            if not folder.exists():
                run_step("_generate", n, folder)
            reps = args.runs if n < 10_000 else args.large_runs
            runs = []
            for r in range(reps):
                models = work / f"models-{n}" if r == 0 else "-"
                runs.append(run_step("_train", folder, models, "all", "no" if args.no_bare else "bare"))
                log(f"train {n} lots, run {r + 1}: train {runs[-1]['train_s']:.1f} s, bare {runs[-1].get('bare_s')} s, "
                    f"own estimators {runs[-1].get('own_s')} s")
            res["train"][n] = {"runs": len(runs), "train_s": med([x["train_s"] for x in runs]),
                               "watch_design_s": med([x["watch_design_s"] for x in runs]),
                               "peak_mb": max(x["peak_mb"] for x in runs), "selected": runs[0]["selected"],
                               "bare_s": None, "own_s": None, "fits": None, "ratio": None, "own_ratio": None}
            if not args.no_bare:
                res["train"][n].update(bare_s=med([x["bare_s"] for x in runs]), fits=runs[0]["fits"],
                                       own_s=med([x["own_s"] for x in runs]),
                                       ratios=[x["train_s"] / x["bare_s"] for x in runs])
                res["train"][n]["ratio"] = res["train"][n]["train_s"] / res["train"][n]["bare_s"]
                res["train"][n]["own_ratio"] = res["train"][n]["train_s"] / res["train"][n]["own_s"]
        # ---- window and report, 1,000-lot model and store
        spec = work / "lots-1000" / "spec.toml"
        res["decide"] = run_step("_decide", work / "models-1000", work / "store-1000.db", spec, args.runs)
        log(f"window {res['decide']['window_s']}, report {res['decide']['report_s']}")
        # ---- what-if, in process
        res["whatif"]["default"] = run_step("_whatif", work / "models-1000", spec, args.whatif_runs)
        res["whatif"]["fitted"] = run_step("_whatif", work / "models-1000", spec, args.whatif_runs, "fitted")
        models_sets = {"default": work / "models-1000"}
        if not args.no_boosting_whatif:
            models_sets["boosting"] = work / "models-1000-boosting"
            t = run_step("_train", work / "lots-1000", models_sets["boosting"], "boosting", "no")
            res["whatif"]["boosting_selected"] = t["selected"]
            res["whatif"]["boosting"] = run_step("_whatif", models_sets["boosting"], spec, args.whatif_runs)
        # ---- what-if, from the shell, interleaved with the bare import
        link = linkage_command()
        cli = {"bare": [], **{k: [] for k in models_sets}}
        for _ in range(args.cli_runs):
            cli["bare"].append(wall([sys.executable, "-c", BARE_IMPORT]))
            for k, mdir in models_sets.items():
                cli[k].append(wall([*link, "predict", *WHATIF_CLI, "--spec", str(spec), "--models-dir", str(mdir),
                                    "--store", str(work / "store-1000.db")]))
        res["cli"] = {k: {"median_s": med(v), "runs": v} for k, v in cli.items()}
        res["cli"]["command"] = " ".join([Path(link[0]).name, "predict", *WHATIF_CLI, "--spec", "spec.toml",
                                          "--models-dir", "models", "--store", "linkage.db"])
        log(f"CLI {res['cli']}")
        # ---- the demo's first report, from the shell (issue 20)
        if args.demo_runs > 0:
            res["demo"] = demo_report(work, args.demo_runs, log)
    finally:
        if not args.work:
            shutil.rmtree(work, ignore_errors=True)
    finished = dt.datetime.now(dt.timezone.utc)
    info["load_end"] = os.getloadavg()
    text = report(res, info, started, finished, args, sizes, train_sizes)
    print(text)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    print(f"\nwritten to {out}", file=sys.stderr)
    if args.json:
        Path(args.json).write_text(json.dumps({"machine": info, "results": res}, indent=1, default=str),
                                   encoding="utf-8")
    return 0


def report(res, info, started, finished, args, sizes, train_sizes) -> str:
    L = []
    mins = (finished - started).total_seconds() / 60
    L += ["# Benchmarks", "",
          f"Measured {started:%Y-%m-%d %H:%M} UTC ({mins:.0f} min) with `python tests/benchmarks/bench.py"
          f"{' --quick' if args.quick else ''}`"
          + (f" at commit {info['commit']}" if info["commit"] else "") + ".",
          "",
          f"Machine: {info['system']}, {info['cpus']} CPUs ({info['cpu']}), "
          + (f"{info['mem_gb']:.1f} GiB RAM" if info["mem_gb"] else "memory unknown") + f"; Python {info['python']}; "
          + ", ".join(f"{k} {v}" for k, v in info["versions"].items()) + ".",
          "",
          "Load average (1, 5, 15 min) at the start: " + ", ".join(f"{v:.2f}" for v in info["load_start"])
          + "; at the end: " + ", ".join(f"{v:.2f}" for v in info["load_end"]) + ".",
          "",
          "Synthetic lots from `make_lots(n, seed=1, truth=Truth.window_scenario())`: every lot has its process "
          "record, 3-5 ribbon replicates, an 11-row sieve analysis and its tablet results, written as CSV. "
          "Each step runs in a fresh Python process; times are medians over the runs stated; peak memory is "
          "the process's peak resident set (interpreter and libraries included). Every figure comes from this "
          "run.", ""]
    # ---- targets
    ing = res["ingest"]
    big = max(ing) if ing else None
    tr = res["train"]
    wi = res["whatif"].get("default")
    cli = res["cli"]
    inproc_ms = 1000 * med(wi["times_s"]) if wi else None
    cli_s = cli["default"]["median_s"] if cli else None
    bare_s = cli["bare"]["median_s"] if cli else None
    ratio_cli = cli_s / bare_s if cli else None
    exps = fit_exponent([n for n in sorted(ing) if n >= 1000], [ing[n]["total_s"] for n in sorted(ing) if n >= 1000])
    ratios = {n: tr[n]["ratio"] for n in sorted(tr) if tr[n]["ratio"] is not None}
    L += ["## Targets", "",
          "| target | measured | verdict |", "|---|---|---|",
          f"| what-if CLI under {TARGET_CLI_S:.1f} s wall | {fmt(cli_s)} s | {verdict(cli_s < TARGET_CLI_S)} |",
          f"| what-if CLI at most {TARGET_CLI_RATIO}× the bare import ({fmt(bare_s)} s) | {fmt(ratio_cli)}× | "
          f"{verdict(ratio_cli <= TARGET_CLI_RATIO)} |",
          f"| in-process what-if under {TARGET_INPROCESS_MS:.0f} ms | {fmt(inproc_ms, 1)} ms | "
          f"{verdict(inproc_ms < TARGET_INPROCESS_MS)} |",
          f"| `train` overhead at most {TARGET_TRAIN_RATIO}× the bare fits | "
          + ", ".join(f"{fmt(r)}× ({n:,} lots)" for n, r in ratios.items())
          + ("not measured (--no-bare)" if not ratios else "")
          + f" | {verdict(all(r <= TARGET_TRAIN_RATIO for r in ratios.values()) if ratios else None)} |",
          f"| `train` of 1,000 lots under {TARGET_TRAIN_1000_S:.0f} s | {fmt(tr[1000]['train_s'], 1)} s | "
          f"{verdict(tr[1000]['train_s'] < TARGET_TRAIN_1000_S)} |"]
    if big is not None:
        L += [f"| ingest + assemble of {big:,} lots under {TARGET_INGEST_S:.0f} s | {fmt(ing[big]['total_s'], 1)} s | "
              f"{verdict(ing[big]['total_s'] < TARGET_INGEST_S) if big >= 100_000 else 'not run at 100,000'} |",
              f"| … and under {TARGET_INGEST_MB / 1024:.0f} GB peak | {fmt(ing[big]['peak_mb'])} MB | "
              f"{verdict(ing[big]['peak_mb'] < TARGET_INGEST_MB) if big >= 100_000 else 'not run at 100,000'} |",
              f"| time growth no worse than linear | exponent {fmt(exps)} (1,000 lots and up) | "
              f"{verdict(None if exps is None else exps <= 1.05)} |"]
        if big >= 100_000:
            L += [f"| ingest + assemble of {big:,} lots at most {TARGET_INGEST_20_S:.0f} s (issue 20) | "
                  f"{fmt(ing[big]['total_s'], 1)} s | {verdict(ing[big]['total_s'] <= TARGET_INGEST_20_S)} |",
                  f"| … and under {TARGET_INGEST_20_MB / 1024:.0f} GB peak (issue 20) | "
                  f"{fmt(ing[big]['peak_mb'])} MB | {verdict(ing[big]['peak_mb'] < TARGET_INGEST_20_MB)} |"]
    dec = res["decide"]
    if dec:
        first, reused = med(dec["report_s"]), med(dec["report_reused_s"]) if dec.get("report_reused_s") else None
        L += [f"| report at 1,000 lots at most {TARGET_REPORT_1000_S:.0f} s (issue 20): `build_report`, everything "
              f"computed but the watch's alarm design, kept with the model at training | {fmt(first)} s | {verdict(first <= TARGET_REPORT_1000_S)} |",
              f"| … `linkage.api.report` reusing the window and map kept beside the model | {fmt(reused)} s | "
              f"{verdict(None if reused is None else reused <= TARGET_REPORT_1000_S)} |"]
    demo = res.get("demo")
    if demo:
        L += [f"| the demo's first report at most {TARGET_DEMO_REPORT_S:.0f} s (issue 20): `linkage report` in a "
              f"`linkage demo` workspace, window and map kept, every figure drawn (wall) | {fmt(demo['median_s'])} s "
              f"| {verdict(demo['median_s'] <= TARGET_DEMO_REPORT_S)} |"]
    L += ["", "An exponent up to 1.05 counts as linear here (run-to-run noise and cache effects); see the "
          "table for the figures at each size.", ""]
    # ---- ingest
    L += ["## Ingest and assemble", "",
          "| lots | raw rows | read + check s | store s | current tables s | assemble s | **total s** | "
          "per 1,000 lots s | peak MB | runs |",
          "|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for n in sorted(ing):
        x = ing[n]
        L.append(f"| {n:,} | {x['raw_rows']:,} | {fmt(x['read_s'])} | {fmt(x['store_s'])} | {fmt(x['current_s'])} | "
                 f"{fmt(x['assemble_s'])} | **{fmt(x['total_s'])}** | {fmt(1000 * x['total_s'] / n)} | "
                 f"{fmt(x['peak_mb'])} | {x['runs']} |")
    for n in sorted(ing):
        if ing[n]["ingests"] > 1:
            L += ["", f"{n:,} lots went in as {ing[n]['ingests']} ingests; read + store of each (first run): "
                  + ", ".join(f"{v:.1f} s" for v in ing[n]["per_ingest_s"]) + ", in order, each into the store "
                  "the ones before it filled."]
    all_exp = fit_exponent(sorted(ing), [ing[n]["total_s"] for n in sorted(ing)])
    L += ["", f"Growth exponent of the total time (slope of log time on log lots): {fmt(exps)} over "
          f"1,000 lots and up, {fmt(all_exp)} over every size (the smallest sizes are mostly fixed costs).",
          "'read + check' is `read_folder` (parse and check every cell); 'store' is `LotStore.ingest` (one "
          "transaction: every raw row as JSON, content hashes, revisions); the two are `linkage ingest`. "
          f"Above {CHUNK_LOTS:,} lots the lots go in as several ingests of at most {CHUNK_LOTS:,} lots each "
          "into one store (a file holds at most 500,000 data rows), each in its own process; their times are "
          "added up. "
          "'current tables' and 'assemble' are `linkage assemble`. Peak memory is the larger of the two "
          "processes.", ""]
    # ---- train
    L += ["## Train", "",
          "| lots | `train_chain` s | bare scikit-learn fits s | **overhead ratio** | project estimators, fits "
          "only s | ratio to those | scikit-learn fits | peak MB | runs |",
          "|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for n in sorted(tr):
        x = tr[n]
        L.append(f"| {n:,} | {fmt(x['train_s'], 1)} | {fmt(x['bare_s'], 1)} | **{fmt(x['ratio'])}×** | "
                 f"{fmt(x['own_s'], 1)} | {fmt(x['own_ratio'])}× | {fmt(None if x['fits'] is None else format(x['fits'], ','))} | "
                 f"{fmt(x['peak_mb'])} | {x['runs']} |")
    sel = tr[1000]["selected"]
    L += ["", "`train_chain(table, seed=0)`: the default chain (7 attributes), every candidate, one process "
          "(n_jobs=1). The bare scikit-learn fits are the same estimator fits done directly with scikit-learn "
          "(`DummyRegressor`, `PLSRegression`, `StandardScaler` → `PolynomialFeatures(2)` → `Ridge`, "
          "`HistGradientBoostingRegressor`; scipy `curve_fit` for the Ryshkewitch–Duckworth curve) in the same "
          "process: the same lots, outer and inner folds (`linkage.models.cv`), grids and refits, the inner "
          "out-of-fold predictions and the held-out predictions, under one thread as `train_chain` runs. They "
          "leave out what only `train_chain` does: checking the table, nested CV+ intervals, metrics and the "
          "one-SE choice, the applicability-domain models and the fitted-chain record. Below 1× means the "
          "project's own estimators (a closed-form quadratic ridge, one PLS fit for every number of components) "
          "cost less than scikit-learn's general ones. 'Project estimators, fits only' times the same loop with "
          "the project's estimator classes (`CandidateSpec.fit_predict_grid`, what `train_chain` calls per inner "
          "fold), so the last ratio is the orchestration alone. Runs at 10,000 lots and more: "
          + str(args.large_runs) + ".",
          "", "`linkage train` also simulates the design of the watch's multivariate alarm and keeps it with the "
          f"model (`linkage.decide.watch.design_at_training`, issue 20): {fmt(tr[1000].get('watch_design_s'))} s "
          "at 1,000 lots, not in the times above; the model the report below runs on has it, as a model "
          "`linkage train` saved has.",
          "", "Selected at 1,000 lots: " + ", ".join(f"{k}: {v}" for k, v in sel.items()) + ".", ""]
    # ---- window, report
    d = res["decide"]
    L += ["## Window and report (the 1,000-lot model and store)", "",
          "| step | median s | runs |", "|---|---:|---:|",
          f"| `find_window` (121 porosities × 2,000 draws) | {fmt(med(d['window_s']))} | {len(d['window_s'])} |",
          f"| `build_report` with the spec (window, figures, explanations) | {fmt(med(d['report_s']))} | "
          f"{len(d['report_s'])} |",
          *([f"| `linkage.api.report` with the spec, reusing the window and map kept beside the model (loads "
             f"the model and the store itself) | {fmt(med(d['report_reused_s']))} | {len(d['report_reused_s'])} |"]
            if d.get("report_reused_s") else []),
          *([f"| the same run again on the unchanged workspace: the figures kept beside the model too | "
             f"{fmt(med(d['report_figures_kept_s']))} | {len(d['report_figures_kept_s'])} |"]
            if d.get("report_figures_kept_s") else []), "",
          f"Window found: {d['window_found']}. Both in process, after loading the model and the store.", ""]
    # ---- the demo's first report
    if demo:
        L += demo_section(demo)
    # ---- what-if
    L += ["## What-if", "",
          f"One what-if: `ribbon_porosity = {WHATIF['ribbon_porosity']}` measured, the other settings at their "
          "training medians, with the spec (probabilities of passing), the 1,000-lot model.", "",
          "| what | median | first call | runs |", "|---|---:|---:|---:|"]
    for key, label in (("default", "in process, `predict_whatif` on `registry.load_whatif` (the lean form)"),
                       ("fitted", "in process, `predict_whatif` on `registry.load` (the fitted chain, converted "
                                  "on each call)"),
                       ("boosting", "in process, every attribute on boosting (`candidates=['boosting']`), "
                                    "lean form")):
        w = res["whatif"].get(key)
        if w:
            L.append(f"| {label} | {fmt(1000 * med(w['times_s']), 1)} ms | {fmt(1000 * w['first_s'], 1)} ms | "
                     f"{len(w['times_s'])} |")
    if cli:
        L.append(f"| `{cli['command']}` (wall) | {fmt(cli['default']['median_s'])} s | — | "
                 f"{len(cli['default']['runs'])} |")
        if "boosting" in cli:
            L.append(f"| the same, every attribute on boosting (wall) | {fmt(cli['boosting']['median_s'])} s | — | "
                     f"{len(cli['boosting']['runs'])} |")
        L.append(f"| bare `python -c \"{BARE_IMPORT}\"` (wall) | {fmt(cli['bare']['median_s'])} s | — | "
                 f"{len(cli['bare']['runs'])} |")
        L += ["", f"Start-up ratio (what-if CLI / bare import): {fmt(ratio_cli)}×"
              + (f"; with every attribute on boosting {fmt(cli['boosting']['median_s'] / bare_s)}×" if "boosting"
                 in cli else "") + ". The CLI and the bare import ran interleaved in the same run. The CLI run "
              "includes loading the model from the registry (checksums of every file of the model, reading "
              "`whatif.npz`), the what-if, printing and recording it in the store's audit trail."]
    if wi:
        L += ["", f"In process: importing linkage and loading the lean form took {fmt(wi['import_and_load_s'])} s "
              f"before the first call; heavy libraries imported: {', '.join(wi['heavy_imported']) or 'none'}."]
    fw = res["whatif"].get("fitted")
    if fw:
        L += [f"With the fitted chain: importing and loading took {fmt(fw['import_and_load_s'])} s; heavy "
              f"libraries imported: {', '.join(fw['heavy_imported']) or 'none'}."]
    return "\n".join(L) + "\n"


def demo_section(demo: dict) -> list[str]:
    """The markdown section of the demo's first report: the runs, the command and what it measures."""
    runs = ", ".join(f"{v:.2f}" for v in demo["runs_s"])
    cpus = ", ".join(f"{v:.2f}" for v in demo["cpu_s"])
    L = ["## The demo's first report (issue 20)", "",
         f"`{demo['command']}` in the workspace `linkage demo` made (reports/demo of a folder in the work dir; "
         f"the demo took {fmt(demo['demo_s'], 1)} s), run from the shell with PYTHONDONTWRITEBYTECODE unset in its "
         f"environment and the package's modules compiled first (`python -m compileall -q {demo['package']}`). "
         f"One warm-up run ({fmt(demo['warmup_s'])} s) computed the window and the map and kept them beside the "
         "model, as a user's first `linkage report` after `linkage window` or `linkage space` reuses them; before "
         "each timed run the kept figures (`models/*/results/figures-*.npz`) were removed, so every figure is "
         "drawn. Wall clock around the process; CPU is user + system of it and the processes it waited for.", "",
         "| runs | wall s, each run | **median s** | CPU s, each run | median CPU s |",
         "|---:|---|---:|---|---:|",
         f"| {len(demo['runs_s'])} | {runs} | **{fmt(demo['median_s'])}** | {cpus} | {fmt(demo['median_cpu_s'])} |"]
    if not all(demo["figures_files_removed"]):
        L += ["", "**No kept figures file was found before some runs** (files removed, by run: "
              + ", ".join(map(str, demo["figures_files_removed"])) + "): those runs may not have drawn every figure."]
    return L + [""]


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] in STEPS:
        step, rest = STEPS[sys.argv[1]], sys.argv[2:]
        conv = {"_generate": (int, str), "_ingest": (str, str), "_assemble": (str, str),
                "_train": (str, str, str, str), "_decide": (str, str, str, int), "_whatif": (str, str, int, str)}
        step(*(f(a) for f, a in zip(conv[sys.argv[1]], rest)))
        sys.exit(0)
    sys.exit(main())
