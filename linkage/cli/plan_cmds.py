"""``linkage plan``: the next lots to make."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage.cli.common import (PROBABILITY, check_output, handle_errors, json_option, models_dir_option, store_option,
                                with_store_upgraded)
from linkage.decide.defaults import PLAN_CRITERIA
from linkage.jsonable import jsonable


@click.command()
@click.option("--lots", "n_lots", required=True, type=click.IntRange(1, 1000),
              help="How many lots to plan (the lots you can afford).")
@click.option("--range", "range_texts", multiple=True, metavar="NAME=LOW:HIGH",
              help="Range of a setting, e.g. roll_force_kn_per_cm=3:14. Repeatable. With --new, the settings the "
                   "design spreads; without, the ribbon settings a planned lot may take (default: their training "
                   "range).")
@click.option("--new", is_flag=True, help="A new product with no lots: a space-filling starting design over the "
              "--range settings (maximin Latin hypercube, run order randomised).")
@click.option("--design", type=click.Choice(["maximin", "factorial"]), default="maximin", show_default=True,
              help="With --new: a maximin Latin hypercube, or a two-level full or fractional factorial at the ends of "
                   "the ranges with the other lots at the centre (2 to 7 settings).")
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file (spec.toml); needed without --new.")
@click.option("--model", "model_id", default="latest", show_default=True,
              help="Model id from 'linkage models', or 'latest'.")
@click.option("--set", "assignments", multiple=True, metavar="NAME=VALUE",
              help="Hold a setting at VALUE in every planned lot (and in the window planned for). Repeatable.")
@click.option("--confidence", default=0.9, show_default=True, type=PROBABILITY,
              help="Confidence of the window whose edges the plan narrows."
                   " At most n/(n + 1), n the fewest lots with a residual among the judged attributes.")
@click.option("--assurance", default=0.9, show_default=True, type=PROBABILITY,
              help="Assurance of the lower bound the window rests on.")
@click.option("--edges", type=click.Choice(["all", "porosity"]), default="all", show_default=True,
              help="Which window edges the next lots narrow: the porosity edges and the roll force edges (all), or "
                   "the porosity edges only. Used by --criterion local (and where cover or thompson fall back to "
                   "it); cover, target and thompson plan for the porosity edges.")
@click.option("--criterion", type=click.Choice(PLAN_CRITERIA), default=PLAN_CRITERIA[0],
              show_default=True,
              help="How the next lots are chosen: spread evenly in predicted ribbon porosity over the point "
                   "estimate's window ± 0.03 (cover; the porosity edges only); variance of local fits at the edges "
                   "(local, the default of earlier versions); where the bootstrap replicates of P(all "
                   "pass) straddle the confidence near the porosity edges (target); or at the quantiles of the "
                   "replicates' porosity edges (thompson; without replicates, the local criterion). Measured on "
                   "150 seeded synthetic campaigns, cover narrowed the window edges' error 1.27 times as much as "
                   "lots drawn at random within the ranges (95% interval 0.97-1.69); the others did no better "
                   "than random: reports/plan-benefit.md.")
@click.option("--prefix", default="PLAN", show_default=True, help="Planned lot ids are PREFIX-001, PREFIX-002, ...")
@click.option("--product", default=None, help="Product name written in the process table (without --new, by "
              "default the one product the model was trained on) and, without --new, the product whose lots the "
              "plan starts from.")
@click.option("--out", "out", type=click.Path(file_okay=False, path_type=Path),
              help="Folder to write process.csv (and tablets.csv when the plan sets or holds the compression "
                   "force) in the template's columns, with blank results, and plan.json. Ingest them once the "
                   "results are filled in: a row of blank results is stored as a record without results.")
@click.option("--seed", default=0, show_default=True, type=int,
              help="Seed of the random draws (the same seed, the same answer).")
@models_dir_option
@store_option
@json_option
@handle_errors
def plan(n_lots, range_texts, new, design, spec_path, model_id, assignments, confidence, assurance, edges,
         criterion, prefix, product, out, seed, models_dir, store, as_json):
    """Plan the next lots: the settings that narrow the ribbon porosity
    window's edges fastest, or a starting design for a new product.

    Lots set aside ('linkage set-aside') are left out, and named.

    \b
    Example:
      linkage plan --new --lots 12 --range roll_force_kn_per_cm=3:14 \\
          --range roll_gap_mm=1.5:3.5 --range roll_speed_rpm=2:8 --out plan/
      linkage plan --lots 8 --spec spec.toml --set compression_force_kn=14 --out plan/
    """
    from linkage.api import plan as make_plan
    from linkage.decide.plan import parse_ranges
    from linkage.decide.whatif import parse_assignments
    from linkage.exceptions import UsageError

    if out is not None:
        check_output(out, folder=True)
    ranges = parse_ranges(range_texts)
    settings = parse_assignments(list(assignments), keep_text=True)  # reported with the model's checks
    if design != "maximin" and not new:
        raise UsageError("--design chooses a new product's starting design; it goes with --new")
    if new and spec_path is not None:
        raise UsageError("--new plans with no lots and no model; --spec is for planning a campaign's next lots")
    spec = None
    if spec_path is not None:
        from linkage.spec import read_spec

        spec = read_spec(spec_path)
    result = make_plan(n_lots, ranges=ranges, spec=spec, new=new, store=store, models_dir=models_dir,
                       model=model_id, settings=settings, confidence=confidence, assurance=assurance, seed=seed,
                       prefix=prefix, product=product, out=out, edges=edges,
                       design=design, criterion=criterion)
    if as_json:
        click.echo(json.dumps(with_store_upgraded(jsonable(result.to_dict())), indent=2, allow_nan=False))
        return
    click.echo(result.text())
