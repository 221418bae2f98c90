"""BatchNorm recalibration and accuracy of a subnet with inherited weights.

Running statistics gathered while training the supernet mix many subnets, so they are
wrong for any one of them. Yu & Huang 2019 (Universally slimmable networks, Sec. 3.3)
re-estimate them per subnet from a few training batches: reset, then a cumulative
average (momentum=None) over a fixed set of batches, no gradients. Deterministic.
"""
from __future__ import annotations

from contextlib import contextmanager
from typing import Iterable, Iterator

import torch
from torch import nn

from tightfit.model.space import Subnet
from tightfit.model.supernet import Supernet


def batch_norms(model: nn.Module) -> list[nn.BatchNorm2d]:
    return [m for m in model.modules() if isinstance(m, nn.modules.batchnorm._BatchNorm)]


@torch.no_grad()
def recalibrate_bn(model: nn.Module, batches: Iterable[torch.Tensor]) -> None:
    """Replace every BatchNorm's running statistics with exact averages over ``batches``."""
    bns = batch_norms(model)
    saved = [bn.momentum for bn in bns]
    for bn in bns:
        bn.reset_running_stats()
        bn.momentum = None
    was_training = model.training
    model.train()
    dev = next(model.parameters()).device
    for x in batches:
        model(x.to(dev))
    model.train(was_training)
    for bn, m in zip(bns, saved):
        bn.momentum = m


@contextmanager
def preserved_bn_stats(model: nn.Module) -> Iterator[None]:
    """Restore the BatchNorm buffers on exit, so a recalibration leaves the supernet as it was."""
    saved = [(bn.running_mean.clone(), bn.running_var.clone(), bn.num_batches_tracked.clone()) for bn in batch_norms(model)]
    try:
        yield
    finally:
        for bn, (m, v, n) in zip(batch_norms(model), saved):
            bn.running_mean.copy_(m)
            bn.running_var.copy_(v)
            bn.num_batches_tracked.copy_(n)


@torch.no_grad()
def accuracy(model: nn.Module, batches: Iterable[tuple[torch.Tensor, torch.Tensor]]) -> float:
    """Top-1 accuracy in percent."""
    model.eval()
    correct = total = 0
    dev = next(model.parameters()).device
    for x, y in batches:
        correct += (model(x.to(dev)).argmax(1).cpu() == y).sum().item()
        total += len(y)
    return 100.0 * correct / max(total, 1)


def subnet_accuracy(supernet: Supernet, subnet: Subnet, calib: list[torch.Tensor],
                    batches: Iterable[tuple[torch.Tensor, torch.Tensor]]) -> float:
    """Accuracy of ``subnet`` with inherited weights after BN recalibration; supernet BN left unchanged."""
    supernet.set_subnet(subnet)
    with preserved_bn_stats(supernet):
        recalibrate_bn(supernet, calib)
        return accuracy(supernet, batches)
