"""Network arithmetic without torch: output sizes, widths, and each layer's parameters and
multiply-adds, so candidates are sized (and manifests describe them) without building them."""
from __future__ import annotations

from typing import Any

from tightfit.model.space import SpaceSpec, Subnet


def conv_out(size: int, stride: int) -> int:
    """Output size of a conv with odd kernel k, padding k // 2 and this stride."""
    return (size - 1) // stride + 1


def hidden_chs(in_chs: int, exp_ratio: float) -> int:
    """Expanded width inside a block."""
    return int(round(in_chs * exp_ratio))


def squeeze_chs(chs: int) -> int:
    """Squeeze-excite width: a quarter of the hidden channels, rounded to a multiple of 8 (at least 8)."""
    return max(8, int(chs / 4 + 4) // 8 * 8)


def describe_architecture(space: SpaceSpec, subnet: Subnet, in_chs: int, image_size: int,
                          num_classes: int) -> list[dict[str, Any]]:
    """One dict per layer group in forward order, with its parameters and multiply-adds at batch 1
    (convolutions and the classifier, as torch's FlopCounterMode counts them), enough to
    rebuild the network by hand and to size candidates without building them."""
    size = conv_out(image_size, space.stem_stride)
    out: list[dict[str, Any]] = [{"type": "stem", "in_chs": in_chs, "out_chs": space.stem_chs, "kernel": 3,
                                  "stride": space.stem_stride, "act": space.stem_act, "out_size": size,
                                  "params": 9 * in_chs * space.stem_chs + 2 * space.stem_chs,
                                  "macs": 9 * in_chs * space.stem_chs * size * size}]
    for i, (st, blocks) in enumerate(zip(space.stages, subnet.stages)):
        chs = space.stage_in_chs(i)
        for j, (e, k) in enumerate(blocks):
            stride = st.stride if j == 0 else 1
            mid, res = hidden_chs(chs, e), conv_out(size, stride)
            params = mid * k * k + 2 * mid + mid * st.out_chs + 2 * st.out_chs
            macs = (mid * k * k + mid * st.out_chs) * res * res
            if st.has_expand:
                params, macs = params + chs * mid + 2 * mid, macs + chs * mid * size * size
            if st.se:
                sq = squeeze_chs(mid)
                params, macs = params + 2 * mid * sq + sq + mid, macs + 2 * mid * sq
            out.append({"type": "inverted_residual", "stage": i, "block": j, "in_chs": chs, "mid_chs": mid,
                        "out_chs": st.out_chs, "exp_ratio": e, "kernel": k, "stride": stride, "act": st.act,
                        "se": st.se, "skip": stride == 1 and chs == st.out_chs, "out_size": res,
                        "params": params, "macs": macs})
            chs, size = st.out_chs, res
    if space.head_chs:
        out.append({"type": "head", "in_chs": chs, "out_chs": space.head_chs, "kernel": 1, "act": space.head_act,
                    "out_size": size, "params": chs * space.head_chs + 2 * space.head_chs,
                    "macs": chs * space.head_chs * size * size})
        chs = space.head_chs
    out.append({"type": "pool_classifier", "in_chs": chs, "out_chs": num_classes, "dropout": space.dropout,
                "params": chs * num_classes + num_classes, "macs": chs * num_classes})
    return out


def architecture_size(space: SpaceSpec, subnet: Subnet, in_chs: int, image_size: int,
                      num_classes: int) -> tuple[int, int]:
    """(parameters, multiply-adds) of the static subnet, computed from the space alone."""
    parts = describe_architecture(space, subnet, in_chs, image_size, num_classes)
    return sum(p["params"] for p in parts), sum(p["macs"] for p in parts)
