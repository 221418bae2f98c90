"""The last step of a search: verify the top candidates by measurement, export the pick.

Each pick's folder holds model.onnx, state_dict.pt and manifest.json.

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
import shutil
import time
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Optional

import torch
from torch import nn

from tightfit.atomic import write_bytes, write_json
from tightfit.elastic import squeeze_chs
from tightfit.search import budget_label, safe_name
from tightfit.search_evolution import CachedAccuracy, CachedLatency, Candidate, pareto_front
from tightfit.space import SpaceSpec, Subnet
from tightfit.supernet import hidden_chs

MANIFEST_FORMAT = "tightfit-export-manifest"
MANIFEST_VERSION = 1
LATENCY_KEYS = ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "cv", "iqr_over_median", "repeat_spread", "stable", "note")


@dataclass(frozen=True)
class Accuracy:
    top1: float
    images: int
    split: str                     # "validation" or "test"

    def to_dict(self) -> dict[str, Any]:
        return {"top1": round(self.top1, 4), "images": self.images, "split": self.split}


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _out(size: int, stride: int) -> int:
    return (size - 1) // stride + 1  # odd kernel k, padding k // 2


def describe_architecture(space: SpaceSpec, subnet: Subnet, in_chs: int, image_size: int,
                          num_classes: int) -> list[dict[str, Any]]:
    """One dict per layer group in forward order, with its parameters and multiply-adds at batch 1
    (convolutions and the classifier, as torch's FlopCounterMode counts them), enough to
    rebuild the network by hand and to size candidates without building them."""
    size = _out(image_size, space.stem_stride)
    out: list[dict[str, Any]] = [{"type": "stem", "in_chs": in_chs, "out_chs": space.stem_chs, "kernel": 3,
                                  "stride": space.stem_stride, "act": space.stem_act, "out_size": size,
                                  "params": 9 * in_chs * space.stem_chs + 2 * space.stem_chs,
                                  "macs": 9 * in_chs * space.stem_chs * size * size}]
    for i, (st, blocks) in enumerate(zip(space.stages, subnet.stages)):
        chs = space.stage_in_chs(i)
        for j, (e, k) in enumerate(blocks):
            stride = st.stride if j == 0 else 1
            mid, res = hidden_chs(chs, e), _out(size, stride)
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


def software_versions() -> dict[str, str]:
    import numpy
    import onnx
    import onnxruntime

    from tightfit import __version__
    return {"tightfit": __version__, "torch": torch.__version__, "onnx": onnx.__version__,
            "onnxruntime": onnxruntime.__version__, "numpy": numpy.__version__,
            "python": platform.python_version()}


def latency_section(summary: Optional[dict[str, Any]], device: dict[str, Any], protocol: dict[str, Any],
                    predicted_ms: float, note: str = "") -> dict[str, Any]:
    """Measured figures (median over repeats) with how and where; None figures when not measured."""
    out: dict[str, Any] = {"device": device, "protocol": protocol}
    for k in LATENCY_KEYS:
        out[k] = summary.get(k) if summary else None
    if summary is None:
        out["stable"] = False
        out["note"] = note or "not measured"
    elif note:
        out["note"] = f"{out['note']}; {note}" if out.get("note") not in (None, "", "ok") else note
    out["predicted_ms"] = round(predicted_ms, 4)
    out["measured"] = summary is not None
    return out


def build_manifest(*, space: SpaceSpec, subnet: Subnet, params: int, macs: int, onnx_data: bytes,
                   channels: int, image_size: int, class_names: tuple[str, ...], mean: tuple[float, ...],
                   std: tuple[float, ...], validation: Accuracy, test: Accuracy, latency: dict[str, Any],
                   budget_ms: float, percentile: float, device_name: str, recipe_name: str,
                   recipe_hash: str) -> dict[str, Any]:
    """The manifest dict (see the project contract for the fields)."""
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
        "accuracy": {"validation": validation.to_dict(), "test": test.to_dict()},
        "latency": latency,
        "budget": {"ms": float(budget_ms), "percentile": float(percentile), "device": device_name},
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


def shipped_accuracy(onnx_data: bytes, ds: Any, split: str, batch_size: int = 512) -> Accuracy:
    """Top-1 of the exported file itself (ONNX Runtime) on a whole split: what the manifest
    claims is what the deployer gets; 2-3x faster than the same pass in eager torch."""
    import torch
    from tightfit.data.dataset import eval_batches
    from tightfit.export import ort_session, ort_top1
    x, y = getattr(ds, f"{split}_x"), getattr(ds, f"{split}_y")
    top1, n = ort_top1(ort_session(onnx_data, torch.get_num_threads()), eval_batches(x, y, ds, batch_size))
    return Accuracy(top1, n, "validation" if split == "val" else split)


def export_pick(run: Any, ds: Any, *, subnet: Subnet, cut: Any, net: nn.Module, export_dir: str | Path,
                latency: dict[str, Any], budget_ms: float, percentile: float, device_name: str) -> dict[str, Any]:
    """Score the exported file on the whole validation and test splits (for the manifest only:
    nothing is chosen on them here), then write the export folder.
    ``cut`` is the CutResult of tightfit.cut.cut_one (its ONNX file)."""
    cfg = run.recipe
    data = Path(cut.onnx_path).read_bytes()
    manifest = build_manifest(
        space=cfg.space, subnet=subnet, params=cut.params, macs=cut.macs, onnx_data=data,
        channels=cfg.data.channels, image_size=cfg.data.image_size, class_names=run.class_names,
        mean=run.mean, std=run.std, validation=shipped_accuracy(data, ds, "val"),
        test=shipped_accuracy(data, ds, "test"), latency=latency, budget_ms=budget_ms,
        percentile=percentile, device_name=device_name, recipe_name=cfg.name, recipe_hash=cfg.hash())
    write_export(export_dir, data, net, manifest)
    return manifest


# ----------------------------------------------------------------------------- verify, pick, export

UNVERIFIED = "unverified: measure on the device with tightfit verify"


def same_host(table_device: dict[str, Any]) -> bool:
    """Direct measurement only means something on the machine the table describes."""
    from tightfit.ondevice.device import describe_device
    here = describe_device()
    return all(table_device.get(k) == here.get(k) for k in ("cpu_model", "logical_cores", "hostname"))


def verification_protocol(table_protocol: dict[str, Any]) -> Any:
    """The table's protocol, with at least 2 fresh-process repeats and the full per-model timing."""
    from tightfit.ondevice.protocol import Protocol
    p, full = Protocol.from_dict(table_protocol), Protocol()
    return replace(p, repeats=max(2, p.repeats), min_seconds=max(p.min_seconds, full.min_seconds),
                   min_runs=max(p.min_runs, full.min_runs))


@dataclass
class Tried:
    cand: Candidate
    cut: Any                      # tightfit.cut.CutResult
    net: Any                      # the static network
    measured: Optional[dict[str, Any]] = None


@dataclass
class Choice:
    pick: Tried
    fits: bool
    note: str
    tried: list[Tried]

    def ratio(self) -> Optional[float]:
        return measured_ratio(self.tried)


def measured_ratio(tried: list[Tried]) -> Optional[float]:
    """Median measured/predicted over every candidate measured: how far off the predictor is now."""
    import numpy as np
    r = [t.measured["budget_stat_ms"] / t.cand.latency_ms for t in tried if t.measured and t.cand.latency_ms > 0]
    return float(np.median(r)) if r else None


def _cut_all(run: Any, ds: Any, cands: list[Candidate], staging: Path, start: int) -> list[Tried]:
    from tightfit.cut import cut_one
    return [Tried(c, *cut_one(run, ds, f"candidate{start + i}", c.subnet, staging, validate=False))
            for i, c in enumerate(cands)]


def measure_and_choose(run: Any, ds: Any, ranked: list[Candidate], budget_ms: float, protocol: Any,
                       staging: Path, top: int, fallback: Callable[[], Candidate],
                       say: Callable[[str], None], rounds: int = 3, guard: float = 0.0,
                       clock: Optional[dict[str, float]] = None) -> Choice:
    """Measure the first ``top`` candidates (front first) interleaved; the most accurate whose measured
    percentile fits within budget x (1 - guard) wins: a later session on the same machine can measure
    the tail a few percent slower, and QA re-measures. If none does, rescale predictions by
    measured/predicted and try the most accurate of those that should then fit (the smallest subnet
    last); if still none, the most accurate that fits the budget itself."""
    from tightfit.ondevice.protocol import measure_repeated
    tried: list[Tried] = []
    ratio: Optional[float] = None
    clock = {} if clock is None else clock
    target = budget_ms * (1.0 - guard)
    for attempt in range(rounds):
        done = {t.cand.key for t in tried}
        pool = [c for c in ranked if c.key not in done and (ratio is None or c.latency_ms * ratio <= target)]
        if not pool:
            last = fallback()
            pool = [] if last.key in done else [last]
        t0 = time.perf_counter()
        batch = _cut_all(run, ds, pool[:top], staging, len(tried))
        t1 = time.perf_counter()
        clock["cut"] = clock.get("cut", 0.0) + t1 - t0
        if not batch:
            break
        figures = measure_repeated([str(t.cut.onnx_path) for t in batch], protocol)
        clock["measure"] = clock.get("measure", 0.0) + time.perf_counter() - t1
        for t in batch:
            t.measured = figures[str(t.cut.onnx_path)]
        tried += batch
        fitting = [t for t in tried if t.measured["budget_stat_ms"] <= target]
        if fitting:
            note = "" if attempt == 0 else "the most accurate candidates measured over budget: fell back to faster ones"
            return Choice(_most_accurate(fitting), True, note, tried)
        ratio = measured_ratio(tried)
        say(f"  none of {len(tried)} measured candidates fits {target:.4g} ms (the budget less its {100 * guard:g} % "
            f"guard; measured = {ratio:.2f} x predicted): trying faster ones")
    within = [t for t in tried if t.measured["budget_stat_ms"] <= budget_ms]
    if within:
        return Choice(_most_accurate(within), True,
                      f"no candidate left the {100 * guard:g} % guard margin; this one fits the budget", tried)
    return Choice(min(tried, key=lambda t: t.measured["budget_stat_ms"]), False,
                  "no candidate measured within the budget: this is the fastest one tried", tried)


def _most_accurate(tried: list[Tried]) -> Tried:
    return max(tried, key=lambda t: (t.cand.fitness, -t.measured["budget_stat_ms"]))


def front_first(ranked: list[Candidate]) -> list[Candidate]:
    """Pareto-front candidates first, most accurate first: each is faster than the one before,
    so the measured set spans latencies even when the most accurate few are alike."""
    front = {k for k, _, _ in pareto_front([(c.key, c.fitness, c.latency_ms) for c in ranked])}
    return [c for c in ranked if c.key in front] + [c for c in ranked if c.key not in front]


def choose_and_export(run: Any, ds: Any, table: Any, ranked: list[Candidate], budget_ms: float, top: int,
                      run_dir: Path, fitness: CachedAccuracy, latency: CachedLatency,
                      say: Callable[[str], None], verifiable: bool, guard: float = 0.0) -> dict[str, Any]:
    """Verify (when the table is for this host), export the pick, and return its picks.json row."""
    from tightfit.ondevice.device import describe_device
    label = f"{safe_name(table.name)}-{budget_label(budget_ms)}"
    staging = run_dir / "search" / "staging" / label
    shutil.rmtree(staging, ignore_errors=True)
    protocol = verification_protocol(table.protocol)
    smallest = run.recipe.space.smallest()

    def fallback() -> Candidate:
        return Candidate(smallest.to_key(), smallest, fitness(smallest), latency(smallest), -1)

    clock: dict[str, float] = {}
    if verifiable:
        say(f"  measuring the top {min(top, len(ranked))} candidates directly ({protocol.repeats} repeats)")
        choice = measure_and_choose(run, ds, front_first(ranked), budget_ms, protocol, staging, top,
                                    fallback, say, guard=guard, clock=clock)
        pick, fits, note, ratio, device = choice.pick, choice.fits, choice.note, choice.ratio(), describe_device()
    else:
        within = [c for c in ranked if c.latency_ms <= budget_ms] or [fallback()]
        pick, fits, note, ratio = _cut_all(run, ds, within[:1], staging, 0)[0], True, UNVERIFIED, None
        device = table.device
    export_dir = run_dir / "exports" / label
    t0 = time.perf_counter()
    manifest = export_pick(run, ds, subnet=pick.cand.subnet, cut=pick.cut, net=pick.net, export_dir=export_dir,
                           latency=latency_section(pick.measured, device, protocol.to_dict(), pick.cand.latency_ms, note),
                           budget_ms=budget_ms, percentile=protocol.percentile, device_name=table.name)
    clock["score and export the pick"] = time.perf_counter() - t0
    say("  after the search: " + ", ".join(f"{k} {v:.1f} s" for k, v in clock.items()))
    shutil.rmtree(staging, ignore_errors=True)
    try:
        staging.parent.rmdir()  # the staging folder goes once no budget uses it
    except OSError:
        pass
    if note:
        say(f"  {note}")
    return {"device": table.name, "budget_ms": budget_ms, "percentile": protocol.percentile, "key": pick.cand.key,
            "val_acc": pick.cand.fitness, "predicted_ms": round(pick.cand.latency_ms, 5), "measured": pick.measured,
            "export_dir": str(export_dir), "fits": fits, "verified": pick.measured is not None, "note": note,
            "measured_over_predicted": None if ratio is None else round(ratio, 4),
            "test_acc": manifest["accuracy"]["test"]["top1"]}
