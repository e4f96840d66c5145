"""``gridflow run CONFIG``: the whole nightly job."""

from __future__ import annotations

import click

from gridflow.cli.main import cli, config_arg, out_opt, run_guarded


@cli.command()
@config_arg
@out_opt
@click.option("--previous", type=click.Path(dir_okay=False), default=None,
              help="last night's output GeoPackage (or database schema, as for --out), for "
                   "the changes layer")
@click.option("--workers", type=int, default=None,
              help="local worker processes for the fire-flow sweep (default: the machine's cores)")
@click.option("--scheduler", default=None,
              help="address of a running Dask distributed scheduler for the fire-flow sweep")
@click.pass_context
def run(ctx: click.Context, config: str, out: str | None, previous: str | None,
        workers: int | None, scheduler: str | None) -> None:
    """Run the whole nightly job: read, clean, allocate, solve, flag, fire flow, write."""
    from gridflow.jobs.run import run_job

    run_guarded(ctx, run_job, config, out=out, previous=previous, workers=workers,
                scheduler=scheduler)
