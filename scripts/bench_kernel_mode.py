"""Centre-crop kernels vs. the learned kernel transformation (Cai et al. 2020), side by side.

Trains the same recipe twice (only train.kernel_mode differs), then reports validation
accuracy after BN recalibration for smallest, middle, largest and a fixed set of random
subnets, plus training time. Usage:
    python scripts/bench_kernel_mode.py recipes/demo.toml [--random 8] [--out runs/kernel-mode]
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import random
import time
from pathlib import Path

from tightfit.data.dataset import calibration_batches, eval_batches, load_dataset
from tightfit.recalibrate import subnet_accuracy
from tightfit.recipe import load_recipe
from tightfit.rundir import load_trained
from tightfit.train import train


def evaluate(run_dir: Path, ds, subnets) -> dict[str, float]:
    run = load_trained(run_dir)
    calib = calibration_batches(ds, run.recipe.train.batch_size, run.recipe.train.recalibration_batches, run.recipe.seed)
    return {name: subnet_accuracy(run.supernet, s, calib, eval_batches(ds.val_x, ds.val_y, ds, 512))
            for name, s in subnets.items()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("recipe")
    ap.add_argument("--random", type=int, default=8)
    ap.add_argument("--out", default="runs/kernel-mode")
    args = ap.parse_args()
    base = load_recipe(args.recipe)
    ds = load_dataset(base.data, base.seed)
    space = base.space
    rng = random.Random(123)
    subnets = {"smallest": space.smallest(), "middle": space.middle(), "largest": space.largest(),
               **{f"random{i}": space.sample(rng) for i in range(args.random)}}
    results = {}
    for mode in ("centre", "transform"):
        recipe = dataclasses.replace(base, train=dataclasses.replace(base.train, kernel_mode=mode))
        out = Path(args.out) / f"{mode}-{int(time.time())}"
        t0 = time.perf_counter()
        train(recipe, out, ds=ds, progress=True)
        secs = time.perf_counter() - t0
        acc = evaluate(out, ds, subnets)
        results[mode] = {"train_s": secs, "acc": acc,
                         "mean_random": sum(v for k, v in acc.items() if k.startswith("random")) / args.random}
    print(json.dumps(results, indent=1))
    print(f"{'subnet':<10} {'centre':>8} {'transform':>10}")
    for name in subnets:
        print(f"{name:<10} {results['centre']['acc'][name]:>8.2f} {results['transform']['acc'][name]:>10.2f}")
    print(f"{'mean rand':<10} {results['centre']['mean_random']:>8.2f} {results['transform']['mean_random']:>10.2f}")
    print(f"{'train s':<10} {results['centre']['train_s']:>8.0f} {results['transform']['train_s']:>10.0f}")


if __name__ == "__main__":
    main()
