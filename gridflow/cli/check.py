"""``gridflow check CONFIG``: read and clean only; writes findings and the cleaned network."""

from __future__ import annotations

import click

from gridflow.cli.guard import run_guarded
from gridflow.cli.options import config_arg, out_opt


@click.command()
@config_arg
@out_opt
@click.pass_context
def check(ctx: click.Context, config: str, out: str | None) -> None:
    """Read and clean the GIS only: write findings and the cleaned network, solve nothing."""
    from gridflow.jobs.check import check_job

    run_guarded(ctx, check_job, config, out=out)
