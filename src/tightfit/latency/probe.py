"""Probe bundles: one small ONNX model per distinct layer configuration (layers.py), plus a few
whole subnets that let the predictor calibrate the sum of isolated layers against real networks.
The bundle layout is the one ``tightfit.ondevice.runner`` reads.
"""
from __future__ import annotations

import shutil
import tempfile
import zipfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import torch
from torch import nn

from tightfit.errors import UserError
from tightfit.model.onnx import onnx_bytes
from tightfit.latency.layers import LayerConfig, calibration_subnets, layer_configs, overhead_configs
from tightfit.model.extract import extract_block, extract_classifier, extract_conv_bn, extract_subnet
from tightfit.model.space import space_hash
from tightfit.model.supernet import Supernet
from tightfit.ondevice.files import BUNDLE_FORMAT, atomic_write, write_bytes, write_json
from tightfit.recipe import Recipe, build_supernet, load_recipe
from tightfit.checkpoint import CHECKPOINT_NAME
from tightfit.rundir import load_trained

class _Head(nn.Module):
    """Head conv (if any) → global average pool → classifier, exactly as StaticNet ends."""

    def __init__(self, conv: nn.Module, classifier: nn.Module):
        super().__init__()
        self.conv, self.pool, self.classifier = conv, nn.AdaptiveAvgPool2d(1), classifier

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.classifier(self.pool(self.conv(x)).flatten(1))


class _Passthrough(nn.Module):
    """`copies` chained depthwise 1x1 convs (and the skip add, as a block probe has it).

    A probe pays, besides its layer, what a whole network pays once: the session call and,
    where the runtime changes the tensor layout around convs, a layout change in and out.
    The same cheapest conv once and twice isolates that: 2 * T(once) - T(twice).
    """

    def __init__(self, chs: int, copies: int, skip: bool):
        super().__init__()
        self.convs = nn.Sequential(*[nn.Conv2d(chs, chs, 1, groups=chs, bias=False) for _ in range(copies)])
        for conv in self.convs:
            nn.init.ones_(conv.weight)
        self.skip = skip

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + self.convs(x) if self.skip else self.convs(x)


def layer_module(supernet: Supernet, cfg: LayerConfig) -> nn.Module:
    """The static torch module for one layer configuration (eval mode, fp32, CPU)."""
    if cfg.role == "block":
        return extract_block(supernet.stages[cfg.stage][0 if cfg.first else 1], cfg.expansion, cfg.kernel,
                             cfg.in_channels, cfg.out_channels).eval()
    if cfg.role == "passthrough":
        return _Passthrough(cfg.in_channels, cfg.copies, cfg.skip).eval()
    if cfg.role == "stem":
        return extract_conv_bn(supernet.stem, cfg.in_channels, cfg.out_channels).eval()
    head = supernet.space.head_channels
    conv = extract_conv_bn(supernet.head, cfg.in_channels, head) if head else nn.Identity()
    return _Head(conv, extract_classifier(supernet, head or cfg.in_channels)).eval()


def class_count(recipe: Recipe) -> int:
    """Classes the recipe's data has, without loading it (only the classifier's width depends on it)."""
    if recipe.data.classes:
        return recipe.data.classes
    if recipe.data.source == "builtin":
        from tightfit.data.synthetic import CLASS_NAMES
        return len(CLASS_NAMES)
    if recipe.data.source == "fashion-mnist":
        from tightfit.data.fashion_mnist import CLASS_NAMES
        return len(CLASS_NAMES)
    root = Path(recipe.data.path).expanduser()
    count = sum(d.is_dir() for d in root.iterdir()) if root.is_dir() else 0
    if count < 2:
        raise UserError(f"data.path {recipe.data.path!r} holds no class folders; point it at the image folder")
    return count


def load_source(source: str | Path) -> tuple[Recipe, Supernet]:
    """A run directory (trained weights if it has a checkpoint) or a recipe file (fresh weights).

    Weights do not change latency, but the modules (BatchNorm included) must be the real
    ones, so that ONNX Runtime fuses each probe exactly as it fuses the whole network.
    """
    source = Path(source)
    if not source.exists():
        raise UserError(f"{source} not found: pass a run directory (or a recipe file)")
    if source.is_dir() and (source / CHECKPOINT_NAME).is_file():
        run = load_trained(source)
        return run.recipe, run.supernet
    if source.is_dir():
        if not (source / "recipe.toml").is_file():
            raise UserError(f"{source} has neither checkpoint.pt nor recipe.toml; pass a run directory or a recipe")
        source = source / "recipe.toml"
    recipe = load_recipe(source)
    torch.manual_seed(recipe.seed)
    return recipe, build_supernet(recipe, class_count(recipe)).eval()


@contextmanager
def single_thread() -> Iterator[None]:
    """Torch on one thread while tracing many tiny models: on a busy machine more threads
    only contend (measured 10x slower exports on 2 shared cores)."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(threads)


def _bundle_entries(recipe: Recipe, supernet: Supernet, n_subnets: int, seed: int):
    """(id, kind, torch module, input chs, input size, meta) for every entry, in bundle order."""
    chs, size = recipe.data.channels, recipe.data.image_size
    layers = layer_configs(recipe.space, chs, size)
    for cfg in layers + overhead_configs(layers):
        yield cfg.id, "layer", lambda c=cfg: layer_module(supernet, c), cfg.in_channels, cfg.resolution, cfg.meta()
    for name, s in calibration_subnets(recipe.space, n_subnets, seed):
        meta = {"role": "subnet", "key": s.to_key(), "name": name, "depths": list(s.depths),
                "shape": f"{chs}x{size}x{size} -> logits"}
        yield f"subnet-{name}", "subnet", lambda s=s: extract_subnet(supernet, s), chs, size, meta


def _replace_folder(tmp: Path, out: Path) -> None:
    """Move a finished bundle into place; an existing folder is replaced only if it is a bundle."""
    if out.exists():
        if not (out / "index.json").is_file() and any(out.iterdir()):
            raise UserError(f"{out} exists and is not a probe bundle; choose another --out")
        old = out.with_name(f".{out.name}.old")
        shutil.rmtree(old, ignore_errors=True)
        out.rename(old)
        tmp.rename(out)
        shutil.rmtree(old, ignore_errors=True)
    else:
        tmp.rename(out)


def _copy_device_code(folder: Path) -> None:
    """The torch-free on-device code (runner, verify) and ``__main__.py``, so the bundle runs alone."""
    package = Path(__file__).resolve().parents[1]  # src/tightfit
    for f in [package / "__init__.py", *sorted((package / "ondevice").glob("*.py"))]:
        write_bytes(folder / "tightfit" / f.relative_to(package), f.read_bytes())
    write_bytes(folder / "__main__.py", (package / "ondevice" / "bundle_main.py").read_bytes())


def _zip_folder(folder: Path, dest: Path) -> Path:
    """Zip the bundle: the data under one top-level folder (the runner accepts that layout), the code
    and ``__main__.py`` at the root, so that ``python probe.zip`` runs it."""
    code = {"__main__.py", "tightfit"}

    def write(tmp: str) -> None:
        with zipfile.ZipFile(tmp, "w", zipfile.ZIP_DEFLATED) as zf:
            for f in sorted(folder.rglob("*")):
                if f.is_file():
                    rel = f.relative_to(folder)
                    zf.write(f, rel if rel.parts[0] in code else Path(folder.name) / rel)
    return atomic_write(dest, write)


def write_bundle(source: str | Path, out: str | Path | None = None, n_subnets: int = 8, zip: bool = False,
                 seed: int = 0, progress: bool = True) -> Path:
    """Export every layer probe and n_subnets calibration subnets; returns the folder (or the .zip)."""
    from tightfit.progress import bar
    if n_subnets < 0:
        raise UserError(f"--subnets {n_subnets} must be >= 0 (2 or more lets the predictor calibrate)")
    recipe, supernet = load_source(source)
    if out is None:
        if not Path(source).is_dir():
            raise UserError("give --out when probing a recipe file (a run directory defaults to RUN_DIR/probe)")
        out = Path(source) / "probe"
    out = Path(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", dir=out.parent))
    except OSError as e:
        raise UserError(f"cannot write the probe bundle to {out} ({e.strerror}); choose another --out") from None
    try:
        entries = []
        todo = list(_bundle_entries(recipe, supernet, n_subnets, seed))
        with single_thread():
            for eid, kind, build, chs, size, meta in bar(todo, desc="probe export", unit="model",
                                                          disable=not progress):
                write_bytes(tmp / "onnx" / f"{eid}.onnx", onnx_bytes(build(), chs, size))
                entries.append({"id": eid, "kind": kind, "file": f"onnx/{eid}.onnx", "meta": meta})
        write_json(tmp / "index.json", {
            "format": BUNDLE_FORMAT, "version": 1,
            "space_hash": space_hash(recipe.space, recipe.data.channels, recipe.data.image_size),
            "recipe": {"name": recipe.name, "hash": recipe.hash()},
            "input": {"channels": recipe.data.channels, "image_size": recipe.data.image_size},
            "entries": entries})
        _copy_device_code(tmp)
        _replace_folder(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if zip:
        return _zip_folder(out, out.with_name(out.name + ".zip"))
    return out
