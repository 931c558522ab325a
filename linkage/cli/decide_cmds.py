"""``linkage window`` and ``linkage predict``."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage.cli.common import (PROBABILITY, check_output, handle_errors, json_option, models_dir_option,
                                no_record_option, note_set_aside_unread, record_wanted, store_option,
                                tell_progress, with_store_upgraded)
from linkage.decide import defaults
from linkage.jsonable import jsonable
from linkage.results import whatif_text, window_text

# the texts live with the results (linkage/results.py), so Python and the command line say the same
format_window = window_text
format_whatif = whatif_text

_model_option = click.option("--model", "model_id", default="latest", show_default=True,
                             help="Model id from 'linkage models', or 'latest'.")
_set_option = click.option("--set", "assignments", multiple=True, metavar="NAME=VALUE",
                           help="Hold a setting (or a measured value) at VALUE. Repeatable.")
_assurance_option = click.option(
    "--assurance", default=0.9, show_default=True, type=PROBABILITY,
    help="Assurance of the lower bound on each probability of passing (from the model's lot-level bootstrap "
         "replicates): a probability is promised 'at least' its bound at this assurance.")


@click.command()
@click.option("--spec", "spec_path", required=True, type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file (spec.toml).")
@_model_option
@_set_option
@click.option("--confidence", default=0.9, show_default=True, type=PROBABILITY,
              help="Probability of meeting every specification together that the window must reach."
                   " At most n/(n + 1), n the fewest lots with a residual among the judged attributes.")
@click.option("--draws", "n_draws", default=defaults.WINDOW_DRAWS, show_default=True, type=click.IntRange(200, 200_000),
              help="Monte Carlo draws per porosity.")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the Monte Carlo draws.")
@_assurance_option
@models_dir_option
@store_option
@no_record_option
@json_option
@handle_errors
def window(spec_path, model_id, assignments, confidence, n_draws, seed, assurance, models_dir, store, no_record,
           as_json):
    """Find the ribbon porosity window where every specification passes
    with the stated confidence, and the roll force that lands in it.

    Settings not given with --set are held coherently with the given ones
    (their conditional mean over the training lots); the output says which,
    and whether the held point is inside the applicability domain.

    The window is recorded in the lot store's audit trail. A store named
    by --store or $LINKAGE_STORE that does not exist is refused (exit 2);
    --no-record runs without recording.

    \b
    Example:
      linkage window --spec spec.toml --set roll_gap_mm=2.5 --confidence 0.9
      linkage window --spec spec.toml --json > window.json
      linkage window --spec spec.toml --no-record
    """
    from linkage.api import window as find
    from linkage.decide.whatif import parse_assignments
    from linkage.spec import read_spec

    spec = read_spec(spec_path)
    settings = parse_assignments(list(assignments), keep_text=True)  # reported with the model's checks
    result = find(spec, store=store, models_dir=models_dir, model=model_id, settings=settings,
                  confidence=confidence, n_draws=n_draws, seed=seed, assurance=assurance,
                  record=record_wanted(no_record))
    _note_unrecorded(result, "window", no_record)
    note_set_aside_unread(store, result.set_aside_unread)
    if as_json:
        click.echo(json.dumps(with_store_upgraded(jsonable(result.to_dict())), indent=2, allow_nan=False))
        return
    click.echo(result.text())


@click.command()
@_model_option
@_set_option
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Specification file; adds the probability of passing each limit.")
@click.option("--level", type=PROBABILITY, default=None,
              help="Interval level (default: the model's nominal coverage).")
@click.option("--from-csv", "from_csv", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="Predict every row of a CSV whose columns are names (any case), with optional 'lot' and "
                   "'product' columns; template columns that are not names of the model are ignored when empty in "
                   "every row (plan's process.csv), refused otherwise.")
@click.option("--html", "html_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Write a one-page what-if sheet (one row only).")
@click.option("--page", "page_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Write the what-if page: one self-contained HTML file with a control per setting that "
                   "recomputes this what-if in the browser, offline (--set values are its start; without "
                   "--set only the page is written).")
@click.option("--page-window", "page_window", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="A porosity window ('linkage window --json' output) for the page to draw.")
@click.option("--lot", default=None, help="The lot this what-if is for; its results, when they arrive, are "
              "compared with the prediction ('linkage watch'). A stored lot is found under a spelling that "
              "differs only in letter case and dash characters (‐ – — and the like) and the what-if recorded "
              "under the store's spelling; a lot not made yet is "
              "recorded as typed (spaces collapsed).")
@click.option("--product", default=None, help="The product this what-if is for (stated on the sheet and in the "
              "JSON); refused when the model was not trained on it.  [default: the model's product when it was "
              "trained on one]")
@click.option("--seed", default=0, show_default=True, type=int, help="Seed of the Monte Carlo draws.")
@_assurance_option
@models_dir_option
@store_option
@no_record_option
@json_option
@handle_errors
def predict(model_id, assignments, spec_path, level, from_csv, html_path, page_path, page_window, lot, product, seed,
            assurance, models_dir, store, no_record, as_json):
    """What-if: predict every downstream attribute from settings and/or
    measured values, with intervals, the chance of passing each specification
    and the applicability-domain verdict.

    \b
    Example:
      linkage predict --set roll_force_kn_per_cm=9 --set roll_gap_mm=2.5 --spec spec.toml
      linkage predict --set ribbon_porosity=0.31 --spec spec.toml --html whatif.html
      linkage predict --from-csv planned.csv --json
      linkage predict --spec spec.toml --page whatif-page.html --page-window window.json
      linkage predict --set ribbon_porosity=0.29 --lot Q26-049 --product "QZ-417 200 mg" --spec spec.toml
      linkage predict --set ribbon_porosity=0.3 --spec spec.toml --models-dir received/ --no-record

    Every what-if is recorded in the lot store with the model id, the
    inputs and the outputs. A store named by --store or $LINKAGE_STORE
    that does not exist is refused (exit 2, nothing written); without
    either, a missing linkage.db is noted on stderr and nothing recorded.
    --no-record writes nothing in the store (a model received without its
    lots); the store, when it exists, is still read for --lot's spelling.
    """
    # over 80 lines for a reason: a quarter is the --help text above, the rest one linear recipe in the order the
    # command acts (outputs checked, store refused, spec, page, what-ifs, files, text); split, it reads worse
    from linkage.api import recording, whatif, whatif_rows
    from linkage.decide.whatif import parse_assignments
    from linkage.exceptions import UsageError

    if html_path is not None:
        check_output(html_path)
    if page_path is not None:
        check_output(page_path)
    record = record_wanted(no_record)
    if assignments or from_csv is not None:  # a what-if to record: a mistyped store refused before any file
        recording(store, record, "predict")
    spec = None
    if spec_path is not None:
        from linkage.spec import read_spec

        spec = read_spec(spec_path)
    # a value that is not a number is reported by the what-if with the names and ranges it checks (all at once)
    values = parse_assignments(list(assignments), keep_text=page_path is None)
    if page_path is not None:
        from linkage.report.page import write_page

        write_page(page_path, values, spec=spec, window_path=page_window, models_dir=models_dir, model=model_id,
                   level=level, seed=seed, assurance=assurance)
        if not values and from_csv is None:  # the page alone
            click.echo(f"What-if page written to {page_path}", err=True)
            return
    if from_csv is not None:
        if values:
            raise UsageError("give either --set or --from-csv, not both")
        if html_path is not None:
            raise UsageError("--html writes one sheet for one what-if; use it without --from-csv")
        from linkage.decide.whatif import read_rows

        rows = read_rows(from_csv)
        results = whatif_rows(rows, lots=lot, spec=spec, store=store, models_dir=models_dir, model=model_id,
                              level=level, seed=seed, product=product, assurance=assurance, record=record)
        if rows.ignored:
            click.echo(f"Note: {from_csv.name}: {', '.join(rows.ignored)} ignored: template column(s) that are no "
                       "input or attribute of the model, empty in every row", err=True)
    else:
        if not values:
            raise UsageError("nothing to predict from: give --set NAME=VALUE (or --from-csv)")
        results = [whatif(values, spec=spec, store=store, models_dir=models_dir, model=model_id, level=level,
                          seed=seed, lot=lot, product=product, assurance=assurance, record=record)]
    if results:  # one note for every row of a --from-csv file: they share the store
        _note_unrecorded(next((r for r in results if not r.recorded), results[0]), "predict", no_record)
    if html_path is not None:
        from linkage.export import write_atomic
        from linkage.report.sheet import whatif_html

        html_path.parent.mkdir(parents=True, exist_ok=True)
        sheet = whatif_html(results[0].result, results[0].set_aside_note)
        write_atomic(html_path, sheet.encode("utf-8"))  # whole or not at all
    if as_json:
        payload = results[0].to_dict() if from_csv is None else [r.to_dict() for r in results]
        # strict JSON: an unbounded interval end (too few lots) is null; the model's notes say why
        click.echo(json.dumps(with_store_upgraded(jsonable(payload)), indent=2, allow_nan=False))
    else:
        for r in results:
            click.echo(r.text())  # begins "For lot ..., product ...:" when they are known
    if html_path is not None:
        click.echo(f"What-if sheet written to {html_path}", err=True)
    if page_path is not None:
        click.echo(f"What-if page written to {page_path}", err=True)


def _note_unrecorded(result, action: str, no_record: bool = False) -> None:
    """Say on stderr that a window or what-if was not recorded: --no-record, or no store at the default path."""
    if no_record:
        tell_progress(f"Note: --no-record: this {action} was not recorded in an audit trail.")
    elif not result.recorded:
        tell_progress(f"Note: no lot store at {result.store}; this {action} was not recorded in an audit trail.")
