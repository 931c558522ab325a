"""Options shared by several commands, and the one place where library
errors become messages and exit codes."""

from __future__ import annotations

import functools
import os
from pathlib import Path

import click

from linkage.exceptions import LinkageError

STORE_ENV = "LINKAGE_STORE"
MODELS_ENV = "LINKAGE_MODELS_DIR"


def store_option(f):
    return click.option(
        "--store",
        type=click.Path(dir_okay=False, path_type=Path),
        default=lambda: os.environ.get(STORE_ENV, "linkage.db"),
        show_default="linkage.db, or $LINKAGE_STORE",
        help="SQLite lot store file.",
    )(f)


def models_dir_option(f):
    return click.option(
        "--models-dir",
        type=click.Path(file_okay=False, path_type=Path),
        default=lambda: os.environ.get(MODELS_ENV, "models"),
        show_default="models/, or $LINKAGE_MODELS_DIR",
        help="Model registry folder.",
    )(f)


def json_option(f):
    return click.option("--json", "as_json", is_flag=True, help="Print JSON instead of text.")(f)


def handle_errors(f):
    """Turn a LinkageError into its message on stderr and its exit code."""

    @functools.wraps(f)
    def wrapper(*args, **kwargs):
        try:
            return f(*args, **kwargs)
        except LinkageError as exc:
            click.echo(f"Error: {exc}", err=True)
            raise SystemExit(exc.exit_code) from None

    return wrapper
