"""One training step: the sandwich rule with in-place distillation (Yu & Huang 2019).

The largest subnet learns from the labels; the smallest, N random subnets and the targets' band
subnets (targets.py) learn from the largest's detached soft predictions, the labels, or a mix
(distill_weight); gradients accumulate and one optimizer step follows.
"""
from __future__ import annotations

import functools
import math
import random
from typing import Callable

import torch
import torch.nn.functional as F
from torch import nn

from tightfit.model.arithmetic import architecture_size
from tightfit.model.space import SpaceSpec, Subnet
from tightfit.model.supernet import Supernet
from tightfit.recipe import Recipe, TrainConfig


def sandwich(space: SpaceSpec, step: int, seed: int, n_random: int, *, largest_only: bool = False,
             distance: Callable[[Subnet], float] | None = None, candidates: int = 1) -> list[Subnet]:
    """[largest, smallest, n random]; the draw depends only on (seed, step).
    A one-subnet space (a fixed network, e.g. a hand-scaled baseline) trains as a plain network,
    and so does any space while ``largest_only`` (the warm-up phase of ``largest_only_epochs``).
    With ``distance``, each random subnet is the nearest of ``candidates`` uniform draws (first on ties)."""
    if space.size() == 1 or largest_only:
        return [space.largest()]
    rng = random.Random(seed * 7_919 + step)

    def draw() -> Subnet:
        if distance is None:
            return space.sample(rng)
        return min((space.sample(rng) for _ in range(candidates)), key=distance)
    return [space.largest(), space.smallest()] + [draw() for _ in range(n_random)]


def macs_distance(recipe: Recipe, num_classes: int, target: float) -> Callable[[Subnet], float]:
    """|f - target|, f being a subnet's multiply-adds placed between the smallest's (0) and the
    largest's (1): biases random subnets toward the size region budgets pick from (a simple form of
    sampling toward a region of the space, after Wang et al. 2021)."""
    def macs(s: Subnet) -> int:
        return architecture_size(recipe.space, s, recipe.data.channels, recipe.data.image_size, num_classes)[1]
    lo, hi = macs(recipe.space.smallest()), macs(recipe.space.largest())

    @functools.lru_cache(maxsize=4096)
    def distance(s: Subnet) -> float:
        return abs((macs(s) - lo) / max(1, hi - lo) - target)
    return distance


def step_subnets(recipe: Recipe, step: int, steps_per_epoch: int,
                 distance: Callable[[Subnet], float] | None = None) -> list[Subnet]:
    """The sandwich of ``step`` under the recipe's [train] settings (warm-up phase, biased draws)."""
    cfg = recipe.train
    warm = step < int(round(cfg.largest_only_epochs * steps_per_epoch))
    return sandwich(recipe.space, step, recipe.seed, cfg.random_subnets, largest_only=warm,
                    distance=distance, candidates=cfg.random_candidates)


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


def lr_at(step: int, total: int, warmup: int, base: float, end: float = 0.0) -> float:
    """Linear warm-up, then cosine decay to ``base * end`` (Loshchilov & Hutter 2017, eta_min = base * end;
    a floor above zero as in Yu et al. 2020)."""
    if step < warmup:
        return base * (step + 1) / warmup
    t = (step - warmup) / max(1, total - warmup)
    return base * (end + (1 - end) * 0.5 * (1 + math.cos(math.pi * min(1.0, t))))


# The alpha-divergence with a < 0 weighs q^(1-a) / p^(-a): where the teacher gives a class almost nothing
# it explodes (a Fashion-MNIST screen at fbcf81f went to NaN within 135 steps at a = -1). Each class's
# log(q / p) is clamped to +-5 (a ratio within e^5 ~ 148): the loss and its gradient stay finite; within
# the bound it is the divergence itself. Wang et al. 2021 bound the ratio too (their exact rule: not
# checked here, from memory).
ALPHA_LOG_RATIO = 5.0


def distill_loss(logits: torch.Tensor, teacher_logits: torch.Tensor, kind: str = "soft_ce",
                 temperature: float = 1.0, alphas: tuple[float, float] = (-1.0, 1.0)) -> torch.Tensor:
    """Distillation against the teacher's (detached) logits, both divided by T and the loss
    scaled by T^2 (Hinton et al. 2015). "soft_ce": cross-entropy against the teacher's probabilities;
    "kl": KL(teacher || student), the same minus the teacher's entropy (same gradient at T = 1);
    "alpha": the larger of two alpha-divergences D_a(teacher || student), a in ``alphas`` (Wang et al. 2021)."""
    t = temperature
    log_q = F.log_softmax(logits / t, 1)
    log_p = F.log_softmax(teacher_logits / t, 1)
    if kind == "alpha":
        log_q = log_p + (log_q - log_p).clamp(-ALPHA_LOG_RATIO, ALPHA_LOG_RATIO)  # bounded density ratio
        return torch.maximum(*(alpha_divergence(log_p, log_q, a).mean() for a in alphas)) * t * t
    p = F.softmax(teacher_logits / t, 1)
    per_row = -(p * log_q).sum(1)
    if kind == "kl":
        per_row = per_row + (p * log_p).sum(1)
    return per_row.mean() * t * t


def alpha_divergence(log_p: torch.Tensor, log_q: torch.Tensor, a: float) -> torch.Tensor:
    """Per row, D_a(p || q) = (sum p^a q^(1-a) - 1) / (a (a - 1)) (Amari's alpha family); the limits
    a -> 1 and a -> 0 are KL(p || q) and KL(q || p)."""
    if abs(a - 1) < 1e-6:
        return (log_p.exp() * (log_p - log_q)).sum(1)
    if abs(a) < 1e-6:
        return (log_q.exp() * (log_q - log_p)).sum(1)
    return (torch.logsumexp(a * log_p + (1 - a) * log_q, 1).exp() - 1) / (a * (a - 1))


def subnet_loss(logits: torch.Tensor, y: torch.Tensor, teacher: torch.Tensor | None, cfg: TrainConfig) -> torch.Tensor:
    """The largest (no teacher) and, without distillation, every subnet learn from the labels; with
    it, the others learn w * distillation + (1 - w) * labels, w = distill_weight (1: teacher only).
    With distill_when = "ahead", a subnet distils only on a batch where the teacher's label loss is
    below its own (a teacher not yet ahead teaches nothing the labels do not)."""
    w = cfg.distill_weight if cfg.distill and teacher is not None else 0.0
    if w > 0 and cfg.distill_when == "ahead" and F.cross_entropy(teacher, y) >= F.cross_entropy(logits.detach(), y):
        w = 0.0
    loss = distill_loss(logits, teacher, cfg.distill_loss, cfg.distill_temperature,
                        (cfg.distill_alpha_low, cfg.distill_alpha_high)) if w > 0 else 0.0
    if w < 1:
        loss = w * loss + (1 - w) * F.cross_entropy(logits, y, label_smoothing=cfg.label_smoothing)
    return loss


def sandwich_backward(model: Supernet, x: torch.Tensor, y: torch.Tensor, subnets: list[Subnet],
                      cfg: TrainConfig, teacher: torch.Tensor | None = None) -> dict[str, float]:
    """Forward and backward every subnet of the sandwich, gradients summing in .grad;
    returns the largest's and smallest's losses. ``teacher``: logits of a teacher other than this
    step's largest subnet (a mean teacher), for every subnet after the first."""
    losses = {}
    given = teacher
    for i, subnet in enumerate(subnets):
        model.set_subnet(subnet)
        if cfg.largest_dropout > 0:  # regularise the largest only (Yu et al. 2020)
            model.dropout.p = cfg.largest_dropout if i == 0 else 0.0
        # Mixed precision on CUDA only; CPU trains in fp32 so results are exactly reproducible.
        with torch.autocast("cuda", dtype=torch.bfloat16, enabled=x.is_cuda):
            logits = model(x).float()
        loss = subnet_loss(logits, y, None if i == 0 else teacher, cfg)
        if i == 0 and given is None:
            teacher = logits.detach()
        loss.backward()
        if i < 2:
            losses["loss_largest" if i == 0 else "loss_smallest"] = loss.item()
    if cfg.largest_dropout > 0:
        model.dropout.p = model.space.dropout
    return losses


def train_step(model: Supernet, opt: torch.optim.Optimizer, x: torch.Tensor, y: torch.Tensor,
               subnets: list[Subnet], cfg: TrainConfig,
               sync: Callable[[dict[str, float]], dict[str, float]] | None = None,
               teacher: torch.Tensor | None = None) -> dict[str, float]:
    """One sandwich step; ``sync`` (several processes) averages gradients and losses over
    ranks once, after the whole sandwich and before the optimizer step."""
    opt.zero_grad(set_to_none=True)
    losses = sandwich_backward(model, x, y, subnets, cfg, teacher)
    if sync is not None:
        losses = sync(losses)
    opt.step()
    return losses
