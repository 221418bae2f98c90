"""Extraction parity, gradient routing and BN recalibration over smallest, largest and random subnets,
in a space with fixed widths and in one with elastic width (stem and every stage)."""
import random
from dataclasses import replace

import pytest
import torch

from tightfit.model.extract import count_macs, count_params, extract_subnet
from tightfit.model.recalibrate import preserved_bn_stats, recalibrate_bn
from tightfit.model.supernet import Supernet
from helpers import perturb, tiny_recipe

SPACE = tiny_recipe().space
WIDE = tiny_recipe(wide=True).space


def _subnets(space, prefix: str = "") -> dict:
    return {prefix + "smallest": space.smallest(), prefix + "largest": space.largest(), prefix + "middle": space.middle(),
            **{f"{prefix}random{i}": space.sample(random.Random(i)) for i in range(5)}}


SUBNETS = {**_subnets(SPACE), **_subnets(WIDE, "wide-")}


def _space_of(name: str):
    return WIDE if name.startswith("wide-") else SPACE


def test_wide_subnets_differ_in_width():
    # the property tests below exercise narrow stems and stages, not only the widest
    widths = {SUBNETS[n].widths for n in SUBNETS if n.startswith("wide-")}
    assert len(widths) >= 4 and all(len(w) == 4 for w in widths)
    assert any(w[0] != w[1] for w in widths) and any(w[1] != w[2] for w in widths)


@pytest.mark.parametrize("smaller_kernels", ["centre", "mapped"])
@pytest.mark.parametrize("name", list(SUBNETS))
def test_static_net_equals_supernet(name, smaller_kernels):
    # Product quality bar: max abs diff <= 1e-5 in fp32, eval mode.
    net = Supernet(replace(_space_of(name), smaller_kernels=smaller_kernels), 3, 5)
    perturb(net, seed=list(SUBNETS).index(name))  # fixed per subnet, the same in every process
    sub = SUBNETS[name]
    net.set_subnet(sub)
    net.eval()
    static = extract_subnet(net, sub)
    assert all(type(m).__module__.startswith(("torch.nn", "tightfit.model.extract")) for m in static.modules())
    x = torch.randn(4, 3, 16, 16)
    with torch.no_grad():
        diff = (static(x) - net(x)).abs().max().item()
    assert diff <= 1e-5
    assert count_params(static) < count_params(net) or name.endswith("largest")


def test_mapped_kernels_start_as_the_centre():
    # Cai et al. 2020 (Sec. 3.2): transformation matrices are initialised to identity.
    a = Supernet(SPACE, 3, 5)
    b = Supernet(replace(SPACE, smaller_kernels="mapped"), 3, 5)
    b.load_state_dict(a.state_dict(), strict=False)
    dw_a, dw_b = a.stages[2][0].dw, b.stages[2][0].dw
    for k in (3, 5, 7):
        assert torch.equal(dw_a.active_weight(16, k), dw_b.active_weight(16, k))
    assert torch.equal(dw_a.active_weight(16, 3), dw_a.weight[:16, :, 2:5, 2:5])


@pytest.mark.parametrize("name", ["smallest", "largest", "random1", "random3",
                                  "wide-smallest", "wide-largest", "wide-random1", "wide-random3"])
def test_gradients_reach_exactly_the_active_parameters(name):
    # Reference: the same subnet built from plain torch.nn layers, differentiated by torch
    # autograd. Centre-crop kernels map every active weight element to one static element, so the
    # supernet's gradient must equal the static net's element for element and be zero elsewhere:
    # equal non-zero counts and equal L1 mass (inactive elements would add to both).
    net = Supernet(_space_of(name), 3, 5)  # smaller kernels: the centre
    perturb(net)
    sub = SUBNETS[name]
    net.set_subnet(sub)
    static = extract_subnet(net, sub).train()
    net.train()
    x = torch.randn(4, 3, 16, 16)
    net(x).sum().backward()
    static(x).sum().backward()
    sup = [p.grad for p in net.parameters() if p.grad is not None]
    ref = [p.grad for p in static.parameters()]
    assert sum(int((g != 0).sum()) for g in sup) == sum(int((g != 0).sum()) for g in ref)
    l1_sup, l1_ref = sum(g.abs().sum() for g in sup), sum(g.abs().sum() for g in ref)
    assert torch.allclose(l1_sup, l1_ref, rtol=1e-4)
    for stage, blocks in zip(net.stages, sub.stages):
        for j, block in enumerate(stage):
            if j >= len(blocks):
                assert all(p.grad is None for p in block.parameters())


def test_kernel_map_gradients_only_for_kernels_on_the_path():
    net = Supernet(replace(SPACE, smaller_kernels="mapped"), 3, 5)
    sub = SPACE.smallest()  # kernel 3 in the last stage: 7 -> 5 -> 3, both matrices used
    net.set_subnet(sub)
    net(torch.randn(2, 3, 16, 16)).sum().backward()
    dw = net.stages[2][0].dw
    assert dw.transforms["k5"].grad is not None and dw.transforms["k3"].grad is not None
    net.zero_grad(set_to_none=True)
    net.set_subnet(SPACE.largest())  # kernel 7: no transformation on the path
    net(torch.randn(2, 3, 16, 16)).sum().backward()
    assert dw.transforms["k5"].grad is None and dw.transforms["k3"].grad is None


def test_bn_recalibration_is_deterministic_and_exact():
    net = Supernet(SPACE, 3, 5)
    sub = SUBNETS["random2"]
    net.set_subnet(sub)
    gen = torch.Generator().manual_seed(1)
    batches = [torch.randn(8, 3, 16, 16, generator=gen) for _ in range(3)]
    recalibrate_bn(net, batches)
    first = {k: v.clone() for k, v in net.state_dict().items()}
    recalibrate_bn(net, batches)
    assert all(torch.equal(first[k], v) for k, v in net.state_dict().items())
    # Stem BN statistics equal the mean of per-batch means (torch.nn.BatchNorm2d with momentum=None
    # keeps a cumulative average — PyTorch docs), computed here directly.
    stem_conv = net.stem.conv
    means = torch.stack([stem_conv(x, net.stem.width).mean((0, 2, 3)) for x in batches]).mean(0)
    assert torch.allclose(net.stem.bn.running_mean, means.detach(), atol=1e-5)


def test_preserved_bn_stats_restores_buffers():
    net = Supernet(SPACE, 3, 5)
    before = {k: v.clone() for k, v in net.state_dict().items()}
    with preserved_bn_stats(net):
        recalibrate_bn(net, [torch.randn(8, 3, 16, 16)])
    assert all(torch.equal(before[k], v) for k, v in net.state_dict().items())


def test_macs_of_a_single_conv_match_the_formula():
    # MACs of a k x k conv = H_out * W_out * C_out * C_in * k * k (common practice).
    conv = torch.nn.Sequential(torch.nn.Conv2d(3, 8, 3, padding=1, bias=False))
    assert count_macs(conv, 3, 16) == 16 * 16 * 8 * 3 * 9
