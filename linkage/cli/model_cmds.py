"""``linkage train`` and ``linkage models``."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage import CAUTION
from linkage.cli.common import (PROBABILITY, FiniteFloat, handle_errors, json_option, models_dir_option,
                                progress_bars, store_option)
from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN

#: keys of one attribute in ``train --json`` (the issue's list, plus the
#: reasons and methods a reader needs to judge them)
TARGET_KEYS = ("stage", "inputs", "n_lots", "cv", "candidates", "unavailable", "noise_floor", "noise_floor_method",
               "selected", "selection_rule", "selection", "nominal_coverage", "coverage", "coverage_method",
               "infinite_intervals", "interval_method", "vip", "rd_params", "notes")


def train_json(fitted) -> dict:
    """What ``train --json`` prints: the model id and one object per attribute."""
    meta = fitted.metadata()
    return {
        "model_id": fitted.model_id,
        "created_at": meta["created_at"],
        "n_lots": meta["training"]["n_lots"],
        "table_sha256": meta["training"]["table_sha256"],
        "seed": meta["seed"],
        "targets": {name: {k: t[k] for k in TARGET_KEYS} for name, t in meta["targets"].items()},
        "skipped": meta["skipped"],
        "caution": CAUTION,
    }


def _num(v, width=9, fmt=".4g", sign="") -> str:
    return f"{'—':>{width}}" if v is None else f"{v:>{sign}{width}{fmt}}"


def format_train(fitted) -> str:
    """Compact text: per attribute, each candidate against the mean, the
    Ryshkewitch–Duckworth baseline and the noise floor."""
    meta = fitted.metadata()
    tr = meta["training"]
    lines = [f"Model {fitted.model_id}: {tr['n_lots']} lots, seed {meta['seed']}, "
             f"table SHA-256 {tr['table_sha256'][:12]}…"]
    for name, t in meta["targets"].items():
        cv = t["cv"]
        lines += ["", f"{name}  [{t['stage']} stage; {t['n_lots']} lots; {cv['scheme']}, seed {cv['seed']}]",
                  f"    {'candidate':<16}{'RMSE':>9}{'MAE':>9}{'Q²':>7}{'bias':>10}{'/mean':>7}{'/RD':>7}"
                  f"{'/noise':>8}"]
        cands = t["candidates"]
        mean_rmse = cands["mean"]["rmse"] if "mean" in cands else None
        rd_rmse = cands["rd_baseline"]["rmse"] if "rd_baseline" in cands else None
        for cname, m in cands.items():
            mark = "*" if cname == t["selected"] else " "
            bias = 0.0 if abs(m["bias"]) <= 1e-12 * max(1.0, m["rmse"]) else m["bias"]  # round-off shown as 0
            rel_mean = m["rmse"] / mean_rmse if mean_rmse else None
            rel_rd = m["rmse"] / rd_rmse if rd_rmse else None
            lines.append(
                f"  {mark} {cname:<16}{_num(m['rmse'])}{_num(m['mae'])}{_num(m['q2'], 7, '.3f')}"
                f"{_num(bias, 10, '.3g', '+')}{_num(rel_mean, 7, '.2f')}{_num(rel_rd, 7, '.2f')}"
                f"{_num(m['rmse_over_noise'], 8, '.2f')}")
        for cname, why in t["unavailable"].items():
            lines.append(f"    {cname:<16}not used: {why}")
        floor = t["noise_floor"]
        lines.append("    noise floor: " + (f"{floor:.4g} ({t['noise_floor_method']})" if floor is not None
                                            else t["noise_floor_method"]))
        sel = t["selection"]
        why = "lowest CV RMSE" if sel["best"] == t["selected"] else (
            f"simplest within one SE of the lowest ({sel['best']}, RMSE {sel['best_rmse']:.4g})")
        lines.append(f"    selected: {t['selected']} ({why})")
        lines.append(f"    {t['nominal_coverage']:.0%} CV+ intervals: empirical coverage {t['coverage']:.1%} "
                     "(nested outer CV, lots held out)")
        for note in t["notes"]:
            lines.append(f"    note: {note}")
    if meta["skipped"]:
        lines += ["", "Not trained:"]
        lines += [f"  {name}: {why}" for name, why in meta["skipped"].items()]
    lines += ["", CAUTION]
    return "\n".join(lines)


@click.command()
@store_option
@models_dir_option
@click.option("--chain", "chain_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Chain file (TOML) naming the stages; default: settings -> ribbon -> granules -> tablets.")
@click.option("--product", default=None, help="Train on the lots of this product only.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the cross-validation folds.")
@click.option("--coverage", default=0.9, show_default=True, type=PROBABILITY,
              help="Nominal coverage of the prediction intervals (0-1).")
@click.option("--dissolution-time", "dissolution_time_min", default=DEFAULT_DISSOLUTION_TIME_MIN,
              show_default=True, type=FiniteFloat(0, 10_000, min_open=True),
              help="Dissolution time point modelled [min].")
@click.option("--jobs", "n_jobs", default=None, type=int,
              help="Parallel fold jobs (starting workers costs seconds; pays off above ~100 lots). "
                   "[default: 1, or every worker of the cluster with --backend dask]")
@click.option("--backend", type=click.Choice(["loky", "threading", "dask"]), default=None,
              help="Where the fold jobs run (through joblib): worker processes (loky, the default with --jobs), "
                   "threads, or a Dask cluster (install the 'distributed' extra). The chain is the same.")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Dask scheduler address (tcp://host:8786) for --backend dask.  [default: the Dask "
                   "configuration's scheduler-address ($DASK_SCHEDULER_ADDRESS), else a local cluster]")
@json_option
@handle_errors
def train(store, models_dir, chain_path, product, seed, coverage, dissolution_time_min, n_jobs, backend, scheduler,
          as_json):
    """Train the chain of stage models on the lots in the store, with
    grouped cross-validation by lot, and save it in the model registry.

    Every attribute gets a mean floor, a Ryshkewitch–Duckworth baseline
    (where ribbon porosity is an input), PLS, a quadratic ridge and gradient
    boosting; the simplest within one standard error of the best CV RMSE is
    selected. Intervals are CV+ conformal with lots as the unit.

    \b
    Example:
      linkage train
      linkage train --chain chain.toml --product ABC-10mg --seed 1 --json
      linkage train --backend dask --scheduler tcp://10.0.0.5:8786
    """
    import contextlib

    from linkage.assemble import assemble
    from linkage.exceptions import InsufficientDataError, UsageError
    from linkage.models.chain import ChainSpec
    from linkage.models.registry import save
    from linkage.models.train import train_chain
    from linkage.store import LotStore

    chain = ChainSpec.from_toml(chain_path) if chain_path is not None else None
    with LotStore(store, create=False) as lot_store:
        tables = lot_store.current_tables(product)
    if not tables or "process" not in tables or tables["process"].empty:
        which = f" of product {product!r}" if product else ""
        raise InsufficientDataError(f"the store {store} holds no lots{which} to train on")
    table = assemble(tables, dissolution_time_min=dissolution_time_min)

    if scheduler is not None and backend != "dask":
        raise UsageError("--scheduler goes with --backend dask")
    cluster = contextlib.nullcontext()
    if backend == "dask":
        try:
            from dask.distributed import Client
        except ImportError:
            raise UsageError("--backend dask needs Dask's distributed scheduler: install the 'distributed' extra "
                             "(pip install 'linkage[distributed]')") from None
        try:
            cluster = Client(scheduler)
        except (OSError, TimeoutError, ValueError) as exc:
            raise UsageError(f"cannot reach the Dask scheduler {scheduler or '(from the Dask configuration)'}: "
                             f"{exc}") from None
    if n_jobs is None:
        n_jobs = -1 if backend == "dask" else 1
    with cluster, progress_bars("Cross-validating") as progress:
        fitted = train_chain(table, chain, seed=seed, nominal_coverage=coverage, progress=progress,
                             n_jobs=n_jobs, backend=backend)
    model_id = save(fitted, models_dir)
    with LotStore(store, create=False) as lot_store:
        lot_store.log("train", model_id=model_id,
                      inputs={"models_dir": str(models_dir), "product": product, "seed": seed,
                              "coverage": coverage, "chain": fitted.chain.to_toml(),
                              "lots": list(fitted.training["lots"]),
                              "table_sha256": fitted.training["table_sha256"]},
                      outputs={t: {"selected": v.selected, "coverage": v.coverage}
                               for t, v in fitted.targets.items()})
    if as_json:
        click.echo(json.dumps(train_json(fitted), indent=2, allow_nan=False, ensure_ascii=False))
    else:
        click.echo(format_train(fitted))


def format_models(rows: list[dict]) -> str:
    if not rows:
        return "No models yet; train one with 'linkage train'."
    lines = [f"  {'model id':<30}{'created (UTC)':<21}{'lots':>5}  {'status':<11}selected models"]
    for r in rows:
        created = (r.get("created_at") or "")[:19].replace("T", " ")
        lots = r.get("n_lots")
        sel = ", ".join(f"{t}: {m}" for t, m in (r.get("targets") or {}).items())
        mark = "*" if r.get("latest") else ("-" if not r.get("in_service", True) else " ")
        lines.append(f"{mark} {r['model_id']:<30}{created:<21}{'' if lots is None else lots:>5}  "
                     f"{r['status']:<11}{sel}")
        if r.get("detail") and r["status"] != "ok":
            lines.append(f"    {r['detail']}")
        src = r.get("source") or {}
        if src.get("kind") == "imported":
            lines.append(f"    imported from {src.get('from')}: {src.get('note')}")
    lines.append("* = latest; - = kept but not in service (a challenger that was not promoted)")
    return "\n".join(lines)


@click.command()
@models_dir_option
@click.option("--import", "import_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Import a model folder from elsewhere into the registry (needs --note).")
@click.option("--note", default=None, help="Where the imported model comes from; recorded in the registry.")
@json_option
@handle_errors
def models(models_dir, import_dir, note, as_json):
    """List the models in the registry, newest first, with their status
    (ok, changed, missing, foreign, incomplete); or import a model folder.

    A model folder copied in by hand is 'foreign' and is never loaded until
    it is imported with --import and a --note saying where it came from.

    \b
    Example:
      linkage models
      linkage models --json
      linkage models --import /mnt/share/m-20260301T101500Z-1a2b3c4d --note "trained on the pilot-plant PC"
    """
    from linkage.exceptions import UsageError
    from linkage.models.registry import import_model, list_models

    if import_dir is not None:
        if not note:
            raise UsageError("--import needs --note saying where the model comes from")
        model_id = import_model(import_dir, models_dir, note)
        if as_json:
            click.echo(json.dumps({"imported": model_id}, indent=2))
        else:
            click.echo(f"Imported {model_id} into {models_dir}.")
        return
    rows = list_models(models_dir)
    if as_json:
        click.echo(json.dumps({"models_dir": str(models_dir), "models": rows}, indent=2, allow_nan=False,
                              ensure_ascii=False))
    else:
        click.echo(format_models(rows))
