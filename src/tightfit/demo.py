"""`tightfit demo`: the user's whole day on the built-in dataset, in a few minutes on 2 cores.

profile this machine from the recipe → train for two budgets → cut three reference subnets →
search the two budgets → export with manifests → verify (QA re-measurement) → report.
"""
from __future__ import annotations

import time
from datetime import datetime
from pathlib import Path

from tightfit.export.by_hand import export_cuts
from tightfit.export.cut import format_table
from tightfit.data.dataset import load_dataset
from tightfit.errors import UserError
from tightfit.recipe import load_recipe
from tightfit.rundir import load_trained
from tightfit.train.commands import with_command_line_targets
from tightfit.train.loop import train


def default_recipe() -> Path:
    for candidate in (Path("recipes/demo.toml"), Path(__file__).resolve().parents[2] / "recipes" / "demo.toml"):
        if candidate.is_file():
            return candidate
    raise UserError("recipes/demo.toml not found: run from the repository root or pass --recipe")


def _budgets_between(predictor, space) -> list[str]:
    """Two budgets inside the space's predicted latency range (35 % and 70 % of the way up)."""
    lo, hi = predictor.predict_ms(space.smallest()), predictor.predict_ms(space.largest())
    return [f"{lo + f * (hi - lo):.3g}ms" for f in (0.35, 0.7)]


def _stage(title: str, t0: float) -> None:
    print(f"\n== {title}  (t = {time.perf_counter() - t0:.0f} s)")


# long: the demo reads as the user's day, one stage after another; splitting it would hide the order
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

    _stage("1. profile this machine from the recipe (probe bundle + on-device runner; no training needed)", t0)
    from tightfit.latency.predict import load_predictor
    from tightfit.latency.table import profile_host
    table = profile_host(recipe_path, progress=False, out=run_dir / "latency" / "this-host.json")
    predictor = load_predictor(recipe, str(table), target="budget_stat_ms")
    budgets = _budgets_between(predictor, recipe.space)
    print(f"latency table: {table}  (budgets chosen inside the space's range: {', '.join(budgets)})")

    _stage("2. train the supernet for those budgets (sandwich rule + subnets from each budget's band)", t0)
    recipe, targets_toml = with_command_line_targets(recipe, [str(table)], budgets)
    train(recipe, run_dir, recipe_path=recipe_path, ds=ds, extra_toml=targets_toml)
    run = load_trained(run_dir)

    _stage("3. cut smallest / middle / largest (BN recalibration, static net, ONNX)", t0)
    results = export_cuts(run, ds, [(name, getattr(recipe.space, name)()) for name in ("smallest", "middle", "largest")],
                          run_dir / "exports" / "reference")
    print(format_table(results))

    _stage("4. search each budget, verify the top candidates by direct measurement, export", t0)
    from tightfit.search.driver import run_search
    from tightfit.search.settings import SearchSettings
    from tightfit.search.commands import format_picks
    # sized for a few minutes
    settings = SearchSettings(population=8, evaluations=24, top=2, val_images=600)
    picks = run_search(run_dir, [str(table)], [t.budget_ms for t in recipe.train.targets], settings)
    print(format_picks(picks))

    _stage("5. QA: re-measure every export against its manifest (tightfit verify)", t0)
    from tightfit.ondevice import verify
    exports = [p["export_dir"] for p in picks]
    code = verify.main(exports + ["--out", str(run_dir / "verdict.json")])

    _stage("6. report", t0)
    from tightfit.report.page import write_report
    page = write_report(run_dir)
    print(f"\nsummary: {len(picks)} picks exported under {run_dir / 'exports'}; "
          f"verify {'passed' if code == 0 else 'found a miss' if code == 1 else 'failed'}; "
          f"report {page.resolve()}")
    print("validation accuracy after BatchNorm recalibration; latency: ONNX Runtime, batch 1, 1 thread, this machine.")
    print(f"demo finished in {time.perf_counter() - t0:.0f} s")
    return run_dir
