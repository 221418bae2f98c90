"""Small builders shared by the tests: tiny recipes (as dicts and as TOML text) and perturbed supernets."""
from __future__ import annotations

import json
import random

import torch

from tightfit.model.space import SpaceSpec, StageSpec, Subnet
from tightfit.recipe import parse_recipe

TINY = {
    "name": "tiny", "seed": 0,
    "data": {"source": "builtin", "image_size": 16, "channels": 3, "samples": 600},
    "space": {"stem_channels": 8, "stem_stride": 1, "head_channels": 0, "stage": [
        {"channels": 8, "stride": 1, "depths": [1], "expansions": [1], "kernels": [3]},
        {"channels": 12, "stride": 2, "depths": [1, 2], "expansions": [2, 4], "kernels": [3, 5]},
        {"channels": 16, "stride": 2, "depths": [1, 2, 3], "expansions": [2, 3, 6], "kernels": [3, 5, 7],
         "activation": "hswish", "squeeze_excite": True},
    ]},
    "train": {"epochs": 1, "batch_size": 32, "lr": 0.05, "warmup_epochs": 0.1, "random_subnets": 1},
}


# The same stages with elastic width: stem and every stage choose their output channels.
TINY_WIDE = {**TINY, "name": "tiny-wide", "space": {**TINY["space"], "stem_channels": [4, 8], "stage": [
    {**TINY["space"]["stage"][0], "channels": [4, 8]},
    {**TINY["space"]["stage"][1], "channels": [8, 12]},
    {**TINY["space"]["stage"][2], "channels": [8, 12, 16]},
]}}


def tiny_recipe(wide: bool = False, **train_overrides):
    base = TINY_WIDE if wide else TINY
    doc = {**base, "train": {**base["train"], **train_overrides}}
    return parse_recipe(doc)


@torch.no_grad()
def perturb(model: torch.nn.Module, seed: int = 0) -> None:
    """Random weights and BatchNorm statistics, so parity checks are not trivially met by a fresh init."""
    gen = torch.Generator().manual_seed(seed)
    for name, t in list(model.named_parameters()) + list(model.named_buffers()):
        if not t.is_floating_point():
            continue
        if name.endswith("running_var"):
            t.copy_(torch.rand(t.shape, generator=gen) + 0.5)
        elif "transforms" in name:
            t.add_(0.1 * torch.randn(t.shape, generator=gen))
        else:
            t.copy_(0.3 * torch.randn(t.shape, generator=gen))


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(map(toml_value, v)) + "]"
    return json.dumps(v) if isinstance(v, str) else repr(v)


def recipe_toml(doc: dict) -> str:
    """TOML text of a recipe dict: scalars, [tables] and [[table.key]] arrays of tables."""
    def is_array_of_tables(v) -> bool:
        return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)
    lines = [f"{k} = {toml_value(v)}" for k, v in doc.items() if not isinstance(v, dict)]
    for section, table in ((k, v) for k, v in doc.items() if isinstance(v, dict)):
        lines.append(f"[{section}]")
        lines += [f"{k} = {toml_value(v)}" for k, v in table.items() if not is_array_of_tables(v)]
        for key, items in ((k, v) for k, v in table.items() if is_array_of_tables(v)):
            for item in items:
                lines += [f"[[{section}.{key}]]"] + [f"{k} = {toml_value(v)}" for k, v in item.items()]
    return "\n".join(lines) + "\n"


def torch_shadowed_env(tmp_path, src: str):
    """Environment in which `import torch` fails (a fake package first on PYTHONPATH) and leaves a
    marker file, so a test can prove the on-device path never tries; returns (env, marker).
    Checks that the fake really shadows torch before handing it out."""
    import os
    import subprocess
    import sys
    fake = tmp_path / "fake"
    (fake / "torch").mkdir(parents=True)
    marker = tmp_path / "torch-was-imported"
    (fake / "torch" / "__init__.py").write_text(
        "import os, pathlib\n"
        "pathlib.Path(os.environ['TORCH_MARKER']).write_text('imported')\n"
        "raise ImportError('torch is not available on this device')\n")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(fake), src]), TORCH_MARKER=str(marker))
    probe = subprocess.run([sys.executable, "-c", "import torch"], env=env, capture_output=True)
    assert probe.returncode != 0 and marker.exists()
    marker.unlink()
    return env, marker


# ----------------------------------------------------------------------------- search on synthetic functions

def wide_space() -> SpaceSpec:
    """Five stages, depths 1-4, three expansions, three kernels: about 10^15 subnets."""
    stages = tuple(StageSpec(out_channels=16 * (i + 1), stride=2 if i % 2 == 0 else 1, depths=(1, 2, 3, 4),
                             expansions=(3, 4, 6), kernels=(3, 5, 7)) for i in range(5))
    return SpaceSpec(stem_channels=16, stem_stride=1, stages=stages)


class FakePredictor:
    """Latency of a subnet: a sum of per-block costs growing with expansion and kernel area (the
    shape of a depthwise-separable block's multiply-adds, Howard et al. 2017, Sec. 3.1)."""

    def __init__(self, space: SpaceSpec):
        self.space, self.calls = space, 0

    def predict_ms(self, subnet: Subnet) -> float:
        self.calls += 1
        total = 0.02
        for i, blocks in enumerate(subnet.stages):
            for e, k in blocks:
                total += 0.004 * (1 + 0.5 * i) * e * (1 + k * k / 25)
        return total


def synthetic_fitness(seed: int):
    """A known but rugged function of the architecture: each (stage, block, choice) has its own
    random value, and deeper stages pay off only with matching kernels. Not monotone in latency,
    so a search must find the right combination, not just the biggest subnet that fits."""
    rng = random.Random(seed)
    table = {(i, j, e, k): rng.gauss(0, 1) for i in range(5) for j in range(4) for e in (3, 4, 6) for k in (3, 5, 7)}

    def fitness(subnet: Subnet) -> float:
        score = 0.0
        for i, blocks in enumerate(subnet.stages):
            for j, (e, k) in enumerate(blocks):
                score += table[(i, j, e, k)] + (0.5 if k == blocks[0][1] else -0.3)
        return score
    return fitness


BUDGET = 1.25  # about the 15th percentile of this space's predicted latency


def dominated(p, others) -> bool:
    """Pareto dominance (Deb et al. 2002, Sec. II): no worse in both objectives, better in one."""
    return any(q[1] >= p[1] and q[2] <= p[2] and (q[1] > p[1] or q[2] < p[2]) for q in others)


def steady(figure_ms: float, guard=None, percentile: float = 90.0):
    """A latency Measurement of steady runs (every statistic ``figure_ms``), for rules that read only the
    figure and the guard (the choice, the budget boundary)."""
    from tightfit.ondevice.measurement import Measurement
    f = figure_ms
    return Measurement(f, percentile, f, f, f, f, f, f, 0.0, 0.0, 100, guard=guard, stable=True)


def fake_pick(export_dir, *, budget_ms: float = 1.0, measurement=None, onnx_path=None, **changes):
    """A search pick record whose files and weights are stand-ins: for the rules that read only its
    figures (the confirmation, the corrected search); nothing here can be written."""
    from pathlib import Path
    from types import SimpleNamespace
    from tightfit.export.pick import Pick
    from tightfit.ondevice.accuracy import Accuracy
    from tightfit.ondevice.timing import Protocol
    export_dir = Path(export_dir)
    fields = dict(device="host", budget_ms=budget_ms, percentile=90.0, subnet=SimpleNamespace(to_key=lambda: "1:3"),
                  predicted_ms=0.9, score=90.0, validation=Accuracy(90, 100, "validation"),
                  test=Accuracy(88, 100, "test"), measurement=measurement, hardware={}, protocol=Protocol(),
                  guard=None, fits=True, note="", cut=SimpleNamespace(onnx_path=onnx_path or export_dir / "model.onnx"),
                  net=None, export_dir=export_dir)
    return Pick(**{**fields, **changes})
