"""``python -m gridflow``: the same as the ``gridflow`` command."""

from gridflow.cli.main import main

main()
