"""The published rules written out by hand on tiny inputs, so a wrong method fails, not only a crash.

Each test names its rule; scripts/check_mutations.py lists the plausible bugs these tests must catch.
"""
from __future__ import annotations

import dataclasses
import random

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from helpers import perturb, steady, tiny_recipe
from tightfit.data.dataset import normalize
from tightfit.model.elastic import ElasticBatchNorm, ElasticConv
from tightfit.recipe import build_supernet
from tightfit.search.choice_rule import Tried, measure_and_choose
from tightfit.search.evolution import Candidate
from tightfit.train.sandwich import sandwich, sandwich_backward


def test_sandwich_gradient_is_label_loss_of_largest_plus_distillation_of_the_others():
    # Yu & Huang 2019 (in-place distillation): the largest learns from the labels (with label smoothing);
    # every other subnet learns from the largest's detached softmax, by soft-label cross-entropy.
    recipe = tiny_recipe()
    model = build_supernet(recipe, 5)
    perturb(model, seed=1)
    model.train()
    space, cfg = recipe.space, recipe.train
    subnets = [space.largest(), space.smallest(), space.sample(random.Random(3))]
    gen = torch.Generator().manual_seed(0)
    x, y = torch.randn(8, 3, 16, 16, generator=gen), torch.randint(0, 5, (8,), generator=gen)
    sandwich_backward(model, x, y, subnets, cfg)
    got = {n: p.grad.clone() for n, p in model.named_parameters() if p.grad is not None}
    model.zero_grad(set_to_none=True)
    model.set_subnet(subnets[0])
    teacher_logits = model(x)
    total = F.cross_entropy(teacher_logits, y, label_smoothing=cfg.label_smoothing)
    teacher = teacher_logits.detach().softmax(1)
    for s in subnets[1:]:
        model.set_subnet(s)
        total = total + (-(teacher * F.log_softmax(model(x), 1)).sum(1).mean())
    total.backward()
    want = {n: p.grad for n, p in model.named_parameters() if p.grad is not None}
    assert set(got) == set(want)
    for n in want:
        torch.testing.assert_close(got[n], want[n], rtol=1e-4, atol=1e-6, msg=n)


def test_kl_distillation_with_temperature_is_the_hand_computed_divergence():
    # Hinton et al. 2015: T^2 * sum_c p_c (log p_c - log q_c), p = softmax(teacher / T), q = softmax(student / T).
    import math
    from tightfit.train.sandwich import distill_loss
    student, teacher = [1.0, 0.0, -1.0], [2.0, 0.5, 0.0]
    T = 2.0
    def softmax(v):
        e = [math.exp(a / T) for a in v]
        return [a / sum(e) for a in e]
    p, q = softmax(teacher), softmax(student)
    want = T * T * sum(pc * (math.log(pc) - math.log(qc)) for pc, qc in zip(p, q))
    s, t = torch.tensor([student]), torch.tensor([teacher])
    assert distill_loss(s, t, "kl", T).item() == pytest.approx(want, rel=1e-5)
    cross = T * T * -sum(pc * math.log(qc) for pc, qc in zip(p, q))
    assert distill_loss(s, t, "soft_ce", T).item() == pytest.approx(cross, rel=1e-5)
    assert distill_loss(t, t, "kl", T).item() == pytest.approx(0.0, abs=1e-6)



def _no_decay_parameters(model: torch.nn.Module) -> set[int]:
    """Norm scales and shifts, every bias and the kernel-transform matrices, found by the module that
    owns them (not by shape)."""
    out = set()
    for mod in model.modules():
        if isinstance(mod, torch.nn.modules.batchnorm._BatchNorm):
            out |= {id(mod.weight), id(mod.bias)}
        if getattr(mod, "bias", None) is not None:
            out.add(id(mod.bias))
        if isinstance(getattr(mod, "transforms", None), torch.nn.ParameterDict):
            out |= {id(t) for t in mod.transforms.values()}
    return out


@pytest.mark.parametrize("optimizer, momentum, shrink", [
    ("sgd", 0.0, 1.0),   # w <- w - lr * wd * w
    ("sgd", 0.9, 1.9),   # Nesterov, first step: buf = wd * w, step = wd * w + m * buf = (1 + m) * wd * w
    ("adamw", 0.9, 1.0),  # decoupled: w <- w - lr * wd * w; Adam's own step is 0 / (sqrt(0) + eps) = 0
])
def test_weight_decay_shrinks_weights_by_lr_wd_w_and_spares_norm_bias_and_transforms(optimizer, momentum, shrink):
    # Common practice: no decay on norm and bias parameters ("no bias decay", He et al. 2019, Bag of Tricks,
    # Sec. 3.1, from memory); the kernel-transform matrices are spared too (this project's rule, sandwich.py).
    # One step with zero gradient then moves nothing but the decay. The update arithmetic is written out from
    # the algorithm boxes of torch.optim.SGD (weight decay, momentum, Nesterov) and torch.optim.AdamW
    # (decoupled decay, Loshchilov & Hutter 2019) in the PyTorch documentation.
    from tightfit.train.sandwich import make_optimizer
    recipe = tiny_recipe(weight_decay=0.1, lr=0.1, momentum=momentum, optimizer=optimizer)
    recipe = dataclasses.replace(recipe, space=dataclasses.replace(recipe.space, smaller_kernels="mapped"))
    model = build_supernet(recipe, 5)
    perturb(model, seed=2)
    before = {n: p.detach().clone() for n, p in model.named_parameters()}
    spared = _no_decay_parameters(model)
    opt = make_optimizer(model, recipe.train)
    for p in model.parameters():
        p.grad = torch.zeros_like(p)  # a parameter without a gradient is skipped: every one must have one
    opt.step()
    lr, wd = recipe.train.lr, recipe.train.weight_decay
    assert len(spared) > 0 and len(spared) < len(before)
    for n, p in model.named_parameters():
        if id(p) in spared:
            assert torch.equal(p.detach(), before[n]), n
        else:
            torch.testing.assert_close(p.detach() - before[n], -shrink * lr * wd * before[n], rtol=1e-4, atol=1e-7,
                                       msg=n)

def test_sandwich_draws_depend_on_seed_and_step_and_differ_within_a_step():
    # Common practice for resumable training: the draw is a function of (seed, step) only.
    space = tiny_recipe().space
    a, b, c = sandwich(space, 5, 0, 4), sandwich(space, 5, 0, 4), sandwich(space, 5, 1, 4)
    assert a == b and a[:2] == [space.largest(), space.smallest()]
    assert a[2:] != c[2:]                                  # another seed, another draw at the same step
    assert sandwich(space, 6, 0, 4)[2:] != a[2:]           # another step, another draw
    assert len({s.to_key() for s in a[2:]}) > 1            # not one subnet repeated


def test_recalibrated_batchnorm_is_the_exact_average_and_touches_only_active_channels():
    # Yu & Huang 2019 (Sec. 3.3): reset, then a cumulative average over the calibration batches.
    bn = ElasticBatchNorm(8, momentum=None)
    bn.reset_running_stats()
    bn.train()
    gen = torch.Generator().manual_seed(0)
    batches = [torch.randn(6, 4, 5, 5, generator=gen) * (i + 1) + i for i in range(3)]
    with torch.no_grad():
        for x in batches:
            bn(x)
    means = torch.stack([x.mean((0, 2, 3)) for x in batches])
    variances = torch.stack([x.var((0, 2, 3), unbiased=True) for x in batches])   # torch's running_var is unbiased
    torch.testing.assert_close(bn.running_mean[:4], means.mean(0))
    torch.testing.assert_close(bn.running_var[:4], variances.mean(0))
    assert torch.equal(bn.running_mean[4:], torch.zeros(4)) and torch.equal(bn.running_var[4:], torch.ones(4))


def test_pointwise_uses_the_leading_channels():
    # Channel prefixes (Yu et al. 2019, slimmable networks): a width-k layer is the first k filters
    # over the first j inputs, so every narrower subnet shares the wider one's leading weights.
    conv = ElasticConv(6, 5)
    with torch.no_grad():
        conv.weight.copy_(torch.arange(30.0).view(5, 6, 1, 1))
    w = conv.active_weight(2, 3)
    assert w[:, :, 0, 0].tolist() == [[0.0, 1.0], [6.0, 7.0], [12.0, 13.0]]


def test_normalize_subtracts_the_mean_then_divides_by_the_std():
    # (x / 255 - mean) / std per channel, channels first (common practice; torchvision Normalize).
    x = torch.tensor([[[[0, 255], [51, 102]]]], dtype=torch.uint8).permute(0, 2, 3, 1).repeat(1, 1, 1, 2)
    out = normalize(x, (0.2, 0.5), (0.5, 0.25))
    expect = (np.array([[0, 255], [51, 102]]) / 255.0 - 0.2) / 0.5
    np.testing.assert_allclose(out[0, 0].numpy(), expect, rtol=1e-6)
    np.testing.assert_allclose(out[0, 1].numpy(), (np.array([[0, 255], [51, 102]]) / 255.0 - 0.5) / 0.25, rtol=1e-6)


@pytest.mark.parametrize("ratio, fits", [(0.99, True), (1.0, True), (1.01, False)])
def test_budget_boundary(ratio, fits):
    # The contract: a budget is met when the percentile is at or under it (Measurement.fits, guard 0: the verdict).
    assert steady(0.5 * ratio).fits(0.5) is fits


def test_choice_never_calls_a_candidate_1_percent_over_the_budget_fitting():
    # The contract (docs/contract.md): a budget is met when p90 <= budget, in the search's choice as in verify.
    cands = [Candidate("over", None, 90.0, 0.9, 0), Candidate("under", None, 80.0, 0.8, 0)]
    measured = {"over": 1.01, "under": 0.99}

    def measure(cs, start):
        return [Tried(c, None, None, steady(measured[c.key])) for c in cs]
    choice = measure_and_choose(cands, 1.0, measure, 2, lambda: cands[-1], lambda line: None, guard=0.0)
    assert choice.pick.cand.key == "under" and choice.fits
    alone = measure_and_choose(cands[:1], 1.0, measure, 1, lambda: cands[0], lambda line: None, guard=0.0)
    assert alone.fits is False      # the only candidate is 1 % over: not a fit, and said so


def test_calibration_reports_its_leave_one_out_error_in_percent():
    # Leave-one-out error (common practice for choosing a model on few points): fit the ratio on two
    # points, predict the third, in percent. Three points: only "sum" and "ratio" are candidates.
    from tightfit.latency.predict import calibrate
    x, y = [1.0, 2.0, 3.0], [1.1, 2.0, 3.3]
    errors = []
    for i in range(3):
        xs, ys = [v for j, v in enumerate(x) if j != i], [v for j, v in enumerate(y) if j != i]
        a = sum(p / q for p, q in zip(xs, ys)) / sum((p / q) ** 2 for p, q in zip(xs, ys))  # min sum((a x / y - 1)^2)
        errors.append(abs(a * x[i] - y[i]) / y[i])
    ratio_loo = 100 * sum(errors) / 3
    sum_loo = 100 * sum(abs(p - q) / q for p, q in zip(x, y)) / 3
    cal = calibrate(x, y)
    assert cal.kind == ("ratio" if ratio_loo < sum_loo else "sum")
    assert cal.loo_mape == pytest.approx(min(ratio_loo, sum_loo), rel=1e-9)


def test_space_hash_tells_input_shapes_apart():
    # A latency table is valid only for the space *and* the input shape it was measured at.
    from tightfit.model.space import space_hash
    space = tiny_recipe().space
    assert space_hash(space, 3, 16) == space_hash(space, 3, 16)
    assert len({space_hash(space, 3, 16), space_hash(space, 3, 32), space_hash(space, 1, 16)}) == 3


def test_verify_judges_at_the_manifest_percentile():
    from pathlib import Path

    from tightfit.ondevice.exports import Export
    from tightfit.ondevice.timing import Protocol
    from tightfit.ondevice.verify import protocol_for
    manifest = {"latency": {"protocol": Protocol(percentile=90.0).to_dict()}, "budget": {"ms": 1.0, "percentile": 75.0}}
    e = Export("x", Path("."), Path("model.onnx"), manifest)
    assert protocol_for(e, None, None, False).percentile == 75.0
    assert protocol_for(e, 2, 4, False).threads == 2 and protocol_for(e, 2, 4, False).repeats == 4


def _block_with_squeeze_excite():
    from tightfit.model.space import StageSpec
    from tightfit.model.supernet import ElasticInvertedResidual
    stage = StageSpec(out_channels=8, stride=1, depths=(1,), expansions=(3, 6), kernels=(3, 5),
                      activation="relu6", squeeze_excite=True)
    block = ElasticInvertedResidual(8, 8, 1, stage, "centre")
    perturb(block, seed=4)
    block.expansion, block.kernel = 3, 3          # hidden 24 of 48, the centre 3x3 of the 5x5 kernels
    return block


def test_sliced_block_with_squeeze_excite_equals_torchvision_layers_loaded_with_leading_slices():
    # Reference: torchvision.ops.SqueezeExcitation (ReLU, hard-sigmoid gate as in MobileNetV3, Howard et al.
    # 2019) and plain torch layers, loaded with explicit leading slices of the supernet's tensors: the first
    # 24 of 48 hidden channels, the centre 3x3 of each 5x5 depthwise kernel, the first 8 of 12 squeeze
    # channels (squeeze width: a quarter of 24 rounded to 8). A trailing slice anywhere changes the output.
    from torch import nn
    from torchvision.ops import SqueezeExcitation
    block = _block_with_squeeze_excite().eval()
    sd = block.state_dict()
    h, sq = 24, 8

    def bn(prefix, n):
        layer = nn.BatchNorm2d(n).eval()
        layer.load_state_dict({k: sd[f"{prefix}.{k}"][:n] if sd[f"{prefix}.{k}"].dim() else sd[f"{prefix}.{k}"]
                               for k in layer.state_dict()})
        return layer

    expand = nn.Conv2d(8, h, 1, bias=False)
    expand.weight.data = sd["expand.weight"][:h, :8].clone()
    dw = nn.Conv2d(h, h, 3, padding=1, groups=h, bias=False)
    dw.weight.data = sd["dw.weight"][:h, :, 1:4, 1:4].clone()
    se = SqueezeExcitation(h, sq, activation=nn.ReLU, scale_activation=nn.Hardsigmoid)
    se.fc1.weight.data, se.fc1.bias.data = sd["se.reduce.weight"][:sq, :h].clone(), sd["se.reduce.bias"][:sq].clone()
    se.fc2.weight.data, se.fc2.bias.data = sd["se.expand.weight"][:h, :sq].clone(), sd["se.expand.bias"][:h].clone()
    project = nn.Conv2d(h, 8, 1, bias=False)
    project.weight.data = sd["project.weight"][:8, :h].clone()
    reference = nn.Sequential(expand, bn("bn1", h), nn.ReLU6(), dw, bn("bn2", h), nn.ReLU6(), se, project,
                              bn("bn3", 8)).eval()
    x = torch.randn(2, 8, 6, 6, generator=torch.Generator().manual_seed(1))
    with torch.no_grad():
        torch.testing.assert_close(block(x), x + reference(x), rtol=1e-5, atol=1e-6)


def test_recalibration_through_a_block_equals_the_depthwise_output_mean_computed_by_hand():
    # Yu & Huang 2019 (Sec. 3.3): after recalibration on one batch, the depthwise BatchNorm's running mean is the
    # mean of the depthwise conv's output over that batch, for the active channels; the others keep the reset
    # values. The expansion's BatchNorm normalises with the batch's own (biased) statistics meanwhile (torch docs).
    from tightfit.model.recalibrate import recalibrate_bn
    block = _block_with_squeeze_excite()
    sd = {k: v.clone() for k, v in block.state_dict().items()}
    x = torch.randn(4, 8, 6, 6, generator=torch.Generator().manual_seed(2))
    recalibrate_bn(block, [x])
    h = F.conv2d(x, sd["expand.weight"][:24, :8])
    mean, var = h.mean((0, 2, 3), keepdim=True), h.var((0, 2, 3), unbiased=False, keepdim=True)
    g, b = sd["bn1.weight"][:24].view(1, -1, 1, 1), sd["bn1.bias"][:24].view(1, -1, 1, 1)
    h = F.relu6((h - mean) / torch.sqrt(var + 1e-5) * g + b)
    d = F.conv2d(h, sd["dw.weight"][:24, :, 1:4, 1:4], padding=1, groups=24)
    torch.testing.assert_close(block.bn2.running_mean[:24], d.mean((0, 2, 3)), rtol=1e-4, atol=1e-5)
    torch.testing.assert_close(block.bn2.running_var[:24], d.var((0, 2, 3), unbiased=True), rtol=1e-4, atol=1e-5)
    assert torch.equal(block.bn2.running_mean[24:], torch.zeros(24))
    assert torch.equal(block.bn2.running_var[24:], torch.ones(24))
