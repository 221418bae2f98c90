"""Fine-tune an exported pick from its inherited weights and rewrite its folder.

The fine-tune (tightfit.train.finetune) changes weights, not the graph, so the latency the pick
was measured at still describes the new file; this is checked (same operators, same initialiser
shapes) rather than assumed. The manifest keeps the inherited accuracy beside the new one and
what the fine-tune cost. The same subnet fine-tuned with the same settings is computed once per
run (RUN/search/finetuned/): two devices that pick one subnet pay for one fine-tune.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any, Callable, Optional

import onnx
import torch

from tightfit.data.dataset import Dataset, calibration_batches
from tightfit.export.cut import PARITY_TOL, CutResult
from tightfit.export.manifest import export_pick, state_dict_bytes
from tightfit.model.onnx import export_onnx, max_parity_error
from tightfit.model.space import Subnet
from tightfit.ondevice.files import write_bytes, write_json
from tightfit.train.finetune import FinetuneSettings, finetune, inherited_net
from tightfit.rundir import TrainedRun


def graph_signature(data: bytes) -> tuple:
    """Operators in order and initialiser shapes: what decides a graph's latency, weights aside."""
    g = onnx.load_from_string(data).graph
    return (tuple((n.op_type, tuple(a.name for a in n.attribute)) for n in g.node),
            tuple(sorted((i.name, tuple(i.dims)) for i in g.initializer)))


def _cache_paths(run_dir: Path, subnet: Subnet, settings: FinetuneSettings) -> tuple[Path, Path]:
    tag = hashlib.sha256(f"{subnet.to_key()}|{settings.steps}|{settings.lr!r}".encode()).hexdigest()[:12]
    folder = run_dir / "search" / "finetuned"
    return folder / f"{tag}.pt", folder / f"{tag}.json"


def finetuned_net(run: TrainedRun, run_dir: Path, ds: Dataset, subnet: Subnet, settings: FinetuneSettings,
                  on_step: Optional[Callable[[int], None]] = None) -> tuple[torch.nn.Module, dict[str, Any]]:
    """The fine-tuned static network of ``subnet`` and the fine-tune's record, from the run's cache
    when this subnet was fine-tuned with these settings before (record ``reused`` then)."""
    cfg = run.recipe.train
    net = inherited_net(run, subnet, calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed))
    weights, record_path = _cache_paths(run_dir, subnet, settings)
    if weights.is_file() and record_path.is_file():
        net.load_state_dict(torch.load(weights, weights_only=True))
        return net.eval(), {**json.loads(record_path.read_text()), "reused": True}
    record = finetune(run, ds, net, settings, on_step=on_step)
    write_bytes(weights, state_dict_bytes(net))
    write_json(record_path, record)
    return net, {**record, "reused": False}


def finetune_export(run: TrainedRun, run_dir: Path, ds: Dataset, export_dir: Path, settings: FinetuneSettings,
                    on_step: Optional[Callable[[int], None]] = None) -> dict[str, Any]:
    """Rewrite ``export_dir`` (a pick's folder) with the fine-tuned weights; returns the new manifest."""
    old = json.loads((export_dir / "manifest.json").read_text())
    subnet = run.recipe.space.parse_key(old["architecture"]["key"])
    before = old["accuracy"]
    inherited_data = (export_dir / "model.onnx").read_bytes()
    net, record = finetuned_net(run, run_dir, ds, subnet, settings, on_step)
    staging = run_dir / "search" / "finetuned" / "staging.onnx"
    data = export_onnx(net, staging, run.recipe.data.channels, run.recipe.data.image_size)
    parity = max_parity_error(net, data, run.recipe.data.channels, run.recipe.data.image_size)
    if parity > PARITY_TOL:
        raise RuntimeError(f"ONNX Runtime output differs from torch by {parity:.2e} for the fine-tuned {subnet.to_key()}")
    if graph_signature(data) != graph_signature(inherited_data):
        raise RuntimeError(f"fine-tuning changed the graph of {subnet.to_key()}: its measured latency would not hold")
    cut = CutResult(export_dir.name, subnet.to_key(), old["architecture"]["params"], old["architecture"]["macs"],
                    None, staging, parity)
    record = {**record, "inherited_accuracy": before,
              "latency": "measured on the inherited weights: the fine-tune changed weights, not the graph "
                         "(same operators and initialiser shapes, checked)"}
    budget = old["budget"]
    manifest = export_pick(run, ds, subnet=subnet, cut=cut, net=net, export_dir=export_dir,
                           latency=old["latency"], budget_ms=budget["ms"], percentile=budget["percentile"],
                           device=budget["device"], finetune=record)
    staging.unlink(missing_ok=True)
    return manifest

