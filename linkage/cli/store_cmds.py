"""``linkage ingest``, ``lots``, ``history`` and ``assemble``: the lot store commands."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import click

from linkage.cli.common import (FiniteFloat, check_output, handle_errors, json_option, models_dir_option,
                                store_option, tell_progress, with_store_upgraded)
from linkage.exceptions import LinkageError, UsageError
from linkage.results import _rows, units_shown
from linkage.schema import DEFAULT_FINES_CUTOFF_UM, TABLES


@click.command()
@click.argument("folder", type=click.Path(exists=True, file_okay=False, path_type=Path))
@store_option
@click.option("--reason", default=None, metavar="TEXT",
              help="Why stored lots are revised (a deviation or correction number); required when any stored "
                   "value changes or is removed (not when a table, rows or blank cells are only added), recorded "
                   "with the revision and in the audit trail.")
@click.option("--accept-unusual", is_flag=True,
              help="Take values far from the product's recent lots deliberately (refused otherwise as a likely unit "
                   "mistake), and sieve apertures below the smallest test sieve's (20 µm; a stack in mm); needs "
                   "--reason; each value is recorded in the audit trail.")
@click.option("--preview", is_flag=True,
              help="Write nothing (not the store, its anchor file or its audit trail; a store that does not exist "
                   "is not created): run every check and comparison of the ingest and say what it would do, with "
                   "each revised lot's changes (old -> new). Same output, refusals and exit code as the ingest, "
                   "with --reason and --accept-unusual as given: 2 (bad input, --reason or --accept-unusual "
                   "needed), 5 (a store or folder this account cannot write), 6 (a store without its anchor "
                   "file). A store of schema 1 (written by an earlier linkage, before seals) is decided on an "
                   "upgraded temporary copy; the ingest itself upgrades the store only to commit. Not foreseen: a "
                   "store another process holds (exit code 3) or a disk that fills up during the ingest.")
@json_option
@handle_errors
def ingest(folder, store, reason, accept_unusual, preview, as_json):
    """Check every file in FOLDER and add its lots to the store.

    FOLDER holds one file a table (process.csv, ribbon.csv, granules.csv,
    granules_laser.csv, tablets.csv, tablet_weights.csv, dissolution.csv, or
    .xlsx), and optionally spec.toml and columns.toml (the lab's own headers
    and units). A stored lot the folder adds to or changes gets a new
    revision; the old one is kept. Results may arrive in stages: a revision
    that only adds (a table the lot did not have, rows with new keys, blank
    cells filled) needs no reason; one that changes or removes a stored
    value, or adds a sieve row to a stored sieve analysis, carries --reason
    (refused without one). A table in FOLDER replaces the lot's stored
    table, so send its stored rows with new ones. The text and --json say
    which lots were added to and which changed. A
    value far from the product's recent lots (a likely unit mistake), or a
    sieve aperture below 20 µm (a stack in mm; also on a first ingest), is
    refused, with the mistake it looks like; --accept-unusual takes it.
    Sending the same files again changes nothing.

    On any problem every problem is listed (file, row, column, value, rule),
    nothing is written and the exit code is 2.

    --preview says what the ingest would do and writes nothing: the same
    checks, refusals and exit code (0: it would go through; 2: bad input,
    or it would need --reason or --accept-unusual; 5: the store, or the
    folder of a new one, cannot be written by this account; 6: the store's
    anchor file is missing), and each revised lot's changes; a pre-check a
    script can run before the ingest. A folder that needs --reason is
    previewed in full all the same (the text, or the --json with
    needs_reason), then refused with exit code 2 and a short error on
    stderr that names the lots (the full refusal is the preview's last
    lines, so a terminal shows it once). A store that cannot be read at all
    fails the preview with what failed, not as a refusal of the ingest.

    \b
    Example:
      linkage ingest lab_exports/2024-05
      linkage ingest lab_exports/2024-05 --store site.db --json
      linkage ingest corrections/ --preview
      linkage ingest corrections/ --reason "DEV-2024-031: envelope density re-measured"
    """
    from linkage.api import ingest as run_ingest

    try:
        result = run_ingest(folder, store, reason=reason, accept_unusual=accept_unusual, preview=preview)
    except LinkageError as exc:
        made = getattr(exc, "preview", None) if preview else None
        if made is not None:  # wants --reason: the whole preview first, its refusal in it; then the exit code
            click.echo(json.dumps(made.to_dict(), indent=2) if as_json else made.text())
            raise UsageError(_refused_for_reason(made, as_json)) from None
        if preview and exc.ingest_refusal:
            tell_progress("Preview: the ingest would be refused as follows, with the same exit code; nothing was "
                          "written.")
        elif preview:
            tell_progress("Preview: not made, the store could not be read as follows (what the ingest would do is "
                          "not known); nothing was written.")
        raise
    if as_json:
        click.echo(json.dumps(with_store_upgraded(result.to_dict()), indent=2))
        return
    click.echo(result.text())


def _refused_for_reason(made, as_json: bool) -> str:
    """The stderr error of a preview refused only for want of --reason, after the whole preview on stdout: short,
    since the refusal's full text is the preview's last lines (``--json``: ``needs_reason``), so that a terminal,
    which shows both streams, shows it once."""
    from linkage.store import lots_named

    lots = made.result.lots_changed
    where = "its needs_reason" if as_json else "its last lines"
    return (f"the ingest would be refused: it changes or removes stored values of {len(lots)} lot(s) "
            f"({lots_named(lots)}) without --reason TEXT; which values and why: the preview above, on stdout "
            f"({where}). Nothing was written.")


@click.command()
@store_option
@click.option("--product", default=None, help="Only the lots of this product.")
@json_option
@handle_errors
def lots(store, product, as_json):
    """List the lots in the store: product, revision, for each table the
    number of rows and the share of its template cells that are filled, and
    the lot's state: 'in use', or 'set aside' (left out of fitting and
    judging by 'linkage set-aside'), with the reason, who and when.

    \b
    Example:
      linkage lots
      linkage lots --product ABC-10mg --json
    """
    from linkage.exceptions import shown_time
    from linkage.store import one_line, reading

    with reading(store) as lot_store:  # an older store is read as it is, not upgraded (said on stderr)
        df = lot_store.lots(product=product)
    if as_json:
        click.echo(json.dumps([{k: _plain(v) for k, v in rec.items()} for rec in df.to_dict("records")], indent=2))
        return
    if df.empty:
        click.echo("The store holds no lots" + (f" of product {product}." if product else " yet."))
        return
    used = [t for t in TABLES if df[f"{t}_rows"].sum() > 0]
    header = ["lot", "product", "rev", *used, "state"]
    body = [[rec["lot"], _text(rec["product"]), str(rec["revision"]),
             *(_cell(rec[f"{t}_rows"], rec[f"{t}_filled_pct"]) for t in used), rec["state"]]
            for rec in df.to_dict("records")]
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    for r in [header, *body]:
        click.echo("  ".join(v.ljust(w) for v, w in zip(r, widths)).rstrip())
    aside = df[df["state"] != "in use"]
    click.echo(f"{len(df)} lots" + (f", {len(aside)} of them set aside" if len(aside) else "")
               + "; per table: rows (percent of template cells filled).")
    if len(aside):
        click.echo("Set aside (left out of fitting and judging; 'linkage restore LOT --reason TEXT' puts one back):")
        for rec in aside.to_dict("records"):  # a reason on one line ('⏎'), the time to the second in UTC (as the
            # set-aside messages write it); --json keeps both as recorded
            click.echo(f"  {rec['lot']}: {one_line(rec['set_aside_reason'])} (by {rec['set_aside_by']}, "
                       f"{shown_time(rec['set_aside_at'])})")


@click.command()
@click.argument("lot")
@store_option
@json_option
@handle_errors
def history(lot, store, as_json):
    """Show every revision of LOT: when, by whom, from which files (with
    SHA-256), and which values changed or were added; a later revision says
    whether it only added (a table, rows, blank cells filled) or changed
    stored values. Decisions to set the lot aside or restore it ('linkage
    set-aside', 'linkage restore') are shown in time order, with who and why
    (a reason of several lines on one line, '⏎' for each break). LOT is found
    under a spelling that differs only in letter case and dash characters
    (‐ – — and the like) or spaces around, as an ingest finds a stored lot.

    \b
    Example:
      linkage history EX-001
      linkage history EX-001 --store site.db --json
    """
    from linkage.exceptions import shown_time
    from linkage.store import change_text, one_line, reading

    with reading(store) as lot_store:  # an older store is read as it is, not upgraded (said on stderr)
        revisions = lot_store.history(lot)
    if as_json:
        click.echo(json.dumps(revisions, indent=2, ensure_ascii=False))
        return
    lot = revisions[0]["lot"]  # the store's spelling (LOT is found under any spelling of it)
    click.echo(f"Lot {lot}: {len(revisions)} revision{'s' if len(revisions) != 1 else ''}")
    for rev in revisions:
        click.echo(f"Revision {rev['revision']}: ingest {rev['ingest_id']}, {shown_time(rev['at'])}, by {rev['user']}"
                   + (f", product {rev['product']}" if rev["product"] else ""))
        if rev.get("reason"):
            click.echo(f"  reason: {one_line(rev['reason'])}")
        if rev["revision"] > 1:
            click.echo("  added to: no stored value changed or removed" if rev["adds_only"] else
                       "  stored values changed or removed")
        for tbl, info in rev["tables"].items():
            mark = "" if info["changed"] else f"  (unchanged, from ingest {info['ingest_id']})"
            click.echo(f"  {tbl:<15} {info['file']} sha256 {info['sha256'][:12]}  {_rows(info['rows'])}{mark}")
        for ch in rev["changes"]:
            click.echo("    " + change_text(ch))
        for event in rev.get("set_aside_events", []):  # decisions made while this revision was in force
            what = "Set aside" if event["action"] == "set-aside" else "Restored (back in use)"
            click.echo(f"{what}: audit entry {event['audit_id']}, {shown_time(event['at'])}, by {event['user']}")
            click.echo(f"  reason: {one_line(event['reason'])}")  # stored unchanged ('--json')


@click.command()
@store_option
@click.option("--out", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the assembled table (one row per lot) to this CSV file.")
@click.option("--product", default=None, help="Only the lots of this product.")
@click.option("--fines-cutoff-um", default=DEFAULT_FINES_CUTOFF_UM, show_default=True,
              type=FiniteFloat(0, 100_000, min_open=True), help="Size below which granules count as fines [µm].")
@click.option("--spec", "spec_path", type=click.Path(exists=True, dir_okay=False, path_type=Path), default=None,
              help="spec.toml: its dissolution time point is used, and each lot is compared with its limits.")
@handle_errors
def assemble(store, out, product, fines_cutoff_um, spec_path):
    """Join the latest revision of every lot into one row per lot, with
    ribbon porosity, granule size, tensile strength and the other derived
    values. Without --out, print a summary.

    Lots set aside ('linkage set-aside') are left out, and named.

    \b
    Example:
      linkage assemble --out lots.csv
      linkage assemble --spec spec.toml --product ABC-10mg --fines-cutoff-um 90
    """
    from linkage.api import assemble as assemble_lots
    from linkage.export import write_table_csv
    from linkage.schema import DEFAULT_DISSOLUTION_TIME_MIN
    from linkage.spec import read_spec

    if out is not None:
        check_output(out)
    spec = read_spec(spec_path) if spec_path is not None else None
    table = assemble_lots(store, product=product, spec=spec, fines_cutoff_um=fines_cutoff_um)
    time_min = table.attrs.get("dissolution_time_min", DEFAULT_DISSOLUTION_TIME_MIN)
    if out is not None:  # written before anything is printed: a reader that stops early (| head) cuts no work
        write_table_csv(table, out)
    click.echo(f"Assembled {len(table)} lots x {table.shape[1]} columns from {store} "
               f"(fines below {fines_cutoff_um:g} µm, dissolution at {time_min:g} min).")
    if out is not None:
        click.echo(f"Wrote {out}.")
    else:
        click.echo("Values per column (filled/lots):")
        width = max(len(c) for c in table.columns)
        for col in table.columns:
            click.echo(f"  {col:<{width}}  {int(table[col].notna().sum())}/{len(table)}")
    if spec is not None:
        click.echo(f"Measured values against {spec_path.name} (lots passing / lots with a value):")
        for attr, limit in spec.limits.items():
            if attr not in table:
                click.echo(f"  {attr} {limit.text()}: not in the table")
                continue
            values = table[attr].dropna()
            passing = sum(spec.passes(attr, v) for v in values)
            click.echo(f"  {attr} {limit.text()}: {passing}/{len(values)}")
        _compendial_counts(table, spec)
    for note in table.attrs.get("notes", []):
        click.echo(f"Note: {units_shown(note)}")  # µm, as the report writes the notes


def _compendial_counts(table, spec) -> None:
    """Measured lots judged as the spec's compendial judges say, on their own units."""
    if spec.dissolution_judge == "stages" and "dissolution_s1_pass" in table:
        s1 = table["dissolution_s1_pass"].dropna().astype(bool)
        click.echo(f"  dissolution_pct by USP <711> stages (Q = {spec.limits['dissolution_pct'].min:g}): "
                   f"{int(s1.sum())}/{len(s1)} lots with vessel data pass at S1 on their own vessels")
    if spec.acceptance_value_max is not None:
        if "weight_acceptance_value" not in table:
            click.echo("  acceptance_value: no lot has 10 or 30 unit weights")
        else:
            av = table["weight_acceptance_value"].dropna()
            click.echo(f"  acceptance_value <= {spec.acceptance_value_max:g} (USP <905> stage 1, weight variation): "
                       f"{int((av <= spec.acceptance_value_max).sum())}/{len(av)}")


def _plain(value):
    if isinstance(value, float) and math.isnan(value):
        return None
    return value.item() if hasattr(value, "item") else value


def _text(value) -> str:
    return "-" if value is None or (isinstance(value, float) and math.isnan(value)) else str(value)


def _cell(rows: int, filled_pct: float) -> str:
    return "-" if rows == 0 else f"{rows} ({filled_pct:.0f}%)"


@click.command()
@store_option
@models_dir_option
@json_option
@click.option("--reanchor", is_flag=True,
              help="Anchor again a store whose anchor file <store>.seal is missing (every write to it is refused "
                   "until then): after the whole check finds nothing, write a new anchor and record the "
                   "re-anchoring in the audit trail. Needs --reason.")
@click.option("--reason", default=None, help="Why the store is anchored again (with --reanchor; recorded).")
@click.pass_context
@handle_errors
def verify(ctx, store, models_dir, as_json, reanchor, reason):
    """Check the whole record: every seal, audit entry, recorded prediction,
    ingest and raw row of the lot store, and every model of the registry
    against its recorded hashes.

    Prints what was checked and the newest seal's hash: record that hash
    outside the store (the batch record) to make any later rewrite of the
    store evident. Exit code 0 when everything matches, 6 when the store
    does not, 4 when a model does not.

    A store whose anchor file (<store>.seal) is missing is read with a
    caution and refused for writing (exit code 6): the removal of its newest
    records cannot be ruled out. Put the anchor file back, or compare the
    newest seal's hash with the batch record and give --reanchor --reason
    TEXT: the store is checked whole, anchored again, and an audit entry
    'reanchor' records who, when, why and the newest seal the check found.

    A store written by an earlier linkage is checked as it is, not
    upgraded (it and its folder stay byte for byte). One written before
    seals (store schema 1) has none to check: verify says what it did
    check (SQLite's integrity check, each lot table's content hash against
    its raw rows) and what it could not, and claims nothing more.

    \b
    Example:
      linkage verify
      linkage verify --store site.db --models-dir /srv/linkage/models --json
      linkage verify --store site.db --reanchor --reason "anchor lost in the copy; hash matches batch record B-12"
    """
    from linkage.cli.common import MODELS_ENV
    from linkage.exceptions import UsageError
    from linkage.integrity import verify_record
    from linkage.store import REANCHOR_NEEDS_REASON, given_reason

    if reanchor and given_reason(reason) is None:
        raise UsageError(REANCHOR_NEEDS_REASON)
    if reason is not None and not reanchor:
        raise UsageError("--reason goes with --reanchor (verify itself writes nothing)")
    given = (ctx.get_parameter_source("models_dir") is not click.core.ParameterSource.DEFAULT
             or bool(os.environ.get(MODELS_ENV)))
    result = verify_record(store, models_dir, registry_required=given,
                           reanchor_reason=reason if reanchor else None)
    if as_json:
        click.echo(json.dumps(result.to_dict(), indent=2))
    else:
        _echo_verify(result, store, models_dir)
    if result.store_problems:
        raise SystemExit(6)
    if result.model_problems:
        raise SystemExit(4)


def _echo_verify(result, store, models_dir) -> None:
    """The text of ``linkage verify``: what was checked in the store and the registry with the newest seal's
    hash, the models not registered, every problem and caution (on stderr), a reanchoring, and the verdict,
    which claims no check that was not made."""
    from linkage.integrity import NOT_CHECKED_UNSEALED, counted

    counts = result.store_counts
    newest = counts.get("newest seal", {})
    unsealed = bool(counts) and newest.get("id") is None  # schema 1, before seals: nothing to check them by
    if counts:
        checked = ", ".join(counted(v, k) for k, v in counts.items()
                            if k != "newest seal" and not (unsealed and k in NOT_CHECKED_UNSEALED))
        click.echo(f"Lot store {store}: {checked}; " + ("no seals (written before seals)"
                   if unsealed else f"newest seal {newest.get('id')} sha256 {newest.get('sha256')}"))
    if result.models_not_checked:
        click.echo(f"Model registry {models_dir}: not checked ({result.models_not_checked}; "
                   "give --models-dir to check one)")
    else:
        click.echo(f"Model registry {models_dir}: {counted(result.models_checked, 'models')} checked")
    for name in result.models_unregistered:
        click.echo(f"  not registered: {name} (a folder the registry index does not hold; never loaded; "
                   "'linkage models --import' registers a model folder copied in)")
    for p in result.store_problems:
        click.echo(f"  store: {p}", err=True)
    for p in result.model_problems:
        click.echo(f"  model: {p}", err=True)
    for p in result.store_cautions:
        click.echo(f"  caution, store: {p}", err=True)
    if result.reanchored:
        done = result.reanchored
        click.echo(f"Anchored again: audit entry {done['audit_id']} 'reanchor' records who, when, why and the "
                   f"newest seal this check found (seal {done['checked_seal']['id']}, sha256 "
                   f"{done['checked_seal']['sha256']}); the anchor file names its own seal {done['anchor']['id']} "
                   f"(sha256 {done['anchor']['sha256']}). Record this hash outside the store.")
    if not result.ok:
        click.echo("The record is NOT whole.")
    elif unsealed:  # no claim of a check that was not made
        click.echo("The lot tables match their content hashes; the store has no seals, so nothing else of it "
                   "could be checked (see the caution above)." + (" The models match their hashes."
                                                                 if result.models_checked else ""))
    else:
        click.echo("Everything matches its seals and hashes." + (" (see the caution above)"
                                                                  if result.store_cautions else ""))
