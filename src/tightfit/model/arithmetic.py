"""Network arithmetic without torch: output sizes, widths, and each layer's parameters and
multiply-adds, so candidates are sized (and manifests describe them) without building them."""
from __future__ import annotations

from typing import Any

from tightfit.model.space import SpaceSpec, Subnet


def conv_out(size: int, stride: int) -> int:
    """Output size of a conv with odd kernel k, padding k // 2 and this stride."""
    return (size - 1) // stride + 1


def hidden_channels(in_channels: int, expansion: float) -> int:
    """Expanded width inside a block."""
    return int(round(in_channels * expansion))


def squeeze_channels(chs: int) -> int:
    """Squeeze-excite width: a quarter of the hidden channels, rounded to a multiple of 8 (at least 8)."""
    return max(8, int(chs / 4 + 4) // 8 * 8)


def describe_architecture(space: SpaceSpec, subnet: Subnet, in_channels: int, image_size: int,
                          num_classes: int) -> list[dict[str, Any]]:
    """One dict per layer group in forward order, with its parameters and multiply-adds at batch 1
    (convolutions and the classifier, as torch's FlopCounterMode counts them), enough to
    rebuild the network by hand and to size candidates without building them."""
    size = conv_out(image_size, space.stem_stride)
    widths = space.widths_of(subnet)
    stem = widths[0]
    out: list[dict[str, Any]] = [{"type": "stem", "in_channels": in_channels, "out_channels": stem,
                                  "kernel": 3, "stride": space.stem_stride, "activation": space.stem_activation, "out_size": size,
                                  "params": 9 * in_channels * stem + 2 * stem,
                                  "macs": 9 * in_channels * stem * size * size}]
    chs = stem
    for i, (st, blocks, width) in enumerate(zip(space.stages, subnet.stages, widths[1:])):
        for j, (e, k) in enumerate(blocks):
            stride = st.stride if j == 0 else 1
            hidden, res = hidden_channels(chs, e), conv_out(size, stride)
            params = hidden * k * k + 2 * hidden + hidden * width + 2 * width
            macs = (hidden * k * k + hidden * width) * res * res
            if st.has_expand:
                params, macs = params + chs * hidden + 2 * hidden, macs + chs * hidden * size * size
            if st.squeeze_excite:
                sq = squeeze_channels(hidden)
                params, macs = params + 2 * hidden * sq + sq + hidden, macs + 2 * hidden * sq
            out.append({"type": "inverted_residual", "stage": i, "block": j, "in_channels": chs,
                        "hidden_channels": hidden, "out_channels": width, "expansion": e, "kernel": k,
                        "stride": stride, "activation": st.activation, "squeeze_excite": st.squeeze_excite,
                        "skip": stride == 1 and chs == width, "out_size": res, "params": params, "macs": macs})
            chs, size = width, res
    if space.head_channels:
        out.append({"type": "head", "in_channels": chs, "out_channels": space.head_channels, "kernel": 1,
                    "activation": space.head_activation, "out_size": size, "params": chs * space.head_channels + 2 * space.head_channels,
                    "macs": chs * space.head_channels * size * size})
        chs = space.head_channels
    out.append({"type": "pool_classifier", "in_channels": chs, "out_channels": num_classes, "dropout": space.dropout,
                "params": chs * num_classes + num_classes, "macs": chs * num_classes})
    return out


def architecture_size(space: SpaceSpec, subnet: Subnet, in_channels: int, image_size: int,
                      num_classes: int) -> tuple[int, int]:
    """(parameters, multiply-adds) of the static subnet, computed from the space alone."""
    parts = describe_architecture(space, subnet, in_channels, image_size, num_classes)
    return sum(p["params"] for p in parts), sum(p["macs"] for p in parts)
