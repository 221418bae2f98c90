"""The manifest and the export folder: model.onnx, state_dict.pt, then manifest.json.

The manifest is what a deployer and `tightfit verify` rely on: how to feed the model,
what it predicts, how accurate it is on which split, how fast it measured under which
protocol on which device, the budget it was chosen for, and the file's SHA-256 so a
swapped or damaged file is caught. manifest.json is written last, so a folder with a
manifest is always complete.
"""
from __future__ import annotations

import hashlib
import io
import platform
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Optional

import numpy as np
import torch
from torch import nn

from tightfit.data.dataset import Dataset, eval_batches
from tightfit.export.cut import CutResult
from tightfit.model.onnx import ort_hits, ort_session
from tightfit.model.arithmetic import describe_architecture
from tightfit.model.space import SpaceSpec, Subnet
from tightfit.ondevice.accuracy import Accuracy, PairedComparison  # accuracy records: count, interval, pairs
from tightfit.ondevice.measurement import Measurement
from tightfit.ondevice.files import MANIFEST_FORMAT, MANIFEST_VERSION, write_bytes, write_json
from tightfit.rundir import TrainedRun


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def software_versions() -> dict[str, str]:
    import numpy
    import onnx
    import onnxruntime

    from tightfit import __version__
    return {"tightfit": __version__, "torch": torch.__version__, "onnx": onnx.__version__,
            "onnxruntime": onnxruntime.__version__, "numpy": numpy.__version__,
            "python": platform.python_version()}


def latency_section(measured: Optional[Measurement], hardware: dict[str, Any], protocol: dict[str, Any],
                    predicted_ms: Optional[float], note: str = "", guard: Optional[dict[str, Any]] = None
                    ) -> dict[str, Any]:
    """Measured figures (pooled over repeats) with how and where, and the guard the pick was chosen
    with (it takes the place of the measurement's own guard); no figures at all when not measured,
    so a prediction is never read as a measurement."""
    out: dict[str, Any] = {**(measured.to_dict() if measured else {}), "hardware": hardware, "protocol": protocol,
                           "guard": guard}
    if measured is None:
        out["stable"] = False
        out["note"] = note or "not measured"
    elif note:
        out["note"] = "; ".join(filter(None, [measured.note, note]))
    out["predicted_ms"] = None if predicted_ms is None else round(predicted_ms, 4)
    out["measured"] = measured is not None
    return out


def build_manifest(*, space: SpaceSpec, subnet: Subnet, params: int, macs: int, onnx_data: bytes,
                   channels: int, image_size: int, class_names: tuple[str, ...], mean: tuple[float, ...],
                   std: tuple[float, ...], validation: Accuracy, test: Accuracy, latency: dict[str, Any],
                   budget_ms: Optional[float], percentile: float, device: Optional[str], recipe_name: str,
                   recipe_hash: str, finetune: Optional[dict[str, Any]] = None,
                   lead: Optional[PairedComparison] = None, use: Optional[float] = None) -> dict[str, Any]:
    """The manifest dict (see the project contract for the fields); budget.ms is None for a model cut
    by hand without a budget (verify then reports its figures and judges nothing); ``finetune`` is None
    for inherited weights, else what the fine-tune did, cost and started from; ``lead`` is the paired
    comparison of the pick (first) with the runner-up (second) on the validation images, when one was made;
    ``use`` the measured figure over the budget (Measurement.use)."""
    return {
        "format": MANIFEST_FORMAT, "version": MANIFEST_VERSION, "model_file": "model.onnx",
        "sha256": sha256_hex(onnx_data),
        "architecture": {"key": subnet.to_key(), "depths": list(subnet.depths), "params": params, "macs": macs,
                         "description": describe_architecture(space, subnet, channels, image_size,
                                                              len(class_names))},
        "input": {"name": "image", "layout": "NCHW", "dtype": "float32", "shape": [None, channels, image_size, image_size],
                  "channels": channels, "image_size": image_size, "color": "RGB" if channels == 3 else "grey",
                  "scale": "divide by 255, then (x-mean)/std", "mean": list(mean), "std": list(std),
                  "resize": f"shorter side to {image_size}, centre crop"},
        "output": {"name": "logits", "classes": list(class_names)},
        "accuracy": {"validation": validation.to_dict(), "test": test.to_dict(),
                     **({"lead": lead.to_dict()} if lead is not None else {})},
        "latency": latency,
        "budget": {"ms": None if budget_ms is None else float(budget_ms), "percentile": float(percentile),
                   "device": device, "use": use, "rule": f"met when latency.budget_stat_ms, the p{percentile:g} of all pooled "
                                             "timed runs, is at most ms"},
        "finetune": finetune,
        "software": software_versions(),
        "recipe": {"name": recipe_name, "hash": recipe_hash},
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }


def state_dict_bytes(net: nn.Module) -> bytes:
    buf = io.BytesIO()
    torch.save(net.state_dict(), buf)
    return buf.getvalue()


def write_export(export_dir: str | Path, onnx_data: bytes, net: nn.Module, manifest: dict[str, Any]) -> Path:
    """Write model.onnx, state_dict.pt, then manifest.json (each atomically); returns the folder."""
    export_dir = Path(export_dir)
    if manifest["sha256"] != sha256_hex(onnx_data):
        raise ValueError("manifest sha256 does not match the ONNX bytes being written")
    (export_dir / "manifest.json").unlink(missing_ok=True)  # an old manifest must never describe new files
    write_bytes(export_dir / "model.onnx", onnx_data)
    write_bytes(export_dir / "state_dict.pt", state_dict_bytes(net))
    write_json(export_dir / "manifest.json", manifest)
    return export_dir


def shipped_hits(onnx_data: bytes, ds: Dataset, split: str, batch_size: int = 512) -> np.ndarray:
    """Right/wrong per image of the exported file itself (ONNX Runtime) on a whole split ("val" or
    "test"), in the split's order: what the manifest claims is what the deployer gets; 2-3x faster
    than the same pass in eager torch."""
    x, y = getattr(ds, f"{split}_x"), getattr(ds, f"{split}_y")
    return ort_hits(ort_session(onnx_data, torch.get_num_threads()), eval_batches(x, y, ds, batch_size))


def shipped_accuracy(onnx_data: bytes, ds: Dataset, split: str, batch_size: int = 512) -> Accuracy:
    """The exported file's accuracy record on a whole split, with its image count and interval."""
    return Accuracy.of(shipped_hits(onnx_data, ds, split, batch_size), "validation" if split == "val" else split)


def export_pick(run: TrainedRun, ds: Dataset, *, subnet: Subnet, cut: CutResult, net: nn.Module, export_dir: str | Path,
                latency: dict[str, Any], budget_ms: Optional[float], percentile: float,
                device: Optional[str], use: Optional[float] = None) -> dict[str, Any]:
    """Score the exported file on the whole validation and test splits (for the manifest only:
    nothing is chosen on them here), then write the export folder.
    ``cut`` is the candidate's cut (its ONNX file)."""
    cfg = run.recipe
    data = Path(cut.onnx_path).read_bytes()
    manifest = build_manifest(
        space=cfg.space, subnet=subnet, params=cut.params, macs=cut.macs, onnx_data=data,
        channels=cfg.data.channels, image_size=cfg.data.image_size, class_names=run.class_names,
        mean=run.mean, std=run.std, validation=shipped_accuracy(data, ds, "val"),
        test=shipped_accuracy(data, ds, "test"), latency=latency, budget_ms=budget_ms,
        percentile=percentile, device=device, recipe_name=cfg.name, recipe_hash=cfg.hash(), use=use)
    write_export(export_dir, data, net, manifest)
    return manifest
