#!/usr/bin/env bash
# Set up .venv (if needed) and run the whole test suite. Extra arguments go to pytest,
# e.g. scripts/test.sh -m "not slow" or scripts/test.sh tests/test_space.py
set -euo pipefail
cd "$(dirname "$0")/.."
scripts/setup_env.sh test
export OMP_NUM_THREADS="${OMP_NUM_THREADS:-$(nproc)}"
exec .venv/bin/python -m pytest -q --durations=15 "$@"
