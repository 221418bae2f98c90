"""Equal compute for the Fashion-MNIST benchmark: what a supernet step and a fine-tune step cost, and
how many supernet epochs the family's CPU-seconds buy.

Both costs are sampled from the package's own code on this machine: a supernet step as
tightfit.train.loop takes it (sandwich, every target's band draw, best-of-k, the teacher), a fine-tune
step as tightfit.train.finetune takes it.
"""
from __future__ import annotations

import resource
import shutil
from pathlib import Path


def cpu_seconds() -> float:
    """CPU time of this process (all threads) and of finished child processes."""
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def _train_until(recipe, run: Path, ds, stop: int) -> float:
    """CPU-seconds of a fresh training run stopped after ``stop`` steps (set-up and one checkpoint included)."""
    from tightfit.errors import Interrupted
    from tightfit.train.loop import train
    shutil.rmtree(run, ignore_errors=True)
    c0 = cpu_seconds()
    try:
        train(recipe, run, ds=ds, progress=False, stop_at_step=stop)
    except Interrupted:
        pass  # stop_at_step ends the run as a signal would: checkpoint, then Interrupted
    return cpu_seconds() - c0


def sample_step_cpu(recipe, work: Path, ds, steps: int = 24, skip: int = 3) -> dict:
    """CPU-seconds of one supernet step of ``recipe`` (its targets included): fresh runs of the package's
    training loop, stopped after ``skip`` and after ``skip + steps`` steps. Their difference is ``steps``
    steps: the set-up (data, model, target bands) and the checkpoint cancel. A first short run is thrown
    away: the process keeps its per-shape kernels, and its first run pays for compiling them (one smoke
    step: 12.9 CPU-s in the first run, 1.4 in a later one), which a long training pays once.
    Every stop stays inside the first epoch, so no epoch evaluation is timed."""
    from tightfit.data.dataset import load_dataset, steps_per_epoch
    ds = ds or load_dataset(recipe.data, recipe.seed)
    spe = steps_per_epoch(ds, recipe.train.batch_size)
    total = max(1, int(round(recipe.train.epochs * spe)))
    last = min(skip + steps, spe - 1, total - 1)
    first = min(skip, last - 1)
    if first < 1:
        raise ValueError(f"an epoch of {spe} steps is too short to sample a step's cost")
    warm_up = _train_until(recipe, work / "warm-up", ds, first)
    long = _train_until(recipe, work / "long", ds, last)
    short = _train_until(recipe, work / "short", ds, first)
    shutil.rmtree(work, ignore_errors=True)
    per_step = max(long - short, 0.0) / (last - first)
    return {"steps_timed": last - first, "cpu_s_per_step": per_step, "steps_per_epoch": spe,
            "cpu_s_per_epoch": per_step * spe, "targets": len(recipe.train.targets),
            "warm_up_cpu_s": round(warm_up, 2), "long_cpu_s": round(long, 2), "short_cpu_s": round(short, 2),
            "method": f"tightfit.train.loop.train stopped after {last} and after {first} steps (after a "
                      f"{first}-step warm-up run), CPU-s difference"}


def sample_finetune_cpu(recipe, steps: int = 15) -> dict:
    """CPU-seconds of one fine-tune step (teacher forward + the middle subnet's step), from a few real steps
    of tightfit.train.finetune on an untrained supernet (its setup and final recalibration included: a
    slight overestimate)."""
    import torch
    from tightfit.data.dataset import calibration_batches, load_dataset
    from tightfit.recipe import build_supernet
    from tightfit.rundir import TrainedRun
    from tightfit.train.finetune import FinetuneSettings, finetune, inherited_net
    ds = load_dataset(recipe.data, recipe.seed)
    run = TrainedRun(build_supernet(recipe, ds.num_classes), recipe, ds.class_names, ds.mean, ds.std, False)
    calib = calibration_batches(ds, recipe.train.batch_size, recipe.train.recalibration_batches, recipe.seed)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # as in the search phases, where the fine-tunes run
    try:
        rec = finetune(run, ds, inherited_net(run, recipe.space.middle(), calib), FinetuneSettings(steps=steps, lr=0.01))
    finally:
        torch.set_num_threads(threads)
    return {"steps_timed": steps, "cpu_s_per_step": rec["cpu_s"] / steps}


# Search CPU-s per budget (fine-tune apart) as a share of the family's: at 9cfdefb six budgets took 736 CPU-s
# (profiles and fine-tunes apart) against the family's 3,021, 0.041 each (docs/benchmarks.md, "Cost").
SEARCH_SHARE = 0.041


def supernet_epochs(family_cpu: float, epoch_cpu: float, family_epochs: float, *, profiling_cpu: float,
                    budgets: int, search_share: float = SEARCH_SHARE, finetune_cpu: float = 0.0) -> dict:
    """Equal compute: the family's CPU-seconds, less what the supernet side spends besides training (the
    profiles, already measured; ``search_share`` of the family per budget; the picks' sampled
    fine-tunes), buy supernet epochs (0.1 epoch steps, at least 1)."""
    search_cpu = budgets * search_share * family_cpu
    room = family_cpu - profiling_cpu - search_cpu - finetune_cpu
    epochs = max(1.0, int(10 * room / max(epoch_cpu, 1e-9)) / 10)
    return {"family_cpu_s": round(family_cpu, 1), "profiling_cpu_s": round(profiling_cpu, 1), "budgets": budgets,
            "search_share_per_budget": search_share, "search_cpu_s_estimate": round(search_cpu, 1),
            "finetune_cpu_s_estimate": round(finetune_cpu, 1), "epoch_cpu_s": round(epoch_cpu, 1), "epochs": epochs,
            "family_epochs": family_epochs}
