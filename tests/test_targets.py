"""Training for declared targets: band draws, the best-of-k rule, the mixed teacher loss, and the
targets' way in through the recipe and the command line."""
from __future__ import annotations

import dataclasses
import math
import subprocess
import sys

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from helpers import FakePredictor, tiny_recipe
from tightfit.errors import UserError
from tightfit.recipe import Target, parse_recipe, recipe_from_dict
from tightfit.train.sandwich import subnet_loss
from tightfit.train.targets import Band, band_draws, band_members, lowest_loss


def test_band_members_are_exactly_the_sampled_subnets_predicted_inside_the_band():
    space = tiny_recipe().space
    pred = FakePredictor(space)
    lo = pred.predict_ms(space.smallest())
    hi = pred.predict_ms(space.largest())
    low, high = lo + 0.4 * (hi - lo), lo + 0.6 * (hi - lo)
    members = band_members(space, pred.predict_ms, low, high, seed=3, draws=2_000)
    assert members and len(set(members)) == len(members)
    assert all(low <= pred.predict_ms(s) <= high for s in members)
    # Nothing inside the band was left out of the sample: re-draw the same sample and check.
    import random
    rng, inside = random.Random("3:bands"), set()
    for _ in range(2_000):
        s = space.sample(rng)
        if low <= pred.predict_ms(s) <= high:
            inside.add(s)
    assert inside == set(members)


def test_band_draws_come_from_their_band_take_bands_in_turn_and_depend_only_on_seed_and_step():
    space = tiny_recipe().space
    pred = FakePredictor(space)
    mid = (pred.predict_ms(space.smallest()) + pred.predict_ms(space.largest())) / 2
    a = Band("a", 0, mid, band_members(space, pred.predict_ms, 0.0, mid, seed=0, draws=500))
    b = Band("b", mid, 9, band_members(space, pred.predict_ms, mid * 1.0001, 9.0, seed=0, draws=500))
    assert a.members and b.members and not set(a.members) & set(b.members)
    for step in range(20):
        draws = band_draws([a, b], step, seed=5, per_step=1, candidates=3)
        assert len(draws) == 1 and len(draws[0]) == 3
        band = (a, b)[step % 2]  # bands in turn
        assert all(s in band for s in draws[0])
        assert draws == band_draws([a, b], step, seed=5, per_step=1, candidates=3)
    assert band_draws([], 0, 0, 1, 1) == []


def test_best_of_k_trains_the_draw_with_the_lowest_loss_first_on_ties():
    # Wang et al. 2021 (best-of-k sampling): of k draws, train the one with the lowest loss.
    space = tiny_recipe().space
    import random
    rng = random.Random(0)
    cands = tuple(space.sample(rng) for _ in range(4))
    injected = {cands[0]: 2.0, cands[1]: 0.7, cands[2]: 0.3, cands[3]: 0.3}
    assert lowest_loss(cands, injected.__getitem__) == cands[2]
    calls = []
    assert lowest_loss(cands[:1], lambda s: calls.append(s) or 0.0) == cands[0]
    assert calls == []  # one draw: nothing is evaluated


@pytest.mark.parametrize("w", [0.0, 0.3, 1.0])
def test_mixed_loss_gradient_matches_the_rule_written_out_by_hand(w):
    # d/dz of CE(softmax(z), q) is softmax(z) - q (common practice); mixing is linear in the two losses.
    # Label smoothing eps: q = (1 - eps) * onehot + eps / C (Szegedy et al. 2016). T = 1.
    torch.manual_seed(0)
    net = nn.Linear(5, 4)
    x, y = torch.randn(6, 5), torch.tensor([0, 1, 2, 3, 0, 1])
    teacher = torch.randn(6, 4)
    cfg = dataclasses.replace(tiny_recipe().train, distill=True, distill_weight=w, label_smoothing=0.1,
                              distill_loss="soft_ce", distill_temperature=1.0)
    z = net(x)
    subnet_loss(z, y, teacher, cfg).backward()
    with torch.no_grad():
        p = F.softmax(net(x), 1)
        q = 0.9 * F.one_hot(y, 4) + 0.1 / 4
        dz = (w * (p - F.softmax(teacher, 1)) + (1 - w) * (p - q)) / len(y)
        expect_w, expect_b = dz.T @ x, dz.sum(0)
    assert torch.allclose(net.weight.grad, expect_w, atol=1e-6)
    assert torch.allclose(net.bias.grad, expect_b, atol=1e-6)


def test_the_largest_and_every_subnet_without_distillation_learn_from_the_labels_only():
    z, y, teacher = torch.randn(4, 3), torch.tensor([0, 1, 2, 0]), torch.randn(4, 3)
    cfg = dataclasses.replace(tiny_recipe().train, distill=True, distill_weight=0.5, label_smoothing=0.0)
    labels = F.cross_entropy(z, y)
    assert torch.allclose(subnet_loss(z, y, None, cfg), labels)  # the largest: no teacher
    off = dataclasses.replace(cfg, distill=False)
    assert torch.allclose(subnet_loss(z, y, teacher, off), labels)


def _doc(**train):
    recipe = tiny_recipe()
    d = {"name": "t", "seed": 0, "data": {"source": "builtin", "samples": 200}, "space": {
        "stem_channels": 8, "stage": [{"channels": 8, "depths": [1, 2], "expansions": [2, 4], "kernels": [3]}]},
        "train": train}
    return d, recipe


def test_recipe_targets_parse_round_trip_through_a_checkpoint_dict_and_change_the_hash():
    doc, _ = _doc(targets=[{"table": "a.json", "budget": "300us"}, {"table": "b.json", "budget": "1.5ms"}])
    r = parse_recipe(doc)
    assert r.train.targets == (Target("a.json", 0.3), Target("b.json", 1.5))
    assert recipe_from_dict(r.to_dict()) == r
    plain = parse_recipe(_doc()[0])
    assert plain.hash() != r.hash()
    assert plain.hash() == parse_recipe(_doc(distill_weight=1.0, target_subnets=1)[0]).hash()  # defaults: same hash


@pytest.mark.parametrize("train, needle", [
    ({"targets": [{"table": "a.json", "budget": "fast"}]}, "is not a duration"),
    ({"targets": [{"table": "a.json"}]}, "train.targets[0].budget"),
    ({"targets": [{"table": "a.json", "budget": "1ms", "device": "x"}]}, "train.targets[0].device"),
    ({"targets": {"table": "a.json"}}, "[[train.targets]]"),
    ({"distill_weight": 1.5}, "train.distill_weight"),
    ({"target_band_bottom": 1.0}, "train.target_band_bottom"),
    ({"lr_end": 0.05}, "final_lr_fraction"),
])
def test_bad_target_settings_are_refused_in_one_line_naming_the_key(train, needle):
    with pytest.raises(UserError) as e:
        parse_recipe(_doc(**train)[0])
    assert needle in str(e.value) and "\n" not in str(e.value)


def test_command_line_targets_need_table_and_budget_and_exit_2(tmp_path):
    recipe = tmp_path / "r.toml"
    recipe.write_text('[space]\nstem_channels = 8\n[[space.stage]]\nchannels = 8\ndepths = [1]\n'
                      'expansions = [2]\nkernels = [3]\n')
    for extra, needle in ((["--budget", "1ms"], "both --table and --budget"),
                          (["--table", str(tmp_path / "none.json"), "--budget", "1ms"], "file not found")):
        p = subprocess.run([sys.executable, "-m", "tightfit", "train", str(recipe), "--run", str(tmp_path / "run"),
                            *extra], capture_output=True, text=True)
        assert p.returncode == 2 and needle in p.stderr, p.stderr
        assert not (tmp_path / "run").exists()


def test_training_with_targets_trains_a_band_draw_in_every_sandwich_step(tmp_path, monkeypatch):
    # The loop adds, after largest / smallest / random, the band draws of the step (bands in turn).
    from tightfit.train import loop
    recipe = tiny_recipe(epochs=1, random_subnets=1, target_subnets=1, target_candidates=1)
    recipe = dataclasses.replace(recipe, data=dataclasses.replace(recipe.data, samples=300))
    pred = FakePredictor(recipe.space)
    mid = (pred.predict_ms(recipe.space.smallest()) + pred.predict_ms(recipe.space.largest())) / 2
    band = Band("fake", 0.0, mid, band_members(recipe.space, pred.predict_ms, 0.9 * mid, mid, recipe.seed, 300))
    assert band.members
    monkeypatch.setattr(loop, "target_bands", lambda r: [band])
    seen = []
    real = loop.train_step
    monkeypatch.setattr(loop, "train_step", lambda m, o, x, y, subnets, *a: seen.append(subnets) or real(
        m, o, x, y, subnets, *a))
    loop.train(recipe, tmp_path / "run", progress=False)
    assert seen
    for subnets in seen:
        assert len(subnets) == 4 and subnets[-1] in band


# ---- teachers: alpha-divergence, distillation only when the teacher is ahead, the mean teacher ----

def _dists(seed=0):
    g = torch.Generator().manual_seed(seed)
    a, b = torch.randn(5, 7, generator=g), torch.randn(5, 7, generator=g)
    return F.log_softmax(a, 1), F.log_softmax(b, 1)


def test_alpha_divergence_matches_its_closed_forms():
    # Amari's alpha family D_a(p||q) = (sum p^a q^(1-a) - 1) / (a (a - 1)) (Cichocki & Amari 2010, from memory):
    # a = 1 is KL(p||q) (checked against scipy.stats.entropy), a = 0 is KL(q||p), a = 2 is half Pearson's
    # chi-square sum (p - q)^2 / q, a = 0.5 is 4 (1 - sum sqrt(p q)) (the Hellinger form).
    from scipy.stats import entropy
    from tightfit.train.sandwich import alpha_divergence
    log_p, log_q = _dists()
    p, q = log_p.exp().double().numpy(), log_q.exp().double().numpy()
    kl = torch.tensor([entropy(p[i], q[i]) for i in range(5)], dtype=torch.float32)
    assert torch.allclose(alpha_divergence(log_p, log_q, 1.0), kl, atol=1e-5)
    assert torch.allclose(alpha_divergence(log_p, log_q, 0.0), alpha_divergence(log_q, log_p, 1.0), atol=1e-6)
    chi = torch.tensor(((p - q) ** 2 / q).sum(1) / 2, dtype=torch.float32)
    assert torch.allclose(alpha_divergence(log_p, log_q, 2.0), chi, atol=1e-4)
    hel = torch.tensor(4 * (1 - ((p * q) ** 0.5).sum(1)), dtype=torch.float32)
    assert torch.allclose(alpha_divergence(log_p, log_q, 0.5), hel, atol=1e-5)
    assert torch.allclose(alpha_divergence(log_p, log_q, 0.999), kl, atol=1e-2)  # continuous at the limit


def test_alpha_distillation_takes_the_larger_of_its_two_divergences():
    from tightfit.train.sandwich import alpha_divergence, distill_loss
    log_p, log_q = _dists(1)
    low, high = alpha_divergence(log_p, log_q, -1.0).mean(), alpha_divergence(log_p, log_q, 1.0).mean()
    got = distill_loss(log_q, log_p, "alpha", 1.0, (-1.0, 1.0))
    assert torch.allclose(got, torch.maximum(low, high)) and not torch.allclose(low, high)


def test_alpha_distillation_stays_finite_where_the_teacher_gives_a_class_almost_nothing():
    # A confident teacher (log p = -80 on two classes) and a student spread evenly: D_-1 = (sum q^2 / p - 1) / 2
    # is ~ e^80 and its gradient overflows (a screen went to NaN). With log(q / p) bounded by 5, by hand:
    # per class q^2 / p = q (q / p) <= q e^5, so the loss is at most (e^5 - 1) / 2 and every gradient finite.
    from tightfit.train.sandwich import ALPHA_LOG_RATIO, distill_loss
    teacher = torch.tensor([[80.0, 0.0, 0.0]])
    student = torch.zeros(1, 3, requires_grad=True)
    loss = distill_loss(student, teacher, "alpha", 1.0, (-1.0, 1.0))
    loss.backward()
    assert torch.isfinite(loss) and torch.isfinite(student.grad).all()
    assert 0 < loss.item() <= (math.exp(ALPHA_LOG_RATIO) - 1) / 2 + 1e-4


def test_a_teacher_not_ahead_on_the_batch_teaches_nothing():
    # distill_when = "ahead": the teacher's label loss on the batch must be below the student's.
    y = torch.tensor([0, 1, 2, 0])
    good = F.one_hot(y, 3).float() * 6       # confident and right
    bad = torch.roll(good, 1, 1)             # confident and wrong
    cfg = dataclasses.replace(tiny_recipe().train, distill=True, distill_weight=1.0, distill_when="ahead",
                              label_smoothing=0.1)
    student = torch.tensor([[1.0, 0.2, -0.5], [0.1, 0.9, 0.0], [-0.3, 0.0, 0.4], [0.5, 0.5, -1.0]])  # a uniform one scores alike
    labels = F.cross_entropy(student, y, label_smoothing=0.1)
    assert torch.allclose(subnet_loss(student, y, bad, cfg), labels)
    from tightfit.train.sandwich import distill_loss
    assert torch.allclose(subnet_loss(student, y, good, cfg), distill_loss(student, good))


def test_mean_teacher_averages_weights_by_the_rule_and_copies_batchnorm_statistics():
    # Tarvainen & Valpola 2017: theta'_t = d theta'_(t-1) + (1 - d) theta_t.
    from tightfit.recipe import build_supernet
    from tightfit.train.teacher import MeanTeacher
    recipe = tiny_recipe()
    torch.manual_seed(0)
    model = build_supernet(recipe, 4)
    avg = MeanTeacher(model, 0.9)
    before = [p.detach().clone() for p in avg.model.parameters()]
    with torch.no_grad():
        for p in model.parameters():
            p.add_(1.0)
        for b in model.buffers():
            if b.dtype.is_floating_point:
                b.add_(2.0)
    avg.update(model)
    for a, p, old in zip(avg.model.parameters(), model.parameters(), before):
        assert torch.allclose(a, 0.9 * old + 0.1 * p)
    assert all(torch.equal(a, b) for a, b in zip(avg.model.buffers(), model.buffers()))
    assert not any(p.requires_grad for p in avg.model.parameters())


@pytest.mark.parametrize("teacher", ["mean", "largest"])
def test_resume_with_targets_and_teachers_is_bit_identical(tmp_path, monkeypatch, teacher):
    from tightfit.checkpoint import load_checkpoint
    from tightfit.data.dataset import load_dataset
    from tightfit.errors import Interrupted
    from tightfit.train import loop
    recipe = tiny_recipe(epochs=2, checkpoint_every=5, teacher=teacher, distill_weight=0.5, target_candidates=2)
    pred = FakePredictor(recipe.space)
    mid = (pred.predict_ms(recipe.space.smallest()) + pred.predict_ms(recipe.space.largest())) / 2
    band = Band("fake", 0.0, mid, band_members(recipe.space, pred.predict_ms, 0.8 * mid, mid, recipe.seed, 300))
    monkeypatch.setattr(loop, "target_bands", lambda r: [band])
    ds = load_dataset(recipe.data, recipe.seed)
    loop.train(recipe, tmp_path / "straight", progress=False, ds=ds)
    with pytest.raises(Interrupted):
        loop.train(recipe, tmp_path / "split", progress=False, ds=ds, stop_at_step=7)
    loop.train(recipe, tmp_path / "split", resume=True, progress=False, ds=ds)
    a, b = (load_checkpoint(tmp_path / r / "checkpoint.pt") for r in ("straight", "split"))
    assert all(torch.equal(a["model"][k], b["model"][k]) for k in a["model"])
    assert ("mean_teacher" in a) == (teacher == "mean")
    if teacher == "mean":
        assert all(torch.equal(a["mean_teacher"][k], b["mean_teacher"][k]) for k in a["mean_teacher"])
