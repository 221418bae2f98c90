"""The training loop: schedule, checkpoints, exact resume, signals, epoch evaluation.

One step is the sandwich of sandwich.py. Subnet sampling and augmentation are seeded from
the step, so a resumed run (and every distributed rank) draws exactly the same subnets
and batches; the one sampling state carried from step to step, the bands' kept elite
(train.target_elite), goes into the checkpoint.
"""
from __future__ import annotations

import json
import signal
import time
from functools import partial
from pathlib import Path

import torch
from tightfit.progress import bar as progress_bar

from tightfit.checkpoint import load_checkpoint, remove_stale_temporaries, save_checkpoint
from tightfit.train.distributed import (GradientSync, Ranks, barrier, broadcast_weights, decided_on_main, joined,
                                  local_rows, mean_over_ranks, step_seed)
from tightfit.data.dataset import Dataset, calibration_batches, eval_batches, load_dataset, steps_per_epoch, train_batches
from tightfit.errors import Interrupted, UserError
from tightfit.model.recalibrate import subnet_accuracy
from tightfit.model.supernet import Supernet
from tightfit.ondevice.files import append_jsonl, read_jsonl, write_bytes, write_text
from tightfit.recipe import Recipe, build_supernet
from tightfit.rundir import checkpoint_path
from tightfit.train.initialise import zero_init_residual
from tightfit.train.sandwich import lr_at, macs_distance, make_optimizer, step_subnets, train_step
from tightfit.train.teacher import MeanTeacher
from tightfit.train.targets import (Band, Elite, band_subnets, batch_loss, elite_from_keys, elite_keys, first_elite,
                                    target_bands)


class _StopFlag:
    """Turns SIGINT/SIGTERM into a flag checked between steps, so the checkpoint is consistent."""

    def __init__(self) -> None:
        self.signum: int | None = None
        self._old: dict[int, object] = {}

    def __enter__(self) -> "_StopFlag":
        for s in (signal.SIGINT, signal.SIGTERM):
            self._old[s] = signal.signal(s, self._handle)
        return self

    def _handle(self, signum, frame) -> None:
        self.signum = signum

    def __exit__(self, *exc) -> None:
        for s, h in self._old.items():
            signal.signal(s, h)


def _state(model, opt, step, recipe, ds: Dataset, complete: bool, averaged: MeanTeacher | None = None,
           elite: Elite | None = None) -> dict:
    state = {"model": model.state_dict(), "optimizer": opt.state_dict(), "step": step,
             "rng": torch.get_rng_state(), "recipe": recipe.to_dict(), "recipe_hash": recipe.hash(),
             "class_names": list(ds.class_names), "mean": list(ds.mean), "std": list(ds.std), "complete": complete}
    if averaged is not None:
        state["mean_teacher"] = averaged.state_dict()
    if elite:
        state["target_elite"] = elite_keys(elite)
    return state


def _global_batch_loss(model: Supernet, x: torch.Tensor, y: torch.Tensor, ranks: Ranks, dev: torch.device,
                       subnet) -> float:
    """A subnet's loss on the whole global batch, so every rank chooses the same band subnets."""
    return mean_over_ranks(batch_loss(model, x, y, subnet), ranks, dev)


def _trim_log(path: Path, step: int) -> None:
    """On resume, drop records written after the checkpoint we resume from, and a last line
    that a kill cut in half."""
    if not path.exists():
        return
    keep = [r for r in read_jsonl(path)[0] if r.get("step", 0) <= step]
    write_text(path, "".join(json.dumps(r) + "\n" for r in keep))


def _epoch_eval(model: Supernet, recipe: Recipe, ds: Dataset, epoch: int, step: int) -> dict:
    calib = calibration_batches(ds, recipe.train.batch_size, min(5, recipe.train.recalibration_batches), recipe.seed)
    rec = {"step": step, "epoch": epoch, "val_images": len(ds.val_y)}  # the count behind each accuracy
    pairs = (("largest", recipe.space.largest()), ("smallest", recipe.space.smallest()))
    for name, sub in pairs[:1] if recipe.space.size() == 1 else pairs:
        rec[f"val_acc_{name}"] = subnet_accuracy(model, sub, calib, eval_batches(ds.val_x, ds.val_y, ds, 512))
    model.train()
    return rec


def train(recipe: Recipe, run_dir: str | Path, *, resume: bool = False, recipe_path: str | Path | None = None,
          progress: bool = True, ds: Dataset | None = None, device: str | None = None,
          stop_at_step: int | None = None, extra_toml: str = "") -> Path:
    """Train (or resume) the supernet of ``recipe`` into ``run_dir``; returns the checkpoint path.

    Under torchrun every process calls this; rank 0 alone touches ``run_dir`` (see
    tightfit.train.distributed). ``stop_at_step`` behaves like a SIGINT arriving at that step
    (checkpoint, then Interrupted); under torchrun, like any signal, it takes effect one
    step later, when all ranks have agreed on it. ``extra_toml`` is appended to the run's copy of
    the recipe (targets given on the command line), so that copy resumes the same training."""
    run_dir = Path(run_dir)
    bands = target_bands(recipe)  # a target outside the space is refused before anything is written
    with joined(device) as (ranks, dev):
        local_rows(recipe.train.batch_size, ranks)  # refuse a global batch that does not split
        state = decided_on_main(ranks, lambda: _open_run(run_dir, recipe, resume), dev)
        ds = ds or load_dataset(recipe.data, recipe.seed)
        torch.manual_seed(recipe.seed)
        model = build_supernet(recipe, ds.num_classes).to(dev)
        if recipe.train.zero_init_residual:
            zero_init_residual(model)
        if recipe.train.channels_last:
            model = model.to(memory_format=torch.channels_last)
        opt = make_optimizer(model, recipe.train)
        start, complete = 0, False
        if state is not None:
            model.load_state_dict(state["model"])
            opt.load_state_dict(state["optimizer"])
            torch.set_rng_state(state["rng"])
            start, complete = int(state["step"]), bool(state.get("complete", False))
        broadcast_weights(model, ranks)  # every rank starts from rank 0's weights
        averaged = MeanTeacher(model, recipe.train.teacher_decay) if recipe.train.teacher == "mean" else None
        if averaged is not None and state is not None:
            averaged.load_state_dict(state["mean_teacher"])
        elite = first_elite(bands, recipe.seed, recipe.train.target_elite)
        if state is not None and "target_elite" in state:
            elite = elite_from_keys(state["target_elite"])
        if ranks.is_main and recipe_path is not None and not (run_dir / "recipe.toml").exists():
            write_bytes(run_dir / "recipe.toml", Path(recipe_path).read_bytes() + extra_toml.encode())
        return _loop(model, opt, recipe, ds, run_dir, start, progress, dev, ranks, stop_at_step, complete, bands,
                     averaged, elite)


def _open_run(run_dir: Path, recipe: Recipe, resume: bool) -> dict | None:
    """Check and prepare ``run_dir``; returns the checkpoint to resume from, if any (rank 0 only)."""
    ckpt = checkpoint_path(run_dir)
    if ckpt.exists() and not resume:
        raise UserError(f"{run_dir} already holds a training run: add --resume to continue it, or pick a new --run")
    try:
        run_dir.mkdir(parents=True, exist_ok=True)
        (run_dir / ".write-test").touch()
        (run_dir / ".write-test").unlink()
    except OSError as e:
        raise UserError(f"cannot write to run directory {run_dir}: {e.strerror}; choose another --run") from None
    state = None
    if resume and ckpt.exists():
        remove_stale_temporaries(ckpt)  # left by a kill in the middle of a save; never trusted
        state = load_checkpoint(ckpt)
        if state.get("recipe_hash") != recipe.hash():
            raise UserError(f"checkpoint in {run_dir} was trained from a different recipe; use that recipe or a new --run")
    return state


# long: one training step's bookkeeping (schedule, sync, logging, checkpoint, stop) must stay in one visible order
def _loop(model: Supernet, opt, recipe: Recipe, ds: Dataset, run_dir: Path, start: int, progress: bool,
          dev: torch.device, ranks: Ranks = Ranks(), stop_at_step: int | None = None, complete: bool = False,
          bands: list[Band] = (), averaged: MeanTeacher | None = None, elite: Elite | None = None) -> Path:
    cfg = recipe.train
    spe = steps_per_epoch(ds, cfg.batch_size)
    if spe == 0:
        raise UserError(f"train.batch_size = {cfg.batch_size} is larger than the training split "
                        f"({len(ds.train_y)} images): lower train.batch_size or add data")
    total = max(1, int(round(cfg.epochs * spe)))
    warmup = int(cfg.warmup_epochs * spe)
    rows = local_rows(cfg.batch_size, ranks)
    distance = macs_distance(recipe, ds.num_classes, cfg.random_macs_target) if cfg.random_macs_target else None
    main = ranks.is_main
    metrics = run_dir / "metrics.jsonl"
    if main:
        _trim_log(metrics, start)
    ckpt = checkpoint_path(run_dir)
    model.train()
    step = start
    bar = progress_bar(total=total, initial=start, desc="supernet", unit="step", disable=not (progress and main))
    t0, seen = time.perf_counter(), 0
    with _StopFlag() as stop:
        sync = GradientSync(model, ranks, lambda: stop.signum) if ranks.launched else None
        while step < total:
            epoch = step // spe
            for x, y in train_batches(ds, recipe.data, cfg.batch_size, recipe.seed, epoch, start=step % spe):
                seen += len(y)  # the global batch
                x, y = x[rows].to(dev, non_blocking=True), y[rows].to(dev, non_blocking=True)
                if cfg.channels_last:
                    x = x.contiguous(memory_format=torch.channels_last)
                lr = lr_at(step, total, warmup, cfg.lr, cfg.final_lr_fraction)
                for g in opt.param_groups:
                    g["lr"] = lr
                if ranks.launched:
                    torch.manual_seed(step_seed(recipe.seed, ranks.rank, step))
                subnets = step_subnets(recipe, step, spe, distance)
                if len(subnets) > 1:  # not in the largest-only warm-up
                    loss_of = partial(_global_batch_loss, model, x, y, ranks, dev)
                    band, elite = band_subnets(bands, elite, step, recipe.seed, cfg, loss_of)
                    subnets += band
                teacher = averaged.logits(x) if averaged is not None and len(subnets) > 1 else None
                losses = train_step(model, opt, x, y, subnets, cfg, sync, teacher)
                if averaged is not None:
                    averaged.update(model)
                step += 1
                ips = seen / (time.perf_counter() - t0)
                bar.update(1)
                bar.set_postfix(loss=f"{losses['loss_largest']:.3f}", img_s=f"{ips:.0f}")
                if main and (step % 20 == 0 or step == total):
                    append_jsonl(metrics, {"step": step, "epoch": step / spe, "lr": lr, "images_per_s": ips, **losses})
                end_of_epoch = step % spe == 0 or step == total
                if step == stop_at_step:
                    stop.signum = signal.SIGINT
                stopping = sync.agreed_stop if sync else stop.signum
                if main and end_of_epoch:
                    append_jsonl(metrics, _epoch_eval(model, recipe, ds, epoch + 1, step))
                if end_of_epoch or (cfg.checkpoint_every and step % cfg.checkpoint_every == 0) or stopping:
                    if main:
                        save_checkpoint(ckpt, _state(model, opt, step, recipe, ds, step == total, averaged, elite))
                    barrier(ranks)  # nobody leaves (or is stopped by torchrun) before the file is whole
                if stopping:
                    bar.close()
                    raise Interrupted(130 if stopping == signal.SIGINT else 143,
                                      f"interrupted at step {step}; checkpoint written. Resume with: "
                                      f"tightfit train {run_dir / 'recipe.toml'} --run {run_dir} --resume")
                if step >= total or end_of_epoch:
                    break
    bar.close()
    if start >= total and not complete:
        _finish(model, opt, recipe, ds, run_dir, total, spe, ranks, averaged, elite)
    return ckpt


def _finish(model: Supernet, opt, recipe: Recipe, ds: Dataset, run_dir: Path, total: int, spe: int,
            ranks: Ranks, averaged: MeanTeacher | None = None, elite: Elite | None = None) -> None:
    """Resume of a run stopped after its last step's checkpoint but before the one marked
    complete (only older checkpoints, or a kill between the two writes, leave that state): run the
    final evaluation again and write the complete checkpoint, as the uninterrupted run does."""
    if ranks.is_main:
        metrics = run_dir / "metrics.jsonl"
        keep = [r for r in read_jsonl(metrics)[0] if not (r.get("step") == total and "val_acc_largest" in r)]
        write_text(metrics, "".join(json.dumps(r) + "\n" for r in keep))
        append_jsonl(metrics, _epoch_eval(model, recipe, ds, (total - 1) // spe + 1, total))
        save_checkpoint(checkpoint_path(run_dir), _state(model, opt, total, recipe, ds, True, averaged, elite))
    barrier(ranks)
