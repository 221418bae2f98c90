"""Re-score saved latency checks with layer medians vs layer means, without measuring again.

`tightfit check-latency` saves every held-out subnet's measured latency in
RUN/latency/checks/DEVICE.json; this rebuilds the predictor from the same table with each
layer statistic and prints MAPE and Kendall tau against those measurements. Given two checks
of the same subnets, it also prints how well the two measurements agree with each other
(the noise ceiling for tau).

    .venv/bin/python scripts/compare_layer_stats.py RUN --table RUN/latency/host.json CHECK.json [CHECK2.json]
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np


def main(argv: list[str] | None = None) -> int:
    from tightfit.errors import UserError
    from tightfit.latency.predict import LatencyPredictor, kendall_tau
    from tightfit.latency.table import load_table
    from tightfit.recipe import load_recipe
    from tightfit.model.space import Subnet, space_hash
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("run", type=Path, help="run directory holding recipe.toml")
    ap.add_argument("--table", type=Path, required=True, help="the latency table the checks were made against")
    ap.add_argument("checks", type=Path, nargs="+", help="saved check results (RUN/latency/checks/*.json)")
    args = ap.parse_args(argv)
    try:
        recipe = load_recipe(args.run / "recipe.toml")
        chs, size = recipe.data.channels, recipe.data.image_size
        table = load_table(args.table, space_hash(recipe.space, chs, size))
        checks = [json.loads(p.read_text("utf-8"))["rows"] for p in args.checks]
        for stat in ("p50_ms", "mean_ms"):
            for target, column in (("p50_ms", "measured_p50_ms"), ("budget_stat_ms", "measured_budget_stat_ms")):
                pred = LatencyPredictor(table, recipe.space, chs, size, target=target, layer_stat=stat)
                for path, rows in zip(args.checks, checks):
                    p = np.array([pred.predict_ms(Subnet.from_key(r["key"])) for r in rows])
                    m = np.array([r[column] for r in rows])
                    print(f"layers {stat:<8} predict {target:<15} {path.name}: MAPE {100 * np.mean(abs(p - m) / m):5.2f} %"
                          f"  tau {kendall_tau(list(p), list(m)):.3f}  (calibration {pred.calibration.kind})")
    except (OSError, KeyError, json.JSONDecodeError, UserError) as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    if len(checks) == 2 and [r["key"] for r in checks[0]] == [r["key"] for r in checks[1]]:
        a, b = ([r["measured_p50_ms"] for r in rows] for rows in checks)
        diff = np.mean(abs(np.array(a) - np.array(b)) / np.array(b)) * 100
        print(f"the two measurements of the same subnets: tau {kendall_tau(a, b):.3f}, mean abs difference {diff:.1f} %")
    return 0


if __name__ == "__main__":
    sys.exit(main())
