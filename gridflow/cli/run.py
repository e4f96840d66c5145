"""``gridflow run CONFIG``: the whole nightly job."""

from __future__ import annotations

import click

from gridflow.cli.guard import run_guarded
from gridflow.cli.options import config_arg, out_opt, previous_opt, scheduler_opt, workers_opt


@click.command()
@config_arg
@out_opt
@previous_opt
@workers_opt
@scheduler_opt
@click.pass_context
def run(ctx: click.Context, config: str, out: str | None, previous: str | None,
        workers: int | None, scheduler: str | None) -> None:
    """Run the whole nightly job: read, clean, allocate, solve, flag, fire flow, write."""
    from gridflow.jobs.run import run_job

    run_guarded(ctx, run_job, config, out=out, previous=previous, workers=workers,
                scheduler=scheduler)
