#!/usr/bin/env bash
# Install everything the tests need into .venv and run the whole test suite.
set -euo pipefail
cd "$(dirname "$0")/.."
# Debian packages the tests use, installed when missing and running as root: chromium (the
# report test renders the HTML in a real headless browser) and PostgreSQL with PostGIS (the
# database tests start a throwaway server). Another program may hold the dpkg lock: retry.
apt_missing=()
command -v chromium >/dev/null 2>&1 || apt_missing+=(chromium)
ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || apt_missing+=(postgresql)
ls /usr/share/postgresql/*/extension/postgis.control >/dev/null 2>&1 || apt_missing+=(postgresql-postgis)
if [ "${#apt_missing[@]}" -gt 0 ] && [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
  for attempt in 1 2 3 4 5 6 7 8 9 10; do
    if (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq \
        -o DPkg::Lock::Timeout=120 "${apt_missing[@]}") >/dev/null; then
      break
    fi
    echo "apt-get failed (attempt $attempt; the dpkg lock may be held): retrying" >&2
    sleep 20
  done
fi
# the style test opens the results in a real desktop GIS (Debian's QGIS Python bindings,
# run by the system Python)
if ! /usr/bin/python3 -c "import qgis.core" >/dev/null 2>&1 && [ "$(id -u)" = 0 ] \
    && command -v apt-get >/dev/null; then
  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive \
    apt-get install -y -qq --no-install-recommends python3-qgis) >/dev/null
fi
python3 -m venv .venv
.venv/bin/python -m pip install -qq --upgrade pip
.venv/bin/python -m pip install -qq -e '.[test]'  # -qq: errors only
exec .venv/bin/python -m pytest "$@"
