"""Errors to exit codes, in one place; logging to stderr.

0 done (flags and findings are results), 2 unusable config or input, 3 a scenario did not
converge, 1 anything unexpected. Messages go to stderr as ``error: ...`` without a traceback
(``-v`` adds it). The code of a gridflow error is the ``exit_code`` of its class
(:mod:`gridflow.errors`), so the Python interface and the command line agree.
"""

from __future__ import annotations

import logging
import sys
from collections.abc import Callable
from typing import Any

import click

from gridflow.errors import GridflowError

__all__ = ["exit_code_for", "setup_logging", "run_guarded"]

log = logging.getLogger("gridflow")


def exit_code_for(exc: BaseException) -> int:
    """The contract's exit code for an exception."""
    if isinstance(exc, GridflowError):
        return exc.exit_code
    return 1


def setup_logging(verbose: int, quiet: int) -> None:
    """Log to stderr at INFO, one step more per ``-v`` and one less per ``-q``."""
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


def run_guarded(ctx: click.Context, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
    """Call ``fn``; map errors to exit codes with a one-line message on stderr."""
    verbose = bool(ctx.obj and ctx.obj.get("verbose"))
    try:
        return fn(*args, **kwargs)
    except GridflowError as exc:
        click.echo(f"error: {exc}", err=True)
        if verbose:
            log.exception("details")
        ctx.exit(exit_code_for(exc))
    except KeyboardInterrupt:
        click.echo("error: interrupted", err=True)
        ctx.exit(1)
    except Exception as exc:  # anything unexpected: exit 1, traceback in the log file
        click.echo(f"error: unexpected {type(exc).__name__}: {exc}", err=True)
        log.debug("unexpected error", exc_info=True)
        if verbose:
            log.exception("details")
        ctx.exit(1)
