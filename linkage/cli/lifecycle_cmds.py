"""``linkage retrain``, ``linkage watch`` and ``linkage audit``."""

from __future__ import annotations

import json
from pathlib import Path

import click

from linkage.cli.common import (handle_errors, json_option, models_dir_option, progress_bars, store_option,
                                with_store_upgraded)

_spec_option = click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path),
                            help="Specification file; adds the porosity window to the comparison.")


@click.command()
@store_option
@models_dir_option
@_spec_option
@click.option("--product", default=None,
              help="The product whose lots the challenger is fitted on; only the champion's is taken (another "
                   "would not be comparable with it).  [default: the champion's product when it was trained on one, "
                   "else every lot of the store, as the champion was trained]")
@click.option("--tolerance", default=0.10, show_default=True, type=float,
              help="Non-inferiority margin: how much worse (fraction) the challenger's RMSE on the lots the "
                   "champion never saw may be, for each attribute, before promotion is refused.")
@click.option("--force", is_flag=True, help="Promote the challenger whatever the rule says (needs --reason).")
@click.option("--reason", default=None, help="Why the promotion is forced; recorded in the audit trail.")
@json_option
@handle_errors
def retrain(store, models_dir, spec_path, product, tolerance, force, reason, as_json):
    """Fit a challenger on every lot in the store, compare it with the
    champion (the model in service) on the lots the champion never saw,
    paired lot by lot (the champion's predictions against the challenger's
    out-of-fold predictions; a one-sided non-inferiority test with the
    tolerance as margin), and promote it only when every attribute passes
    (or with --force and a reason). Both models are kept; the decision and
    its reasons go to the registry and the audit trail, with the lots trained
    on that the watch's alarm flags against the champion (once the challenger
    is promoted, the watch charts against it and no longer shows that alarm).

    Lots set aside ('linkage set-aside') are left out, and named.

    Order of use: ingest the new lots, run 'linkage watch' first (it says
    whether the process has moved away from the champion), then 'linkage
    retrain' once at least 5 new lots per attribute have arrived (fewer
    cannot pass the test), or once the cause of a watch alarm is understood
    and the change intended (a challenger trained on lots of an unexplained
    shift takes the shift as normal; set such a lot aside instead).

    \b
    Example:
      linkage ingest lab_exports/june && linkage watch --spec spec.toml
      linkage retrain --spec spec.toml
      linkage retrain --force --reason "new API supplier qualified, see CC-118"
    """
    from linkage.api import retrain as run_retrain

    spec = None
    if spec_path is not None:
        from linkage.spec import read_spec

        spec = read_spec(spec_path)
    with progress_bars("Cross-validating the challenger") as progress:
        decision = run_retrain(store, models_dir, product=product, spec=spec, force=force, reason=reason,
                               tolerance=tolerance, progress=progress)
    if as_json:
        click.echo(json.dumps(with_store_upgraded(decision.to_dict()), indent=2, allow_nan=False))
        return
    click.echo(decision.text())


@click.command()
@store_option
@models_dir_option
@click.option("--model", "model_id", default="latest", show_default=True,
              help="Model id from 'linkage models', or 'latest'.")
@_spec_option
@click.option("--product", default=None,
              help="Watch only the lots of this product.  [default: the model's product when it was trained on "
                   "one, else every lot of the store; lots of other products left out are named in a note]")
@json_option
@handle_errors
def watch(store, models_dir, model_id, spec_path, product, as_json):
    """Drift watch: prediction residuals of every lot in time order on
    Shewhart, EWMA and CUSUM charts with limits from the training lots;
    ribbon porosity samples within each lot against the porosity window;
    lot-mean porosity between lots; new lots outside the applicability
    domain; recorded what-ifs against what the lots measured (noting a
    what-if made at settings the lot did not run at, and predicting again at
    the settings it ran at).

    Lots set aside ('linkage set-aside') are left out, and named.

    Order of use: after each ingest of new lots, before 'linkage retrain'.
    An alarm says the process moved away from the model: look for an
    assignable cause in the alarmed lots (raw material, equipment, method)
    before retraining, since a model retrained on them takes the shift as
    normal; set a lot aside if it should not count; retrain when the change
    is understood and intended. The exit code is 0 with or without an alarm:
    a scheduled job reads --json, whose 'alarms' (and 'alarmed_lots') is an
    empty list when there is no alarm.
    A model trained on several products is said to be mixed (--json:
    trained_products, mixed_products).

    \b
    Example:
      linkage watch --spec spec.toml
      linkage watch --json > drift.json
    """
    from linkage.api import watch as run_watch

    spec = None
    if spec_path is not None:
        from linkage.spec import read_spec

        spec = read_spec(spec_path)
    result = run_watch(store=store, models_dir=models_dir, model=model_id, spec=spec, product=product)
    if as_json:
        click.echo(json.dumps(with_store_upgraded(result.to_dict()), indent=2, allow_nan=False))
        return
    click.echo(result.text())


@click.command()
@store_option
@click.option("--lot", default=None, help="Only entries about this lot (under a spelling that differs only in "
              "letter case and dash characters (‐ – — and the like), or spaces around), with the ingests that "
              "created or revised it.")
@json_option
@handle_errors
def audit(store, lot, as_json):
    """The audit trail: every ingest, training, promotion, window and
    prediction, with who, when, inputs, model id and outputs. Entries are
    append-only. The text is a table: each entry's outcome and the reason
    given, where there is one; --json gives every input and output.
    With --lot, also the watch, retrain and promote entries that name the
    lot as flagged by the watch's alarm.

    \b
    Example:
      linkage audit
      linkage audit --lot Q26-017 --json
    """
    from linkage.store import reading

    with reading(store) as s:  # an older store is read as it is, not upgraded (said on stderr)
        rows = s.audit(lot, with_ingests=True, require_lot=True)
    if as_json:
        click.echo(json.dumps(rows, indent=2, default=str))
        return
    from linkage.results import audit_text

    click.echo(audit_text(rows, lot))
