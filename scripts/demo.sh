#!/usr/bin/env bash
# Set up .venv (if needed) and run the end-to-end demo on the built-in dataset.
# Outputs go under runs/ (git-ignored); the last lines say where.
set -euo pipefail
cd "$(dirname "$0")/.."
scripts/setup_env.sh
exec .venv/bin/tightfit demo "$@"
