"""``linkage running``: guidance for a lot in progress from its at-line ribbon samples."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage.cli.common import (PROBABILITY, FiniteFloat, check_output, handle_errors, json_option,
                                models_dir_option, no_record_option, record_wanted, store_option, with_store_upgraded)
from linkage.cli.decide_cmds import _model_option, _note_unrecorded
from linkage.jsonable import jsonable


def _window(ctx, param, value):
    """LOW:HIGH as two numbers (the project's number rule), or None."""
    if value is None:
        return None
    from linkage.numbers import parse_plain_number

    low, sep, high = value.partition(":")
    parsed = [parse_plain_number(low), parse_plain_number(high)] if sep else []
    if not sep or any(isinstance(v, str) for v in parsed):
        raise click.BadParameter(f"{value!r} is not LOW:HIGH (two porosity fractions, e.g. 0.26:0.34)")
    return tuple(parsed)


@click.command()
@click.argument("samples", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--set", "assignments", multiple=True, metavar="NAME=VALUE",
              help="A setting of the running lot (wins over --process). Repeatable.")
@click.option("--process", "process_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="A process table (CSV or XLSX) holding the lot's row: its settings.")
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file: the porosity window is found under it at the lot's settings (confidence 0.9; "
                   "on lots that cannot show 0.9, give --window).")
@click.option("--window", "window", callback=_window, metavar="LOW:HIGH",
              help="The porosity window, given directly (instead of --spec).")
@click.option("--adjust", type=click.Choice(["roll_force_kn_per_cm", "roll_gap_mm"]),
              default="roll_force_kn_per_cm", show_default=True, help="The setting whose correction is suggested.")
@click.option("--baseline", default=5, show_default=True, type=click.IntRange(2, 50),
              help="The first samples whose mean is the centre of the within-lot limits.")
@click.option("--confirm-shift", "confirm_shift_sd", default=1.0, show_default=True,
              type=FiniteFloat(0, 10, min_open=True),
              help="Offset from the window's centre, in within-lot SD, that the confirming samples must detect.")
@click.option("--alpha", default=0.05, show_default=True, type=PROBABILITY,
              help="Two-sided level of the confirming test.")
@click.option("--power", default=0.9, show_default=True, type=PROBABILITY,
              help="Power of the confirming test.")
@click.option("--chart", "chart_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Write a small PNG chart of the samples.")
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Write the JSON to this file.")
@_model_option
@click.option("--seed", default=0, show_default=True, type=int,
              help="Seed of the random draws (the same seed, the same answer).")
@models_dir_option
@store_option
@no_record_option
@json_option
@handle_errors
def running(samples, assignments, process_path, spec_path, window, adjust, baseline, confirm_shift_sd, alpha, power,
            chart_path, out_path, model_id, seed, models_dir, store, no_record, as_json):
    """Guidance for a lot in progress: each at-line ribbon sample and the
    running mean against the porosity window and the within-lot limits of the
    training lots, whether the run is drifting (which rule fired at which
    sample), and the roll force (or gap) that brings the expected porosity
    back to the window's centre, with its uncertainty and the number of
    further samples to confirm it. Recorded in the store's audit trail;
    --no-record runs without recording (a trial run adds no audit entry).

    Settings outside the ribbon stage's applicability domain, or a lot
    whose starting level lies beyond twice the half-width of the model's
    prediction interval from its expectation, are said first; the
    correction is then not supported (kept in --json with
    correction.supported false). A change within its uncertainty of zero is
    said to be no change needed now.

    Lots set aside ('linkage set-aside') are left out, and named.

    SAMPLES is a CSV or XLSX with the ribbon table's columns: lot, sample,
    sampled_at, envelope_density_g_cm3, skeletal_density_g_cm3 (one lot).

    \b
    Example:
      linkage running atline.csv --process process.csv --window 0.26:0.34
      linkage running atline.csv --set roll_force_kn_per_cm=8 --set roll_gap_mm=2.5 \\
          --spec spec.toml --chart run.png --json
    """
    from linkage.api import running as advise
    from linkage.decide.whatif import parse_assignments

    for path in (chart_path, out_path):
        if path is not None:
            check_output(path)
    settings = parse_assignments(list(assignments), keep_text=True)  # reported with the model's checks
    result = advise(samples, settings=settings, process=process_path, spec=spec_path, window=window, store=store,
                    models_dir=models_dir, model=model_id, adjust=adjust, baseline=baseline,
                    confirm_shift_sd=confirm_shift_sd, alpha=alpha, power=power, seed=seed,
                    record=record_wanted(no_record))
    payload = json.dumps(jsonable(result.to_dict()), indent=2, allow_nan=False)
    if chart_path is not None:
        from linkage.decide.running import draw_chart

        chart_path.parent.mkdir(parents=True, exist_ok=True)
        draw_chart(result, chart_path)
    if out_path is not None:
        from linkage.export import write_atomic

        out_path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(out_path, payload.encode("utf-8"))
    click.echo(json.dumps(with_store_upgraded(jsonable(result.to_dict())), indent=2, allow_nan=False) if as_json
               else result.text())
    if no_record:
        _note_unrecorded(result, "running", no_record)
    for path, what in ((chart_path, "Chart"), (out_path, "JSON")):
        if path is not None:
            click.echo(f"{what} written to {path}", err=True)
