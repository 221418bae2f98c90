"""Fine-tune a pick from its inherited weights, before it is exported.

The fine-tune (tightfit.train.finetune) changes weights, not the graph, so the latency the pick
was measured at still describes the new file; this is checked (same operators, same initialiser
shapes) rather than assumed. The pick keeps the inherited accuracy beside the new one and what
the fine-tune cost (export/pick.py writes both). The same subnet fine-tuned with the same settings is
computed once per run (RUN/search/finetuned/): two devices that pick one subnet pay for one fine-tune.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import replace
from pathlib import Path
from typing import Any, Callable, Optional

import onnx
import torch

from tightfit.data.dataset import Dataset, calibration_batches
from tightfit.export.cut import PARITY_TOL, CutResult
from tightfit.export.manifest import state_dict_bytes
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


def finetuned_cut(run: TrainedRun, run_dir: Path, ds: Dataset, subnet: Subnet, inherited: CutResult,
                  settings: FinetuneSettings, on_step: Optional[Callable[[int], None]] = None,
                  ) -> tuple[CutResult, torch.nn.Module, dict[str, Any]]:
    """The fine-tuned cut of a pick (its ONNX file beside the inherited one), its network and the
    fine-tune's record; the graph is checked unchanged, so the pick's measured latency still holds."""
    net, record = finetuned_net(run, run_dir, ds, subnet, settings, on_step)
    path = Path(inherited.onnx_path).parent / "finetuned.onnx"
    data = export_onnx(net, path, run.recipe.data.channels, run.recipe.data.image_size)
    parity = max_parity_error(net, data, run.recipe.data.channels, run.recipe.data.image_size)
    if parity > PARITY_TOL:
        raise RuntimeError(f"ONNX Runtime output differs from torch by {parity:.2e} for the fine-tuned {subnet.to_key()}")
    if graph_signature(data) != graph_signature(Path(inherited.onnx_path).read_bytes()):
        raise RuntimeError(f"fine-tuning changed the graph of {subnet.to_key()}: its measured latency would not hold")
    cut = replace(inherited, onnx_path=path, parity=parity, val_acc=None)
    return cut, net, {**record, "latency": "measured on the inherited weights: the fine-tune changed weights, not "
                                           "the graph (same operators and initialiser shapes, checked)"}
