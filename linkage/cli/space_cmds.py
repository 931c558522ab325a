"""``linkage space``: the map of the probability of passing over two settings,
and the acceptable ranges."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage.cli.common import (PROBABILITY, check_output, handle_errors, json_option, models_dir_option,
                                note_set_aside_unread, store_option)
from linkage.decide import defaults


@click.command()
@click.option("--spec", "spec_path", required=True, type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file (spec.toml).")
@click.option("--model", "model_id", default="latest", show_default=True,
              help="Model id from 'linkage models', or 'latest'.")
@click.option("--x", "x", default=defaults.MAP_X, show_default=True, help="Setting on the x axis.")
@click.option("--y", "y", default=defaults.MAP_Y, show_default=True, help="Setting on the y axis.")
@click.option("--grid", "n_grid", default=defaults.MAP_GRID, show_default=True, type=click.IntRange(3, 200),
              help="Grid points per setting (over its training range).")
@click.option("--set", "assignments", multiple=True, metavar="NAME=VALUE",
              help="Hold another setting at VALUE (the rest are held coherently). Repeatable.")
@click.option("--confidence", default=0.9, show_default=True, type=PROBABILITY,
              help="Probability of meeting every specification together that the region must reach."
                   " At most n/(n + 1), n the fewest lots with a residual among the judged attributes.")
@click.option("--assurance", default=0.9, show_default=True, type=PROBABILITY,
              help="Assurance of the lower bound on the probability (lot-level bootstrap replicates).")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the Monte Carlo draws.")
@click.option("--png", "png_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Also write the contour map as a PNG (without the lots: the model file does not hold them; "
                   "the report draws them), with the caution under it.")
@models_dir_option
@store_option
@json_option
@handle_errors
def space(spec_path, model_id, x, y, n_grid, assignments, confidence, assurance, seed, png_path, models_dir, store,
          as_json):
    """Map the probability that a lot meets every specification over two
    settings (default roll force x gap), through the whole chain, with its
    lower bound, the other settings held coherently and the applicability
    domain; and the acceptable ranges: the largest box of the two settings
    where the bound reaches the confidence inside the domain, with a
    suggested set point.

    The lot store is read, never written: when the model's training lots
    include lots now set aside ('linkage set-aside'), a note says so, as
    'linkage window' says it (--json: set_aside_in_training). Without a
    store (no linkage.db here) the map is made all the same; a store named
    that does not exist or cannot be read is said on stderr, and one that
    fails its integrity check is refused (exit code 6).

    \b
    Example:
      linkage space --spec spec.toml
      linkage space --spec spec.toml --x roll_force_kn_per_cm --y compression_force_kn --json > map.json
    """
    from linkage.api import space as make_map
    from linkage.decide.space import space_text
    from linkage.decide.whatif import parse_assignments
    from linkage.jsonable import jsonable
    from linkage.spec import read_spec

    if png_path is not None:
        check_output(png_path)
    spec = read_spec(spec_path)
    settings = parse_assignments(list(assignments), keep_text=True)  # reported with the model's checks
    result = make_map(spec, store=store, models_dir=models_dir, model=model_id, x=x, y=y, n_grid=n_grid,
                      settings=settings, confidence=confidence, assurance=assurance, seed=seed)
    note_set_aside_unread(store, result.set_aside_unread)
    if png_path is not None:
        from linkage.export import write_atomic
        from linkage.report.figures import figure_png
        from linkage.report.space_section import plot_space

        png_path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(png_path, figure_png(plot_space(result, caution=True)))
    if as_json:
        click.echo(json.dumps(jsonable(result.to_dict()), indent=2, allow_nan=False))
        return
    click.echo(space_text(result))
