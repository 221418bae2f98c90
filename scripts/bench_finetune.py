"""What a fine-tune of a pick buys: validation and test accuracy of subnets with inherited weights,
then after fine-tuning (tightfit.train.finetune) for each (steps, lr), with the CPU-seconds it cost.

    .venv/bin/python scripts/bench_finetune.py RUN --subnet KEY [--subnet KEY ...] --steps 100,200 \\
        --lr 0.01,0.03 --json benchmarks/results/finetune-screen.json

Each fine-tune starts again from the inherited weights. The test split is only read, never used to
choose: the choice in the contributor guide is made on validation.
"""
from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import torch

from tightfit.data.dataset import calibration_batches, eval_batches, load_dataset
from tightfit.model.recalibrate import accuracy
from tightfit.train.finetune import FinetuneSettings, finetune, inherited_net, teacher_of
from tightfit.rundir import load_trained


def split_accuracy(net, ds) -> dict[str, float]:
    return {s: round(accuracy(net, eval_batches(getattr(ds, f"{s}_x"), getattr(ds, f"{s}_y"), ds, 512)), 2)
            for s in ("val", "test")}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("run", help="a trained run folder")
    ap.add_argument("--subnet", action="append", required=True, help="subnet key; repeatable")
    ap.add_argument("--steps", default="100,200", help="comma-separated step counts")
    ap.add_argument("--lr", default="0.01", help="comma-separated peak learning rates")
    ap.add_argument("--threads", type=int, default=1, help="torch threads (default 1: fewest CPU-seconds)")
    ap.add_argument("--json", default="", help="write the figures here")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    run = load_trained(args.run)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    cfg = run.recipe.train
    calib = calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed)
    c0 = time.process_time()
    teacher = teacher_of(run, calib)
    rows = [{"subnet": "largest (teacher)", **split_accuracy(teacher, ds), "teacher_cpu_s": round(time.process_time() - c0, 2)}]
    print(rows[0], flush=True)
    for key in args.subnet:
        subnet = run.recipe.space.parse_key(key)
        before = split_accuracy(inherited_net(run, subnet, calib).eval(), ds)
        rows.append({"subnet": key, "steps": 0, **before})
        print(rows[-1], flush=True)
        for lr in [float(v) for v in args.lr.split(",")]:
            for steps in [int(v) for v in args.steps.split(",")]:
                net = inherited_net(run, subnet, calib)
                rec = finetune(run, ds, net, FinetuneSettings(steps=steps, lr=lr), teacher=teacher)
                after = split_accuracy(net, ds)
                rows.append({"subnet": key, "steps": steps, "lr": lr, **after, "cpu_s": rec["cpu_s"],
                             "wall_s": rec["wall_s"], "gain_val": round(after["val"] - before["val"], 2),
                             "gain_test": round(after["test"] - before["test"], 2)})
                print(rows[-1], flush=True)
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps({"run": args.run, "threads": args.threads, "rows": rows}, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
