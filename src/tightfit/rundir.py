"""The run directory: where each step of the pipeline reads and writes.

RUN_DIR/
  recipe.toml          copy of the recipe the run was started with
  checkpoint.pt        latest training checkpoint (weights_only-loadable)
  metrics.jsonl        one JSON object per logged training step / epoch
  exports/NAME/        one folder per exported subnet (model.onnx, manifest.json, state_dict.pt)
"""
from __future__ import annotations

import shutil
from contextlib import contextmanager
from dataclasses import dataclass
import sys
from pathlib import Path
from typing import Iterator

import torch

from tightfit.checkpoint import CHECKPOINT_NAME, load_checkpoint
from tightfit.errors import UserError
from tightfit.recipe import Recipe, build_supernet, recipe_from_dict
from tightfit.model.supernet import Supernet


@dataclass
class TrainedRun:
    supernet: Supernet
    recipe: Recipe
    class_names: tuple[str, ...]
    mean: tuple[float, ...]
    std: tuple[float, ...]
    complete: bool


def checkpoint_path(run_dir: str | Path) -> Path:
    return Path(run_dir) / CHECKPOINT_NAME


@contextmanager
def discard_unstarted_run(run_dir: str | Path) -> Iterator[None]:
    """Bad input found after ``run_dir`` was created (data, batch size) must not leave a
    checkpoint-less folder behind: remove it, but only if this call created it."""
    run_dir = Path(run_dir)
    existed = run_dir.exists()
    try:
        yield
    except UserError:
        if not existed and run_dir.is_dir() and not checkpoint_path(run_dir).exists():
            shutil.rmtree(run_dir, ignore_errors=True)
        raise


def load_trained(run_dir: str | Path) -> TrainedRun:
    """Rebuild the supernet and its recipe from a run directory's checkpoint."""
    if not Path(run_dir).is_dir():
        raise UserError(f"run directory not found: {run_dir}")
    state = load_checkpoint(checkpoint_path(run_dir))
    try:
        recipe = recipe_from_dict(state["recipe"])
        net = build_supernet(recipe, len(state["class_names"]))
        net.load_state_dict(state["model"])
    except (KeyError, TypeError, RuntimeError) as e:
        raise UserError(f"checkpoint in {run_dir} does not match its recipe ({type(e).__name__}); retrain") from None
    net.eval()
    complete = bool(state.get("complete", False))
    if not complete:
        print(f"warning: training in {run_dir} did not finish (checkpoint at step {state.get('step', '?')}): what is "
              f"cut, profiled or searched from it is half-trained; resume with 'tightfit train RECIPE --run {run_dir}'",
              file=sys.stderr)
    return TrainedRun(net, recipe, tuple(state["class_names"]), tuple(state["mean"]), tuple(state["std"]), complete)


def pick_device(requested: str | None = None) -> torch.device:
    """CUDA when present, else CPU; ``requested`` ('cpu', 'cuda', 'cuda:1') forces one."""
    if requested:
        if requested.startswith("cuda") and not torch.cuda.is_available():
            raise UserError(f"--device {requested} asked for, but CUDA is not available here; use --device cpu")
        if not (requested == "cpu" or requested.startswith("cuda")):
            raise UserError(f"--device {requested!r} is not understood: use 'cpu', 'cuda' or 'cuda:N'")
        return torch.device(requested)
    return torch.device("cuda" if torch.cuda.is_available() else "cpu")


def set_threads(n: int | None) -> None:
    """torch CPU threads for this process (None: torch's default, all cores)."""
    if n:
        torch.set_num_threads(n)
