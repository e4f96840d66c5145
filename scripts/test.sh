#!/usr/bin/env bash
# Install everything the tests need into .venv and run the whole test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m venv .venv
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e '.[test]'
exec .venv/bin/python -m pytest "$@"
