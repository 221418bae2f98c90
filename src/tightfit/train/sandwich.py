"""One training step: the sandwich rule with in-place distillation (Yu & Huang 2019).

The largest subnet learns from the labels; the smallest and N random subnets learn from the
largest's detached soft predictions; gradients accumulate and one optimizer step follows.
"""
from __future__ import annotations

import math
import random
from typing import Callable

import torch
import torch.nn.functional as F
from torch import nn

from tightfit.model.space import SpaceSpec, Subnet
from tightfit.model.supernet import Supernet
from tightfit.recipe import TrainConfig


def sandwich(space: SpaceSpec, step: int, seed: int, n_random: int) -> list[Subnet]:
    """[largest, smallest, n random]; the draw depends only on (seed, step).
    A one-subnet space (a fixed network, e.g. a hand-scaled baseline) trains as a plain network."""
    if space.size() == 1:
        return [space.largest()]
    rng = random.Random(seed * 7_919 + step)
    return [space.largest(), space.smallest()] + [space.sample(rng) for _ in range(n_random)]


def param_groups(model: nn.Module, weight_decay: float) -> list[dict]:
    """No weight decay on BatchNorm, biases and the kernel-transform matrices (common practice)."""
    decay, no_decay = [], []
    for name, p in model.named_parameters():
        (no_decay if p.ndim <= 1 or "transforms" in name else decay).append(p)
    return [{"params": decay, "weight_decay": weight_decay}, {"params": no_decay, "weight_decay": 0.0}]


def make_optimizer(model: nn.Module, cfg: TrainConfig) -> torch.optim.Optimizer:
    groups = param_groups(model, cfg.weight_decay)
    if cfg.optimizer == "sgd":
        return torch.optim.SGD(groups, lr=cfg.lr, momentum=cfg.momentum, nesterov=cfg.momentum > 0)
    return torch.optim.AdamW(groups, lr=cfg.lr)


def lr_at(step: int, total: int, warmup: int, base: float) -> float:
    """Linear warm-up, then cosine decay to zero (Loshchilov & Hutter 2017)."""
    if step < warmup:
        return base * (step + 1) / warmup
    t = (step - warmup) / max(1, total - warmup)
    return base * 0.5 * (1 + math.cos(math.pi * min(1.0, t)))


def distill_loss(logits: torch.Tensor, soft_targets: torch.Tensor) -> torch.Tensor:
    """Cross-entropy against the teacher's probabilities (in-place distillation)."""
    return -(soft_targets * F.log_softmax(logits, 1)).sum(1).mean()


def sandwich_backward(model: Supernet, x: torch.Tensor, y: torch.Tensor, subnets: list[Subnet],
                      cfg: TrainConfig) -> dict[str, float]:
    """Forward and backward every subnet of the sandwich, gradients summing in .grad;
    returns the largest's and smallest's losses."""
    losses = {}
    soft = None
    for i, subnet in enumerate(subnets):
        model.set_subnet(subnet)
        # Mixed precision on CUDA only; CPU trains in fp32 so results are exactly reproducible.
        with torch.autocast("cuda", dtype=torch.bfloat16, enabled=x.is_cuda):
            logits = model(x).float()
        if i == 0 or not cfg.distill:
            loss = F.cross_entropy(logits, y, label_smoothing=cfg.label_smoothing)
        else:
            loss = distill_loss(logits, soft)
        if i == 0:
            soft = logits.detach().softmax(1)
        loss.backward()
        if i < 2:
            losses["loss_largest" if i == 0 else "loss_smallest"] = loss.item()
    return losses


def train_step(model: Supernet, opt: torch.optim.Optimizer, x: torch.Tensor, y: torch.Tensor,
               subnets: list[Subnet], cfg: TrainConfig,
               sync: Callable[[dict[str, float]], dict[str, float]] | None = None) -> dict[str, float]:
    """One sandwich step; ``sync`` (several processes) averages gradients and losses over
    ranks once, after the whole sandwich and before the optimizer step."""
    opt.zero_grad(set_to_none=True)
    losses = sandwich_backward(model, x, y, subnets, cfg)
    if sync is not None:
        losses = sync(losses)
    opt.step()
    return losses
