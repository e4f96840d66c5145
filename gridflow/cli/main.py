"""The ``gridflow`` command: a click group over library functions.

Errors are mapped to the contract's exit codes here and only here (:func:`exit_code_for`):
0 done (flags and findings are results), 2 unusable config or input, 3 a scenario did not
converge, 1 anything unexpected. Messages go to stderr as ``error: ...`` without a traceback
(``-v`` adds it).
"""

from __future__ import annotations

import logging
import sys

import click

from gridflow import __version__
from gridflow.errors import GridflowError

log = logging.getLogger("gridflow")


def exit_code_for(exc: BaseException) -> int:
    """The contract's exit code for an exception."""
    if isinstance(exc, GridflowError):
        return exc.exit_code
    return 1


def setup_logging(verbose: int, quiet: int) -> None:
    level = logging.INFO - 10 * verbose + 10 * quiet
    root = logging.getLogger("gridflow")
    root.setLevel(min(level, logging.DEBUG))
    if not any(getattr(h, "_gridflow_stderr", False) for h in root.handlers):
        h: logging.Handler = logging.StreamHandler(sys.stderr)
        h._gridflow_stderr = True  # type: ignore[attr-defined]
        h.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%H:%M:%S"))
        root.addHandler(h)
    for h in root.handlers:
        if getattr(h, "_gridflow_stderr", False):
            h.setLevel(max(level, logging.DEBUG))


# one registry of shared options
config_arg = click.argument("config", type=click.Path(dir_okay=False))
out_opt = click.option("--out", "out", type=click.Path(dir_okay=False), default=None,
                       help="output GeoPackage, or a PostgreSQL database and schema "
                            "('service=NAME schema=NAME'; default: [run] output)")


@click.group()
@click.version_option(__version__, prog_name="gridflow")
@click.option("-v", "--verbose", count=True, help="more log output (repeat for more)")
@click.option("-q", "--quiet", count=True, help="less log output")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: int) -> None:
    """Nightly hydraulic and fire-flow analysis of a water utility's GIS."""
    setup_logging(verbose, quiet)
    ctx.obj = {"verbose": verbose}


def run_guarded(ctx: click.Context, fn, *args, **kwargs):
    """Call ``fn``; map errors to exit codes with a one-line message on stderr."""
    try:
        return fn(*args, **kwargs)
    except GridflowError as exc:
        click.echo(f"error: {exc}", err=True)
        if ctx.obj and ctx.obj.get("verbose"):
            log.exception("details")
        ctx.exit(exit_code_for(exc))
    except KeyboardInterrupt:
        click.echo("error: interrupted", err=True)
        ctx.exit(1)
    except Exception as exc:  # anything unexpected: exit 1, traceback in the log file
        click.echo(f"error: unexpected {type(exc).__name__}: {exc}", err=True)
        log.debug("unexpected error", exc_info=True)
        if ctx.obj and ctx.obj.get("verbose"):
            log.exception("details")
        ctx.exit(1)


def _register() -> None:
    from gridflow.cli import commands  # noqa: F401  (commands attach themselves to the group)


def main(argv=None) -> None:
    _register()
    cli.main(args=argv, prog_name="gridflow")


if __name__ == "__main__":
    main()
