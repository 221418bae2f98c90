"""Cut subnets out of a trained run: recalibrate BN, extract, export ONNX, measure.

This is the path every exported model takes, whether chosen by hand (`tightfit cut`),
by the demo, or by the search.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

from tightfit.ondevice.files import write_bytes
from tightfit.data.dataset import Dataset, calibration_batches, eval_batches
from tightfit.model.onnx import export_onnx, max_parity_error
from tightfit.model.extract import StaticNet, count_macs, count_params, extract_subnet
from tightfit.model.recalibrate import accuracy, preserved_bn_stats, recalibrate_bn
from tightfit.rundir import TrainedRun
from tightfit.model.space import Subnet
from tightfit.ondevice.measurement import Measurement
from tightfit.ondevice.repeats import measure_repeated
from tightfit.ondevice.timing import Protocol

PARITY_TOL = 1e-4


@dataclass
class CutResult:
    name: str
    key: str
    params: int
    macs: int
    val_acc: float | None         # None when cut without the validation pass (search candidates)
    onnx_path: Path
    parity: float                 # max |ORT - torch| over batch 1 and 7
    p50_ms: float | None = None
    p90_ms: float | None = None


def resolve_subnet(run: TrainedRun, spec: str) -> tuple[str, Subnet]:
    """(folder name, subnet) for 'largest', 'smallest', 'middle' or a key. A key's folder is named
    by its hash, so a later cut of another subnet never overwrites it and '/' never nests folders."""
    space = run.recipe.space
    named = {"largest": space.largest, "smallest": space.smallest, "middle": space.middle}
    if spec in named:
        return spec, named[spec]()
    subnet = space.parse_key(spec)
    return f"subnet-{hashlib.sha256(subnet.to_key().encode()).hexdigest()[:10]}", subnet


def cut_one(run: TrainedRun, ds: Dataset, name: str, subnet: Subnet, out_dir: Path,
            validate: bool = True) -> tuple[CutResult, StaticNet]:
    """Recalibrated static network for ``subnet``, its ONNX file in out_dir/name, and its figures.
    ``validate=False`` skips the full validation pass: the search cuts several candidates to
    measure them and scores only the one it picks (on the ONNX file it ships)."""
    cfg, sn = run.recipe, run.supernet
    calib = calibration_batches(ds, cfg.train.batch_size, cfg.train.recalibration_batches, cfg.seed)
    sn.set_subnet(subnet)
    with preserved_bn_stats(sn):
        recalibrate_bn(sn, calib)
        net = extract_subnet(sn, subnet)
    val = accuracy(net, eval_batches(ds.val_x, ds.val_y, ds, cfg.train.eval_batch_size)) if validate else None
    folder = out_dir / name
    data = export_onnx(net, folder / "model.onnx", cfg.data.channels, cfg.data.image_size)
    parity = max_parity_error(net, data, cfg.data.channels, cfg.data.image_size)
    if parity > PARITY_TOL:
        raise RuntimeError(f"ONNX Runtime output differs from torch by {parity:.2e} for {subnet.to_key()}")
    write_bytes(folder / "subnet.txt", (subnet.to_key() + "\n").encode())
    result = CutResult(name, subnet.to_key(), count_params(net), count_macs(net, cfg.data.channels, cfg.data.image_size),
                       val, folder / "model.onnx", parity)
    return result, net


def measure_latency(results: list[CutResult], protocol: Optional[Protocol] = None) -> dict[str, Measurement]:
    """Batch-1 ONNX Runtime latency of every cut, interleaved, under the on-device protocol (its
    defaults unless given); returns the measurements by ONNX path and fills p50/p90 in."""
    figures = measure_repeated([str(r.onnx_path) for r in results], protocol or Protocol())
    for r in results:
        r.p50_ms, r.p90_ms = figures[str(r.onnx_path)].p50_ms, figures[str(r.onnx_path)].p90_ms
    return figures


def format_table(rows: list[CutResult]) -> str:
    head = f"{'subnet':<17} {'params':>9} {'MACs':>11} {'val acc %':>9} {'p50 ms':>8} {'p90 ms':>8}  key"
    lines = [head, "-" * len(head)]
    for r in rows:
        lines.append(f"{r.name:<17} {r.params:>9,} {r.macs:>11,} {r.val_acc:>9.2f} "
                     f"{r.p50_ms or float('nan'):>8.3f} {r.p90_ms or float('nan'):>8.3f}  {r.key}")
    return "\n".join(lines)
