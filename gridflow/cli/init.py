"""``gridflow init GIS``: draft a commented config from a GIS file's layers and fields."""

from __future__ import annotations

import click

from gridflow.cli.guard import run_guarded
from gridflow.cli.options import gis_arg


@click.command()
@gis_arg
@click.option("--out", "out", type=click.Path(dir_okay=False), default=None,
              help="config file to write (default: the GIS file's name with .toml); never "
                   "overwritten")
@click.pass_context
def init(ctx: click.Context, gis: str, out: str | None) -> None:
    """Draft a starter config from GIS's layers and fields; lines marked CHECK are guesses."""
    from gridflow.config.draft import init_job

    run_guarded(ctx, init_job, gis, out=out)
