"""The weight-sharing supernet: stem, stages of elastic inverted-residual blocks, head.

Call ``set_subnet(subnet)`` and the forward pass runs exactly that subnet: the first d
blocks of each stage, each with its chosen expansion ratio and kernel size, every stage
(and the stem) at its chosen width, as channel prefixes of the widest weights.
"""
from __future__ import annotations

from typing import Callable

import torch
import torch.nn.functional as F
from torch import nn

from tightfit.model.arithmetic import hidden_channels
from tightfit.model.elastic import ElasticBatchNorm, ElasticConv, ElasticDepthwise, ElasticSqueezeExcite
from tightfit.model.space import SpaceSpec, StageSpec, Subnet


def act_layer(name: str) -> Callable[[], nn.Module]:
    return {"relu6": nn.ReLU6, "hswish": nn.Hardswish}[name]


class ElasticConvBN(nn.Module):
    """Conv → BatchNorm → activation with elastic output width (the stem; the head conv)."""

    def __init__(self, in_channels: int, out_channels: int, kernel: int, stride: int, activation: str):
        super().__init__()
        self.conv = ElasticConv(in_channels, out_channels, kernel, stride)
        self.bn = ElasticBatchNorm(out_channels)
        self.act = act_layer(activation)()
        self.width = out_channels

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.act(self.bn(self.conv(x, self.width)))


class ElasticInvertedResidual(nn.Module):
    """MobileNetV2 block (Sandler et al. 2018, Table 1) with elastic expansion, kernel and width.

    The hidden width is round(active input channels * expansion), so a narrower stage before
    it narrows the block as a width multiplier would; the skip is used whenever the stride is
    1 and the active input and output widths agree (as in a fixed network of those widths)."""

    def __init__(self, in_channels: int, out_channels: int, stride: int, stage: StageSpec, smaller_kernels: str):
        super().__init__()
        self.in_channels, self.out_channels, self.stride = in_channels, out_channels, stride
        hidden_max = hidden_channels(in_channels, max(stage.expansions))
        self.has_expand = stage.has_expand
        if self.has_expand:
            self.expand = ElasticConv(in_channels, hidden_max)
            self.bn1 = ElasticBatchNorm(hidden_max)
        self.dw = ElasticDepthwise(hidden_max, stage.kernels, stride, smaller_kernels)
        self.bn2 = ElasticBatchNorm(hidden_max)
        self.act = act_layer(stage.activation)()
        self.se = ElasticSqueezeExcite(hidden_max) if stage.squeeze_excite else None
        self.project = ElasticConv(hidden_max, out_channels)
        self.bn3 = ElasticBatchNorm(out_channels)
        self.expansion, self.kernel, self.width = max(stage.expansions), max(stage.kernels), out_channels

    def uses_skip(self, in_channels: int) -> bool:
        return self.stride == 1 and in_channels == self.width

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        mid = hidden_channels(x.shape[1], self.expansion)
        y = self.act(self.bn1(self.expand(x, mid))) if self.has_expand else x
        y = self.act(self.bn2(self.dw(y, self.kernel)))
        if self.se is not None:
            y = self.se(y)
        y = self.bn3(self.project(y, self.width))
        return x + y if self.uses_skip(x.shape[1]) else y


class Supernet(nn.Module):
    def __init__(self, space: SpaceSpec, in_channels: int, num_classes: int):
        super().__init__()
        self.space, self.in_channels, self.num_classes = space, in_channels, num_classes
        self.stem = ElasticConvBN(in_channels, space.stem_channels, 3, space.stem_stride, space.stem_activation)
        self.stages = nn.ModuleList()
        for i, st in enumerate(space.stages):
            chs = space.stage_in_channels(i)
            blocks = nn.ModuleList()
            for j in range(max(st.depths)):
                blocks.append(ElasticInvertedResidual(chs, st.out_channels, st.stride if j == 0 else 1, st,
                                                      space.smaller_kernels))
                chs = st.out_channels
            self.stages.append(blocks)
        last = space.stages[-1].out_channels
        if space.head_channels:
            self.head = ElasticConvBN(last, space.head_channels, 1, 1, space.head_activation)
            last = space.head_channels
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
            if isinstance(m, (nn.Conv2d, ElasticConv)):
                nn.init.kaiming_normal_(m.weight, mode="fan_out")
                if getattr(m, "bias", None) is not None:
                    nn.init.zeros_(m.bias)
            elif isinstance(m, nn.BatchNorm2d):
                nn.init.ones_(m.weight)
                nn.init.zeros_(m.bias)
            elif isinstance(m, nn.Linear):
                nn.init.normal_(m.weight, 0, 0.01)
                nn.init.zeros_(m.bias)

    def set_subnet(self, subnet: Subnet) -> None:
        self.depths = subnet.depths
        widths = self.space.widths_of(subnet)
        self.stem.width = widths[0]
        for blocks, choice, width in zip(self.stages, subnet.stages, widths[1:]):
            for block, (e, k) in zip(blocks, choice):
                block.expansion, block.kernel, block.width = e, k, width

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.stem(x)
        for blocks, depth in zip(self.stages, self.depths):
            for block in blocks[:depth]:
                x = block(x)
        x = self.pool(self.head(x)).flatten(1)  # (B, C): C follows the last stage's width without a head conv
        return F.linear(self.dropout(x), self.classifier.weight[:, :x.shape[1]], self.classifier.bias)
