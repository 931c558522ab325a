"""``linkage set-aside`` and ``linkage restore``: leave stored lots out of fitting and judging, on the record."""

from __future__ import annotations

import json

import click

from linkage.cli.common import handle_errors, json_option, store_option, with_store_upgraded

_REASON_HELP = ("Why (required; recorded with the decision in the audit trail): the deviation number and the "
                "assignable cause, for example.")


def _decision(name: str):
    """The command ``name`` with the arguments and options both decisions take: LOT [LOT ...], --reason,
    --store, --json; errors as every command ends with them."""
    def make(f):
        for wrap in (handle_errors, json_option, store_option,
                     click.option("--reason", default=None, metavar="TEXT", help=_REASON_HELP),
                     click.argument("lots", nargs=-1, required=True, metavar="LOT [LOT ...]"), click.command(name)):
            f = wrap(f)
        return f
    return make


@_decision("set-aside")
def set_aside(lots, reason, store, as_json):
    """Set stored lots aside: their rows stay in the store, unchanged, but
    every command that fits or judges lots (assemble, train, retrain, watch,
    report, plan, transfer, running) leaves them out and says so, until 'linkage
    restore'. For a lot that should never have been used: a mistyped lot id,
    a lot never really made, a lot with a known assignable cause (a blend
    error). Nothing is deleted.

    Each decision is an audit entry 'set-aside' (who, when, why), sealed like
    every record: 'linkage verify' finds one edited or removed. 'linkage
    lots' shows each lot's state and reason, 'linkage history LOT' and
    'linkage audit' the decisions. LOT is found under a spelling that differs
    only in letter case and dash characters (‐ – — and the like), as an
    ingest finds a stored lot.

    Refused (exit code 2, nothing written; every problem in one message)
    without --reason, for a lot the store does not hold (every one named) and
    for a lot already set aside (with when, by whom and why); a store
    without its anchor file is refused (exit code 6).

    \b
    Example:
      linkage set-aside EX-017 --reason "DEV-2026-014: blend error, wrong API lot charged"
      linkage set-aside EX-0l7 EX-099 --store site.db --reason "ids typed wrongly; re-sent as EX-017, EX-009"
    """
    from linkage.api import set_aside as run

    _show(run(lots, store, reason=reason), as_json)


@_decision("restore")
def restore(lots, reason, store, as_json):
    """Put set-aside lots back in use: every command that fits or judges lots
    takes them again. Each decision is an audit entry 'restore' (who, when,
    why), sealed like every record.

    Refused (exit code 2, nothing written; every problem in one message)
    without --reason, for a lot the store does not hold and for a lot that
    is not set aside; a store without its anchor file is refused (exit code
    6). LOT is found under a spelling that differs only in letter case and
    dash characters (‐ – — and the like), as an ingest finds a stored lot.

    \b
    Example:
      linkage restore EX-017 --reason "DEV-2026-014 closed: blend error not confirmed"
    """
    from linkage.api import restore as run

    _show(run(lots, store, reason=reason), as_json)


def _show(result, as_json: bool) -> None:
    if as_json:
        click.echo(json.dumps(with_store_upgraded(result.to_dict()), indent=2, ensure_ascii=False))
        return
    click.echo(result.text())
