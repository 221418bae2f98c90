"""Cut one subnet out of the supernet as a standalone network of plain torch.nn layers.

The static network holds copies of the sliced (and kernel-transformed) weights and the
BatchNorm statistics currently in the supernet, so recalibrate first (recalibrate.py).
Its layer order mirrors torchvision's MobileNetV2, so state_dicts line up one to one.
"""
from __future__ import annotations

import torch
from torch import nn
from torch.utils.flop_counter import FlopCounterMode

from tightfit.model.arithmetic import hidden_channels, squeeze_channels
from tightfit.model.elastic import ElasticSqueezeExcite
from tightfit.model.space import Subnet
from tightfit.model.supernet import ElasticConvBN, ElasticInvertedResidual, Supernet


class SqueezeExcite(nn.Module):
    def __init__(self, chs: int, sq_chs: int):
        super().__init__()
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.reduce = nn.Conv2d(chs, sq_chs, 1)
        self.act = nn.ReLU()
        self.expand = nn.Conv2d(sq_chs, chs, 1)
        self.gate = nn.Hardsigmoid()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x * self.gate(self.expand(self.act(self.reduce(self.pool(x)))))


class InvertedResidual(nn.Module):
    def __init__(self, layers: nn.Sequential, use_skip: bool):
        super().__init__()
        self.conv = layers
        self.use_skip = use_skip

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + self.conv(x) if self.use_skip else self.conv(x)


class StaticNet(nn.Module):
    """features (stem, blocks, head) → global average pool → classifier, like torchvision's MobileNetV2."""

    def __init__(self, features: nn.Sequential, classifier: nn.Sequential):
        super().__init__()
        self.features = features
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.classifier = classifier

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.classifier(self.pool(self.features(x)).flatten(1))


def _conv(weight: torch.Tensor, stride: int = 1, groups: int = 1) -> nn.Conv2d:
    out_channels, in_per_group, k, _ = weight.shape
    conv = nn.Conv2d(in_per_group * groups, out_channels, k, stride, k // 2, groups=groups, bias=False)
    conv.weight.data.copy_(weight)
    return conv


def _bn(src: nn.BatchNorm2d, chs: int) -> nn.BatchNorm2d:
    bn = nn.BatchNorm2d(chs, eps=src.eps, momentum=src.momentum if src.momentum is not None else 0.1)
    bn.weight.data.copy_(src.weight[:chs])
    bn.bias.data.copy_(src.bias[:chs])
    bn.running_mean.copy_(src.running_mean[:chs])
    bn.running_var.copy_(src.running_var[:chs])
    bn.num_batches_tracked.copy_(src.num_batches_tracked)
    return bn


def _squeeze_excite(src: ElasticSqueezeExcite, chs: int) -> SqueezeExcite:
    sq = squeeze_channels(chs)
    se = SqueezeExcite(chs, sq)
    se.reduce.weight.data.copy_(src.reduce.weight[:sq, :chs])
    se.reduce.bias.data.copy_(src.reduce.bias[:sq])
    se.expand.weight.data.copy_(src.expand.weight[:chs, :sq])
    se.expand.bias.data.copy_(src.expand.bias[:chs])
    return se


@torch.no_grad()
def extract_block(b: ElasticInvertedResidual, expansion: float, kernel: int, in_channels: int | None = None,
                  out_channels: int | None = None) -> InvertedResidual:
    """The block at these choices; widths default to the widest (the block's full weights)."""
    chs_in = b.in_channels if in_channels is None else in_channels
    chs_out = b.out_channels if out_channels is None else out_channels
    mid = hidden_channels(chs_in, expansion)
    act = type(b.act)
    layers: list[nn.Module] = []
    if b.has_expand:
        layers += [nn.Sequential(_conv(b.expand.active_weight(chs_in, mid)), _bn(b.bn1, mid), act())]
    layers += [nn.Sequential(_conv(b.dw.active_weight(mid, kernel), b.stride, groups=mid), _bn(b.bn2, mid), act())]
    if b.se is not None:
        layers.append(_squeeze_excite(b.se, mid))
    layers += [_conv(b.project.active_weight(mid, chs_out)), _bn(b.bn3, chs_out)]
    return InvertedResidual(nn.Sequential(*layers), b.stride == 1 and chs_in == chs_out)


@torch.no_grad()
def extract_conv_bn(src: ElasticConvBN, in_channels: int, out_channels: int) -> nn.Sequential:
    """Stem or head conv at these widths: conv → BatchNorm → activation."""
    conv = _conv(src.conv.active_weight(in_channels, out_channels), src.conv.stride)
    return nn.Sequential(conv, _bn(src.bn, out_channels), type(src.act)())


@torch.no_grad()
def extract_classifier(supernet: Supernet, in_features: int) -> nn.Sequential:
    """Dropout → linear on the first ``in_features`` inputs."""
    lin = nn.Linear(in_features, supernet.classifier.out_features)
    lin.weight.data.copy_(supernet.classifier.weight[:, :in_features])
    lin.bias.data.copy_(supernet.classifier.bias)
    return nn.Sequential(nn.Dropout(supernet.space.dropout), lin)


@torch.no_grad()
def extract_subnet(supernet: Supernet, subnet: Subnet) -> StaticNet:
    """Return the static network for ``subnet`` (eval mode, on the CPU, fp32)."""
    widths = supernet.space.widths_of(subnet)
    features: list[nn.Module] = [extract_conv_bn(supernet.stem, supernet.in_channels, widths[0])]
    chs = widths[0]
    for blocks, choice, width in zip(supernet.stages, subnet.stages, widths[1:]):
        for b, (e, k) in zip(blocks, choice):
            features.append(extract_block(b, e, k, chs, width))
            chs = width
    if isinstance(supernet.head, ElasticConvBN):
        features.append(extract_conv_bn(supernet.head, chs, supernet.space.head_channels))
        chs = supernet.space.head_channels
    net = StaticNet(nn.Sequential(*features), extract_classifier(supernet, chs))
    return net.float().cpu().eval()


def count_params(model: nn.Module) -> int:
    return sum(p.numel() for p in model.parameters())


@torch.no_grad()
def count_macs(model: nn.Module, in_channels: int, image_size: int) -> int:
    """Multiply-accumulates of one forward pass at batch 1: torch's forward FLOP count / 2."""
    was_training = model.training
    model.eval()
    with FlopCounterMode(display=False) as counter:
        model(torch.zeros(1, in_channels, image_size, image_size))
    model.train(was_training)
    return counter.get_total_flops() // 2
