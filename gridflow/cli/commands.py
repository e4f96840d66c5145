"""Registers the commands on the group. Each command is a thin shell over a library function."""

from gridflow.cli import calibrate, check, run  # noqa: F401
