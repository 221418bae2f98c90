"""The sharing gap at declared targets: train the supernet for targets, then compare, per target band,
architectures cut from it with the same architectures trained alone for the same steps.

Targets are placed as the Fashion-MNIST benchmark places them: a budget just above a hand-scaled
family member's predicted latency on a table (default 1.04 x). Each band gets two architectures:
the member itself and the band's other one-choice-per-stage architecture with the most
multiply-adds. Every variant's supernet is judged on the same validation images after BN
recalibration on the same batches. A variant with target_elite > 0 also reports each band's final
elite ("w0.5-mid-elite-0", ...), read from its checkpoint; --alone-elite RUN trains those of RUN alone.

    python scripts/screen_targets.py recipes/fashion-mnist.toml --table T.json --epochs 3.4 --threads 2 \\
        --members w0.5-min,w0.5-mid,w0.75-max --variant distill=false \\
        --variant distill=false,target_candidates=3 --alone --json screen.json
    python scripts/screen_targets.py recipes/fashion-mnist.toml --table T.json --epochs 3.4 --threads 2 \
        --variant distill=false,target_elite=4 --json screen.json   # then --alone-elite RUN_DIR
"""
from __future__ import annotations

import argparse
import dataclasses
import random
import sys
import time
from itertools import groupby
from pathlib import Path

import torch

from tightfit.budgets import budget_label
from tightfit.checkpoint import load_checkpoint
from tightfit.data.dataset import load_dataset
from tightfit.latency.predict import load_predictor
from tightfit.model.arithmetic import architecture_size
from tightfit.model.space import BlockChoice, SpaceSpec, Subnet
from tightfit.recipe import Recipe, Target, load_recipe, recipe_from_dict
from tightfit.rundir import checkpoint_path
from tightfit.train.baselines import DEFAULT_FAMILY, member_subnet
from tightfit.train.targets import target_bands

from bench_train_settings import evaluate, merge_json, parse_variant, timed_train, with_changes


def uniform_stage_subnets(space: SpaceSpec, n: int, seed: int) -> list[Subnet]:
    """Distinct subnets with one block choice per stage (trainable alone as plain networks)."""
    rng, out = random.Random(seed), set()
    for _ in range(n):
        stages = tuple(tuple([BlockChoice(rng.choice(st.expansions), rng.choice(st.kernels))] * rng.choice(st.depths))
                       for st in space.stages)
        widths = (rng.choice(space.stem_choices),) + tuple(rng.choice(st.width_choices) for st in space.stages) \
            if space.elastic_width else ()
        out.add(Subnet(stages, widths))
    return sorted(out, key=lambda s: s.to_key())


def alone_space(space: SpaceSpec, subnet: Subnet) -> SpaceSpec:
    """The one-subnet space holding exactly ``subnet`` (its widths fixed). A stage that mixes block
    choices becomes one stage per run of equal blocks: the later ones keep the width at stride 1, so
    each block has the same input, output and skip as in the stage it came from."""
    widths = subnet.widths or (space.stem_channels,) + tuple(st.out_channels for st in space.stages)
    stages = []
    for st, blocks, w in zip(space.stages, subnet.stages, widths[1:]):
        for i, (choice, run) in enumerate(groupby(blocks)):
            stages.append(dataclasses.replace(st, out_channels=w, widths=(), depths=(len(list(run)),),
                                              expansions=(choice.expansion,), kernels=(choice.kernel,),
                                              stride=st.stride if i == 0 else 1))
    return dataclasses.replace(space, stem_channels=widths[0], stem_widths=(), stages=tuple(stages))


def elite_architectures(run_dir: Path, members: list[str]) -> dict[str, Subnet]:
    """The final elite of each band of a run trained with target_elite, named after the band's member
    ("w0.5-mid-elite-0"); the run's targets are in ``members`` order, one band per target."""
    state = load_checkpoint(checkpoint_path(run_dir))
    member_of = {b.name: m for b, m in zip(target_bands(recipe_from_dict(state["recipe"])), members)}
    return {f"{member_of[band]}-elite-{i}": Subnet.from_key(key)
            for band, keys in state.get("target_elite", {}).items() for i, key in enumerate(keys)}


def band_architectures(recipe: Recipe, table: str, members: list[str], over: float, classes: int
                       ) -> tuple[list[Target], dict[str, Subnet]]:
    """One target per member (budget = over x its predicted latency) and two architectures per band."""
    pred = load_predictor(recipe, table)
    family = {m.name: m for m in DEFAULT_FAMILY}
    pool = uniform_stage_subnets(recipe.space, 20_000, recipe.seed)
    lat = {s: pred.predict_ms(s) for s in pool}
    targets, archs = [], {}
    for name in members:
        m = member_subnet(recipe.space, family[name])
        budget = over * pred.predict_ms(m)
        low = recipe.train.target_band_bottom * budget
        others = [s for s in pool if low <= lat[s] <= budget and s != m]
        macs = {s: architecture_size(recipe.space, s, recipe.data.channels, recipe.data.image_size, classes)[1]
                for s in others}
        targets.append(Target(table, round(budget, 6)))
        archs[f"{name}"] = m
        if others:
            archs[f"{name}-band"] = max(others, key=macs.__getitem__)
        print(f"target {budget_label(budget)} above {name}: band {low:.4f}-{budget:.4f} ms, "
              f"{len(others)} one-choice-per-stage architectures in it", flush=True)
    return targets, archs


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("recipe")
    ap.add_argument("--table", required=True, help="latency table of the recipe's space (tightfit profile RECIPE)")
    ap.add_argument("--members", default="w0.5-min,w0.5-mid,w0.75-max", help="family members the budgets sit above")
    ap.add_argument("--over", type=float, default=1.04, help="budget = this x the member's predicted latency")
    ap.add_argument("--variant", action="append", default=[], help="[train] changes of a supernet trained for the targets")
    ap.add_argument("--plain", action="store_true", help="also train the recipe as written, without targets")
    ap.add_argument("--alone", action="store_true", help="also train every band architecture alone")
    ap.add_argument("--alone-elite", default="", metavar="RUN_DIR",
                    help="also train alone each elite architecture kept in this run's checkpoint (target_elite)")
    ap.add_argument("--epochs", type=float, default=None)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--json", default="")
    ap.add_argument("--out", default="runs/screen-targets")
    args = ap.parse_args(argv)
    torch.set_num_threads(args.threads)
    base = load_recipe(args.recipe)
    if args.epochs:
        base = dataclasses.replace(base, train=dataclasses.replace(base.train, epochs=args.epochs))
    ds = load_dataset(base.data, base.seed)
    members = args.members.split(",")
    targets, archs = band_architectures(base, args.table, members, args.over, ds.num_classes)
    meta = {"recipe": args.recipe, "recipe_hash": base.hash(), "epochs": base.train.epochs, "threads": args.threads,
            "train_images": len(ds.train_y), "val_images": len(ds.val_y), "table": Path(args.table).name,
            "targets": [{"budget_ms": t.budget_ms} for t in targets], "over": args.over,
            "subnets": {k: s.to_key() for k, s in archs.items()}}
    stamp = int(time.time())
    runs = ({"as written (no targets)": (base, {})} if args.plain else {}) | {
        f"targets, {v}": (with_changes(base, parse_variant(v)), parse_variant(v)) for v in args.variant}
    for label, (recipe, changes) in runs.items():
        if not label.startswith("as written"):
            recipe = dataclasses.replace(recipe, train=dataclasses.replace(recipe.train, targets=tuple(targets)))
        out = Path(args.out) / f"{label.replace(' ', '_').replace(',', '')}-{stamp}"
        wall, cpu = timed_train(recipe, out, ds)
        elite = elite_architectures(out, members) if recipe.train.target_elite else {}
        acc = evaluate(out, ds, archs | elite, base.seed)
        print(label, {k: round(v, 2) for k, v in acc.items()}, f"{cpu:.0f} CPU-s", flush=True)
        if args.json:
            merge_json(Path(args.json), label, {"changes": changes, "train_s": wall, "train_cpu_s": cpu, "acc": acc,
                                                "elite": {k: s.to_key() for k, s in elite.items()}}, meta)
    solo = (archs if args.alone else {}) | (elite_architectures(Path(args.alone_elite), members)
                                            if args.alone_elite else {})
    for name, subnet in solo.items():
        alone = dataclasses.replace(base, name=f"{base.name}-{name}", space=alone_space(base.space, subnet))
        out = Path(args.out) / f"alone-{name}-{stamp}"
        wall, cpu = timed_train(alone, out, ds)
        acc = evaluate(out, ds, {name: alone.space.largest()}, base.seed)
        print(f"{name} alone", round(acc[name], 2), f"{cpu:.0f} CPU-s", flush=True)
        if args.json:
            merge_json(Path(args.json), f"{name} alone", {"train_s": wall, "train_cpu_s": cpu, "acc": acc}, meta)
    return 0


if __name__ == "__main__":
    sys.exit(main())
