"""Shared command-line options, one registry for every command.

Each name here is a click decorator; commands stack the ones they take, so an option is spelled
and documented once.
"""

from __future__ import annotations

import click

__all__ = ["config_arg", "gis_arg", "out_opt", "previous_opt", "workers_opt", "scheduler_opt",
           "verbose_opt", "quiet_opt"]

config_arg = click.argument("config", type=click.Path(dir_okay=False))
gis_arg = click.argument("gis", type=click.Path(dir_okay=False))
out_opt = click.option("--out", "out", type=click.Path(dir_okay=False), default=None,
                       help="output GeoPackage, or a PostgreSQL database and schema "
                            "('service=NAME schema=NAME'; default: [run] output)")
previous_opt = click.option("--previous", type=click.Path(dir_okay=False), default=None,
                            help="last night's output GeoPackage (or database schema, as for "
                                 "--out), for the changes layer")
workers_opt = click.option("--workers", type=int, default=None,
                           help="local worker processes for the fire-flow sweep (default: the "
                                "machine's cores)")
scheduler_opt = click.option("--scheduler", default=None,
                             help="address of a running Dask distributed scheduler for the "
                                  "fire-flow sweep")
verbose_opt = click.option("-v", "--verbose", count=True, help="more log output (repeat for more)")
quiet_opt = click.option("-q", "--quiet", count=True, help="less log output")
