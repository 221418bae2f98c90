"""`tightfit demo`: the whole foundation on built-in data, in a few minutes on 2 cores."""
from __future__ import annotations

import time
from datetime import datetime
from pathlib import Path

from tightfit.cut import cut_one, format_table, measure_latency
from tightfit.data.dataset import load_dataset
from tightfit.errors import UserError
from tightfit.recipe import load_recipe
from tightfit.rundir import load_trained
from tightfit.train import train


def default_recipe() -> Path:
    for candidate in (Path("recipes/demo.toml"), Path(__file__).resolve().parents[2] / "recipes" / "demo.toml"):
        if candidate.is_file():
            return candidate
    raise UserError("recipes/demo.toml not found: run from the repository root or pass --recipe")


def run_demo(run_dir: str | Path | None = None, recipe_path: str | Path | None = None) -> Path:
    t0 = time.perf_counter()
    recipe_path = Path(recipe_path) if recipe_path else default_recipe()
    recipe = load_recipe(recipe_path)
    run_dir = Path(run_dir) if run_dir else Path("runs") / f"demo-{datetime.now():%Y%m%d-%H%M%S}"
    print(f"tightfit demo: recipe {recipe_path}, run directory {run_dir.resolve()}")
    ds = load_dataset(recipe.data, recipe.seed)
    print(f"data: {len(ds.train_y)} train / {len(ds.val_y)} validation / {len(ds.test_y)} test images, "
          f"{ds.num_classes} classes ({', '.join(ds.class_names)}); generated in {time.perf_counter() - t0:.1f} s")
    print(f"search space: {recipe.space.size():,} subnets")
    train(recipe, run_dir, recipe_path=recipe_path, ds=ds)
    run = load_trained(run_dir)
    results = []
    for name in ("smallest", "middle", "largest"):
        subnet = getattr(recipe.space, name)()
        results.append(cut_one(run, ds, name, subnet, run_dir / "exports")[0])
    measure_latency(results)
    print()
    print(format_table(results))
    print(f"\nvalidation accuracy after BatchNorm recalibration; latency: ONNX Runtime, batch 1, 1 thread, this machine.")
    print(f"outputs: {run_dir.resolve()}  (checkpoint.pt, metrics.jsonl, exports/*/model.onnx)")
    print(f"demo finished in {time.perf_counter() - t0:.0f} s")
    return run_dir
