"""Profile a run again with another layer-probe timing and score both predictors on the subnets
a check already measured (RUN/latency/checks/host.json from scripts/check_predictor.sh):

    .venv/bin/python scripts/compare_layer_timing.py RUN_DIR 0.05

RUN_DIR is the run directory check_predictor.sh printed; the new table is RUN/latency/cheapSECONDS.json.
"""
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from tightfit.latency.probe import write_bundle, load_source
from tightfit.latency.table import run_runner, load_table
from tightfit.latency.predict import LatencyPredictor, kendall_tau
from tightfit.model.space import Subnet
run, secs = Path(sys.argv[1]), sys.argv[2]
out = run / "latency" / f"cheap{secs}.json"
t0 = time.perf_counter()
with tempfile.TemporaryDirectory() as tmp:
    b = write_bundle(run, Path(tmp) / "probe", n_subnets=8, progress=False)
    run_runner(b, out, ["--threads", "1", "--layer-time-seconds", secs])
print(f"profile with layer seconds {secs}: {time.perf_counter() - t0:.0f} s wall")
recipe, _ = load_source(run)
check = json.loads((run / "latency" / "checks" / "host.json").read_text())
for target, col in (("p50_ms", "measured_p50_ms"), ("budget_stat_ms", "measured_budget_stat_ms")):
    for name in ("host", f"cheap{secs}"):
        pred = LatencyPredictor(load_table(run / "latency" / f"{name}.json"), recipe.space, recipe.data.channels,
                                recipe.data.image_size, target=target)
        p = [pred.predict_ms(Subnet.from_key(r["key"])) for r in check["rows"]]
        m = [r[col] for r in check["rows"]]
        ape = 100 * np.abs(np.array(p) - m) / m
        print(f"{name:>12} {target:>15}: MAPE {ape.mean():.2f} %  max {ape.max():.1f} %  "
              f"tau {kendall_tau(p, m):.3f}  calib {pred.calibration.kind}")
