"""``linkage report``: one self-contained HTML report of a model and its lots."""

from __future__ import annotations

from pathlib import Path

import click

from linkage.cli.common import PROBABILITY, check_output, handle_errors, models_dir_option, store_option


@click.command()
@click.option("--model", "model_id", default="latest", show_default=True,
              help="Model id from 'linkage models', or 'latest'.")
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file (spec.toml): draws the limits and adds the porosity window.")
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Where to write the report.  [default: reports/report-<model id>.html]")
@click.option("--confidence", default=0.9, show_default=True, type=float,
              help="Probability of meeting every specification together that the window must reach."
                   " At most n/(n + 1), n the fewest lots with a residual among the judged attributes.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the Monte Carlo draws.")
@click.option("--assurance", default=0.9, show_default=True, type=PROBABILITY,
              help="Assurance of the lower bound on the probability of passing that the window rests on.")
@click.option("--plan", "plan_path", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="A plan.json from 'linkage plan --out': adds a section with the planned lots.")
@store_option
@models_dir_option
@handle_errors
def report(model_id, spec_path, out_path, confidence, seed, assurance, plan_path, store, models_dir):
    """Write one self-contained HTML report: the lots, the ribbon stage, the
    Ryshkewitch-Duckworth baseline, every attribute's cross-validated
    performance, explanations, the porosity window (with --spec), the
    applicability domain and a model card. Figures are embedded; the file
    opens offline in any browser. Prints the path written.

    Lots set aside ('linkage set-aside') are left out, and named.

    The lots come from the store (the model's product when it was trained
    on one); the model from the registry.

    \b
    Example:
      linkage report --spec spec.toml
      linkage report --model latest --spec spec.toml --out reports/may.html
    """
    from linkage.api import report as write_report

    if out_path is not None:
        check_output(out_path)
    spec = None
    if spec_path is not None:
        from linkage.spec import read_spec

        spec = read_spec(spec_path)
    path = write_report(out_path, store=store, models_dir=models_dir, model=model_id, spec=spec,
                        confidence=confidence, seed=seed, assurance=assurance, plan=plan_path)
    click.echo(str(path))
