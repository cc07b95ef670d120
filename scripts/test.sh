#!/usr/bin/env bash
# Install everything the tests need (Python packages into .venv, Debian chromium for the
# real-browser tests) and run the whole test suite. Extra arguments go to pytest.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh "test"
if ! command -v chromium >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
  else
    sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
  fi
fi
.venv/bin/python -m ruff check ensemblelab tests benchmarks
# static types of the package ([tool.mypy] in pyproject.toml, with pandas-stubs)
.venv/bin/python -m mypy
set +e
.venv/bin/python -m pytest "$@"
status=$?
set -e
# pytest exit status 5 means "no tests collected": that is a failure of the suite here
if [ "$status" = 5 ]; then
  echo "pytest collected no tests" >&2
  exit 1
fi
exit "$status"
