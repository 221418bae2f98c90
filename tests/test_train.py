"""Training: sandwich sampling, schedule, exact resume, safe checkpoint loading."""

import pytest
import torch

from tightfit.checkpoint import load_checkpoint, save_checkpoint
from tightfit.data.dataset import load_dataset
from tightfit.errors import Interrupted, UserError
from tightfit.train.loop import train
from tightfit.train.sandwich import lr_at, macs_distance, sandwich, sandwich_backward, step_subnets
from helpers import TINY, tiny_recipe


def test_sandwich_is_largest_smallest_then_random_and_seeded_by_step():
    space = tiny_recipe().space
    a = sandwich(space, step=5, seed=0, n_random=3)
    assert a[0] == space.largest() and a[1] == space.smallest() and len(a) == 5
    assert a == sandwich(space, step=5, seed=0, n_random=3)
    assert a != sandwich(space, step=6, seed=0, n_random=3)


def test_schedule_warms_up_then_follows_cosine():
    # Loshchilov & Hutter 2017, Eq. 5 with eta_min = 0: eta_t = 0.5 * eta_max * (1 + cos(pi * t / T)).
    import math
    assert lr_at(0, 100, 10, 1.0) == pytest.approx(0.1)
    assert lr_at(9, 100, 10, 1.0) == pytest.approx(1.0)
    assert lr_at(55, 100, 10, 1.0) == pytest.approx(0.5 * (1 + math.cos(math.pi * 45 / 90)))
    assert lr_at(100, 100, 10, 1.0) == pytest.approx(0.0)


def test_schedule_can_end_at_a_fraction_of_the_base_lr():
    # Loshchilov & Hutter 2017, Eq. 5 with eta_min = 0.05 * eta_max (a floor as in Yu et al. 2020).
    import math
    assert lr_at(100, 100, 10, 2.0, end=0.05) == pytest.approx(0.1)
    assert lr_at(55, 100, 10, 2.0, end=0.05) == pytest.approx(0.1 + 0.5 * 1.9 * (1 + math.cos(math.pi * 45 / 90)))
    assert lr_at(10, 100, 10, 2.0, end=0.05) == pytest.approx(2.0)
    assert lr_at(3, 100, 10, 2.0, end=0.05) == pytest.approx(0.8)   # the warm-up is unchanged


def test_zero_init_residual_zeroes_bn3_gamma_of_exactly_the_skip_blocks():
    # Goyal et al. 2017 (Sec. 5.1): gamma = 0 in the last BN of each residual branch, and nowhere else.
    # Stage 0 here widens 8 -> 12 at stride 1: no skip, so it must keep gamma = 1.
    from tightfit.recipe import build_supernet
    from tightfit.recipe import parse_recipe
    from tightfit.train.initialise import zero_init_residual
    doc = {**TINY, "space": {**TINY["space"], "stage": [{**TINY["space"]["stage"][0], "channels": 12},
                                                         *TINY["space"]["stage"][1:]]}}
    model = build_supernet(parse_recipe(doc), 5)
    assert zero_init_residual(model) == 3
    zeroed = {(i, j) for i, blocks in enumerate(model.stages) for j, b in enumerate(blocks)
              if torch.count_nonzero(b.bn3.weight) == 0}
    assert zeroed == {(1, 1), (2, 1), (2, 2)}
    for i, blocks in enumerate(model.stages):
        for j, b in enumerate(blocks):
            assert torch.equal(b.bn2.weight, torch.ones_like(b.bn2.weight))
            if (i, j) not in zeroed:
                assert torch.equal(b.bn3.weight, torch.ones_like(b.bn3.weight))
    x = torch.randn(2, 3, 16, 16)
    model.eval()
    block = model.stages[1][1]
    assert torch.equal(block(x.new_ones(2, 12, 8, 8)), x.new_ones(2, 12, 8, 8))  # starts as the identity
    # elastic width: stem [4, 8] -> stage 0 [4, 8] at stride 1 shares widths, so its skip is used (4 -> 4)
    wide = build_supernet(tiny_recipe(wide=True), 5)
    assert zero_init_residual(wide) == 4 and torch.count_nonzero(wide.stages[0][0].bn3.weight) == 0


def test_largest_only_epochs_train_the_largest_alone_then_the_full_sandwich():
    recipe = tiny_recipe(epochs=3, largest_only_epochs=1.0, random_subnets=2)
    space = recipe.space
    assert step_subnets(recipe, 0, 10) == [space.largest()]
    assert step_subnets(recipe, 9, 10) == [space.largest()]
    full = step_subnets(recipe, 10, 10)
    assert full == sandwich(space, 10, recipe.seed, 2) and len(full) == 4
    assert step_subnets(tiny_recipe(random_subnets=2), 0, 10) == sandwich(space, 0, 0, 2)  # default: no warm-up


def test_macs_target_draws_the_nearest_of_the_candidates():
    # Each random subnet is the candidate (of `random_candidates` uniform draws) nearest the target fraction.
    import random
    from tightfit.model.arithmetic import architecture_size
    recipe = tiny_recipe(random_subnets=3, random_macs_target=0.3, random_candidates=5)
    space = recipe.space

    def macs(s):
        return architecture_size(space, s, 3, 16, 12)[1]

    lo, hi = macs(space.smallest()), macs(space.largest())
    distance = macs_distance(recipe, 12, 0.3)
    assert distance(space.smallest()) == pytest.approx(0.3) and distance(space.largest()) == pytest.approx(0.7)
    got = step_subnets(recipe, 4, 10, distance)
    rng = random.Random(recipe.seed * 7_919 + 4)
    for s in got[2:]:
        draws = [space.sample(rng) for _ in range(5)]
        assert s == min(draws, key=lambda d: abs((macs(d) - lo) / (hi - lo) - 0.3))
    uniform = [s for st in range(40) for s in sandwich(space, st, 0, 3)[2:]]
    biased = [s for st in range(40) for s in sandwich(space, st, 0, 3, distance=distance, candidates=5)[2:]]
    assert sum(map(distance, biased)) < 0.5 * sum(map(distance, uniform))


def test_largest_dropout_applies_to_the_largest_pass_only():
    # Yu et al. 2020: regularise the largest only; the other passes see no dropout at all.
    from tightfit.recipe import build_supernet
    recipe = tiny_recipe(largest_dropout=0.5)
    space = recipe.space
    gen = torch.Generator().manual_seed(0)
    x, y = torch.randn(8, 3, 16, 16, generator=gen), torch.randint(0, 5, (8,), generator=gen)
    model = build_supernet(recipe, 5)
    model.train()
    seen = []
    model.dropout.register_forward_hook(lambda m, i, o: seen.append((m.p, torch.equal(i[0], o))))
    sandwich_backward(model, x, y, [space.largest(), space.smallest(), space.largest()], recipe.train)
    assert seen[0] == (0.5, False)                   # the largest: dropout active
    assert seen[1:] == [(0.0, True), (0.0, True)]    # the others pass straight through
    assert model.dropout.p == space.dropout          # left as built


def _weights(run):
    return load_checkpoint(run / "checkpoint.pt")["model"]


@pytest.mark.parametrize("stop_at", [7, 14])  # mid-epoch and at an epoch boundary
def test_resume_gives_bit_identical_weights(tmp_path, stop_at):
    # Uninterrupted run vs. a run stopped (as by SIGINT) at `stop_at` and resumed: same final weights.
    recipe = tiny_recipe(epochs=2, checkpoint_every=5)
    ds = load_dataset(recipe.data, recipe.seed)
    train(recipe, tmp_path / "straight", progress=False, ds=ds)
    with pytest.raises(Interrupted) as stopped:
        train(recipe, tmp_path / "split", progress=False, ds=ds, stop_at_step=stop_at)
    assert stopped.value.code == 130
    assert load_checkpoint(tmp_path / "split" / "checkpoint.pt")["step"] == stop_at
    train(recipe, tmp_path / "split", resume=True, progress=False, ds=ds)
    a, b = _weights(tmp_path / "straight"), _weights(tmp_path / "split")
    assert all(torch.equal(a[k], b[k]) for k in a)
    def logged_steps(run):
        import json
        return [json.loads(line)["step"] for line in (run / "metrics.jsonl").read_text().splitlines()]
    assert logged_steps(tmp_path / "split") == logged_steps(tmp_path / "straight")  # no duplicates after resume


def test_existing_run_needs_resume_and_same_recipe(tmp_path):
    recipe = tiny_recipe(epochs=0.2)
    ds = load_dataset(recipe.data, recipe.seed)
    train(recipe, tmp_path / "r", progress=False, ds=ds)
    with pytest.raises(UserError, match="--resume"):
        train(recipe, tmp_path / "r", progress=False, ds=ds)
    with pytest.raises(UserError, match="different recipe"):
        train(tiny_recipe(epochs=0.3), tmp_path / "r", resume=True, progress=False, ds=ds)


class _Evil:
    def __reduce__(self):
        import os
        return (os.system, ("echo pwned > /dev/null",))


def test_checkpoint_carrying_code_is_refused(tmp_path):
    # torch.load(weights_only=True) refuses arbitrary pickled callables (PyTorch serialization docs).
    path = tmp_path / "checkpoint.pt"
    torch.save({"model": {}, "recipe": {}, "payload": _Evil()}, path)
    with pytest.raises(UserError, match="refusing"):
        load_checkpoint(path)


def test_truncated_checkpoint_is_refused(tmp_path):
    path = tmp_path / "checkpoint.pt"
    save_checkpoint(path, {"model": {"w": torch.ones(1000)}, "recipe": {}})
    path.write_bytes(path.read_bytes()[:300])
    with pytest.raises(UserError, match="unreadable or truncated"):
        load_checkpoint(path)


def test_metrics_and_learning(tmp_path):
    # It learns: on the built-in data (12 classes, chance 8.3 %), five short epochs lift the largest subnet's
    # validation accuracy to at least twice chance (fixed seed, CPU; the stem's init draws changed at
    # 0bc366e, and a bound at 20 % sat on a seed's luck).
    import json
    recipe = tiny_recipe(epochs=5)
    train(recipe, tmp_path / "m", progress=False)
    records = [json.loads(line) for line in (tmp_path / "m" / "metrics.jsonl").read_text().splitlines()]
    evals = [r for r in records if "val_acc_largest" in r]
    assert [r["epoch"] for r in evals] == [1, 2, 3, 4, 5]
    # 102 validation images move an accuracy by ~1 point per image, so: the final figure at least twice
    # chance, some later epoch above the first, and the training loss down (0bc366e: 19.6, 25.5, 21.6,
    # 23.5, 19.6 % over the five epochs)
    acc = [r["val_acc_largest"] for r in evals]
    assert acc[-1] >= 2 * 100 / 12 and max(acc[1:]) > acc[0]
    steps = [r for r in records if "loss_largest" in r]
    assert steps and all(r["images_per_s"] > 0 for r in steps)
    assert steps[-1]["loss_largest"] < steps[0]["loss_largest"]
    assert max(r["step"] for r in records) == 5 * 14   # 459 training images / batch 32: 14 full steps an epoch


def test_a_half_trained_run_is_loaded_with_a_warning(tiny_run, tmp_path, capsys):
    # Contract ("Errors and safety"): nothing is used silently; an interrupted run says so when loaded.
    import shutil
    import torch
    from tightfit.rundir import load_trained
    run = tmp_path / "run"
    shutil.copytree(tiny_run, run, ignore=shutil.ignore_patterns("search", "exports"))
    assert load_trained(run).complete and "warning" not in capsys.readouterr().err
    state = torch.load(run / "checkpoint.pt", weights_only=False)
    state["complete"] = False
    torch.save(state, run / "checkpoint.pt")
    assert not load_trained(run).complete
    err = capsys.readouterr().err
    assert err.startswith("warning: training in") and "did not finish" in err and "tightfit train" in err
