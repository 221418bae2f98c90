"""Parameters and multiply-adds computed from the space alone, against torch's own counters."""
from __future__ import annotations

import random

import pytest

from tightfit.model.space import SpaceSpec


@pytest.mark.parametrize("wide", [False, True], ids=["fixed-width", "elastic-width"])
@pytest.mark.parametrize("which", ["smallest", "largest", "middle", "random"])
def test_architecture_size_matches_torch_counters(which, wide):
    # Reference: parameters counted by torch.nn.Module.parameters() and multiply-adds by
    # torch.utils.flop_counter.FlopCounterMode (via tightfit.model.extract), on the built network.
    from tightfit.model.extract import count_macs, count_params, extract_subnet
    from tightfit.model.arithmetic import architecture_size
    from tightfit.model.supernet import Supernet
    from helpers import tiny_recipe
    space = tiny_recipe(wide=wide).space  # has squeeze-excite in its last stage
    for head in (0, 24):
        sp = SpaceSpec(space.stem_channels, 2 if head else 1, space.stages, head_channels=head,
                       stem_widths=space.stem_widths)
        subnet = sp.sample(random.Random(5)) if which == "random" else getattr(sp, which)()
        net = extract_subnet(Supernet(sp, 3, 7), subnet)
        assert architecture_size(sp, subnet, 3, 17, 7) == (count_params(net), count_macs(net, 3, 17))
