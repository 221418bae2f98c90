"""Does the ranking of subnets hold with fewer BN recalibration batches? Kendall tau against the recipe's.

    .venv/bin/python scripts/bench_recalibration_rank.py RUN --images 600

The same random subnets are scored on the same validation images after recalibration on the recipe's
``recalibration_batches`` and on fewer; tau against the recipe's ranking, whether the best stays the best,
and CPU-seconds per subnet (1 torch thread, as the search runs). A measurement only, not a test.
"""
from __future__ import annotations

import argparse
import json
import random
import sys
import time
from dataclasses import replace
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("run", help="a trained run folder")
    ap.add_argument("--images", type=int, default=600, help="validation images per score (default 600)")
    ap.add_argument("--subnets", type=int, default=24, help="random subnets (default 24)")
    ap.add_argument("--batches", type=int, nargs="+", default=[5, 3, 2], help="fewer batches to try")
    ap.add_argument("--json", default="", help="write the figures here")
    args = ap.parse_args(argv)
    import torch
    from tightfit.data.dataset import load_dataset
    from tightfit.latency.predict import kendall_tau
    from tightfit.rundir import load_trained
    from tightfit.search.fitness import RunAccuracy
    torch.set_num_threads(1)
    run = load_trained(args.run)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    rng = random.Random(1)
    subnets = list({s.to_key(): s for s in (run.recipe.space.sample(rng) for _ in range(2 * args.subnets))}.values())
    subnets = subnets[:args.subnets]
    rows, ref = {}, None
    for n in [run.recipe.train.recalibration_batches, *args.batches]:
        acc = RunAccuracy(replace(run, recipe=replace(run.recipe, train=replace(run.recipe.train, recalibration_batches=n))),
                          ds, args.images)
        c0 = time.process_time()
        scores = [acc(s)["val_acc"] for s in subnets]
        ref = ref or scores
        best = max(range(len(scores)), key=scores.__getitem__) == max(range(len(ref)), key=ref.__getitem__)
        rows[n] = {"kendall_tau": round(kendall_tau(scores, ref), 3), "best_same": best,
                   "cpu_s_per_subnet": round((time.process_time() - c0) / len(subnets), 3)}
        print(f"{n:3d} batches: {rows[n]}", flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
