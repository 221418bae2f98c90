"""Supernet training settings side by side: same recipe, data and seed, one [train] change each.

Trains the recipe once as written and once per --variant, then reports validation accuracy
after BN recalibration for smallest, middle, largest and a fixed set of random subnets, and
training time. With --alone, the largest subnet is also trained by itself (a one-subnet
space, tightfit.train.baselines) under the same schedule: the gap between it and the supernet's
largest is what weight sharing costs at that many epochs.

    python scripts/bench_train_settings.py recipes/demo.toml --variant kernel_mode=transform
    python scripts/bench_train_settings.py recipes/fashion-mnist.toml --epochs 1 \\
        --variant lr=0.025 --variant distill=false --alone
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import random
import sys
import time
from pathlib import Path

from tightfit.train.baselines import Member, member_recipe
from tightfit.data.dataset import calibration_batches, eval_batches, load_dataset
from tightfit.model.recalibrate import subnet_accuracy
from tightfit.recipe import Recipe, TrainConfig, load_recipe
from tightfit.train.rundir import load_trained
from tightfit.train.loop import train


def parse_variant(text: str) -> dict:
    """'lr=0.025,distill=false' -> {'lr': 0.025, 'distill': False}, typed like TrainConfig's fields."""
    fields = {f.name: f for f in dataclasses.fields(TrainConfig)}
    out = {}
    for part in filter(None, text.split(",")):
        key, sep, value = part.partition("=")
        key = key.strip()
        if not sep or key not in fields:
            raise SystemExit(f"error: --variant {text!r}: expected KEY=VALUE with KEY one of {', '.join(fields)}")
        current = getattr(TrainConfig(), key)
        if isinstance(current, bool):
            if value.lower() not in ("true", "false"):
                raise SystemExit(f"error: --variant {text!r}: {key} takes true or false")
            out[key] = value.lower() == "true"
        else:
            try:
                out[key] = type(current)(value)
            except ValueError:
                raise SystemExit(f"error: --variant {text!r}: {key} takes a {type(current).__name__}") from None
    return out


def evaluate(run_dir: Path, ds, subnets) -> dict[str, float]:
    run = load_trained(run_dir)
    calib = calibration_batches(ds, run.recipe.train.batch_size, run.recipe.train.recalibration_batches, run.recipe.seed)
    return {name: subnet_accuracy(run.supernet, s, calib, eval_batches(ds.val_x, ds.val_y, ds, 512))
            for name, s in subnets.items()}


def timed_train(recipe: Recipe, out: Path, ds) -> tuple[float, float]:
    """(wall seconds, process CPU seconds) of one training run."""
    t0, c0 = time.perf_counter(), time.process_time()
    train(recipe, out, ds=ds, progress=True)
    return time.perf_counter() - t0, time.process_time() - c0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("recipe")
    ap.add_argument("--variant", action="append", default=[], help="[train] changes, e.g. lr=0.025,distill=false")
    ap.add_argument("--epochs", type=float, default=None, help="override train.epochs for every run")
    ap.add_argument("--alone", action="store_true", help="also train the largest subnet by itself")
    ap.add_argument("--random", type=int, default=8, help="fixed random subnets to average (default 8)")
    ap.add_argument("--out", default="runs/train-settings")
    args = ap.parse_args(argv)
    variants = {"as written": {}, **{v: parse_variant(v) for v in args.variant}}
    base = load_recipe(args.recipe)
    if args.epochs:
        base = dataclasses.replace(base, train=dataclasses.replace(base.train, epochs=args.epochs))
    ds = load_dataset(base.data, base.seed)
    space = base.space
    rng = random.Random(123)
    subnets = {"smallest": space.smallest(), "middle": space.middle(), "largest": space.largest(),
               **{f"random{i}": space.sample(rng) for i in range(args.random)}}
    stamp = int(time.time())
    results = {}
    for label, changes in variants.items():
        recipe = dataclasses.replace(base, train=dataclasses.replace(base.train, **changes))
        out = Path(args.out) / f"{len(results)}-{stamp}"
        wall, cpu = timed_train(recipe, out, ds)
        acc = evaluate(out, ds, subnets)
        results[label] = {"run": str(out), "train_s": wall, "train_cpu_s": cpu, "acc": acc,
                          "mean_random": sum(v for k, v in acc.items() if k.startswith("random")) / max(args.random, 1)}
    if args.alone:
        out = Path(args.out) / f"alone-{stamp}"
        wall, cpu = timed_train(member_recipe(base, Member("alone", 1.0, "max")), out, ds)
        results["largest alone"] = {"run": str(out), "train_s": wall, "train_cpu_s": cpu,
                                    "acc": evaluate(out, ds, {"largest": load_trained(out).recipe.space.largest()})}
    Path(args.out).mkdir(parents=True, exist_ok=True)
    (Path(args.out) / f"results-{stamp}.json").write_text(json.dumps(results, indent=1))
    print(f"{'':<24} {'smallest':>9} {'middle':>9} {'largest':>9} {'mean rand':>9} {'train s':>8} {'CPU s':>8}")
    for label, r in results.items():
        acc = r["acc"]
        cells = [f"{acc[k]:>9.2f}" if k in acc else f"{'':>9}" for k in ("smallest", "middle", "largest")]
        mean = f"{r['mean_random']:>9.2f}" if "mean_random" in r else f"{'':>9}"
        print(f"{label[:24]:<24} {' '.join(cells)} {mean} {r['train_s']:>8.0f} {r['train_cpu_s']:>8.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
