"""Search space: size, sampling, keys, the spec's own checks."""
import dataclasses
import itertools
import random
from collections import Counter

import pytest
from hypothesis import given, settings, strategies as st

from tightfit.errors import UserError
from tightfit.model.space import Subnet
from helpers import tiny_recipe

SPACE = tiny_recipe().space
WIDE = tiny_recipe(wide=True).space   # the same stages, elastic width in the stem and every stage


def enumerate_all(space):
    """Brute-force enumeration with itertools.product (reference for size())."""
    per_stage = []
    for s in space.stages:
        block_choices = list(itertools.product(s.expansions, s.kernels))
        options = []
        for d in s.depths:
            options += list(itertools.product(block_choices, repeat=d))
        per_stage.append(options)
    widths = list(itertools.product(*space.width_options())) if space.elastic_width else [()]
    return [Subnet(tuple(c), w) for c in itertools.product(*per_stage) for w in widths]


@pytest.mark.parametrize("space", [SPACE, WIDE], ids=["fixed-width", "elastic-width"])
def test_size_matches_brute_force_enumeration(space):
    every = enumerate_all(space)
    assert space.size() == len(every) == len({s.to_key() for s in every})
    assert all(space.contains(s) for s in every)


def test_elastic_width_multiplies_the_space_and_keys_carry_widths():
    assert WIDE.size() == SPACE.size() * 2 * 2 * 2 * 3
    assert WIDE.largest().to_key() == "1:3/4:5,4:5/6:7,6:7,6:7@8-8-12-16"
    assert WIDE.smallest().to_key() == "1:3/2:3/2:3@4-4-8-8"
    assert SPACE.largest().widths == () and not SPACE.elastic_width
    # a fixed-width key is not a subnet of the elastic space (widths must be named), and back
    assert not WIDE.contains(SPACE.largest()) and not SPACE.contains(WIDE.largest())
    for bad in ("1:3/2:3/2:3@4-4-8", "1:3/2:3/2:3@4-4-8-9", "1:3/2:3/2:3@", "1:3/2:3/2:3@4-4-8-x"):
        with pytest.raises(UserError):
            WIDE.parse_key(bad)


def test_sampling_is_uniform_over_widths():
    # Uniform over all subnets: the widths multiply the count independently of the blocks, so each
    # stage's width is uniform over its choices (loose bound, as above; common practice).
    rng = random.Random(1)
    n = 3000
    counts = Counter(WIDE.sample(rng).widths[3] for _ in range(n))
    assert set(counts) == {8, 12, 16}
    assert all(abs(c - n / 3) < 5 * (n / 3) ** 0.5 for c in counts.values())


def test_sampling_is_uniform_over_depths():
    # Uniform over all subnets means depth d of the last stage is drawn with probability
    # (#choices per block)^d / sum — checked with a loose chi-square-style bound (common practice).
    rng = random.Random(0)
    n = 6000
    counts = Counter(len(SPACE.sample(rng).stages[2]) for _ in range(n))
    per_block = 3 * 3
    weights = {d: per_block ** d for d in (1, 2, 3)}
    total = sum(weights.values())
    for d, w in weights.items():
        expected = n * w / total
        assert abs(counts[d] - expected) < 5 * expected ** 0.5 + 1


def test_largest_and_smallest():
    assert SPACE.largest().to_key() == "1:3/4:5,4:5/6:7,6:7,6:7"
    assert SPACE.smallest().to_key() == "1:3/2:3/2:3"


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 2**32 - 1), st.booleans())
def test_key_round_trip(seed, wide):
    space = WIDE if wide else SPACE
    sub = space.sample(random.Random(seed))
    assert space.parse_key(sub.to_key()) == sub
    assert Subnet.from_key(sub.to_key()).to_key() == sub.to_key()


@pytest.mark.parametrize("key", ["", "1:3", "x:3/2:3/2:3", "1:3/2:3/2:9", "1:3/2:3,2:3,2:3/2:3",
                                 "1:3/2.5:3/2:3", "1:3//2:3", "1:3/2:3/2:3/2:3", "1:3/2:3:1/2:3",
                                 "e1k3_e2k3_e2k3"])  # the last: the old key syntax
def test_keys_outside_the_space_are_refused(key):
    with pytest.raises(UserError):
        SPACE.parse_key(key)


# Spec invariants hold for a space built in code too, not only for one parsed from a recipe: each bad value
# raises ValueError naming the field. Sources of the rules: a block's stride is 1 or 2 (MobileNetV2,
# Sandler et al. 2018, Table 2); a depthwise kernel is odd so that padding k // 2 keeps the size (common
# practice); a stage has at least one block and a ratio above 0 (this project's rule, model/space.py);
# narrower widths are channel prefixes of the widest, which sizes the weights (this project's rule, elastic.py).
BAD_STAGES = [("stride", 3), ("kernels", (3, 4)), ("depths", (0, 1)), ("expansions", (0, 2)), ("out_channels", 0),
              ("activation", "gelu"), ("widths", (8, 24)), ("kernels", (5, 3)), ("depths", ())]
BAD_SPACES = [("stem_stride", 4), ("stem_channels", 0), ("head_channels", -1), ("dropout", 1.0), ("stages", ()),
              ("stem_widths", (4, 16)), ("smaller_kernels", "transform")]


@pytest.mark.parametrize("field,value", BAD_STAGES, ids=[f"{f}={v}" for f, v in BAD_STAGES])
def test_a_stage_built_in_code_refuses_bad_values(field, value):
    with pytest.raises(ValueError, match=field):
        dataclasses.replace(SPACE.stages[2], **{field: value})


@pytest.mark.parametrize("field,value", BAD_SPACES, ids=[f"{f}={v}" for f, v in BAD_SPACES])
def test_a_space_built_in_code_refuses_bad_values(field, value):
    with pytest.raises(ValueError, match=field):
        dataclasses.replace(SPACE, **{field: value})


def test_good_values_build():
    # The counterpart: the same fields at legal values construct (the checks refuse only what they should).
    dataclasses.replace(SPACE.stages[2], stride=1, kernels=(1, 3), widths=(8, 16), expansions=(0.5, 6))
    dataclasses.replace(SPACE, stem_stride=2, head_channels=0, dropout=0.0, stem_widths=(4, 8), smaller_kernels="mapped")


def test_mapped_smaller_kernels_add_one_square_map_per_smaller_size_and_keep_the_latency_key():
    # Cai et al. 2020 (Sec. 3.2): one (k*k x k*k) matrix per smaller kernel size in each depthwise layer.
    # By hand for the tiny space: stage 1 (kernels 3, 5; 2 blocks) 2 * 9**2, stage 2 (kernels 3, 5, 7;
    # 3 blocks) 3 * (9**2 + 25**2), stage 0 (kernel 3 only) none: 2280 parameters in all.
    from tightfit.model.space import space_hash
    from tightfit.model.supernet import Supernet
    mapped = dataclasses.replace(SPACE, smaller_kernels="mapped")

    def params(space):
        return sum(p.numel() for p in Supernet(space, 3, 5).parameters())
    assert params(mapped) - params(SPACE) == 2 * 9 ** 2 + 3 * (9 ** 2 + 25 ** 2) == 2280
    # The shapes, and so the latency, do not depend on it: a latency table serves both.
    assert space_hash(mapped, 3, 16) == space_hash(SPACE, 3, 16)
