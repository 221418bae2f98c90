"""Initialisation applied after the supernet is built (training choices, kept out of model/)."""
from __future__ import annotations

from torch import nn

from tightfit.model.supernet import ElasticInvertedResidual


def zero_init_residual(model: nn.Module) -> int:
    """Zero the last BatchNorm's gamma (``bn3``) in every block whose skip is used, so each residual
    block starts as the identity (Goyal et al. 2017, Sec. 5.1; for supernets Yu et al. 2020).
    Returns the number of blocks changed."""
    count = 0
    for m in model.modules():
        if isinstance(m, ElasticInvertedResidual) and m.stride == 1 and m.in_channels == m.out_channels:
            nn.init.zeros_(m.bn3.weight)
            count += 1
    return count
