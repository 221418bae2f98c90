"""Elastic layers: weights sized for the largest choice, sliced at run time.

Width is elastic as channel prefixes: a block with k hidden channels uses the first k
output channels of the expand conv, the first k depthwise filters and the first k input
channels of the projection; a stage (or the stem) of width w uses the first w output
channels of its convs, and the next layer the first w of its inputs. Kernel size is elastic in the depthwise
conv: a small kernel is the centre of the largest one, or (``smaller_kernels = "mapped"``) that
centre passed through one small learned linear map per kernel size, shared by all channels and
initialised to identity (Cai et al. 2020, Sec. 3.2).
"""
from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from tightfit.model.arithmetic import squeeze_channels


class ElasticConv(nn.Module):
    """Dense conv without bias (1x1 by default); in/out channels taken as prefixes of the full weight."""

    def __init__(self, in_channels: int, out_channels: int, kernel: int = 1, stride: int = 1):
        super().__init__()
        self.stride = stride
        self.weight = nn.Parameter(torch.empty(out_channels, in_channels, kernel, kernel))
        nn.init.kaiming_normal_(self.weight, mode="fan_out")

    def active_weight(self, in_channels: int, out_channels: int) -> torch.Tensor:
        return self.weight[:out_channels, :in_channels]

    def forward(self, x: torch.Tensor, out_channels: int) -> torch.Tensor:
        k = self.weight.shape[-1]
        return F.conv2d(x, self.active_weight(x.shape[1], out_channels), stride=self.stride, padding=k // 2)


class ElasticDepthwise(nn.Module):
    """Depthwise conv whose channel count follows the input and whose kernel is chosen per call."""

    def __init__(self, chs: int, kernels: tuple[int, ...], stride: int, smaller_kernels: str = "centre"):
        super().__init__()
        self.kernels = tuple(sorted(kernels))
        self.max_kernel = self.kernels[-1]
        self.stride = stride
        self.weight = nn.Parameter(torch.empty(chs, 1, self.max_kernel, self.max_kernel))
        nn.init.kaiming_normal_(self.weight, mode="fan_out")
        self.transforms = nn.ParameterDict()
        if smaller_kernels == "mapped":
            # One (k*k x k*k) matrix per smaller kernel, going down from the largest.
            for k in self.kernels[:-1]:
                self.transforms[f"k{k}"] = nn.Parameter(torch.eye(k * k))

    def active_weight(self, chs: int, kernel: int) -> torch.Tensor:
        w = self.weight[:chs]
        bigger = self.max_kernel
        for k in reversed(self.kernels[:-1]):
            if k < kernel:
                break
            start = (bigger - k) // 2
            w = w[:, :, start:start + k, start:start + k]
            if f"k{k}" in self.transforms:
                w = (w.reshape(chs, k * k) @ self.transforms[f"k{k}"]).reshape(chs, 1, k, k)
            bigger = k
        return w.contiguous()

    def forward(self, x: torch.Tensor, kernel: int) -> torch.Tensor:
        chs = x.shape[1]
        return F.conv2d(x, self.active_weight(chs, kernel), stride=self.stride, padding=kernel // 2, groups=chs)


class ElasticBatchNorm(nn.BatchNorm2d):
    """BatchNorm2d whose statistics and affine terms are sliced with the channels.

    Running statistics are updated in place on the slice, so BN recalibration of a
    subnet writes only its own channels. momentum=None gives a cumulative average.
    """

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        chs = x.shape[1]
        factor = 0.0
        if self.training and self.track_running_stats:
            self.num_batches_tracked.add_(1)
            factor = 1.0 / float(self.num_batches_tracked) if self.momentum is None else self.momentum
        return F.batch_norm(x, self.running_mean[:chs], self.running_var[:chs],
                            self.weight[:chs], self.bias[:chs], self.training, factor, self.eps)


class ElasticSqueezeExcite(nn.Module):
    """Squeeze-excite (Hu et al. 2018) with hard-sigmoid gate as in MobileNetV3; the
    squeeze width is a quarter of the active hidden channels (rounded to 8)."""

    def __init__(self, chs: int):
        super().__init__()
        sq = squeeze_channels(chs)
        self.reduce = nn.Conv2d(chs, sq, 1)
        self.expand = nn.Conv2d(sq, chs, 1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        chs = x.shape[1]
        sq = squeeze_channels(chs)
        s = x.mean((2, 3), keepdim=True)
        s = F.relu(F.conv2d(s, self.reduce.weight[:sq, :chs], self.reduce.bias[:sq]))
        s = F.hardsigmoid(F.conv2d(s, self.expand.weight[:chs, :sq], self.expand.bias[:chs]))
        return x * s
