"""The search space: stages of inverted-residual blocks and the subnets they allow.

A subnet picks one depth per stage and, for each active block, one expansion ratio
and one depthwise kernel size. Subnets have a short text key that round-trips, e.g.
``e1k3_e6k5-e3k3_e6k7-e6k3-e3k5`` (stages joined by ``_``, blocks by ``-``).
"""
from __future__ import annotations

import math
import random
from dataclasses import dataclass

from tightfit.errors import UserError

ACTIVATIONS = ("relu6", "hswish")


@dataclass(frozen=True)
class StageSpec:
    out_chs: int
    stride: int
    depths: tuple[int, ...]          # allowed number of blocks
    exp_ratios: tuple[float, ...]    # allowed expansion ratios (hidden = round(in_chs * ratio))
    kernels: tuple[int, ...]         # allowed depthwise kernel sizes (odd)
    act: str = "relu6"
    se: bool = False                 # squeeze-excite after the depthwise conv

    @property
    def has_expand(self) -> bool:
        # MobileNetV2 (Sandler et al. 2018, Table 1): a block with t=1 has no expansion conv.
        return self.exp_ratios != (1,) and self.exp_ratios != (1.0,)


@dataclass(frozen=True)
class SpaceSpec:
    stem_chs: int
    stem_stride: int
    stages: tuple[StageSpec, ...]
    head_chs: int = 0                # 0: no 1x1 head conv before pooling
    stem_act: str = "relu6"
    head_act: str = "relu6"
    dropout: float = 0.0

    def stage_in_chs(self, i: int) -> int:
        return self.stem_chs if i == 0 else self.stages[i - 1].out_chs

    def size(self) -> int:
        """Number of distinct subnets."""
        total = 1
        for st in self.stages:
            per_block = len(st.exp_ratios) * len(st.kernels)
            total *= sum(per_block ** d for d in st.depths)
        return total

    def log10_size(self) -> float:
        return math.log10(self.size())

    def largest(self) -> "Subnet":
        return Subnet(tuple(tuple((max(st.exp_ratios), max(st.kernels)) for _ in range(max(st.depths)))
                            for st in self.stages))

    def smallest(self) -> "Subnet":
        return Subnet(tuple(tuple((min(st.exp_ratios), min(st.kernels)) for _ in range(min(st.depths)))
                            for st in self.stages))

    def middle(self) -> "Subnet":
        """The median choice everywhere: a reference point between smallest and largest."""
        def mid(xs):
            return xs[len(xs) // 2]
        return Subnet(tuple(tuple((mid(st.exp_ratios), mid(st.kernels)) for _ in range(mid(st.depths)))
                            for st in self.stages))

    def sample(self, rng: random.Random) -> "Subnet":
        """Uniform over the whole space: a depth is drawn with weight equal to the
        number of subnets it allows, then each block's choices uniformly."""
        stages = []
        for st in self.stages:
            per_block = len(st.exp_ratios) * len(st.kernels)
            depth = rng.choices(st.depths, weights=[per_block ** d for d in st.depths])[0]
            stages.append(tuple((rng.choice(st.exp_ratios), rng.choice(st.kernels)) for _ in range(depth)))
        return Subnet(tuple(stages))

    def contains(self, subnet: "Subnet") -> bool:
        if len(subnet.stages) != len(self.stages):
            return False
        for st, blocks in zip(self.stages, subnet.stages):
            if len(blocks) not in st.depths:
                return False
            if any(e not in st.exp_ratios or k not in st.kernels for e, k in blocks):
                return False
        return True

    def parse_key(self, key: str) -> "Subnet":
        """Key → subnet, checked against this space (UserError if it does not belong)."""
        subnet = Subnet.from_key(key)
        if not self.contains(subnet):
            raise UserError(f"subnet key {key!r} is not in this search space; use only the depths, expansions "
                            f"and kernels the recipe allows, e.g. {self.smallest().to_key()!r}")
        return subnet


def _fmt_ratio(e: float) -> str:
    return f"{e:g}"


@dataclass(frozen=True)
class Subnet:
    """One architecture: per stage, a tuple of (expansion ratio, kernel size) per active block."""
    stages: tuple[tuple[tuple[float, int], ...], ...]

    @property
    def depths(self) -> tuple[int, ...]:
        return tuple(len(s) for s in self.stages)

    def to_key(self) -> str:
        return "_".join("-".join(f"e{_fmt_ratio(e)}k{k}" for e, k in blocks) for blocks in self.stages)

    @classmethod
    def from_key(cls, key: str) -> "Subnet":
        try:
            stages = []
            for part in key.split("_"):
                blocks = []
                for b in part.split("-"):
                    if not b.startswith("e") or "k" not in b:
                        raise ValueError(b)
                    e_txt, k_txt = b[1:].split("k")
                    e = float(e_txt)
                    blocks.append((int(e) if e.is_integer() else e, int(k_txt)))
                stages.append(tuple(blocks))
            return cls(tuple(stages))
        except ValueError:
            raise UserError(f"malformed subnet key {key!r}: expected stages like 'e6k3-e3k5' joined by '_'") from None

    def __str__(self) -> str:
        return self.to_key()


def space_hash(space: SpaceSpec, in_chs: int, image_size: int) -> str:
    """Identifies a search space together with its input shape: latency tables and probe
    bundles carry it, so a table measured for another space is refused."""
    import hashlib
    import json
    from dataclasses import asdict
    blob = json.dumps({"space": asdict(space), "in_chs": in_chs, "image_size": image_size}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]
