"""Supernet training settings side by side: same recipe, data and seed, one [train] change each.

Trains the recipe once as written and once per --variant, then reports validation accuracy
after BN recalibration for smallest, middle, largest and a fixed set of random subnets, and
training time. With --alone, subnets are also trained by themselves (one-subnet spaces, which
tightfit.train.loop trains as plain networks) under the same data and schedule: the gap between
one of them and the same subnet cut from the supernet is what weight sharing costs at that
many epochs. A variant may also set ``seed=N``: the training seed (initialisation, sampling,
batch order), with the data split and subset still drawn from the recipe's seed, so two seeds
of one setting show the noise level.

    python scripts/bench_train_settings.py recipes/demo.toml --variant random_subnets=1
    python scripts/bench_train_settings.py recipes/fashion-mnist.toml --epochs 1 \\
        --variant lr=0.025 --variant distill=false --alone
    python scripts/bench_train_settings.py recipes/fashion-mnist.toml --epochs 2 --max-train-images 12800 \\
        --threads 1 --variant lr_end=0.05 --alone largest,middle,smallest --json screen.json

With --json, every finished run is merged into that file at once (an existing label is
replaced), so a long screen can be split over several invocations (--no-base skips the recipe
as written). --finetune STEPS[,STEPS...] also fine-tunes the middle and smallest subnets of the
as-written run (or of --finetune-run DIR) from their inherited weights, distilling from its
largest, and reports what those steps buy (the product's fine-tune: tightfit search --finetune-steps).
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import random
import sys
import time
from pathlib import Path

import torch

from tightfit.data.dataset import calibration_batches, eval_batches, load_dataset
from tightfit.model.recalibrate import accuracy, subnet_accuracy
from tightfit.model.space import SpaceSpec, Subnet
from tightfit.recipe import Recipe, TrainConfig, load_recipe
from tightfit.train.loop import train
from tightfit.rundir import load_trained
from tightfit.train.finetune import FinetuneSettings, finetuned_subnet

from screen_summary import COLUMNS, summarise  # scripts/screen_summary.py, torch-free for the benchmark page


def parse_variant(text: str) -> dict:
    """'lr=0.025,distill=false' -> {'lr': 0.025, 'distill': False}, typed like TrainConfig's fields
    ('seed' is the recipe's top-level training seed)."""
    fields = {f.name: f for f in dataclasses.fields(TrainConfig)}
    out = {}
    for part in filter(None, text.split(",")):
        key, sep, value = part.partition("=")
        key = key.strip()
        if not sep or (key not in fields and key != "seed"):
            raise SystemExit(f"error: --variant {text!r}: expected KEY=VALUE with KEY seed or one of {', '.join(fields)}")
        current = 0 if key == "seed" else getattr(TrainConfig(), key)
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


def with_changes(base: Recipe, changes: dict) -> Recipe:
    train_changes = {k: v for k, v in changes.items() if k != "seed"}
    return dataclasses.replace(base, seed=changes.get("seed", base.seed),
                               train=dataclasses.replace(base.train, **train_changes))


def subnet_space(space: SpaceSpec, subnet: Subnet) -> SpaceSpec:
    """The one-subnet space holding exactly ``subnet`` (one choice per stage, as smallest/middle/largest)."""
    stages = []
    for st, blocks in zip(space.stages, subnet.stages):
        if len(set(blocks)) != 1:
            raise SystemExit(f"error: --alone needs one choice per stage; {subnet.to_key()} mixes them")
        (e, k), = set(blocks)
        stages.append(dataclasses.replace(st, depths=(len(blocks),), expansions=(e,), kernels=(k,)))
    return dataclasses.replace(space, stages=tuple(stages))


def evaluate(run_dir: Path, ds, subnets, calib_seed: int) -> dict[str, float]:
    """Validation accuracy after BN recalibration; the calibration batches come from ``calib_seed``
    (the base recipe's), so every run is judged on the same batches."""
    run = load_trained(run_dir)
    calib = calibration_batches(ds, run.recipe.train.batch_size, run.recipe.train.recalibration_batches, calib_seed)
    return {name: subnet_accuracy(run.supernet, s, calib, eval_batches(ds.val_x, ds.val_y, ds, 512))
            for name, s in subnets.items()}


def timed_train(recipe: Recipe, out: Path, ds) -> tuple[float, float]:
    """(wall seconds, process CPU seconds) of one training run."""
    t0, c0 = time.perf_counter(), time.process_time()
    train(recipe, out, ds=ds, progress=True)
    return time.perf_counter() - t0, time.process_time() - c0


def finetune(run_dir: Path, ds, subnet: Subnet, steps: int, lr: float) -> dict:
    """Fine-tune ``subnet`` from its inherited weights the way `tightfit search --finetune-steps` does
    (tightfit.train.finetune), then validate it."""
    net, rec = finetuned_subnet(load_trained(run_dir), ds, subnet, FinetuneSettings(steps=steps, lr=lr))
    return {**rec, "seconds": rec["wall_s"], "cpu_seconds": rec["cpu_s"],
            "acc": accuracy(net, eval_batches(ds.val_x, ds.val_y, ds, 512))}


def merge_json(path: Path, label: str, record: dict, meta: dict) -> None:
    doc = json.loads(path.read_text()) if path.exists() else {}
    doc.setdefault("protocol", meta)
    doc.setdefault("runs", {})[label] = record
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(doc, indent=1) + "\n")


def print_summary(doc: dict) -> None:
    rows = summarise(doc)
    print(f"noise: sigma {rows[0]['sigma']:.2f} points per run, threshold {rows[0]['threshold']:.2f}")
    print(f"{'':<40} " + " ".join(f"{c:>11}" for c in COLUMNS) + f" {'mean':>7} {'train s':>8} {'d s':>6}  verdict")
    for r in rows:
        cells = " ".join(f"{r['delta'][c]:>+11.2f}" if c in r["delta"] else f"{'':>11}" for c in COLUMNS)
        mean = f"{r['mean_delta']:>+7.2f}" if "mean_delta" in r else f"{'':>7}"
        print(f"{r['label'][:40]:<40} {cells} {mean} {r['train_s']:>8.0f} {r['delta_s']:>+6.0f}  {r.get('verdict', '')}")


def print_table(results: dict) -> None:
    print(f"{'':<32} {'smallest':>9} {'middle':>9} {'largest':>9} {'mean rand':>9} {'train s':>8} {'CPU s':>8}")
    for label, r in results.items():
        acc = r["acc"]
        cells = [f"{acc[k]:>9.2f}" if k in acc else f"{'':>9}" for k in ("smallest", "middle", "largest")]
        mean = f"{r['mean_random']:>9.2f}" if "mean_random" in r else f"{'':>9}"
        print(f"{label[:32]:<32} {' '.join(cells)} {mean} {r['train_s']:>8.0f} {r['train_cpu_s']:>8.0f}")


# long: the argument list and the three kinds of run (variants, alone, fine-tune) read best in one place
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("recipe", nargs="?", help="the recipe (not needed with --summarise)")
    ap.add_argument("--summarise", default="", metavar="JSON",
                    help="print a --json file's runs as differences from the two-seed baseline and exit")
    ap.add_argument("--variant", action="append", default=[], help="[train] changes, e.g. lr=0.025,distill=false")
    ap.add_argument("--epochs", type=float, default=None, help="override train.epochs for every run")
    ap.add_argument("--max-train-images", type=int, default=None, help="override data.max_train_images")
    ap.add_argument("--alone", nargs="?", const="largest", default="",
                    help="also train these subnets by themselves (comma list of largest, middle, smallest; default largest)")
    ap.add_argument("--no-base", action="store_true", help="skip the recipe as written")
    ap.add_argument("--finetune", default="", help="fine-tune steps, e.g. 50,200, from the as-written run")
    ap.add_argument("--finetune-run", default="", help="the trained run to fine-tune from (default: this invocation's as-written run)")
    ap.add_argument("--finetune-lr", type=float, default=0.01)
    ap.add_argument("--random", type=int, default=8, help="fixed random subnets to average (default 8)")
    ap.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
    ap.add_argument("--json", default="", help="merge every finished run into this file")
    ap.add_argument("--out", default="runs/train-settings")
    args = ap.parse_args(argv)
    if args.summarise:
        print_summary(json.loads(Path(args.summarise).read_text()))
        return 0
    if not args.recipe:
        ap.error("a recipe is needed (or --summarise JSON)")
    torch.set_num_threads(args.threads)
    variants = {} if args.no_base else {"as written": {}}
    variants.update({v: parse_variant(v) for v in args.variant})
    base = load_recipe(args.recipe)
    if args.epochs:
        base = dataclasses.replace(base, train=dataclasses.replace(base.train, epochs=args.epochs))
    if args.max_train_images is not None:
        base = dataclasses.replace(base, data=dataclasses.replace(base.data, max_train_images=args.max_train_images))
    ds = load_dataset(base.data, base.seed)
    space = base.space
    rng = random.Random(123)
    subnets = {"smallest": space.smallest(), "middle": space.middle(), "largest": space.largest(),
               **{f"random{i}": space.sample(rng) for i in range(args.random)}}
    meta = {"recipe": args.recipe, "recipe_hash": base.hash(), "epochs": base.train.epochs,
            "train_images": len(ds.train_y), "val_images": len(ds.val_y), "threads": args.threads,
            "subnets": {k: s.to_key() for k, s in subnets.items()}}
    stamp = int(time.time())
    results = {}
    def record(label: str, rec: dict) -> None:
        results[label] = rec
        if args.json:
            merge_json(Path(args.json), label, rec, meta)
    for label, changes in variants.items():
        recipe = with_changes(base, changes)
        out = Path(args.out) / f"{len(results)}-{stamp}"
        wall, cpu = timed_train(recipe, out, ds)
        t0 = time.perf_counter()
        acc = evaluate(out, ds, subnets, base.seed)
        record(label, {"run": str(out), "changes": changes, "train_s": wall, "train_cpu_s": cpu, "acc": acc,
                       "eval_s": time.perf_counter() - t0,
                       "mean_random": sum(v for k, v in acc.items() if k.startswith("random")) / max(args.random, 1)})
    for which in filter(None, args.alone.split(",")):
        out = Path(args.out) / f"alone-{which}-{stamp}"
        alone = dataclasses.replace(base, name=f"{base.name}-{which}", space=subnet_space(space, subnets[which]))
        wall, cpu = timed_train(alone, out, ds)
        record(f"{which} alone", {"run": str(out), "train_s": wall, "train_cpu_s": cpu,
                                  "acc": evaluate(out, ds, {which: alone.space.largest()}, base.seed)})
    for steps in [int(s) for s in filter(None, args.finetune.split(","))]:
        if not args.finetune_run and "as written" not in results:
            raise SystemExit("error: --finetune needs --finetune-run or the as-written run (drop --no-base)")
        run_dir = Path(args.finetune_run or results["as written"]["run"])
        for which in ("middle", "smallest"):
            ft = finetune(run_dir, ds, subnets[which], steps, args.finetune_lr)
            record(f"{which} fine-tuned {steps} steps", {"run": str(run_dir), "train_s": ft["seconds"],
                                                         "train_cpu_s": ft["cpu_seconds"], "acc": {which: ft["acc"]},
                                                         "finetune": ft})
    Path(args.out).mkdir(parents=True, exist_ok=True)
    (Path(args.out) / f"results-{stamp}.json").write_text(json.dumps(results, indent=1))
    print_table(results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
