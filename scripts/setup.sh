#!/usr/bin/env bash
# Create (or reuse) the project virtual environment in .venv and install ensemblelab into it.
# Usage: bash scripts/setup.sh EXTRAS     e.g. bash scripts/setup.sh widgets
set -euo pipefail
cd "$(dirname "$0")/.."
extras="${1:-widgets}"
py="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
  "$py" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e ".[${extras}]"
