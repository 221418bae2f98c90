"""The search space: stages of inverted-residual blocks and the subnets they allow.

A subnet picks one depth per stage and, for each active block, one expansion ratio
and one depthwise kernel size; where the space has elastic width, it also picks the
stem's and each stage's output channels. Subnets have a short text key that round-trips,
e.g. ``1:3,6:5/3:3,6:7,6:3/3:5``: each block ``expansion:kernel``, blocks within a stage
joined by ``,``, stages by ``/`` (the coarser the boundary, the heavier the separator);
with elastic width the widths follow an ``@``, stem first: ``1:3/6:5,3:3@8-16-24``.
Every character is safe in a shell word and a file name.
"""
from __future__ import annotations

import hashlib
import json
import random
from dataclasses import asdict, dataclass
from typing import NamedTuple

from tightfit.errors import UserError

ACTIVATIONS = ("relu6", "hswish")
# How a smaller depthwise kernel is taken from the largest one's weights: "centre", its centre as is;
# "mapped", its centre through one learned (k*k x k*k) map per smaller size, shared by all channels
# (Cai et al. 2020, Sec. 3.2). Only "mapped" adds parameters; neither changes a subnet's shapes.
SMALLER_KERNELS = ("centre", "mapped")


class SpecError(ValueError):
    """A bad value in a space, whether built in code or from a recipe. ``field`` names the dataclass
    field, so the recipe parser can name its own key in its one-line error."""

    def __init__(self, field: str, value: object, rule: str):
        super().__init__(f"{field} = {value!r} is invalid: {rule}")
        self.field, self.value, self.rule = field, value, rule


def _require(ok: bool, field: str, value: object, rule: str) -> None:
    if not ok:
        raise SpecError(field, value, rule)


def _increasing(values: tuple) -> bool:
    return len(values) > 0 and all(a < b for a, b in zip(values, values[1:]))


def _check_widths(field: str, widths: tuple[int, ...], widest: int) -> None:
    # Narrower widths are channel prefixes of weights sized for the widest (elastic.py).
    _require(not widths or (_increasing(widths) and min(widths) > 0 and max(widths) == widest), field, widths,
             "every width must be > 0, distinct, in increasing order, the widest sizing the weights")


class BlockChoice(NamedTuple):
    """One active block's choice."""
    expansion: float
    kernel: int


@dataclass(frozen=True)
class StageSpec:
    out_channels: int                # the widest choice: weights are sized for it
    stride: int
    depths: tuple[int, ...]          # allowed number of blocks
    expansions: tuple[float, ...]    # allowed expansion ratios (hidden = round(in_channels * ratio))
    kernels: tuple[int, ...]         # allowed depthwise kernel sizes (odd)
    activation: str = "relu6"
    squeeze_excite: bool = False     # squeeze-excite after the depthwise conv
    widths: tuple[int, ...] = ()     # allowed output channels, each a prefix of out_channels; () = out_channels only

    def __post_init__(self) -> None:
        _require(self.out_channels > 0, "out_channels", self.out_channels, "must be an integer > 0")
        _require(self.stride in (1, 2), "stride", self.stride, "must be 1 or 2")
        for name in ("depths", "expansions", "kernels"):  # middle() and largest() rely on the order
            _require(_increasing(getattr(self, name)), name, getattr(self, name),
                     "must be a non-empty list of distinct values in increasing order")
        _require(self.depths[0] >= 1, "depths", self.depths, "every depth must be >= 1")
        _require(self.expansions[0] > 0, "expansions", self.expansions, "every expansion ratio must be > 0")
        _require(all(k >= 1 and k % 2 == 1 for k in self.kernels), "kernels", self.kernels,
                 "kernel sizes must be odd and >= 1 (e.g. 3, 5, 7)")
        _require(self.activation in ACTIVATIONS, "activation", self.activation, f"choose one of {', '.join(ACTIVATIONS)}")
        _check_widths("widths", self.widths, self.out_channels)

    @property
    def width_choices(self) -> tuple[int, ...]:
        return self.widths or (self.out_channels,)

    @property
    def has_expand(self) -> bool:
        # MobileNetV2 (Sandler et al. 2018, Table 1): a block with t=1 has no expansion conv.
        return self.expansions != (1,) and self.expansions != (1.0,)


@dataclass(frozen=True)
class SpaceSpec:
    stem_channels: int
    stem_stride: int
    stages: tuple[StageSpec, ...]
    head_channels: int = 0                # 0: no 1x1 head conv before pooling
    stem_activation: str = "relu6"
    head_activation: str = "relu6"
    dropout: float = 0.0
    stem_widths: tuple[int, ...] = ()     # allowed stem output channels; () = stem_channels only
    smaller_kernels: str = "centre"       # one of SMALLER_KERNELS

    def __post_init__(self) -> None:
        _require(self.stem_channels > 0, "stem_channels", self.stem_channels, "must be an integer > 0")
        _require(self.stem_stride in (1, 2), "stem_stride", self.stem_stride, "must be 1 or 2")
        _require(len(self.stages) > 0, "stages", self.stages, "a space needs at least one stage")
        _require(self.head_channels >= 0, "head_channels", self.head_channels, "must be >= 0 (0 means no head conv)")
        for name in ("stem_activation", "head_activation"):
            _require(getattr(self, name) in ACTIVATIONS, name, getattr(self, name),
                     f"choose one of {', '.join(ACTIVATIONS)}")
        _require(0 <= self.dropout < 1, "dropout", self.dropout, "must be in [0, 1)")
        _check_widths("stem_widths", self.stem_widths, self.stem_channels)
        _require(self.smaller_kernels in SMALLER_KERNELS, "smaller_kernels", self.smaller_kernels,
                 f"choose one of {', '.join(SMALLER_KERNELS)}")

    @property
    def stem_choices(self) -> tuple[int, ...]:
        return self.stem_widths or (self.stem_channels,)

    def width_options(self) -> tuple[tuple[int, ...], ...]:
        """Allowed widths of the stem, then of each stage."""
        return (self.stem_choices,) + tuple(st.width_choices for st in self.stages)

    @property
    def elastic_width(self) -> bool:
        """True when some width has more than one choice; only then do subnets carry widths."""
        return any(len(w) > 1 for w in self.width_options())

    def widths_of(self, subnet: "Subnet") -> tuple[int, ...]:
        """Active output channels of the stem, then of each stage."""
        return subnet.widths or (self.stem_channels,) + tuple(st.out_channels for st in self.stages)

    def stage_in_channels(self, i: int) -> int:
        """Input channels of stage i at the widest choices (what its weights are sized for)."""
        return self.stem_channels if i == 0 else self.stages[i - 1].out_channels

    def size(self) -> int:
        """Number of distinct subnets."""
        total = 1
        for st in self.stages:
            per_block = len(st.expansions) * len(st.kernels)
            total *= sum(per_block ** d for d in st.depths)
        for w in self.width_options():
            total *= len(w)
        return total

    def _widths(self, pick) -> tuple[int, ...]:
        return tuple(pick(w) for w in self.width_options()) if self.elastic_width else ()

    def largest(self) -> "Subnet":
        return Subnet(tuple(tuple(BlockChoice(max(st.expansions), max(st.kernels)) for _ in range(max(st.depths)))
                            for st in self.stages), self._widths(max))

    def smallest(self) -> "Subnet":
        return Subnet(tuple(tuple(BlockChoice(min(st.expansions), min(st.kernels)) for _ in range(min(st.depths)))
                            for st in self.stages), self._widths(min))

    def middle(self) -> "Subnet":
        """The median choice everywhere: a reference point between smallest and largest."""
        def mid(xs):
            return xs[len(xs) // 2]
        return Subnet(tuple(tuple(BlockChoice(mid(st.expansions), mid(st.kernels)) for _ in range(mid(st.depths)))
                            for st in self.stages), self._widths(mid))

    def sample(self, rng: random.Random) -> "Subnet":
        """Uniform over the whole space: a depth is drawn with weight equal to the
        number of subnets it allows, then each block's choices uniformly, then each width
        uniformly (widths multiply the count independently)."""
        stages = []
        for st in self.stages:
            per_block = len(st.expansions) * len(st.kernels)
            depth = rng.choices(st.depths, weights=[per_block ** d for d in st.depths])[0]
            stages.append(tuple(BlockChoice(rng.choice(st.expansions), rng.choice(st.kernels)) for _ in range(depth)))
        return Subnet(tuple(stages), self._widths(rng.choice))

    def contains(self, subnet: "Subnet") -> bool:
        if len(subnet.stages) != len(self.stages):
            return False
        if self.elastic_width:
            options = self.width_options()
            if len(subnet.widths) != len(options) or any(w not in o for w, o in zip(subnet.widths, options)):
                return False
        elif subnet.widths:
            return False
        for st, blocks in zip(self.stages, subnet.stages):
            if len(blocks) not in st.depths:
                return False
            if any(e not in st.expansions or k not in st.kernels for e, k in blocks):
                return False
        return True

    def parse_key(self, key: str) -> "Subnet":
        """Key → subnet, checked against this space (UserError if it does not belong)."""
        subnet = Subnet.from_key(key)
        if not self.contains(subnet):
            raise UserError(f"subnet key {key!r} is not in this search space; use only the depths, expansions, "
                            f"kernels{' and widths' if self.elastic_width else ''} the recipe allows, "
                            f"e.g. {self.smallest().to_key()!r}")
        return subnet


@dataclass(frozen=True)
class Subnet:
    """One architecture: per stage, the choices of its active blocks; with elastic width, the
    output channels of the stem and of each stage (empty where the space's widths are fixed)."""
    stages: tuple[tuple[BlockChoice, ...], ...]
    widths: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        # accept plain (expansion, kernel) pairs, store BlockChoice: equal subnets compare and hash equal
        object.__setattr__(self, "stages", tuple(tuple(BlockChoice(*b) for b in s) for s in self.stages))
        object.__setattr__(self, "widths", tuple(int(w) for w in self.widths))

    @property
    def depths(self) -> tuple[int, ...]:
        return tuple(len(s) for s in self.stages)

    def to_key(self) -> str:
        blocks = "/".join(",".join(f"{e:g}:{k}" for e, k in blocks) for blocks in self.stages)
        return blocks + ("@" + "-".join(map(str, self.widths)) if self.widths else "")

    @classmethod
    def from_key(cls, key: str) -> "Subnet":
        try:
            blocks_txt, _, widths_txt = key.partition("@")
            widths = tuple(int(w) for w in widths_txt.split("-")) if widths_txt else ()
            if key.endswith("@") or any(w <= 0 for w in widths):
                raise ValueError(key)
            stages = []
            for part in blocks_txt.split("/"):
                blocks = []
                for b in part.split(","):
                    e_txt, k_txt = b.split(":")
                    e = float(e_txt)
                    blocks.append(BlockChoice(int(e) if e.is_integer() else e, int(k_txt)))
                stages.append(tuple(blocks))
            return cls(tuple(stages), widths)
        except ValueError:
            raise UserError(f"malformed subnet key {key!r}: expected blocks 'expansion:kernel' joined by ',' "
                            "within a stage and stages joined by '/', e.g. '1:3/6:5,3:3/6:3', then, where widths "
                            "are elastic, '@' and the stem's and stages' widths joined by '-', e.g. "
                            "'1:3/6:5,3:3/6:3@8-8-16-24'") from None

    def __str__(self) -> str:
        return self.to_key()


def space_hash(space: SpaceSpec, in_channels: int, image_size: int) -> str:
    """Identifies a search space together with its input shape: latency tables and probe
    bundles carry it, so a table measured for another space is refused. How smaller kernels are taken
    changes weights, not shapes or time, so it is left out: one table serves both ways."""
    shapes = {k: v for k, v in asdict(space).items() if k != "smaller_kernels"}
    blob = json.dumps({"space": shapes, "in_channels": in_channels, "image_size": image_size}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]
