"""The weight-sharing supernet: stem, stages of elastic inverted-residual blocks, head.

Call ``set_subnet(subnet)`` and the forward pass runs exactly that subnet: the first d
blocks of each stage, each with its chosen expansion ratio and kernel size.
"""
from __future__ import annotations

from typing import Callable

import torch
from torch import nn

from tightfit.model.arithmetic import hidden_chs
from tightfit.model.elastic import ElasticBatchNorm, ElasticDepthwise, ElasticPointwise, ElasticSqueezeExcite
from tightfit.model.space import SpaceSpec, StageSpec, Subnet
from tightfit.recipe import Recipe


def act_layer(name: str) -> Callable[[], nn.Module]:
    return {"relu6": nn.ReLU6, "hswish": nn.Hardswish}[name]


class ElasticInvertedResidual(nn.Module):
    """MobileNetV2 block (Sandler et al. 2018, Table 1) with elastic expansion and kernel."""

    def __init__(self, in_chs: int, out_chs: int, stride: int, stage: StageSpec, kernel_transform: bool):
        super().__init__()
        self.in_chs, self.out_chs, self.stride = in_chs, out_chs, stride
        mid_max = hidden_chs(in_chs, max(stage.exp_ratios))
        self.has_expand = stage.has_expand
        if self.has_expand:
            self.expand = ElasticPointwise(in_chs, mid_max)
            self.bn1 = ElasticBatchNorm(mid_max)
        self.dw = ElasticDepthwise(mid_max, stage.kernels, stride, kernel_transform)
        self.bn2 = ElasticBatchNorm(mid_max)
        self.act = act_layer(stage.act)()
        self.se = ElasticSqueezeExcite(mid_max) if stage.se else None
        self.project = ElasticPointwise(mid_max, out_chs)
        self.bn3 = ElasticBatchNorm(out_chs)
        self.use_skip = stride == 1 and in_chs == out_chs
        self.exp_ratio, self.kernel = max(stage.exp_ratios), max(stage.kernels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        mid = hidden_chs(self.in_chs, self.exp_ratio)
        y = self.act(self.bn1(self.expand(x, mid))) if self.has_expand else x
        y = self.act(self.bn2(self.dw(y, self.kernel)))
        if self.se is not None:
            y = self.se(y)
        y = self.bn3(self.project(y, self.out_chs))
        return x + y if self.use_skip else y


class Supernet(nn.Module):
    def __init__(self, space: SpaceSpec, in_chs: int, num_classes: int, kernel_transform: bool = False):
        super().__init__()
        self.space, self.in_chs, self.num_classes = space, in_chs, num_classes
        self.kernel_transform = kernel_transform
        self.stem = nn.Sequential(
            nn.Conv2d(in_chs, space.stem_chs, 3, space.stem_stride, 1, bias=False),
            nn.BatchNorm2d(space.stem_chs), act_layer(space.stem_act)())
        self.stages = nn.ModuleList()
        for i, st in enumerate(space.stages):
            chs = space.stage_in_chs(i)
            blocks = nn.ModuleList()
            for j in range(max(st.depths)):
                blocks.append(ElasticInvertedResidual(chs, st.out_chs, st.stride if j == 0 else 1, st, kernel_transform))
                chs = st.out_chs
            self.stages.append(blocks)
        last = space.stages[-1].out_chs
        if space.head_chs:
            self.head = nn.Sequential(nn.Conv2d(last, space.head_chs, 1, bias=False),
                                      nn.BatchNorm2d(space.head_chs), act_layer(space.head_act)())
            last = space.head_chs
        else:
            self.head = nn.Identity()
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.dropout = nn.Dropout(space.dropout)
        self.classifier = nn.Linear(last, num_classes)
        self.depths = tuple(max(st.depths) for st in space.stages)
        self._init_weights()

    def _init_weights(self) -> None:
        # Initialisation as in torchvision's MobileNetV2 (common practice).
        for m in self.modules():
            if isinstance(m, nn.Conv2d):
                nn.init.kaiming_normal_(m.weight, mode="fan_out")
                if m.bias is not None:
                    nn.init.zeros_(m.bias)
            elif isinstance(m, nn.BatchNorm2d):
                nn.init.ones_(m.weight)
                nn.init.zeros_(m.bias)
            elif isinstance(m, nn.Linear):
                nn.init.normal_(m.weight, 0, 0.01)
                nn.init.zeros_(m.bias)

    def set_subnet(self, subnet: Subnet) -> None:
        self.depths = subnet.depths
        for blocks, choice in zip(self.stages, subnet.stages):
            for block, (e, k) in zip(blocks, choice):
                block.exp_ratio, block.kernel = e, k

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.stem(x)
        for blocks, depth in zip(self.stages, self.depths):
            for block in blocks[:depth]:
                x = block(x)
        x = self.pool(self.head(x)).flatten(1)  # (B, C)
        return self.classifier(self.dropout(x))


def build_supernet(recipe: Recipe, num_classes: int) -> Supernet:
    """The supernet a recipe describes (the one place a recipe becomes a network)."""
    return Supernet(recipe.space, recipe.data.channels, num_classes,
                    kernel_transform=recipe.train.kernel_mode == "transform")
