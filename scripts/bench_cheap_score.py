"""How well a cheap accuracy score ranks subnets, and what it costs: validation images x BN
recalibration batches, against a reference of the whole split after 20 recalibration batches.

    python scripts/bench_cheap_score.py runs/bench-fashion-mnist --json benchmarks/results/cheap-score.json

The search ranks candidates on a capped part of the validation split (``--val-images``) and
re-scores the best on all of it; the recipe's ``recalibration_batches`` sets the BN recalibration.
This measures Kendall tau, mean |difference| and CPU-seconds per subnet for each setting over the
same random subnets (1 torch thread, as the search runs). A measurement only, not a test.
"""
from __future__ import annotations

import argparse
import json
import random
import sys
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "src"))

SETTINGS = ((1000, 10), (2000, 10), (3000, 10), (2000, 5), (3000, 5), (6000, 5), (6000, 10))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("run", help="a trained run folder")
    ap.add_argument("--subnets", type=int, default=24, help="random subnets to rank (default 24)")
    ap.add_argument("--json", default="", help="write the figures here")
    args = ap.parse_args(argv)
    import torch
    from tightfit.data.dataset import load_dataset
    from tightfit.latency.predict import kendall_tau
    from tightfit.search.fitness import RunAccuracy
    from tightfit.rundir import load_trained
    torch.set_num_threads(1)
    t = load_trained(args.run)
    ds = load_dataset(t.recipe.data, t.recipe.seed)
    rng = random.Random(1)
    subnets = list({s.to_key(): s for s in (t.recipe.space.sample(rng) for _ in range(args.subnets))}.values())

    def with_batches(n):
        return replace(t, recipe=replace(t.recipe, train=replace(t.recipe.train, recalibration_batches=n)))
    ref = RunAccuracy(with_batches(20), ds, 0)
    whole = [ref(s)["val_acc"] for s in subnets]
    best = max(range(len(subnets)), key=lambda i: whole[i])
    rows = {}
    for images, batches in SETTINGS:
        acc = RunAccuracy(with_batches(batches), ds, images)
        c0 = time.process_time()
        a = [acc(s)["val_acc"] for s in subnets]
        cpu = (time.process_time() - c0) / len(subnets)
        top8 = sorted(range(len(subnets)), key=lambda i: -a[i])[:8]
        rows[f"{images}/{batches}"] = {"kendall_tau": round(kendall_tau(a, whole), 3), "cpu_s_per_subnet": round(cpu, 3),
                                       "best_in_top8": best in top8,
                                       "mean_abs_diff_points": round(sum(abs(x - y) for x, y in zip(a, whole)) / len(a), 3)}
        print(f"{images:5d} images, {batches:2d} recalibration batches: {rows[f'{images}/{batches}']}", flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps({"run": args.run, "reference": "whole split, 20 recalibration batches",
                                               "subnets": len(subnets), "rows": rows, "whole": whole}, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
