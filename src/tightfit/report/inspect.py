"""`tightfit inspect`: what a recipe's space, a run and its latency tables offer, before choosing budgets.

Users otherwise choose budgets blind: this prints the space's size and its params / MACs range,
the predicted latency range on each table, one subnet's figures on demand, the front a search
found and the picks it made.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

from tightfit.errors import UserError
from tightfit.latency.predict import load_predictor, predicted_range
from tightfit.latency.probe import class_count
from tightfit.model.arithmetic import architecture_size
from tightfit.ondevice.files import read_jsonl
from tightfit.ondevice.measurement import figure_of
from tightfit.recipe import Recipe, load_recipe
from tightfit.report.data import _read_json, accuracy_text, export_folder, manifest_claim


def space_lines(recipe: Recipe, num_classes: int) -> list[str]:
    sp, data = recipe.space, recipe.data
    widths = ", elastic width" if sp.elastic_width else ""
    lines = [f"space: {sp.size():,} subnets over {len(sp.stages)} stages{widths}; input {data.channels}x"
             f"{data.image_size}x{data.image_size}, {num_classes} classes"]
    for name in ("smallest", "middle", "largest"):
        s = getattr(sp, name)()
        params, macs = architecture_size(sp, s, data.channels, data.image_size, num_classes)
        lines.append(f"  {name:<8} {params:>10,} params {macs / 1e6:>8.2f} M MACs   {s.to_key()}")
    return lines


def subnet_lines(recipe: Recipe, num_classes: int, key: str, tables: list[Path]) -> list[str]:
    sp, data = recipe.space, recipe.data
    subnet = sp.parse_key(key)
    params, macs = architecture_size(sp, subnet, data.channels, data.image_size, num_classes)
    lines = [f"subnet {subnet.to_key()}: {params:,} params, {macs / 1e6:.2f} M MACs"]
    for t in tables:
        pred = load_predictor(recipe, t)
        lines.append(f"  {pred.table.name}: predicted p{int(pred.table.percentile)} {pred.predict_ms(subnet):.3f} ms")
    return lines


def training_lines(run_dir: Path, complete: bool, epochs: float) -> list[str]:
    evals = [r for r in read_jsonl(run_dir / "metrics.jsonl")[0] if "val_acc_largest" in r]
    state = "complete" if complete else "NOT complete (interrupted: resume with tightfit train ... --resume)"
    line = f"training: {state}; {epochs:g} epochs in the recipe"
    if evals:
        e = evals[-1]
        acc = [f"{n} {accuracy_text({'top1': e[f'val_acc_{n}'], 'images': e.get('val_images')}, e[f'val_acc_{n}'])}"
               for n in ("largest", "smallest") if f"val_acc_{n}" in e]
        line += f"; after epoch {e['epoch']:g}: {', '.join(acc)} validation"
    return [line]


def search_lines(run_dir: Path, front: bool) -> list[str]:
    lines = []
    picks = run_dir / "search" / "picks.json"
    if picks.is_file():
        for p in json.loads(picks.read_text("utf-8")):
            got = figure_of(p.get("measured"))
            meas = f"measured {got:.3f} ms" if got else "not measured here"
            manifest = _read_json(Path(export_folder(p, run_dir)) / "manifest.json", [])
            lines.append(f"pick {p['device']} {p['budget_ms']:g} ms: {p['key']}  validation "
                         f"{accuracy_text(manifest_claim(manifest, 'validation'), p['val_acc'])}, {meas}, "
                         f"{'fits' if p['fits'] else 'DOES NOT FIT'}")
    for path in sorted((run_dir / "search").glob("front-*.json")) if front else []:
        rows = json.loads(path.read_text("utf-8"))
        lines.append(f"front on {path.stem.removeprefix('front-')} ({len(rows)} subnets, predicted ms, validation %):")
        lines += [f"  {r['predicted_ms']:.4f} ms  {r['val_acc']:6.2f} %  {r['key']}" for r in rows]
    return lines


def recipe_classes(recipe: Recipe, given: int) -> int:
    """A recipe file's class count: ``given`` (--classes), else data.classes, else counted in the data.
    Sizes and latency ranges need only the space and this count, not the images."""
    if given:
        return given
    try:
        return class_count(recipe)
    except UserError as e:
        raise UserError(f"{e}; or, to inspect before the data exists, give the class count: --classes N "
                        "(or data.classes in the recipe)") from None


def inspect(target: str, tables: list[str], subnets: list[str], front: bool, classes: int = 0) -> str:
    """The text of `tightfit inspect TARGET`: TARGET is a recipe file or a run directory; ``classes``
    (0: unknown) stands in for a recipe's data that does not exist yet."""
    if classes < 0 or classes == 1:
        raise UserError(f"--classes {classes}: a classifier needs at least 2 classes")
    path = Path(target)
    run_dir: Optional[Path] = None
    if path.is_dir():
        from tightfit.rundir import load_trained
        run = load_trained(path)
        if classes and classes != len(run.class_names):
            raise UserError(f"--classes {classes}: the run in {path} has {len(run.class_names)} classes; "
                            "--classes is for a recipe file whose data does not exist yet")
        recipe, classes, run_dir = run.recipe, len(run.class_names), path
    elif path.is_file():
        recipe = load_recipe(path)
        classes = recipe_classes(recipe, classes)
    else:
        raise UserError(f"{target} is neither a recipe file nor a run directory")
    table_paths = [Path(t) for t in tables] or (sorted((run_dir / "latency").glob("*.json")) if run_dir else [])
    lines = space_lines(recipe, classes)
    if run_dir is not None:
        lines += training_lines(run_dir, run.complete, recipe.train.epochs)
    lines += [predicted_range(recipe, t) for t in table_paths]
    if run_dir is not None and not table_paths:
        lines.append(f"no latency table yet: tightfit profile {run_dir} (this machine) or tightfit probe (another device)")
    for key in subnets:
        lines += subnet_lines(recipe, classes, key, table_paths)
    if run_dir is not None:
        lines += search_lines(run_dir, front)
    return "\n".join(lines)
