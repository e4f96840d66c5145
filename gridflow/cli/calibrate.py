"""``gridflow calibrate CONFIG``: fit roughness groups to the field flow tests."""

from __future__ import annotations

import click

from gridflow.cli.guard import run_guarded
from gridflow.cli.options import config_arg


@click.command()
@config_arg
@click.option("--out", "out", type=click.Path(dir_okay=False), default=None,
              help="TOML snippet to write (default: beside [run] output, *_roughness.toml)")
@click.option("--workers", type=int, default=None,
              help="local worker processes for the test solves (default: the machine's cores)")
@click.option("--scheduler", default=None,
              help="address of a running Dask distributed scheduler for the test solves")
@click.pass_context
def calibrate(ctx: click.Context, config: str, out: str | None, workers: int | None,
              scheduler: str | None) -> None:
    """Fit pipe roughness groups to the field flow tests; writes a table to paste, changes
    nothing."""
    from gridflow.jobs.calibrate import calibrate_job

    run_guarded(ctx, calibrate_job, config, out=out, workers=workers, scheduler=scheduler)
