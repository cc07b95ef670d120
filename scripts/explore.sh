#!/usr/bin/env bash
# The main job on a fresh machine: install ensemblelab with its widget stack (and the compiled
# kernels, numba, from the `fast` extra) into .venv and
# serve the linked explorer on the shipped (invented) demo ensemble. Extra arguments go to
# `ensemblelab explore` (for example a path to your own ensemble).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh "widgets,structures,fast"
exec .venv/bin/ensemblelab explore "$@"
