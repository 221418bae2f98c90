"""The hand-scaled family of the benchmark is part of the benchmark's search space."""
from __future__ import annotations

from pathlib import Path

import pytest
import torch

from tightfit.latency.layers import layer_configs, subnet_layer_ids
from tightfit.model.extract import extract_subnet
from tightfit.model.supernet import Supernet
from tightfit.recipe import load_recipe
from tightfit.train.baselines import DEFAULT_FAMILY, make_divisible, member_space, member_subnet

RECIPE = load_recipe(Path(__file__).resolve().parents[1] / "recipes" / "fashion-mnist.toml")


def test_make_divisible_follows_the_mobilenet_rounding():
    # MobileNet reference code rounding (common practice, from memory): nearest multiple of 8,
    # never more than 10 % below the value.
    assert [make_divisible(v) for v in (8, 12, 18, 20, 30, 32, 48)] == [8, 16, 24, 24, 32, 32, 48]


@pytest.mark.parametrize("member", DEFAULT_FAMILY, ids=lambda m: m.name)
def test_every_family_member_is_a_subnet_of_the_benchmark_space(member):
    """Same layers as the member trained alone (module by module, shapes and strides), so the same
    latency-table entries: the search could pick any member, and a member fits where its layers do."""
    space = RECIPE.space
    sub = member_subnet(space, member)
    assert space.contains(sub)
    own = member_space(space, member)
    torch.manual_seed(0)
    alone = extract_subnet(Supernet(own, 1, 10), own.largest())
    cut = extract_subnet(Supernet(space, 1, 10), sub)
    assert repr(alone) == repr(cut)
    assert [p.shape for p in alone.parameters()] == [p.shape for p in cut.parameters()]
    shapes = {c.id: c.shape() for c in layer_configs(space, 1, 28)}
    own_shapes = {c.id: c.shape() for c in layer_configs(own, 1, 28)}
    assert [shapes[i] for i in subnet_layer_ids(space, sub)] == [own_shapes[i] for i in subnet_layer_ids(own, own.largest())]


def test_the_family_spans_the_space_in_width_and_depth():
    subs = [member_subnet(RECIPE.space, m) for m in DEFAULT_FAMILY]
    assert len(DEFAULT_FAMILY) >= 5 and len({s.to_key() for s in subs}) == len(subs)
    assert subs[0] == RECIPE.space.largest()
    assert {s.widths for s in subs} == {RECIPE.space.largest().widths, (16, 16, 24, 32, 48), (8, 8, 16, 24, 32)}
