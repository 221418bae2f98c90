"""Small builders shared by the tests: tiny recipes and perturbed supernets."""
from __future__ import annotations

import torch

from tightfit.recipe import parse_recipe

TINY = {
    "name": "tiny", "seed": 0,
    "data": {"source": "builtin", "image_size": 16, "channels": 3, "samples": 600},
    "space": {"stem_channels": 8, "stem_stride": 1, "head_channels": 0, "stage": [
        {"channels": 8, "stride": 1, "depths": [1], "expansions": [1], "kernels": [3]},
        {"channels": 12, "stride": 2, "depths": [1, 2], "expansions": [2, 4], "kernels": [3, 5]},
        {"channels": 16, "stride": 2, "depths": [1, 2, 3], "expansions": [2, 3, 6], "kernels": [3, 5, 7],
         "activation": "hswish", "squeeze_excite": True},
    ]},
    "train": {"epochs": 1, "batch_size": 32, "lr": 0.05, "warmup_epochs": 0.1, "random_subnets": 1},
}


def tiny_recipe(**train_overrides):
    doc = {**TINY, "train": {**TINY["train"], **train_overrides}}
    return parse_recipe(doc)


@torch.no_grad()
def perturb(model: torch.nn.Module, seed: int = 0) -> None:
    """Random weights and BatchNorm statistics, so parity checks are not trivially met by a fresh init."""
    gen = torch.Generator().manual_seed(seed)
    for name, t in list(model.named_parameters()) + list(model.named_buffers()):
        if not t.is_floating_point():
            continue
        if name.endswith("running_var"):
            t.copy_(torch.rand(t.shape, generator=gen) + 0.5)
        elif "transforms" in name:
            t.add_(0.1 * torch.randn(t.shape, generator=gen))
        else:
            t.copy_(0.3 * torch.randn(t.shape, generator=gen))
