"""ONNX export of a static subnet, checked against torch.

We use torch's TorchScript-based exporter (``dynamo=False``): it exports one of our
small static networks in tens of milliseconds, while the newer exporter needs
onnxscript and takes seconds per model, and the probe bundle exports hundreds of
small layer models. Both produce the same standard ops (Conv, Relu/Clip, HardSwish,
GlobalAveragePool, Gemm) for these networks; parity with torch is checked either way.
"""
from __future__ import annotations

import io
import warnings

import numpy as np
import onnx
import torch
from torch import nn

from tightfit.ondevice.files import write_bytes

OPSET = 17


def onnx_bytes(model: nn.Module, in_channels: int, image_size: int) -> bytes:
    """Serialized ONNX model with input 'image' (N, C, H, W) and output 'logits', batch axis dynamic."""
    model = model.eval()
    buf = io.BytesIO()
    dummy = torch.zeros(1, in_channels, image_size, image_size)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(model, (dummy,), buf, input_names=["image"], output_names=["logits"],
                          dynamic_axes={"image": {0: "batch"}, "logits": {0: "batch"}},
                          opset_version=OPSET, dynamo=False)
    return buf.getvalue()


def export_onnx(model: nn.Module, path, in_channels: int, image_size: int) -> bytes:
    """Export, run the full ONNX checker, write atomically; returns the file's bytes."""
    data = onnx_bytes(model, in_channels, image_size)
    onnx.checker.check_model(onnx.load_from_string(data), full_check=True)
    write_bytes(path, data)
    return data


def ort_session(data: bytes, threads: int = 0):
    """A quiet CPU session of ONNX Runtime (threads 0: its default)."""
    import onnxruntime as ort
    opts = ort.SessionOptions()
    opts.intra_op_num_threads, opts.inter_op_num_threads, opts.log_severity_level = threads, 1, 3
    return ort.InferenceSession(data, opts, providers=["CPUExecutionProvider"])


def ort_hits(session, batches) -> np.ndarray:
    """One right/wrong flag per image of an ONNX Runtime session over (x, y) torch batches, in order:
    the figure of the file that ships, not of the torch module it came from, and what a paired
    comparison of two files on the same images needs."""
    hits = [session.run(None, {"image": x.numpy()})[0].argmax(1) == y.numpy() for x, y in batches]
    return np.concatenate(hits) if hits else np.zeros(0, bool)


def ort_top1(session, batches) -> tuple[float, int]:
    """(top-1 %, images) of an ONNX Runtime session over (x, y) torch batches."""
    hits = ort_hits(session, batches)
    return 100.0 * int(hits.sum()) / max(hits.size, 1), int(hits.size)


def ort_outputs(data: bytes, x: np.ndarray) -> np.ndarray:
    import onnxruntime as ort
    sess = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    return sess.run(None, {"image": x})[0]


@torch.no_grad()
def max_parity_error(model: nn.Module, data: bytes, in_channels: int, image_size: int, batch_sizes=(1, 7)) -> float:
    """Largest |ONNX Runtime - torch| over random inputs of the given batch sizes."""
    gen = torch.Generator().manual_seed(0)
    worst = 0.0
    for b in batch_sizes:
        x = torch.randn(b, in_channels, image_size, image_size, generator=gen)
        worst = max(worst, float(np.abs(ort_outputs(data, x.numpy()) - model.eval()(x).numpy()).max()))
    return worst
