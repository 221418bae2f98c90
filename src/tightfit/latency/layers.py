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

from tightfit.model.arithmetic import conv_out, hidden_channels
from tightfit.model.space import SpaceSpec, Subnet

OVERHEAD_ID = "passthrough"


@dataclass(frozen=True)
class LayerConfig:
    """One distinct layer the space can produce, with the shapes it runs at."""
    id: str
    role: str                  # "stem" | "block" | "head" | "passthrough"
    in_channels: int
    out_channels: int
    resolution: int            # input height = width
    stage: int = -1
    first: bool = False
    expansion: float = 0
    kernel: int = 0
    hidden_channels: int = 0
    stride: int = 1
    activation: str = ""
    squeeze_excite: bool = False
    skip: bool = False
    copies: int = 0            # overhead probes: chained passthrough convs

    def shape(self) -> str:
        """Readable one-liner, e.g. '24x16x16 -> expand x4 to 96, 5x5 depthwise, stride 2, hswish,
        squeeze-excite -> 40x8x8'."""
        out_res = conv_out(self.resolution, self.stride)
        io = (f"{self.in_channels}x{self.resolution}x{self.resolution}", f"{self.out_channels}x{out_res}x{out_res}")
        if self.role == "passthrough":
            return f"passthrough x{self.copies}{' +skip' if self.skip else ''}: {io[0]} -> {io[0]}"
        if self.role != "block":
            return f"{self.role}: {io[0]} -> {io[1] if self.role == 'stem' else 'logits'}"
        extras = ", squeeze-excite" if self.squeeze_excite else ""
        extras += ", skip" if self.skip else ""
        return (f"{io[0]} -> expand x{self.expansion:g} to {self.hidden_channels}, {self.kernel}x{self.kernel} "
                f"depthwise, stride {self.stride}, {self.activation}{extras} -> {io[1]}")

    def meta(self) -> dict:
        return {**asdict(self), "shape": self.shape()}


def block_id(stage: int, first: bool, expansion: float, kernel: int) -> str:
    return f"stage{stage}-{'first' if first else 'later'}-expansion{expansion:g}-kernel{kernel}"


def layer_configs(space: SpaceSpec, in_channels: int, image_size: int) -> list[LayerConfig]:
    """Every distinct layer configuration of the space, in network order."""
    res = image_size
    out = [LayerConfig("stem", "stem", in_channels, space.stem_channels, res, stride=space.stem_stride,
                       activation=space.stem_activation)]
    res = conv_out(res, space.stem_stride)
    for i, st in enumerate(space.stages):
        positions = [(True, space.stage_in_channels(i), st.stride, res)]
        res = conv_out(res, st.stride)
        if max(st.depths) > 1:
            positions.append((False, st.out_channels, 1, res))
        for first, chs, stride, r in positions:
            skip = stride == 1 and chs == st.out_channels
            for e in st.expansions:
                for k in st.kernels:
                    out.append(LayerConfig(block_id(i, first, e, k), "block", chs, st.out_channels, r, i, first, e, k,
                                           hidden_channels(chs, e), stride, st.activation, st.squeeze_excite, skip))
    last = space.stages[-1].out_channels
    out.append(LayerConfig("head", "head", last, space.head_channels or last, res, activation=space.head_activation))
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
    shapes = dict.fromkeys((c.in_channels, c.resolution, c.skip) for c in layers)
    return [LayerConfig(overhead_id(chs, res, skip, n), "passthrough", chs, chs, res, skip=skip, copies=n)
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
