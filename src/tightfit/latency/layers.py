"""The distinct layers of a search space and their ids in a probe bundle (torch-free).

A block's input resolution and input channels depend only on its stage and on whether
it is the stage's first block, so the distinct blocks are, per stage, the first-block
(expansion, kernel) choices and, when the stage can be deeper than one, the later-block
choices. Stem and head (head conv + pool + classifier) are one entry each; passthrough
probes isolate the per-call overhead (latency/predict.py).
"""
from __future__ import annotations

import random
from dataclasses import asdict, dataclass

from tightfit.model.arithmetic import conv_out, hidden_chs
from tightfit.model.space import SpaceSpec, Subnet

OVERHEAD_ID = "overhead"


@dataclass(frozen=True)
class LayerConfig:
    """One distinct layer the space can produce, with the shapes it runs at."""
    id: str
    role: str                  # "stem" | "block" | "head" | "overhead"
    in_chs: int
    out_chs: int
    resolution: int            # input height = width
    stage: int = -1
    first: bool = False
    exp_ratio: float = 0
    kernel: int = 0
    hidden_chs: int = 0
    stride: int = 1
    act: str = ""
    se: bool = False
    skip: bool = False
    copies: int = 0            # overhead probes: chained passthrough convs

    def shape(self) -> str:
        """Readable one-liner, e.g. '24x16x16 -> e4 (96) k5 s2 hswish +SE -> 40x8x8'."""
        out_res = conv_out(self.resolution, self.stride)
        io = (f"{self.in_chs}x{self.resolution}x{self.resolution}", f"{self.out_chs}x{out_res}x{out_res}")
        if self.role == "overhead":
            return f"passthrough x{self.copies}{' +skip' if self.skip else ''}: {io[0]} -> {io[0]}"
        if self.role != "block":
            return f"{self.role}: {io[0]} -> {io[1] if self.role == 'stem' else 'logits'}"
        extras = " +SE" if self.se else ""
        extras += " +skip" if self.skip else ""
        return (f"{io[0]} -> e{self.exp_ratio:g} ({self.hidden_chs}) k{self.kernel} s{self.stride} "
                f"{self.act}{extras} -> {io[1]}")

    def meta(self) -> dict:
        return {**asdict(self), "shape": self.shape()}


def block_id(stage: int, first: bool, exp_ratio: float, kernel: int) -> str:
    return f"block-s{stage}-{'first' if first else 'later'}-e{exp_ratio:g}-k{kernel}"


def layer_configs(space: SpaceSpec, in_chs: int, image_size: int) -> list[LayerConfig]:
    """Every distinct layer configuration of the space, in network order."""
    res = image_size
    out = [LayerConfig("stem", "stem", in_chs, space.stem_chs, res, stride=space.stem_stride, act=space.stem_act)]
    res = conv_out(res, space.stem_stride)
    for i, st in enumerate(space.stages):
        positions = [(True, space.stage_in_chs(i), st.stride, res)]
        res = conv_out(res, st.stride)
        if max(st.depths) > 1:
            positions.append((False, st.out_chs, 1, res))
        for first, chs, stride, r in positions:
            skip = stride == 1 and chs == st.out_chs
            for e in st.exp_ratios:
                for k in st.kernels:
                    out.append(LayerConfig(block_id(i, first, e, k), "block", chs, st.out_chs, r, i, first, e, k,
                                           hidden_chs(chs, e), stride, st.act, st.se, skip))
    last = space.stages[-1].out_chs
    out.append(LayerConfig("head", "head", last, space.head_chs or last, res, act=space.head_act))
    return out


def subnet_layer_ids(subnet: Subnet) -> list[str]:
    """The layer entries whose latencies add up to this subnet's."""
    ids = ["stem"]
    for i, blocks in enumerate(subnet.stages):
        ids += [block_id(i, j == 0, e, k) for j, (e, k) in enumerate(blocks)]
    return ids + ["head"]


def overhead_id(chs: int, res: int, skip: bool, copies: int) -> str:
    return f"{OVERHEAD_ID}-{chs}x{res}x{res}{'-skip' if skip else ''}-x{copies}"


def overhead_configs(layers: list[LayerConfig]) -> list[LayerConfig]:
    """Passthrough probes, once and twice, for every distinct (input shape, skip) of the layers."""
    shapes = dict.fromkeys((c.in_chs, c.resolution, c.skip) for c in layers)
    return [LayerConfig(overhead_id(chs, res, skip, n), "overhead", chs, chs, res, skip=skip, copies=n)
            for chs, res, skip in shapes for n in (1, 2)]


def calibration_subnets(space: SpaceSpec, n: int, seed: int = 0) -> list[tuple[str, Subnet]]:
    """Smallest, largest, middle, then distinct random subnets: n in all (fewer if the space is tiny)."""
    picks = {"smallest": space.smallest(), "largest": space.largest(), "middle": space.middle()}
    out: dict[str, tuple[str, Subnet]] = {}
    for name, s in picks.items():
        out.setdefault(s.to_key(), (name, s))
    rng = random.Random(seed)
    for _ in range(50 * n):
        if len(out) >= n:
            break
        s = space.sample(rng)
        out.setdefault(s.to_key(), (f"random{len(out)}", s))
    return list(out.values())[:n]
