"""Fine-tune one chosen subnet from its inherited weights, taught by the supernet's largest.

Weight sharing leaves a subnet below the same network trained alone (the sharing gap). Only the
picks ship, so a short fine-tune of each pick's static network, distilling from the largest
subnet (BN recalibrated, frozen), spends compute where it is used (fine-tuning picks: Cai et al.
2020; soft-label distillation as in training: Yu & Huang 2019). The graph does not change, only
its weights: the pick's measured latency still describes it.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any, Callable

import torch
from torch import nn

from tightfit.data.dataset import Dataset, calibration_batches, train_batches
from tightfit.model.extract import StaticNet, extract_subnet
from tightfit.model.recalibrate import preserved_bn_stats, recalibrate_bn
from tightfit.model.space import Subnet
from tightfit.rundir import TrainedRun
from tightfit.train.sandwich import distill_loss, param_groups

SEED_OFFSET = 1_000  # its batch order differs from the supernet's epochs, reproducibly


@dataclass(frozen=True)
class FinetuneSettings:
    steps: int = 0          # optimizer steps of the recipe's batch size; 0: no fine-tune
    lr: float = 0.1         # peak learning rate, cosine to zero over the steps

    def to_dict(self) -> dict[str, Any]:
        return {"steps": self.steps, "lr": self.lr}


def inherited_net(run: TrainedRun, subnet: Subnet, calib: list[torch.Tensor]) -> StaticNet:
    """``subnet`` as a static network with its inherited weights, BN recalibrated on ``calib``
    (the supernet's own statistics left as they were)."""
    run.supernet.set_subnet(subnet)
    with preserved_bn_stats(run.supernet):
        recalibrate_bn(run.supernet, calib)
        return extract_subnet(run.supernet, subnet)


def teacher_of(run: TrainedRun, calib: list[torch.Tensor]) -> StaticNet:
    """The largest subnet as a frozen static network, BN recalibrated on ``calib``."""
    teacher = inherited_net(run, run.recipe.space.largest(), calib).eval()
    for p in teacher.parameters():
        p.requires_grad_(False)
    return teacher


def cosine_lr(step: int, steps: int, peak: float) -> float:
    return peak * 0.5 * (1 + math.cos(math.pi * step / max(1, steps)))


# long: the loop, its schedule and the bookkeeping read best together
def finetune(run: TrainedRun, ds: Dataset, net: nn.Module, settings: FinetuneSettings,
             teacher: nn.Module | None = None, on_step: Callable[[int], None] | None = None) -> dict[str, Any]:
    """Fine-tune ``net`` in place for ``settings.steps`` steps (SGD as the recipe's, cosine from
    ``settings.lr`` to zero, the recipe's batches and augmentation, soft-label distillation from
    ``teacher``, by default the run's largest), then recalibrate its BN on the recipe's calibration
    batches; returns what was done and what it cost."""
    cfg, data = run.recipe.train, run.recipe.data
    calib = calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed)
    t0, c0 = time.perf_counter(), time.process_time()
    teacher = teacher if teacher is not None else teacher_of(run, calib)
    opt = torch.optim.SGD(param_groups(net, cfg.weight_decay), lr=settings.lr, momentum=cfg.momentum,
                          nesterov=cfg.momentum > 0)
    net.train()
    step, epoch, last_loss = 0, 0, float("nan")
    while step < settings.steps:
        for x, _ in train_batches(ds, data, cfg.batch_size, run.recipe.seed + SEED_OFFSET, epoch):
            if step == settings.steps:
                break
            if cfg.channels_last:
                x = x.contiguous(memory_format=torch.channels_last)
            for g in opt.param_groups:
                g["lr"] = cosine_lr(step, settings.steps, settings.lr)
            with torch.no_grad():
                target = teacher(x)
            opt.zero_grad(set_to_none=True)
            loss = distill_loss(net(x), target, cfg.distill_loss, cfg.distill_temperature)
            loss.backward()
            opt.step()
            last_loss, step = loss.item(), step + 1
            if on_step is not None:
                on_step(step)
        epoch += 1
    recalibrate_bn(net, calib)
    net.eval()
    return {**settings.to_dict(), "teacher": run.recipe.space.largest().to_key(), "loss": "distillation from the teacher's "
            f"soft labels ({cfg.distill_loss}, T = {cfg.distill_temperature:g})", "last_loss": round(last_loss, 4),
            "wall_s": round(time.perf_counter() - t0, 2), "cpu_s": round(time.process_time() - c0, 2)}


def finetuned_subnet(run: TrainedRun, ds: Dataset, subnet: Subnet, settings: FinetuneSettings) -> tuple[StaticNet, dict]:
    """The recalibrated static network of ``subnet``, fine-tuned (a convenience for scripts and tests)."""
    cfg = run.recipe.train
    net = inherited_net(run, subnet, calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed))
    return net, finetune(run, ds, net, settings)
