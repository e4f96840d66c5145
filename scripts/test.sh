#!/usr/bin/env bash
# Install everything the tests need into .venv and run the whole test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
# the report test renders the HTML in a real headless browser (Debian's chromium)
if ! command -v chromium >/dev/null 2>&1 && [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium) >/dev/null
fi
# the style test opens the results in a real desktop GIS (Debian's QGIS Python bindings,
# run by the system Python)
if ! /usr/bin/python3 -c "import qgis.core" >/dev/null 2>&1 && [ "$(id -u)" = 0 ] \
    && command -v apt-get >/dev/null; then
  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends python3-qgis) >/dev/null
fi
python3 -m venv .venv
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e '.[test]'
exec .venv/bin/python -m pytest "$@"
