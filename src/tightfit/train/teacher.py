"""A mean teacher: an exponential moving average of the supernet's weights, whose largest subnet
teaches the others (Tarvainen & Valpola 2017). Early in a short schedule the largest subnet is barely
ahead of the subnets it teaches; an average of its recent weights is a steadier, often better teacher."""
from __future__ import annotations

import copy

import torch

from tightfit.model.supernet import Supernet


class MeanTeacher:
    """Holds the averaged copy; ``update`` after each optimizer step, ``logits`` before the sandwich."""

    def __init__(self, model: Supernet, decay: float):
        self.model, self.decay = copy.deepcopy(model), decay
        for p in self.model.parameters():
            p.requires_grad_(False)

    @torch.no_grad()
    def update(self, model: Supernet) -> None:
        """avg = decay * avg + (1 - decay) * weights; BN running statistics are copied, not averaged."""
        for a, p in zip(self.model.parameters(), model.parameters()):
            a.mul_(self.decay).add_(p.detach(), alpha=1 - self.decay)
        for a, b in zip(self.model.buffers(), model.buffers()):
            a.copy_(b)

    @torch.no_grad()
    def logits(self, x: torch.Tensor) -> torch.Tensor:
        """The averaged largest subnet on the batch, with batch statistics like the student."""
        self.model.set_subnet(self.model.space.largest())
        self.model.train()
        with torch.autocast("cuda", dtype=torch.bfloat16, enabled=x.is_cuda):
            return self.model(x).float()

    def state_dict(self) -> dict:
        return self.model.state_dict()

    def load_state_dict(self, state: dict) -> None:
        self.model.load_state_dict(state)
