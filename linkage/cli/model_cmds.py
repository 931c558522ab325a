"""``linkage train`` and ``linkage models``."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage.cli.common import (PROBABILITY, FiniteFloat, handle_errors, json_option, models_dir_option,
                                progress_bars, store_option, tell_progress, with_store_upgraded)
from linkage.results import TARGET_KEYS, train_json, train_text  # noqa: F401 (TARGET_KEYS: kept importable here)
from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN

# the texts live with the results (linkage/results.py), so Python and the command line say the same
format_train = train_text


@click.command()
@store_option
@models_dir_option
@click.option("--chain", "chain_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Chain file (TOML) naming the stages; default: settings -> ribbon -> granules -> tablets.")
@click.option("--product", default=None, help="Train on the lots of this product only.  [default: every lot of "
              "the store; where they are of several products (or some have none), train says so and names them]")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the cross-validation folds.")
@click.option("--coverage", default=0.9, show_default=True, type=PROBABILITY,
              help="Nominal coverage of the prediction intervals (0-1).")
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="Specification file (spec.toml): the dissolution time point modelled is its "
                   "[dissolution_pct] time_min, and Q its min.")
@click.option("--dissolution-time", "dissolution_time_min", default=None,
              show_default=f"{DEFAULT_DISSOLUTION_TIME_MIN:g}, or the spec's time_min",
              type=FiniteFloat(0, 10_000, min_open=True),
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
@click.option("--group-by", "group_by", default=None, metavar="COLUMN",
              help="Keep the lots that share this column's value (a raw-material batch, a campaign; or 'month' of "
                   "manufactured_at) together in every cross-validation fold and in the conformal intervals; "
                   "recorded with the model.  [default: each lot on its own]")
@click.option("--materials/--no-materials", default=True, show_default=True,
              help="Try each extra numeric column of the process table (raw-material attributes) as an input "
                   "of each attribute, refitting its selected candidate and linear_select in the same grouped "
                   "folds, and keep a column only where a paired test says it helps (the comparison is printed and "
                   "recorded; the chain is refitted only when a column is kept). The default since issue 19 "
                   "(--materials is still accepted); --no-materials trains the chain as given.")
@json_option
@handle_errors
def train(store, models_dir, chain_path, product, seed, coverage, spec_path, dissolution_time_min, n_jobs, backend,
          scheduler, group_by, materials, as_json):
    """Train the chain of stage models on the lots in the store, with
    grouped cross-validation by lot, and save it in the model registry.

    Lots set aside ('linkage set-aside') are left out, and named.

    Every attribute gets these candidates, simplest first: mean (a floor),
    rd_baseline (Ryshkewitch–Duckworth, where ribbon porosity is an input),
    johanson_baseline (Johanson's rolling theory, where roll force, gap and
    diameter are inputs), log_linear, weibull_release, linear_select, pls,
    quadratic_ridge and boosting (gradient boosting); the simplest within
    one standard error of the best CV RMSE is selected. Intervals are CV+
    conformal with lots as the unit.

    \b
    The model records the dissolution time point it was trained at (the
    spec's time_min with --spec); window, predict, report, watch and retrain
    refuse a spec at another time point. With vessel data, each vessel's
    profile is interpolated linearly between measured time points; a time
    point outside the measured range is refused.

    \b
    Example:
      linkage train
      linkage train --spec spec.toml
      linkage train --chain chain.toml --product ABC-10mg --seed 1 --json
      linkage train --backend dask --scheduler tcp://10.0.0.5:8786
      linkage train --group-by api_batch

    \b
    Lots made from one raw-material batch or in one campaign are not
    independent: --group-by keeps them together, so the CV errors and the
    intervals are those of a new batch. Where the lots carry
    manufactured_at, a forward-in-time check (fit on the earliest two
    thirds, score the rest) is reported beside the CV.
    """
    from linkage.api import train as run_train

    with progress_bars("Cross-validating") as progress:
        trained = run_train(store, models_dir, chain=chain_path, product=product, seed=seed, coverage=coverage,
                            spec=spec_path, dissolution_time_min=dissolution_time_min, n_jobs=n_jobs, backend=backend,
                            scheduler=scheduler, progress=progress, group_by=group_by, materials=materials)
    for note in trained.notes:  # a model of several products, trained without --product: said, not refused
        tell_progress(f"Note: {note}")
    if as_json:
        click.echo(json.dumps(with_store_upgraded(trained.to_dict()), indent=2, allow_nan=False, ensure_ascii=False))
    else:
        click.echo(trained.text())


def format_models(rows: list[dict]) -> str:
    from linkage.exceptions import shown_time
    from linkage.models.registry import ROLES
    from linkage.products import mixed_text

    if not rows:
        return "No models yet; train one with 'linkage train'."
    lines = [f"  {'model id':<30}{'created':<25}{'lots':>5}  {'status':<11}{'role':<19}selected models"]
    for r in rows:
        created = "" if r.get("created_at") is None else shown_time(r["created_at"])  # --json: as recorded
        lots = r.get("n_lots")
        sel = ", ".join(f"{t}: {m}" for t, m in (r.get("targets") or {}).items())
        mark = "*" if r.get("latest") else ("-" if not r.get("in_service", True) else " ")
        lines.append(f"{mark} {r['model_id']:<30}{created:<25}{'' if lots is None else lots:>5}  "
                     f"{r['status']:<11}{r.get('role') or '':<19}{sel}")
        if r.get("mixed_products"):  # one model of several products (linkage.products)
            lines.append(f"    {mixed_text(r['products'])}")
        if r.get("detail") and r["status"] != "ok":
            lines.append(f"    {r['detail']}")
        src = r.get("source") or {}
        if src.get("kind") == "imported":
            lines.append(f"    imported from {src.get('from')}: {src.get('note')}")
    lines.append("* = latest, the model commands use unless given --model ID; - = kept but not in service (a "
                 "challenger that was not promoted); no mark = in service but not latest, or not in the index")
    if any(r.get("role") == "champion" and not r.get("latest") for r in rows):
        lines.append("No model is latest: the champion fails its checks (above), and no older model is used in its "
                     "place; name one with --model ID, or run 'linkage verify'.")
    shown = dict.fromkeys(r.get("role") for r in rows if r.get("role"))
    lines += [f"role {role}: {ROLES[role]}" for role in shown]
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
    (ok, changed, missing, foreign, incomplete) and role (champion: what
    'latest' names; superseded; not promoted ...); or import a model folder.
    When the champion fails its checks, the commands that use 'latest'
    (predict, window, report ...) are refused (exit code 4), and no older
    model is used in its place: give them --model ID. This listing still
    shows every model, with the champion's status, and the lots of a model
    that fails its checks where its metadata still matches the index. A
    model trained on several products is marked mixed under its line
    (--json: products, mixed_products).

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
