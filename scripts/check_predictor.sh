#!/usr/bin/env bash
# Measure how well the latency predictor does on this machine, 1 thread:
# profile the host into a latency table, then measure 30 held-out random subnets whole
# (interleaved, fresh-process repeats) and compare, then measure them once more and score the
# second measurement against the first (the floor no predictor can beat). Weights do not change
# latency, so a run directory holding only the recipe is enough (a fresh supernet is probed).
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
import time
from tightfit.latency.check import check_predictor
from tightfit.latency.commands import format_check
from tightfit.latency.layers import layer_configs
from tightfit.latency.table import load_table, profile_host

run = sys.argv[1]
t0 = time.perf_counter()
table = profile_host(run, "host", threads=1)
entries = load_table(table).entries
print(f"profile: {time.perf_counter() - t0:.0f} s wall for {len(entries)} entries")
result = check_predictor(run, table, n=30, twice=True)
print(format_check(result))
for t, e in result["measurement_vs_measurement"].items():
    print(f"second measurement vs first, {t}: MAPE {e['mape']:.2f} %, Kendall tau {e['kendall_tau']:.3f}")
PY
  echo "== done; $(uptime)"
done
