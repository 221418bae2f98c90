"""Fitness for the search on a trained run: BN recalibration, then validation accuracy.

Recalibration is the hot path of a search (every candidate re-estimates its BatchNorm
statistics), so Recalibrator reuses what subnets share; RunAccuracy times each phase so
the search can say where its time went.
"""
from __future__ import annotations

import hashlib
import time
from pathlib import Path
from typing import Any, Optional

import torch
from torch import nn

from tightfit.data.dataset import Dataset, calibration_batches, eval_batches
from tightfit.errors import UserError
from tightfit.model.onnx import onnx_bytes, ort_session, ort_top1
from tightfit.model.arithmetic import architecture_size
from tightfit.model.extract import extract_subnet
from tightfit.model.recalibrate import accuracy, batch_norms, preserved_bn_stats, recalibrate_bn
from tightfit.model.space import SpaceSpec, Subnet
from tightfit.model.supernet import Supernet
from tightfit.search.cache import CachedLatency
from tightfit.rundir import TrainedRun, checkpoint_path


def fixed_stages(space: SpaceSpec) -> int:
    """Leading stages with a single depth, expansion and kernel: subnets share them up to width."""
    n = 0
    while n < len(space.stages) and all(len(v) == 1 for v in (space.stages[n].depths, space.stages[n].expansions,
                                                                space.stages[n].kernels)):
        n += 1
    return n


def _cumulative(bns: list[nn.BatchNorm2d]) -> list[Optional[float]]:
    """Reset running statistics to a cumulative average (momentum None); returns the old momenta."""
    saved = [bn.momentum for bn in bns]
    for bn in bns:
        bn.reset_running_stats()
        bn.momentum = None
    return saved


def _bn_state(bns: list[nn.BatchNorm2d]) -> list[tuple]:
    return [(bn, bn.running_mean.clone(), bn.running_var.clone(), bn.num_batches_tracked.clone()) for bn in bns]


Cached = Optional[tuple[list[torch.Tensor], list[tuple]]]  # (outputs per calibration batch, BN statistics)


class Recalibrator:
    """BN recalibration (tightfit.recalibrate.recalibrate_bn) that reuses what subnets share.

    In training mode a layer's output and batch statistics depend only on the layers before
    it, so the outputs of the stem and fixed stages are computed once per choice of their
    widths, and the outputs of the first variable block once per (its input, its expansion,
    kernel and width); only the rest is re-run. Cached outputs are capped at ``room_bytes``
    (big images): beyond it, plain recalibration."""

    def __init__(self, supernet: Supernet, calib: list[torch.Tensor], room_bytes: int = 1 << 30):
        self.sn, self.calib, self.n, self.room_bytes = supernet, calib, fixed_stages(supernet.space), room_bytes
        self.prefix = torch.nn.Sequential(supernet.stem, *[b for blocks in supernet.stages[:self.n] for b in blocks])
        self.prefixes: dict[tuple, Cached] = {}
        self.variants: dict[tuple, Cached] = {}
        self.first = supernet.stages[self.n][0] if self.n < len(supernet.stages) else None
        prefix_ids = {id(bn) for bn in batch_norms(self.prefix)}
        self.rest = [bn for bn in batch_norms(supernet) if id(bn) not in prefix_ids]
        self.first_ids = {id(bn) for bn in batch_norms(self.first)} if self.first is not None else set()

    def _take(self, sample: torch.Tensor) -> bool:
        """Reserve room for len(calib) tensors shaped like ``sample``, if the cap allows."""
        size = sample.element_size() * sample.numel() * len(self.calib)
        if size > self.room_bytes:
            return False
        self.room_bytes -= size
        return True

    def _run(self, module: nn.Module, inputs: list[torch.Tensor]) -> tuple[list[torch.Tensor], list[tuple]]:
        """Outputs of ``module`` in training mode and its exact BN statistics over ``inputs``; BN left as it was."""
        bns = batch_norms(module)
        was_training = self.sn.training
        with preserved_bn_stats(module), torch.no_grad():
            saved = _cumulative(bns)
            module.train()
            outs = [module(h) for h in inputs]
            for bn, m in zip(bns, saved):
                bn.momentum = m
            stats = _bn_state(bns)
        self.sn.train(was_training)
        return outs, stats

    def _prefix_key(self) -> tuple:
        return (self.sn.stem.width,) + tuple(blocks[0].width for blocks in self.sn.stages[:self.n])

    def _shared(self) -> Cached:
        """Outputs and statistics of the stem and fixed stages at their current widths (cached)."""
        key = self._prefix_key()
        if key not in self.prefixes:
            outs, stats = self._run(self.prefix, self.calib)
            self.prefixes[key] = (outs, stats) if self._take(outs[0]) else None
        return self.prefixes[key]

    def _first_block(self, inputs: list[torch.Tensor]) -> Cached:
        """Outputs and statistics of the first variable block for its current choice (cached)."""
        key = self._prefix_key() + (self.first.expansion, self.first.kernel, self.first.width)
        if key not in self.variants:
            outs, stats = self._run(self.first, inputs)
            self.variants[key] = (outs, stats) if self._take(outs[0]) else None
        return self.variants[key]

    def __call__(self) -> None:
        """Recalibrate the active subnet's BatchNorm statistics (call inside preserved_bn_stats)."""
        shared = self._shared()
        if shared is None:
            return recalibrate_bn(self.sn, self.calib)
        inputs, prefix_stats = shared
        cached = self._first_block(inputs) if self.first is not None else None
        hs, keep = (cached[0], prefix_stats + cached[1]) if cached else (inputs, prefix_stats)
        rest = [bn for bn in self.rest if not (cached and id(bn) in self.first_ids)]
        saved = _cumulative(rest)
        was_training = self.sn.training
        self.sn.train()
        with torch.no_grad():
            for h in hs:
                for i, (blocks, depth) in enumerate(zip(self.sn.stages[self.n:], self.sn.depths[self.n:])):
                    for block in blocks[1 if cached and i == 0 else 0:depth]:
                        h = block(h)
                self.sn.head(h)
        self.sn.train(was_training)
        for bn, m in zip(rest, saved):
            bn.momentum = m
        for bn, mean, var, count in keep:
            bn.running_mean.copy_(mean)
            bn.running_var.copy_(var)
            bn.num_batches_tracked.copy_(count)


class RunAccuracy:
    """``compute`` for CachedAccuracy on a trained run: recalibrate BN on training batches, then
    top-1 on the (optionally capped) validation split; time spent per phase is kept.

    With backend "onnxruntime" the recalibrated subnet is extracted and exported (tightfit.model.onnx)
    and the validation pass runs in ONNX Runtime, which fuses conv + BatchNorm + activation:
    3-4x faster than eager torch here, same predictions (export parity <= 1e-4 is checked
    for every pick by tightfit.export.cut). Backend "torch" is tightfit.recalibrate.subnet_accuracy."""

    def __init__(self, run: TrainedRun, ds: Dataset, val_images: int = 0, backend: str = "onnxruntime", skip: int = 0,
                 recalibrator: Optional[Recalibrator] = None):
        if backend not in ("onnxruntime", "torch"):
            raise UserError(f"evaluation backend {backend!r} is unknown: use 'onnxruntime' or 'torch'")
        cfg = run.recipe
        self.run, self.backend = run, backend
        self.calib = calibration_batches(ds, cfg.train.batch_size, cfg.train.recalibration_batches, cfg.seed)
        self.skip = skip
        rest = len(ds.val_y) - skip
        self.images = rest if val_images <= 0 else min(val_images, rest)
        # The validation split is a random carve, so any run of N images in it is a uniform subsample;
        # ``skip`` gives images the search did not see, to re-score its picks without selection bias.
        part = slice(skip, skip + self.images)
        self.val = list(eval_batches(ds.val_x[part], ds.val_y[part], ds, max(cfg.train.eval_batch_size, 512)))
        self.recal_s = self.export_s = self.val_s = 0.0
        self.recalibrate = recalibrator or Recalibrator(run.supernet, self.calib)  # shared: its caches are per weights

    def tag(self, run_dir: Path) -> dict[str, Any]:
        """What the cached figures depend on: recipe, the exact weights, recalibration and images."""
        weights = hashlib.sha256(checkpoint_path(run_dir).read_bytes()).hexdigest()[:16]
        return {"recipe_hash": self.run.recipe.hash(), "weights": weights,
                "recalibration_batches": len(self.calib), "images": self.images,
                **({"skip": self.skip} if self.skip else {})}

    def phases(self, latency: CachedLatency) -> dict[str, float]:
        return {"BN recalibration": self.recal_s, "export": self.export_s, "validation": self.val_s,
                "latency prediction": latency.seconds}

    def _ort_accuracy(self, net: nn.Module) -> float:
        data = self.run.recipe.data
        t0 = time.perf_counter()
        session = ort_session(onnx_bytes(net, data.channels, data.image_size), torch.get_num_threads())
        t1 = time.perf_counter()
        acc, _ = ort_top1(session, self.val)
        self.export_s += t1 - t0
        self.val_s += time.perf_counter() - t1
        return acc

    def __call__(self, subnet: Subnet) -> dict[str, Any]:
        sn, data = self.run.supernet, self.run.recipe.data
        sn.set_subnet(subnet)
        t0 = time.perf_counter()
        with preserved_bn_stats(sn):
            self.recalibrate()
            self.recal_s += time.perf_counter() - t0
            if self.backend == "torch":
                t1 = time.perf_counter()
                acc = accuracy(sn, self.val)
                self.val_s += time.perf_counter() - t1
            else:
                net = extract_subnet(sn, subnet)
        if self.backend != "torch":
            acc = self._ort_accuracy(net)
        params, macs = architecture_size(self.run.recipe.space, subnet, data.channels, data.image_size,
                                         len(self.run.class_names))
        return {"val_acc": round(acc, 4), "params": params, "macs": macs}


class WholeSplit:
    """``compute`` for the whole validation split from a capped part already scored (``part``, cached) and
    the images after it (``rest``, a RunAccuracy with ``skip`` = the part's images): accuracy is a count
    over images, so the two counts add up to the whole split's exactly, and re-scoring a candidate costs
    the rest of the split, not all of it. Both share one Recalibrator, so the statistics are the same."""

    def __init__(self, part: Any, part_images: int, rest: RunAccuracy):
        self.part, self.part_images, self.rest = part, part_images, rest
        self.images = part_images + rest.images

    def tag(self, run_dir: Path) -> dict[str, Any]:
        """The tag a whole-split RunAccuracy writes, so figures cached either way serve each other."""
        return {k: v for k, v in self.rest.tag(run_dir).items() if k != "skip"} | {"images": self.images}

    def __call__(self, subnet: Subnet) -> dict[str, Any]:
        first, rest = self.part.record(subnet), self.rest(subnet)
        hits = _count(first["val_acc"], self.part_images) + _count(rest["val_acc"], self.rest.images)
        return {**rest, "val_acc": round(100.0 * hits / max(self.images, 1), 4)}


def _count(percent: float, images: int) -> int:
    """Images right, back from a top-1 % kept to 4 decimals (exact below a million images)."""
    return int(round(percent * images / 100.0))
