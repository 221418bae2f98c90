"""Initialisation applied after the supernet is built (training choices, kept out of model/)."""
from __future__ import annotations

from torch import nn

from tightfit.model.supernet import Supernet


def zero_init_residual(model: Supernet) -> int:
    """Zero the last BatchNorm's gamma (``bn3``) in every block whose skip some subnet uses, so each
    residual block starts as the identity (Goyal et al. 2017, Sec. 5.1; for supernets Yu et al. 2020).
    With elastic width a block uses its skip when its active input and output widths agree, so a first
    block counts when the previous stage's widths and its own share a value. Returns the blocks changed."""
    count = 0
    options = model.space.width_options()  # stem, then each stage
    for i, blocks in enumerate(model.stages):
        for j, block in enumerate(blocks):
            widths_in = options[i + 1] if j else options[i]
            if block.stride == 1 and set(widths_in) & set(options[i + 1]):
                nn.init.zeros_(block.bn3.weight)
                count += 1
    return count
