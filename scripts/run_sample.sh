#!/usr/bin/env bash
# Install gridflow into .venv and run the nightly job on the bundled sample town.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m venv .venv
.venv/bin/python -m pip install -qq --upgrade pip
# -qq: pip shows errors only (setuptools notes every editable install of a flat layout)
.venv/bin/python -m pip install -qq -e .
mkdir -p out
.venv/bin/gridflow run sample_gis/millbrook.toml --out out/millbrook_results.gpkg "$@"
echo "results: out/millbrook_results.gpkg and out/millbrook_results.html"
