"""The ``gridflow`` command: a click group over library functions.

Every command is added here, explicitly, in :data:`COMMANDS`; command modules define plain
click commands and import only :mod:`gridflow.cli.options` (shared options) and
:mod:`gridflow.cli.guard` (errors to exit codes, logging), never this module. To add a
command: write ``gridflow/cli/<name>.py`` with ``@click.command()``, import it below and list
it in :data:`COMMANDS`.
"""

from __future__ import annotations

import click

from gridflow import __version__
from gridflow.cli.calibrate import calibrate
from gridflow.cli.check import check
from gridflow.cli.guard import exit_code_for, run_guarded, setup_logging
from gridflow.cli.init import init
from gridflow.cli.options import config_arg, out_opt, quiet_opt, verbose_opt
from gridflow.cli.run import run

__all__ = ["cli", "main", "COMMANDS", "exit_code_for", "run_guarded", "config_arg", "out_opt"]


@click.group()
@click.version_option(__version__, prog_name="gridflow")
@verbose_opt
@quiet_opt
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: int) -> None:
    """Nightly hydraulic and fire-flow analysis of a water utility's GIS."""
    setup_logging(verbose, quiet)
    ctx.obj = {"verbose": verbose}


#: the commands of ``gridflow``, in help order
COMMANDS: tuple[click.Command, ...] = (run, check, init, calibrate)
for _command in COMMANDS:
    cli.add_command(_command)


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``gridflow`` program."""
    cli.main(args=argv, prog_name="gridflow")


if __name__ == "__main__":
    main()
