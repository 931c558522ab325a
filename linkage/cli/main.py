"""The ``linkage`` command group.

Subcommands are loaded lazily (only the one that runs is imported), so that a
what-if does not pay for the report's imports.
"""

from __future__ import annotations

import importlib
import importlib.util  # explicitly: "import importlib" alone does not bind importlib.util
import sys
from typing import NoReturn

import click

from linkage import __version__

#: command name -> "module:function". Each module lives in linkage/cli/.
COMMANDS: dict[str, str] = {
    "demo": "linkage.cli.demo:demo",
    "ingest": "linkage.cli.store_cmds:ingest",
    "lots": "linkage.cli.store_cmds:lots",
    "history": "linkage.cli.store_cmds:history",
    "assemble": "linkage.cli.store_cmds:assemble",
    "train": "linkage.cli.model_cmds:train",
    "models": "linkage.cli.model_cmds:models",
    "window": "linkage.cli.decide_cmds:window",
    "predict": "linkage.cli.decide_cmds:predict",
    "report": "linkage.cli.report_cmds:report",
    "retrain": "linkage.cli.lifecycle_cmds:retrain",
    "watch": "linkage.cli.lifecycle_cmds:watch",
    "audit": "linkage.cli.lifecycle_cmds:audit",
    "running": "linkage.cli.running_cmds:running",
    "verify": "linkage.cli.store_cmds:verify",
    "transfer": "linkage.cli.transfer_cmds:transfer",
    "plan": "linkage.cli.plan_cmds:plan",
    "space": "linkage.cli.space_cmds:space",
    "set-aside": "linkage.cli.setaside_cmds:set_aside",
    "restore": "linkage.cli.setaside_cmds:restore",
}


class LazyGroup(click.Group):
    def list_commands(self, ctx):
        return sorted(name for name in COMMANDS if self._available(name))

    @staticmethod
    def _available(name: str) -> bool:
        module = COMMANDS[name].split(":")[0]
        return importlib.util.find_spec(module) is not None

    def get_command(self, ctx, name):
        if name not in COMMANDS or not self._available(name):
            return None
        module, attr = COMMANDS[name].split(":")
        return getattr(importlib.import_module(module), attr)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="linkage")
def cli():
    """Roller compaction, lot by lot: ingest lab exports, train linked stage
    models (settings -> ribbon -> granules -> tablets), find the ribbon porosity
    window and predict what a batch will do.

    Decision support only, not release testing.

    \b
    Example (the demo's lot store, model registry and spec file, in demo/):
      linkage demo --out demo
      linkage lots --store demo/demo-lots.db
      linkage window --store demo/demo-lots.db --models-dir demo/models --spec demo/spec.toml
      linkage predict --store demo/demo-lots.db --models-dir demo/models --set roll_force_kn_per_cm=8
    """


def main() -> None:  # pragma: no cover - entry point (leave() is tested in a child process)
    """The ``linkage`` command: :func:`cli`, then the process ends by :func:`leave` (no interpreter teardown)."""
    try:
        cli()  # click's standalone mode always ends in SystemExit, with the command's exit code
    except SystemExit as exc:
        leave(exc.code)
    leave(0)


def leave(code=0) -> NoReturn:
    """End the process with ``code`` as :func:`sys.exit` would (None: 0; a text: printed to standard error, 1),
    after what a normal exit does that anyone can see (the ``atexit`` functions, standard output and error
    flushed), but without tearing the interpreter down object by object.

    A command has written its files whole (:func:`linkage.export.write_atomic`) and closed its stores by the time
    it returns; what is left is freeing every object, module by module, which after a report (the fitted
    chain, scikit-learn, pandas and matplotlib loaded) took 0.3-0.5 s of the command's wall time for nothing
    the operating system does not do at once on exit (reports/benchmarks.md, 2026-12-05)."""
    import atexit
    import os

    if code is None:
        status = 0
    elif isinstance(code, int):
        status = code
    else:
        print(code, file=sys.stderr)
        status = 1
    try:
        atexit._run_exitfuncs()  # what a normal exit runs (logging, multiprocessing, temporary folders)
    finally:
        try:
            sys.stdout.flush()
        except BrokenPipeError:  # the reader stopped reading: as a normal exit would ignore
            pass
        except OSError as exc:  # output still buffered that cannot be written (disk full): never silent
            from linkage.cli.common import stdout_failed
            from linkage.exceptions import IO_EXIT_CODE

            try:
                print(stdout_failed(exc.strerror or str(exc)), file=sys.stderr)
            except (OSError, ValueError):
                pass
            status = status or IO_EXIT_CODE
        except ValueError:  # closed
            pass
        try:
            sys.stderr.flush()
        except (OSError, ValueError):
            pass
        os._exit(status)


if __name__ == "__main__":  # python -m linkage.cli.main
    main()
