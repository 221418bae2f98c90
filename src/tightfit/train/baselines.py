"""Hand-scaled baselines: what a user without a supernet would ship.

One block design (the space's largest choice per stage) scaled by a width multiplier and
fewer blocks per stage, each member trained alone from scratch. A member is a recipe whose
search space holds exactly one subnet, so it trains with the same code, data pipeline,
augmentation and schedule as the supernet (tightfit.train.loop treats a one-subnet space as a
plain network) and extracts, exports and measures like any pick.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

from tightfit.recipe import Recipe
from tightfit.model.space import BlockChoice, SpaceSpec, StageSpec, Subnet


def make_divisible(value: float, divisor: int = 8, minimum: int = 8) -> int:
    """Round channels to a multiple of ``divisor`` without dropping more than 10 %
    (common practice in MobileNet reference code)."""
    v = max(minimum, int(value + divisor / 2) // divisor * divisor)
    return v + divisor if v < 0.9 * value else v


@dataclass(frozen=True)
class Member:
    name: str
    width: float      # multiplier on every stage's (and the stem's) channels
    depth: str        # "max", "mid" or "min" blocks per stage

    def describe(self) -> str:
        return f"width x{self.width:g}, {self.depth} depth"


def _depth(stage: StageSpec, which: str) -> int:
    ds = sorted(stage.depths)
    return {"max": ds[-1], "min": ds[0], "mid": ds[len(ds) // 2]}[which]


def member_space(space: SpaceSpec, member: Member) -> SpaceSpec:
    """A one-subnet space: the largest block choice per stage, scaled channels and depth."""
    stages = tuple(replace(st, out_channels=make_divisible(st.out_channels * member.width), depths=(_depth(st, member.depth),),
                           expansions=(max(st.expansions),), kernels=(max(st.kernels),), widths=()) for st in space.stages)
    head = make_divisible(space.head_channels * member.width) if space.head_channels else 0
    return replace(space, stem_channels=make_divisible(space.stem_channels * member.width), stages=stages,
                   head_channels=head, stem_widths=())


def member_subnet(space: SpaceSpec, member: Member) -> Subnet:
    """The member as a subnet of ``space`` (the same layers, so the same latency entries); a
    space without the member's widths cannot hold it (check with ``space.contains``)."""
    own = member_space(space, member)
    stages = tuple(tuple(BlockChoice(max(st.expansions), max(st.kernels)) for _ in range(_depth(st, member.depth)))
                   for st in space.stages)
    widths = (own.stem_channels,) + tuple(st.out_channels for st in own.stages)
    return Subnet(stages, widths if space.elastic_width else ())


def member_recipe(recipe: Recipe, member: Member) -> Recipe:
    """Same data, augmentation, optimiser, schedule and epochs as the supernet's recipe."""
    return replace(recipe, name=f"{recipe.name}-{member.name}", space=member_space(recipe.space, member))


# Three width multipliers (as MobileNetV2's 1.0 / 0.75 / 0.5, Sandler et al. 2018) by depth: the widths
# recipes/fashion-mnist.toml offers, so every member is also a subnet of its space.
DEFAULT_FAMILY = (Member("w1.0-max", 1.0, "max"), Member("w0.75-max", 0.75, "max"), Member("w0.75-mid", 0.75, "mid"),
                  Member("w0.5-mid", 0.5, "mid"), Member("w0.5-min", 0.5, "min"))
