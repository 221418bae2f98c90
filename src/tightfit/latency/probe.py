"""Probe bundles: one small ONNX model per distinct layer configuration, plus a few whole subnets.

A block's input resolution and input channels depend only on its stage and on whether
it is the stage's first block, so the distinct blocks are, per stage, the first-block
(expansion, kernel) choices and, when the stage can be deeper than one, the later-block
choices. Stem and head (head conv + pool + classifier) are one entry each. The whole
subnets let the predictor calibrate the sum of isolated layers against real networks.
The bundle layout is the one ``tightfit.ondevice.runner`` reads.
"""
from __future__ import annotations

import random
import shutil
import tempfile
import zipfile
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Iterator

import torch
from torch import nn

from tightfit.atomic import write_bytes, write_json
from tightfit.errors import UserError
from tightfit.export import onnx_bytes
from tightfit.extract import _block, extract_subnet
from tightfit.recipe import Recipe
from tightfit.space import SpaceSpec, Subnet, space_hash
from tightfit.supernet import Supernet, hidden_chs

BUNDLE_FORMAT = "tightfit-probe-bundle"
OVERHEAD_ID = "overhead"


@dataclass(frozen=True)
class LayerConfig:
    """One distinct layer the space can produce, with the shapes it runs at."""
    id: str
    role: str                  # "stem" | "block" | "head" | "overhead"
    in_chs: int
    out_chs: int
    resolution: int            # input height = width
    stage: int = -1
    first: bool = False
    exp_ratio: float = 0
    kernel: int = 0
    hidden_chs: int = 0
    stride: int = 1
    act: str = ""
    se: bool = False
    skip: bool = False
    copies: int = 0            # overhead probes: chained passthrough convs

    def shape(self) -> str:
        """Readable one-liner, e.g. '24x16x16 -> e4 (96) k5 s2 hswish +SE -> 40x8x8'."""
        out_res = conv_out(self.resolution, self.stride)
        io = (f"{self.in_chs}x{self.resolution}x{self.resolution}", f"{self.out_chs}x{out_res}x{out_res}")
        if self.role == "overhead":
            return f"passthrough x{self.copies}{' +skip' if self.skip else ''}: {io[0]} -> {io[0]}"
        if self.role != "block":
            return f"{self.role}: {io[0]} -> {io[1] if self.role == 'stem' else 'logits'}"
        extras = " +SE" if self.se else ""
        extras += " +skip" if self.skip else ""
        return (f"{io[0]} -> e{self.exp_ratio:g} ({self.hidden_chs}) k{self.kernel} s{self.stride} "
                f"{self.act}{extras} -> {io[1]}")

    def meta(self) -> dict:
        return {**asdict(self), "shape": self.shape()}


def conv_out(size: int, stride: int) -> int:
    """Output size of a conv with odd kernel k, padding k // 2 and this stride."""
    return (size - 1) // stride + 1


def block_id(stage: int, first: bool, exp_ratio: float, kernel: int) -> str:
    return f"block-s{stage}-{'first' if first else 'later'}-e{exp_ratio:g}-k{kernel}"


def layer_configs(space: SpaceSpec, in_chs: int, image_size: int) -> list[LayerConfig]:
    """Every distinct layer configuration of the space, in network order."""
    res = image_size
    out = [LayerConfig("stem", "stem", in_chs, space.stem_chs, res, stride=space.stem_stride, act=space.stem_act)]
    res = conv_out(res, space.stem_stride)
    for i, st in enumerate(space.stages):
        positions = [(True, space.stage_in_chs(i), st.stride, res)]
        res = conv_out(res, st.stride)
        if max(st.depths) > 1:
            positions.append((False, st.out_chs, 1, res))
        for first, chs, stride, r in positions:
            skip = stride == 1 and chs == st.out_chs
            for e in st.exp_ratios:
                for k in st.kernels:
                    out.append(LayerConfig(block_id(i, first, e, k), "block", chs, st.out_chs, r, i, first, e, k,
                                           hidden_chs(chs, e), stride, st.act, st.se, skip))
    last = space.stages[-1].out_chs
    out.append(LayerConfig("head", "head", last, space.head_chs or last, res, act=space.head_act))
    return out


def subnet_layer_ids(subnet: Subnet) -> list[str]:
    """The layer entries whose latencies add up to this subnet's."""
    ids = ["stem"]
    for i, blocks in enumerate(subnet.stages):
        ids += [block_id(i, j == 0, e, k) for j, (e, k) in enumerate(blocks)]
    return ids + ["head"]


class _Head(nn.Module):
    """Head conv (if any) → global average pool → classifier, exactly as StaticNet ends."""

    def __init__(self, net: nn.Module, has_head_conv: bool):
        super().__init__()
        self.conv = net.features[-1] if has_head_conv else nn.Identity()
        self.pool, self.classifier = net.pool, net.classifier

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
    space = supernet.space
    if cfg.role == "block":
        return _block(supernet.stages[cfg.stage][0 if cfg.first else 1], cfg.exp_ratio, cfg.kernel).eval()
    if cfg.role == "overhead":
        return _Passthrough(cfg.in_chs, cfg.copies, cfg.skip).eval()
    net = extract_subnet(supernet, space.smallest())
    if cfg.role == "stem":
        return net.features[0]
    return _Head(net, bool(space.head_chs)).eval()


def overhead_id(chs: int, res: int, skip: bool, copies: int) -> str:
    return f"{OVERHEAD_ID}-{chs}x{res}x{res}{'-skip' if skip else ''}-x{copies}"


def overhead_configs(layers: list[LayerConfig]) -> list[LayerConfig]:
    """Passthrough probes, once and twice, for every distinct (input shape, skip) of the layers."""
    shapes = dict.fromkeys((c.in_chs, c.resolution, c.skip) for c in layers)
    return [LayerConfig(overhead_id(chs, res, skip, n), "overhead", chs, chs, res, skip=skip, copies=n)
            for chs, res, skip in shapes for n in (1, 2)]


def calibration_subnets(space: SpaceSpec, n: int, seed: int = 0) -> list[tuple[str, Subnet]]:
    """Smallest, largest, middle, then distinct random subnets: n in all (fewer if the space is tiny)."""
    picks = {"smallest": space.smallest(), "largest": space.largest(), "middle": space.middle()}
    out: dict[str, tuple[str, Subnet]] = {}
    for name, s in picks.items():
        out.setdefault(s.to_key(), (name, s))
    rng = random.Random(seed)
    for _ in range(50 * n):
        if len(out) >= n:
            break
        s = space.sample(rng)
        out.setdefault(s.to_key(), (f"random{len(out)}", s))
    return list(out.values())[:n]


def _class_count(recipe: Recipe) -> int:
    """Classes the recipe's data has, without loading it (only the classifier's width depends on it)."""
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
    from tightfit.checkpoint import CHECKPOINT_NAME
    from tightfit.recipe import load_recipe
    from tightfit.rundir import load_trained
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
    return recipe, Supernet(recipe.space, recipe.data.channels, _class_count(recipe)).eval()


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
        yield cfg.id, "layer", lambda c=cfg: layer_module(supernet, c), cfg.in_chs, cfg.resolution, cfg.meta()
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


def _zip_folder(folder: Path, dest: Path) -> Path:
    """Zip the bundle with one top-level folder (the runner accepts that layout)."""
    def write(tmp: str) -> None:
        with zipfile.ZipFile(tmp, "w", zipfile.ZIP_DEFLATED) as zf:
            for f in sorted(folder.rglob("*")):
                if f.is_file():
                    zf.write(f, Path(folder.name) / f.relative_to(folder))
    from tightfit.atomic import atomic_write
    return atomic_write(dest, write)


def write_bundle(source: str | Path, out: str | Path | None = None, n_subnets: int = 8, zip: bool = False,
                 seed: int = 0, progress: bool = True) -> Path:
    """Export every layer probe and n_subnets calibration subnets; returns the folder (or the .zip)."""
    from tqdm import tqdm
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
            for eid, kind, build, chs, size, meta in tqdm(todo, desc="probe export", unit="model",
                                                          disable=not progress):
                write_bytes(tmp / "onnx" / f"{eid}.onnx", onnx_bytes(build(), chs, size))
                entries.append({"id": eid, "kind": kind, "file": f"onnx/{eid}.onnx", "meta": meta})
        write_json(tmp / "index.json", {
            "format": BUNDLE_FORMAT, "version": 1,
            "space_hash": space_hash(recipe.space, recipe.data.channels, recipe.data.image_size),
            "recipe": {"name": recipe.name, "hash": recipe.hash()},
            "input": {"channels": recipe.data.channels, "image_size": recipe.data.image_size},
            "entries": entries})
        _replace_folder(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if zip:
        return _zip_folder(out, out.with_name(out.name + ".zip"))
    return out
