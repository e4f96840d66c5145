"""Whole jobs behind the commands: ``check`` and ``run``."""
