#!/usr/bin/env bash
# Measure how well the latency predictor does on this machine, 1 thread:
# profile the host into a latency table, then measure 30 held-out random subnets whole
# (interleaved, fresh-process repeats) and compare. Weights do not change latency, so a
# run directory holding only the recipe is enough (a fresh supernet is probed).
#
#   scripts/check_predictor.sh [RECIPE ...]     default: recipes/demo.toml recipes/fashion-mnist.toml
#
# Prints the load average beside the figures: on a shared machine they are contended.
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-.venv/bin/python}
[ $# -gt 0 ] || set -- recipes/demo.toml recipes/fashion-mnist.toml
for recipe in "$@"; do
  run=$(mktemp -d "${TMPDIR:-/tmp}/tightfit-latency-check.XXXXXX")
  cp "$recipe" "$run/recipe.toml"
  echo "== $recipe (run directory $run); $(uptime)"
  "$PY" - "$run" <<'PY'
import sys
from tightfit.latency.commands import format_check
from tightfit.latency.predict import check_predictor
from tightfit.latency.table import profile_host

run = sys.argv[1]
table = profile_host(run, "host", threads=1)
print(format_check(check_predictor(run, table, n=30)))
PY
  echo "== done; $(uptime)"
done
