"""The MobileNetV2 recipe's largest subnet is the published MobileNetV2 (Sandler et al. 2018, Table 2)."""
from pathlib import Path

import pytest
import torch
from torch.utils.flop_counter import FlopCounterMode

from tightfit.model.extract import count_macs, count_params, extract_subnet
from tightfit.recipe import load_recipe
from tightfit.model.supernet import Supernet

torchvision = pytest.importorskip("torchvision")
RECIPE = load_recipe(Path(__file__).parents[1] / "recipes" / "mobilenetv2-224.toml")


@pytest.fixture(scope="module")
def pair():
    supernet = Supernet(RECIPE.space, 3, 1000)
    sub = RECIPE.space.largest()
    supernet.set_subnet(sub)
    ours = extract_subnet(supernet, sub)
    reference = torchvision.models.mobilenet_v2(weights=None).eval()  # random init, nothing downloaded
    return ours, reference


def test_parameter_count_equals_torchvision(pair):
    ours, reference = pair
    # torchvision.models.mobilenet_v2(): 3,504,872 parameters (torchvision model docs).
    assert count_params(ours) == count_params(reference) == 3_504_872


def test_same_function_after_loading_torchvision_weights(pair):
    ours, reference = pair
    # Key mapping: both networks list layers in the paper's order (stem, 17 bottlenecks,
    # 1x1 conv, classifier), so their state_dicts pair up in order, with equal shapes.
    theirs = reference.state_dict()
    assert len(theirs) == len(ours.state_dict())
    mapped = {}
    for (k_ours, v_ours), (k_ref, v_ref) in zip(ours.state_dict().items(), theirs.items()):
        assert v_ours.shape == v_ref.shape, (k_ours, k_ref)
        assert k_ours.rsplit(".", 1)[-1] == k_ref.rsplit(".", 1)[-1]
        mapped[k_ours] = v_ref
    ours.load_state_dict(mapped)
    with torch.no_grad():  # random BN statistics so the comparison is not dominated by zeros
        for bn_ours, bn_ref in zip([m for m in ours.modules() if isinstance(m, torch.nn.BatchNorm2d)],
                                   [m for m in reference.modules() if isinstance(m, torch.nn.BatchNorm2d)]):
            mean, var = torch.randn_like(bn_ref.running_mean) * 0.1, torch.rand_like(bn_ref.running_var) + 0.5
            for bn in (bn_ours, bn_ref):
                bn.running_mean.copy_(mean)
                bn.running_var.copy_(var)
    x = torch.randn(1, 3, 224, 224)
    with torch.no_grad():
        assert (ours.eval()(x) - reference(x)).abs().max().item() <= 1e-5


def test_macs_match_flop_counter_and_paper(pair):
    ours, _ = pair
    macs = count_macs(ours, 3, 224)
    with FlopCounterMode(display=False) as counter:  # torch.utils.flop_counter forward count
        ours(torch.zeros(1, 3, 224, 224))
    assert macs == counter.get_total_flops() // 2
    # Sandler et al. 2018, Table 3: MobileNetV2 (1.0, 224) has ~300M multiply-adds.
    assert abs(macs - 300e6) / 300e6 <= 0.02
