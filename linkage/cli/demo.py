"""``linkage demo``: the whole job on the demo scenario."""

from __future__ import annotations

from pathlib import Path

import click

from linkage import CAUTION
from linkage.cli.common import check_output, handle_errors, progress_bars, tell_progress


@click.command()
@click.option("--out", "out", type=click.Path(file_okay=False, path_type=Path), default=Path("reports/demo"),
              show_default=True, help="Folder for the demo's store, models and outputs.")
@handle_errors
def demo(out):
    """Run the full job on the demo scenario: ingest, assemble, train,
    porosity window, a what-if sheet and the report. The demo keeps its own
    lot store and model registry inside OUT, with a copy of its spec file
    (OUT/spec.toml, the one it used); it prints where each went, so that
    later commands can be pointed at them (see 'linkage --help').

    \b
    Example:
      linkage demo
      linkage demo --out /tmp/linkage-demo
    """
    from linkage.demo import run_demo

    check_output(out, folder=True)
    with progress_bars() as progress:
        result = run_demo(out, step=lambda m: tell_progress(f"- {m}"), progress=progress)
    click.echo("")
    click.echo(f"lot store       {result.store}")
    click.echo(f"assembled table {result.assembled}")
    click.echo(f"model           {result.model_id} in {result.models_dir}")
    click.echo(f"window          {result.window_json}")
    click.echo(f"what-if sheet   {result.whatif_html}")
    click.echo(f"report          {result.report}")
    if result.window_line:  # the answer itself, not only where it went (a user test); the report says what it rests on
        click.echo(f"window found    {result.window_line} (window.json and the report say what it rests on)")
    if result.spec is not None:
        click.echo(f"spec file       {result.spec}")
    # a later command in the same folder finds neither the demo's store nor its models by default (a user test)
    click.echo("later commands  give them the demo's spec, store and models, for example:")
    click.echo(f"  linkage window {later_options(result)}")
    total = sum(result.seconds.values())
    click.echo("seconds         " + ", ".join(f"{k} {v:.1f}" for k, v in result.seconds.items())
               + f"; total {total:.1f}")
    click.echo(CAUTION)


def later_options(result) -> str:
    """The options that point a later command at the demo's own spec, lot store and model registry (quoted
    for a shell where a path needs it)."""
    from shlex import quote

    spec = f"--spec {quote(str(result.spec))} " if result.spec is not None else ""
    return f"{spec}--store {quote(str(result.store))} --models-dir {quote(str(result.models_dir))}"
