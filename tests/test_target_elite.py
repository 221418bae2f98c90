"""A kept per-band elite (train.target_elite): the challenge rule on injected losses, the round-robin
over slots, the elite's first members, elite off as plain band draws, the recipe's checks, and a
killed and resumed run that matches an uninterrupted one."""
from __future__ import annotations

import dataclasses
import random

import pytest
import torch

from helpers import FakePredictor, tiny_recipe
from tightfit.errors import UserError
from tightfit.recipe import parse_recipe
from tightfit.train.targets import (Band, band_draws, band_members, band_subnets, challenge, elite_subnets,
                                    first_elite)


def _distinct(n: int, seed: int = 0, besides: tuple = ()) -> list:
    """``n`` distinct subnets of the tiny space, none of them in ``besides``."""
    space, rng, out = tiny_recipe().space, random.Random(seed), []
    while len(out) < n:
        s = space.sample(rng)
        if s not in out and s not in besides:
            out.append(s)
    return out


def _bands():
    """Two bands of the tiny space split at the middle of its predicted range (FakePredictor)."""
    space = tiny_recipe().space
    pred = FakePredictor(space)
    mid = (pred.predict_ms(space.smallest()) + pred.predict_ms(space.largest())) / 2
    a = Band("a", 0.0, mid, band_members(space, pred.predict_ms, 0.0, mid, seed=0, draws=500))
    b = Band("b", mid * 1.0001, 9.0, band_members(space, pred.predict_ms, mid * 1.0001, 9.0, seed=0, draws=500))
    return pred, a, b


def test_challenge_trains_and_keeps_the_lower_loss_and_the_member_on_ties():
    # The rule, written out by hand: trained = fresh if loss(fresh) < loss(member) else member; the trained one
    # holds the slot, the other slots are untouched.
    m0, m1, m2, fresh = _distinct(4)
    elite = (m0, m1, m2)
    for loss_fresh, loss_member, trained in ((0.5, 0.9, fresh), (0.9, 0.5, m1), (0.7, 0.7, m1)):
        losses = {m0: 9.0, m1: loss_member, m2: 9.0, fresh: loss_fresh}
        got, kept = challenge(elite, 1, fresh, losses.__getitem__)
        assert got == trained
        assert kept == (m0, trained, m2)


def test_a_draw_already_in_the_elite_does_not_challenge():
    # This project's rule (targets.challenge): the elite stays distinct, so a draw already kept leaves the slot
    # to its member, even with a lower loss, and costs no forward pass.
    m0, m1 = _distinct(2)
    calls = []
    got, kept = challenge((m0, m1), 1, m0, lambda s: calls.append(s) or (0.0 if s == m0 else 1.0))
    assert (got, kept, calls) == (m1, (m0, m1), [])


def test_round_robin_visits_every_slot_of_each_band_in_turn():
    # Bands in turn (step % 2 with one band subnet per step); a band's v-th turn challenges slot v % size, written
    # out by hand: band a at steps 0, 2, 4, 6 -> slots 0, 1, 0, 1; band b at steps 1, 3, 5, 7 -> the same.
    _, a, b = _bands()
    kept = _distinct(4, seed=7, besides=a.members + b.members)
    elite = {"a": (kept[0], kept[1]), "b": (kept[2], kept[3])}  # none of them a band member: every draw challenges
    def loss(s):  # members always win, so the trained one is the member of the slot whose turn it is
        return 0.0 if s in kept else 1.0
    trained = [elite_subnets([a, b], elite, step, 3, 1, loss)[0][0] for step in range(8)]
    assert trained == [kept[0], kept[2], kept[1], kept[3], kept[0], kept[2], kept[1], kept[3]]


def test_elite_walks_steps_and_fresh_winners_take_the_challenged_slot():
    # Fresh draws always win (loss 0 against 1): after step s, the slot whose turn it was holds that step's draw.
    _, a, b = _bands()
    elite = first_elite([a, b], seed=3, size=2)
    for step in range(6):
        (fresh,), = band_draws([a, b], step, 3, 1, 1)
        kept = elite["a"] + elite["b"]
        trained, after = elite_subnets([a, b], elite, step, 3, 1, lambda s, kept=kept: 1.0 if s in kept else 0.0)
        band, other, slot = "ab"[step % 2], "ba"[step % 2], (step // 2) % 2
        if fresh in elite[band]:
            assert trained == [elite[band][slot]] and after == elite
        else:
            assert trained == [fresh] and after[band][slot] == fresh
            assert after[band][1 - slot] == elite[band][1 - slot] and after[other] == elite[other]
        elite = after


def test_first_elite_holds_distinct_band_members_predicted_inside_their_band():
    pred, a, b = _bands()
    elite = first_elite([a, b], seed=5, size=3)
    for band in (a, b):
        members = elite[band.name]
        assert len(members) == 3 and len(set(members)) == 3
        assert all(band.low_ms <= pred.predict_ms(s) <= band.high_ms for s in members)  # the band's rule, by hand
    assert elite == first_elite([a, b], seed=5, size=3)  # from (seed, band) only
    assert first_elite([a, b], seed=6, size=3) != elite
    few = Band("few", 0.0, 9.0, a.members[:2])
    assert set(first_elite([few], seed=5, size=3)["few"]) == set(few.members)  # fewer members: all of them
    assert first_elite([a, b], seed=5, size=0) == {}


def test_elite_off_gives_exactly_the_plain_band_draws_and_best_of_k():
    # target_elite = 0 is the behaviour before it: one draw each is trained as drawn, with no loss computed;
    # with k draws, the lowest injected loss (first on ties) is trained.
    _, a, b = _bands()
    cfg = tiny_recipe(target_subnets=2).train
    calls = []
    for step in range(5):
        got, elite = band_subnets([a, b], {}, step, 4, cfg, lambda s: calls.append(s) or 0.0)
        assert got == [c[0] for c in band_draws([a, b], step, 4, 2, 1)] and elite == {}
    assert calls == []
    k3 = dataclasses.replace(cfg, target_candidates=3)
    losses = {s: random.Random(s.to_key()).random() for s in a.members + b.members}
    got, _ = band_subnets([a, b], {}, 9, 4, k3, losses.__getitem__)
    assert got == [min(c, key=losses.__getitem__) for c in band_draws([a, b], 9, 4, 2, 3)]


def _doc(**train):
    return {"name": "t", "seed": 0, "data": {"source": "builtin", "samples": 200}, "space": {
        "stem_channels": 8, "stage": [{"channels": 8, "depths": [1, 2], "expansions": [2, 4], "kernels": [3]}]},
        "train": train}


@pytest.mark.parametrize("train, needles", [
    ({"target_elite": -1}, ("train.target_elite",)),
    ({"target_elite": 2, "target_candidates": 3}, ("train.target_elite", "train.target_candidates")),
])
def test_bad_elite_settings_are_refused_in_one_line_naming_the_keys(train, needles):
    with pytest.raises(UserError) as e:
        parse_recipe(_doc(**train))
    assert all(n in str(e.value) for n in needles) and "\n" not in str(e.value)


def test_elite_off_keeps_the_recipe_hash_and_on_changes_it():
    plain = parse_recipe(_doc())
    assert parse_recipe(_doc(target_elite=0)).hash() == plain.hash()
    assert parse_recipe(_doc(target_elite=2)).hash() != plain.hash()


def test_resume_with_an_elite_is_bit_identical_and_continues_the_elite(tmp_path, monkeypatch):
    from tightfit.checkpoint import load_checkpoint
    from tightfit.data.dataset import load_dataset
    from tightfit.errors import Interrupted
    from tightfit.train import loop
    recipe = tiny_recipe(epochs=1, target_elite=2)
    recipe = dataclasses.replace(recipe, data=dataclasses.replace(recipe.data, samples=300))
    pred = FakePredictor(recipe.space)
    mid = (pred.predict_ms(recipe.space.smallest()) + pred.predict_ms(recipe.space.largest())) / 2
    band = Band("fake", 0.0, mid, band_members(recipe.space, pred.predict_ms, 0.8 * mid, mid, recipe.seed, 300))
    monkeypatch.setattr(loop, "target_bands", lambda r: [band])
    ds = load_dataset(recipe.data, recipe.seed)
    first = [s.to_key() for s in first_elite([band], recipe.seed, 2)["fake"]]
    with pytest.raises(Interrupted):
        loop.train(recipe, tmp_path / "split", progress=False, ds=ds, stop_at_step=4)
    stopped = load_checkpoint(tmp_path / "split" / "checkpoint.pt")["target_elite"]["fake"]
    assert stopped != first  # a draw won before the kill, so a resume that forgot the elite would differ
    loop.train(recipe, tmp_path / "split", resume=True, progress=False, ds=ds)
    loop.train(recipe, tmp_path / "straight", progress=False, ds=ds)
    a, b = (load_checkpoint(tmp_path / r / "checkpoint.pt") for r in ("straight", "split"))
    assert a["target_elite"] == b["target_elite"]
    assert all(k in band.members for k in map(recipe.space.parse_key, a["target_elite"]["fake"]))
    assert all(torch.equal(a["model"][k], b["model"][k]) for k in a["model"])


def test_an_elite_architecture_trained_alone_is_the_same_network_as_its_cut(monkeypatch):
    # An elite member may mix block choices within a stage; scripts/screen_targets.py trains it alone as a space of
    # one subnet. Same network, checked by hand: the static net extracted from that space takes the cut's weights
    # (same layers and shapes, strict load) and then gives the same outputs (strides and skips alike).
    from pathlib import Path
    from helpers import perturb
    from tightfit.model.extract import extract_subnet
    from tightfit.model.space import Subnet
    from tightfit.recipe import build_supernet
    monkeypatch.syspath_prepend(str(Path(__file__).resolve().parents[1] / "scripts"))
    from screen_targets import alone_space
    recipe = tiny_recipe(wide=True)
    subnet = Subnet((((1, 3),), ((2, 3), (4, 5)), ((6, 7), (6, 7), (2, 3))), (8, 4, 12, 12))
    assert recipe.space.contains(subnet)
    one = dataclasses.replace(recipe, space=alone_space(recipe.space, subnet))
    assert one.space.size() == 1
    full, alone = build_supernet(recipe, 5), build_supernet(one, 5)
    perturb(full)
    cut, solo = extract_subnet(full, subnet), extract_subnet(alone, one.space.largest())
    solo.load_state_dict(cut.state_dict())
    x = torch.randn(2, 3, 16, 16)
    assert torch.allclose(solo(x), cut(x), atol=1e-6)
