"""The rules of a pick's fine-tune (tightfit.train.finetune) written out by hand on a tiny, untrained
supernet: who teaches, the loss, the optimizer, the learning-rate schedule, the batches, and what is
recalibrated afterwards. scripts/check_mutations.py lists the plausible bugs these tests must catch."""
from __future__ import annotations

import copy
import math

import pytest
import torch
import torch.nn.functional as F

from helpers import perturb, tiny_recipe
from tightfit.data.dataset import calibration_batches, load_dataset, train_batches
from tightfit.model.recalibrate import recalibrate_bn
from tightfit.model.supernet import Supernet
from tightfit.train.finetune import FinetuneSettings, finetune, inherited_net
from tightfit.rundir import TrainedRun

BATCHES_PER_EPOCH = 14  # 459 training images of the tiny recipe, batches of 32, the last incomplete one dropped


def _run(**train):
    """A trained-run record around an untrained supernet with random weights and BN statistics, so a
    teacher that skipped its recalibration, or a wrong subnet, gives other logits."""
    recipe = tiny_recipe(**train)
    ds = load_dataset(recipe.data, recipe.seed)
    supernet = Supernet(recipe.space, recipe.data.channels, ds.num_classes)
    perturb(supernet, seed=1)
    return TrainedRun(supernet, recipe, ds.class_names, ds.mean, ds.std, True), ds


def _calib(run, ds):
    cfg = run.recipe.train
    return calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed)


class _Steps:
    """Stands in for torch.optim.SGD: records, at every step, each group's learning rate and each
    parameter's gradient, then steps as SGD does."""

    def __init__(self):
        self.made, self.lrs, self.grads = [], [], []
        outer = self

        class Recording(torch.optim.SGD):
            def __init__(self, *args, **kwargs):
                super().__init__(*args, **kwargs)
                outer.made.append(self)

            def step(self, closure=None):
                outer.lrs.append([g["lr"] for g in self.param_groups])
                outer.grads.append({id(p): p.grad.clone() for g in self.param_groups for p in g["params"]
                                    if p.grad is not None})
                return super().step(closure)
        self.cls = Recording


@pytest.fixture
def steps(monkeypatch):
    rec = _Steps()
    monkeypatch.setattr(torch.optim, "SGD", rec.cls)
    return rec


def _inputs_of(net) -> list[torch.Tensor]:
    """The inputs of the training steps (the recalibration afterwards runs without gradients)."""
    seen: list[torch.Tensor] = []

    def hook(module, args):
        if module.training and torch.is_grad_enabled():
            seen.append(args[0].detach().clone())
    net.register_forward_pre_hook(hook)
    return seen


def test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature(steps):
    # Soft-label distillation (Hinton et al. 2015): loss = T^2 * KL(softmax(t / T) || softmax(s / T)), the
    # teacher being the largest subnet (in-place distillation, Yu & Huang 2019) in inference mode with its
    # BatchNorm statistics re-estimated on the calibration batches (Yu & Huang 2019, Sec. 3.3). Written out
    # here on the supernet itself (set to the largest, recalibrated, eval) and a copy of the student.
    run, ds = _run(distill_loss="kl", distill_temperature=2.0)
    calib = _calib(run, ds)
    net = inherited_net(run, run.recipe.space.smallest(), calib)
    start, seen = copy.deepcopy(net), _inputs_of(net)
    record = finetune(run, ds, net, FinetuneSettings(steps=1, lr=0.05))

    teacher = copy.deepcopy(run.supernet)
    teacher.set_subnet(run.recipe.space.largest())
    recalibrate_bn(teacher, calib)
    x, t = seen[0], 2.0
    with torch.no_grad():
        p = F.softmax(teacher.eval()(x) / t, 1)
    start.train()
    log_q = F.log_softmax(start(x) / t, 1)
    loss = t * t * (p * (p.log() - log_q)).sum(1).mean()
    loss.backward()
    got = steps.grads[0]
    for (name, p0), (_, p1) in zip(start.named_parameters(), net.named_parameters()):
        torch.testing.assert_close(got[id(p1)], p0.grad, rtol=1e-4, atol=1e-6, msg=name)
    assert record["last_loss"] == pytest.approx(loss.item(), abs=1e-4)   # the KL itself, not the cross-entropy
    assert record["teacher"] == run.recipe.space.largest().to_key()


def test_the_optimizer_is_the_recipes_nesterov_sgd_without_decay_on_norm_and_bias(steps):
    # The recipe's SGD (Nesterov momentum) with weight decay on conv and linear weights only; no decay on
    # norm and bias parameters (common practice: "no bias decay", He et al. 2019, Sec. 3.1, from memory).
    run, ds = _run(weight_decay=1e-3)
    net = inherited_net(run, run.recipe.space.middle(), _calib(run, ds))
    finetune(run, ds, net, FinetuneSettings(steps=1, lr=0.05))
    opt, = steps.made
    spared = {id(m.bias) for m in net.modules() if getattr(m, "bias", None) is not None}
    spared |= {id(m.weight) for m in net.modules() if isinstance(m, torch.nn.modules.batchnorm._BatchNorm)}
    decay = {id(p): g["weight_decay"] for g in opt.param_groups for p in g["params"]}
    assert set(decay) == {id(p) for p in net.parameters()}
    assert all(decay[i] == (0.0 if i in spared else 1e-3) for i in decay)
    assert all(g["momentum"] == run.recipe.train.momentum and g["nesterov"] for g in opt.param_groups)


def test_the_learning_rate_falls_by_a_cosine_from_the_peak_to_zero_over_exactly_the_steps(steps):
    # SGDR without restarts (Loshchilov & Hutter 2017, Eq. 5, eta_min = 0): step s of N runs at
    # peak * (1 + cos(pi * s / N)) / 2, so the first step runs at the peak and the last just above zero.
    run, ds = _run()
    net = inherited_net(run, run.recipe.space.smallest(), _calib(run, ds))
    n, peak = BATCHES_PER_EPOCH + 3, 0.08
    finetune(run, ds, net, FinetuneSettings(steps=n, lr=peak))
    want = [peak * (1 + math.cos(math.pi * s / n)) / 2 for s in range(n)]
    assert len(steps.lrs) == n
    for s, lrs in enumerate(steps.lrs):
        assert lrs == pytest.approx([want[s]] * len(lrs), rel=1e-12), s


def test_the_batches_are_the_recipes_in_an_order_of_their_own_reshuffled_each_epoch_and_reproducible():
    # Common practice: fine-tuning sees the training split reshuffled every epoch; its order differs from the
    # supernet's own epochs (which would replay its first batches) and is the same on every run.
    run, ds = _run()
    calib, n = _calib(run, ds), BATCHES_PER_EPOCH + 3
    seen = []
    for _ in range(2):
        net = inherited_net(run, run.recipe.space.smallest(), calib)
        seen.append(_inputs_of(net))
        finetune(run, ds, net, FinetuneSettings(steps=n, lr=0.05))
    first, again = seen
    assert len(first) == n and all(torch.equal(a, b) for a, b in zip(first, again))
    cfg, data = run.recipe.train, run.recipe.data
    supernets = [x for e in (0, 1) for x, _ in train_batches(ds, data, cfg.batch_size, run.recipe.seed, e)]
    assert not any(torch.equal(a, b) for a, b in zip(first, supernets))
    second_epoch = first[BATCHES_PER_EPOCH:]
    assert not any(torch.equal(a, b) for a, b in zip(second_epoch, first))
    assert all(a.shape[0] == cfg.batch_size for a in first)


@torch.no_grad()
def _batch_statistics(net, batches):
    """Each BatchNorm's input mean and unbiased variance per channel, averaged over ``batches``: the exact
    re-estimate of Yu & Huang 2019 (Sec. 3.3), computed from the inputs each layer sees in training mode."""
    bns = [m for m in net.modules() if isinstance(m, torch.nn.modules.batchnorm._BatchNorm)]
    sums = {id(bn): [0.0, 0.0] for bn in bns}

    def hook(module, args):
        x = args[0]
        sums[id(module)][0] += x.mean((0, 2, 3))
        sums[id(module)][1] += x.var((0, 2, 3), unbiased=True)
    handles = [bn.register_forward_pre_hook(hook) for bn in bns]
    net.train()
    for x in batches:
        net(x)
    for h in handles:
        h.remove()
    return [(sums[id(bn)][0] / len(batches), sums[id(bn)][1] / len(batches)) for bn in bns]


def test_after_the_steps_every_batchnorm_holds_the_exact_average_over_the_calibration_batches():
    # The steps leave BatchNorm with a moving average of training batches under weights that kept changing;
    # the shipped network is re-estimated on the fixed calibration batches (Yu & Huang 2019, Sec. 3.3) and
    # handed back in inference mode.
    run, ds = _run()
    calib = _calib(run, ds)
    net = inherited_net(run, run.recipe.space.middle(), calib)
    finetune(run, ds, net, FinetuneSettings(steps=4, lr=0.05))
    assert not net.training
    want = _batch_statistics(copy.deepcopy(net), calib)
    bns = [m for m in net.modules() if isinstance(m, torch.nn.modules.batchnorm._BatchNorm)]
    assert len(bns) == len(want) > 0
    for bn, (mean, var) in zip(bns, want):
        torch.testing.assert_close(bn.running_mean, mean, rtol=1e-4, atol=1e-5)
        torch.testing.assert_close(bn.running_var, var, rtol=1e-4, atol=1e-5)


def test_taking_out_a_pick_and_its_teacher_leaves_the_supernet_as_it_was():
    # Common practice for shared weights: reading one subnet out must not change what the others inherit
    # (the supernet's BatchNorm statistics are restored after each recalibration).
    run, ds = _run()
    before = {k: v.clone() for k, v in run.supernet.state_dict().items()}
    net = inherited_net(run, run.recipe.space.smallest(), _calib(run, ds))
    finetune(run, ds, net, FinetuneSettings(steps=2, lr=0.05))
    after = run.supernet.state_dict()
    assert all(torch.equal(after[k], v) for k, v in before.items())
