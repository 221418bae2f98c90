"""The distinct layers of a search space and their ids in a probe bundle (torch-free).

A block's input resolution depends only on its stage and on whether it is the stage's
first block; its channels on the widths chosen around it. So the distinct blocks are, per
stage, the first-block (input width, output width, expansion, kernel) choices, the input
width being one of the previous stage's (or the stem's), and, when the stage can be deeper
than one, the later-block (width, expansion, kernel) choices. The stem is one entry per
stem width, the head (head conv + pool + classifier) one per last-stage width; passthrough
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


def block_id(stage: int, first: bool, in_channels: int, out_channels: int, expansion: float, kernel: int) -> str:
    return (f"stage{stage}-{'first' if first else 'later'}-in{in_channels}-out{out_channels}"
            f"-expansion{expansion:g}-kernel{kernel}")


def stem_id(width: int) -> str:
    return f"stem-out{width}"


def head_id(in_channels: int) -> str:
    return f"head-in{in_channels}"


def layer_configs(space: SpaceSpec, in_channels: int, image_size: int) -> list[LayerConfig]:
    """Every distinct layer configuration of the space, in network order."""
    res = image_size
    out = [LayerConfig(stem_id(w), "stem", in_channels, w, res, stride=space.stem_stride,
                       activation=space.stem_activation) for w in space.stem_choices]
    res = conv_out(res, space.stem_stride)
    widths_in = space.stem_choices
    for i, st in enumerate(space.stages):
        positions = [(True, a, b, st.stride, res) for a in widths_in for b in st.width_choices]
        res = conv_out(res, st.stride)
        if max(st.depths) > 1:
            positions += [(False, w, w, 1, res) for w in st.width_choices]
        for first, chs, width, stride, r in positions:
            skip = stride == 1 and chs == width
            for e in st.expansions:
                for k in st.kernels:
                    out.append(LayerConfig(block_id(i, first, chs, width, e, k), "block", chs, width, r, i, first, e, k,
                                           hidden_channels(chs, e), stride, st.activation, st.squeeze_excite, skip))
        widths_in = st.width_choices
    out += [LayerConfig(head_id(w), "head", w, space.head_channels or w, res, activation=space.head_activation)
            for w in widths_in]
    return out


def subnet_layer_ids(space: SpaceSpec, subnet: Subnet) -> list[str]:
    """The layer entries whose latencies add up to this subnet's."""
    widths = space.widths_of(subnet)
    ids, chs = [stem_id(widths[0])], widths[0]
    for i, (blocks, width) in enumerate(zip(subnet.stages, widths[1:])):
        for j, (e, k) in enumerate(blocks):
            ids.append(block_id(i, j == 0, chs, width, e, k))
            chs = width
    return ids + [head_id(chs)]


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
