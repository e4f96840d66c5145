"""Registers the commands on the group. Each command is a thin shell over a library function."""

from gridflow.cli import check, run  # noqa: F401
