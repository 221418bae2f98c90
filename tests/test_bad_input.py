"""Bad input on every command: exit code 2, one `error:` line that names the problem and the fix,
no traceback, and nothing written (the case's folder is byte-for-byte what it was before).
Exit code 2 for bad usage is what Python's argparse uses (docs, ArgumentParser.error); the
product contract extends it to every kind of bad input.

One table of cases, each run as a user would: `python -m tightfit ...` in a fresh folder.
The run and the export they need are built once per module from the tiny recipe.
"""
from __future__ import annotations

import ast
import copy
import hashlib
import json
import os
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np
import pytest
import torch
from PIL import Image

from helpers import TINY, recipe_toml
from tightfit.ondevice.files import TABLE_VERSION

SRC = Path(__file__).resolve().parents[1] / "src"
DELETE = object()

RECIPE = copy.deepcopy(TINY)
RECIPE["data"]["samples"] = 400
RECIPE["train"]["epochs"] = 0.2
FOLDER_DATA = {"source": "folder", "path": "imgs", "image_size": 16, "channels": 3}
FASHION_DATA = {"source": "fashion-mnist", "path": "fm", "image_size": 28, "channels": 1}


# ---- building inputs ---------------------------------------------------------------------

def edited(doc: dict, changes: dict) -> dict:
    """A copy of doc with {("space", "stage", 1, "kernels"): value} changes applied (DELETE removes)."""
    doc = copy.deepcopy(doc)
    for path, value in changes.items():
        parent = doc
        for key in path[:-1]:
            parent = parent[key]
        if value is DELETE:
            del parent[path[-1]]
        else:
            parent[path[-1]] = value
    return doc


def write_images(root: Path, counts: dict[str, int], corrupt: dict[str, int] | None = None,
                 grey: tuple[str, ...] = ()) -> None:
    """root/<class>/<i>.png random images (grey 'L' for classes in `grey`), plus corrupt .png files."""
    rng = np.random.default_rng(0)
    for name, n in counts.items():
        (root / name).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            shape = (20, 24) if name in grey else (20, 24, 3)
            Image.fromarray(rng.integers(0, 256, shape, dtype=np.uint8)).save(root / name / f"{i}.png")
        for i in range((corrupt or {}).get(name, 0)):
            (root / name / f"bad{i}.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"not really a png" * 4)


def idx_header(type_code: int, dims: tuple[int, ...]) -> bytes:
    """IDX header (LeCun et al., MNIST file format): 0, 0, type, ndim, then big-endian uint32 dims."""
    return bytes([0, 0, type_code, len(dims)]) + b"".join(d.to_bytes(4, "big") for d in dims)


class Evil:
    """Unpickling this runs a shell command: a checkpoint that carries code."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


# ---- shared fixtures ---------------------------------------------------------------------

@dataclass
class Shared:
    root: Path
    run: Path
    export: Path
    _table: Optional[Path] = None

    def valid_table(self) -> Path:
        """A latency table for the run's space: every layer 0.5 ms, per-call overheads 0.1 ms."""
        if self._table is None:
            from tightfit.latency.predict import load_predictor
            from tightfit.latency.probe import write_bundle
            from tightfit.recipe import load_recipe
            bundle = write_bundle(self.run, self.root / "probe", n_subnets=0, progress=False)
            index = json.loads((bundle / "index.json").read_text())
            stats = ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "budget_stat_ms")
            entries = {e["id"]: {"kind": e["kind"], "meta": e["meta"],
                                 **dict.fromkeys(stats, 0.1 if e["id"].startswith("passthrough") else 0.5)}
                       for e in index["entries"]}
            self._table = self.root / "table.json"
            self._table.write_text(json.dumps({
                "format": "tightfit-latency-table", "version": TABLE_VERSION, "space_hash": index["space_hash"],
                "hardware": {"hostname": "synthetic"}, "protocol": {"percentile": 90.0}, "entries": entries}))
            load_predictor(load_recipe(self.run / "recipe.toml"), self._table)  # control: accepted as is
        return self._table


def build_manifest_for(run, cut, net, onnx_data: bytes) -> dict:
    """The export manifest as tightfit.export.manifest writes it (the contract's fields)."""
    from tightfit.export.manifest import Accuracy, build_manifest, latency_section
    from tightfit.ondevice.hardware import describe_hardware
    from tightfit.ondevice.timing import Protocol
    r = run.recipe
    return build_manifest(
        space=r.space, subnet=r.space.smallest(), params=cut.params, macs=cut.macs, onnx_data=onnx_data,
        channels=r.data.channels, image_size=r.data.image_size, class_names=run.class_names, mean=run.mean,
        std=run.std, validation=Accuracy(7, 10, "validation"), test=Accuracy(7, 10, "test"),
        latency=latency_section(None, describe_hardware(), Protocol().to_dict(), 0.1), budget_ms=1.0,
        percentile=90.0, device="host", recipe_name=r.name, recipe_hash=r.hash())


@pytest.fixture(scope="module")
def shared(tmp_path_factory) -> Shared:
    """One tiny trained run and one export of its smallest subnet (checked valid, so the cases that
    break them show the break, not a fixture that was never good)."""
    from tightfit.export.cut import cut_one
    from tightfit.data.dataset import load_dataset
    from tightfit.recipe import load_recipe
    from tightfit.rundir import load_trained
    from tightfit.train.loop import train
    from tightfit.ondevice.verify import load_export
    root = tmp_path_factory.mktemp("bad-input")
    (root / "tiny.toml").write_text(recipe_toml(RECIPE))
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        recipe = load_recipe(root / "tiny.toml")
        ds = load_dataset(recipe.data, recipe.seed)
        train(recipe, root / "run", recipe_path=root / "tiny.toml", progress=False, ds=ds)
        run = load_trained(root / "run")
        cut, net = cut_one(run, ds, "host-1ms", recipe.space.smallest(), root / "exports")
    finally:
        torch.set_num_threads(threads)
    export = root / "exports" / "host-1ms"
    data = (export / "model.onnx").read_bytes()
    (export / "manifest.json").write_text(json.dumps(build_manifest_for(run, cut, net, data)))
    load_export(export)  # control: verify accepts the pristine export
    return Shared(root, root / "run", export)


@dataclass
class Env:
    """What a case's setup may build inside its own folder (the command's cwd)."""
    tmp: Path
    shared: Shared

    def run(self) -> Path:
        return Path(shutil.copytree(self.shared.run, self.tmp / "run"))

    def export(self) -> Path:
        return Path(shutil.copytree(self.shared.export, self.tmp / "exports" / "host-1ms"))

    def recipe(self, changes: dict | None = None, name: str = "r.toml", data: dict | None = None) -> Path:
        doc = edited(RECIPE, changes or {})
        if data is not None:
            doc["data"] = data
        path = self.tmp / name
        path.write_text(recipe_toml(doc))
        return path

    def table(self, **fields) -> Path:
        doc = {"format": "tightfit-latency-table", "version": TABLE_VERSION, "space_hash": "0123456789abcdef",
               "hardware": {"hostname": "elsewhere"}, "protocol": {"percentile": 90.0},
               "entries": {"stem": {"kind": "layer", "meta": {}, **dict.fromkeys(
                   ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "budget_stat_ms"), 0.1)}}}
        path = self.tmp / "table.json"
        path.write_text(json.dumps({**doc, **fields}))
        return path

    def manifest(self, change: Callable[[dict], None]) -> None:
        path = self.tmp / "exports" / "host-1ms" / "manifest.json"
        m = json.loads(path.read_text())
        change(m)
        path.write_text(json.dumps(m))


# ---- the cases ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Case:
    id: str
    args: tuple[str, ...]
    expect: tuple[str, ...]                 # substrings of the one error line: the problem, then the fix
    setup: Optional[Callable[[Env], object]] = None  # builds the bad input in the case's folder
    figure: Optional[Callable[[Env], str]] = None    # one more expected substring, worked out at run time


def recipe_case(id: str, changes: dict, *expect: str, command: str = "train") -> Case:
    args = ("train", "r.toml", "--run", "run") if command == "train" else ("demo", "--recipe", "r.toml", "--run", "run")
    return Case(id, args, expect, lambda env: env.recipe(changes))


def stage(i: int, key: str) -> tuple:
    return ("space", "stage", i, key)


def data_case(id: str, data: dict, build: Callable[[Path], None], *expect: str) -> Case:
    def setup(env: Env) -> None:
        env.recipe(data=data)
        build(env.tmp / data["path"])
    return Case(id, ("train", "r.toml", "--run", "run"), expect, setup)


def _append(path: Path, data: bytes) -> None:
    with open(path, "ab") as f:
        f.write(data)


def _truncate(path: Path, keep: int = 300) -> None:
    path.write_bytes(path.read_bytes()[:keep])


def _evil_checkpoint(env: Env) -> None:
    run = env.run()
    state = torch.load(run / "checkpoint.pt", weights_only=True)
    state["note"] = Evil(env.tmp / "PWNED")  # the file would appear if the loader ran the payload
    torch.save(state, run / "checkpoint.pt")


def _truncated_fashion(root: Path) -> None:
    root.mkdir()
    (root / "train-images-idx3-ubyte").write_bytes(idx_header(0x08, (60000, 28, 28)) + bytes(1000))


def _not_onnx(env: Env) -> None:
    data = b"this is not an ONNX model"
    (env.export() / "model.onnx").write_bytes(data)
    env.manifest(lambda m: m.update(sha256=hashlib.sha256(data).hexdigest()))


def _valid_table(env: Env) -> None:
    env.run()
    shutil.copy(env.shared.valid_table(), env.tmp / "table.json")


def _fastest(env: Env) -> str:
    """What the smallest subnet predicts on the valid table: the message must say it."""
    from tightfit.latency.predict import load_predictor
    from tightfit.recipe import load_recipe
    recipe = load_recipe(env.shared.run / "recipe.toml")
    return f"{load_predictor(recipe, env.tmp / 'table.json').predict_ms(recipe.space.smallest()):.3f} ms"


def _search(budget: str, table: str = "table.json") -> tuple[str, ...]:
    return ("search", "run", "--table", table, f"--budget={budget}")


CASES = [
    # -- recipe ----------------------------------------------------------------------------
    Case("recipe-missing", ("train", "missing.toml", "--run", "run"), ("recipe file not found", "recipes/")),
    Case("recipe-toml-syntax", ("train", "r.toml", "--run", "run"), ("not valid TOML", "line 3", "fix the syntax"),
         lambda env: (env.tmp / "r.toml").write_text('name = "x"\n[data]\nsource "builtin"\n')),
    recipe_case("recipe-unknown-key", {("train", "epoch"): 1}, "unknown recipe key 'train.epoch'", "allowed here"),
    recipe_case("recipe-wrong-type", {("train", "batch_size"): "32"}, "train.batch_size", "expected int"),
    recipe_case("recipe-zero-channels", {stage(1, "channels"): 0}, "space.stage[1].channels", "integer > 0"),
    recipe_case("recipe-negative-channels", {stage(2, "channels"): -16}, "space.stage[2].channels", "integer > 0"),
    recipe_case("recipe-negative-stem", {("space", "stem_channels"): -8}, "space.stem_channels", "> 0"),
    recipe_case("recipe-even-kernel", {stage(1, "kernels"): [3, 4]}, "space.stage[1].kernels", "must be odd"),
    recipe_case("recipe-stride-3", {stage(1, "stride"): 3}, "space.stage[1].stride", "must be 1 or 2"),
    recipe_case("recipe-empty-depths", {stage(2, "depths"): []}, "space.stage[2].depths", "non-empty list"),
    recipe_case("recipe-depth-zero", {stage(2, "depths"): [0, 1]}, "space.stage[2].depths", ">= 1"),
    recipe_case("recipe-expansion-zero", {stage(1, "expansions"): [0, 2]}, "space.stage[1].expansions", "> 0"),
    recipe_case("recipe-no-stages", {("space", "stage"): DELETE}, "at least one", "[[space.stage]]"),
    recipe_case("recipe-bad-activation", {stage(0, "activation"): "gelu"}, "activation", "relu6, hswish"),
    recipe_case("demo-recipe-bad-source", {("data", "source"): "web"}, "data.source", "choose one of builtin",
                command="demo"),
    # -- data ------------------------------------------------------------------------------
    data_case("data-folder-missing", FOLDER_DATA, lambda root: None, "imgs does not exist", "set data.path"),
    data_case("data-empty-class", FOLDER_DATA, lambda root: (write_images(root, {"a": 6}), (root / "b").mkdir()),
              "has no image files", "add images or remove the folder"),
    data_case("data-single-class", FOLDER_DATA, lambda root: write_images(root, {"only": 6}),
              "1 class folder(s)", "add one sub-folder per class"),
    data_case("data-mostly-corrupt", FOLDER_DATA,
              lambda root: write_images(root, {"a": 2, "b": 2}, corrupt={"a": 5, "b": 5}),
              "10 of 14 image files", "could not be read", "fix or remove them"),
    data_case("fashion-mnist-missing", FASHION_DATA, lambda root: root.mkdir(),
              "train-images-idx3-ubyte", "not found", "apt-get install dataset-fashion-mnist"),
    data_case("fashion-mnist-truncated", FASHION_DATA, _truncated_fashion,
              "holds 1000 data bytes", "truncated or corrupt", "re-copy it"),
    recipe_case("batch-larger-than-data", {("train", "batch_size"): 4096}, "train.batch_size = 4096",
                "larger than the training split"),
    # -- run directory and checkpoints -----------------------------------------------------
    Case("run-dir-under-a-file", ("train", "r.toml", "--run", "file.txt/run"),
         ("cannot write to run directory file.txt/run", "Not a directory"),
         lambda env: (env.recipe(), (env.tmp / "file.txt").write_text("x"))),
    Case("resume-other-recipe", ("train", "r.toml", "--run", "run", "--resume"),
         ("trained from a different recipe", "use that recipe or a new --run"),
         lambda env: (env.run(), env.recipe({("train", "epochs"): 0.3}))),
    Case("checkpoint-truncated", ("cut", "run", "--subnet", "smallest"),
         ("unreadable or truncated", "retrain"), lambda env: _truncate(env.run() / "checkpoint.pt")),
    Case("checkpoint-carrying-code", ("probe", "run"),
         ("refusing checkpoint", f"it would load {os.system.__module__}.system", "written by 'tightfit train'"),
         _evil_checkpoint),
    Case("cut-key-outside-space", ("cut", "run", "--subnet", "smallest", "--subnet", "9:9"),
         ("subnet key '9:9' is not in this search space", "the recipe allows"), lambda env: env.run()),
    Case("cut-out-under-a-file", ("cut", "run", "--subnet", "smallest", "--out", "file.txt/x"),
         ("cannot create the export folder file.txt/x", "choose another --out"),
         lambda env: (env.run(), (env.tmp / "file.txt").write_text("x"))),
    Case("probe-out-under-a-file", ("probe", "run", "--out", "file.txt/probe"),
         ("cannot write the probe bundle to file.txt/probe", "choose another --out"),
         lambda env: (env.run(), (env.tmp / "file.txt").write_text("x"))),
    Case("profile-bad-device-name", ("profile", "run", "--name", "a/b"),
         ("device name 'a/b'", "letters, digits"), lambda env: env.run()),
    Case("report-missing-run", ("report", "nowhere"), ("run folder nowhere not found", "tightfit train")),
    Case("report-out-under-a-file", ("report", "run", "--out", "file.txt/report"),
         ("cannot write the report to file.txt/report", "choose another --out"),
         lambda env: (env.run(), (env.tmp / "file.txt").write_text("x"))),
    # -- latency tables and budgets --------------------------------------------------------
    Case("table-other-space", ("check-latency", "run", "--table", "table.json"),
         ("measured for another search space", "tightfit probe"), lambda env: (env.run(), env.table())),
    Case("table-malformed-json", ("check-latency", "run", "--table", "table.json"),
         ("is not valid JSON", "re-measure it"),
         lambda env: (env.run(), (env.tmp / "table.json").write_text('{"format": "tightfit-lat'))),
    Case("table-older-version", ("check-latency", "run", "--table", "table.json"),
         ("written by an older version of tightfit", "measure it again"),
         lambda env: (env.run(), env.table(version=1))),
    Case("search-budget-not-a-duration", _search("fast"), ("budget 'fast' is not a duration", "0.3ms"),
         lambda env: (env.run(), env.table())),
    Case("search-budget-zero", _search("0ms"), ("budget '0ms' must be greater than zero", "0.3ms"),
         lambda env: (env.run(), env.table())),
    Case("search-budget-negative", _search("-1ms"), ("budget '-1ms'", "0.3ms"),
         lambda env: (env.run(), env.table())),
    Case("search-budget-below-fastest", _search("1us"), ("below the fastest subnet", "raise the budget"),
         _valid_table, figure=_fastest),
    Case("search-table-other-space", _search("1ms"), ("measured for another search space", "tightfit probe"),
         lambda env: (env.run(), env.table())),
    # -- exports and manifests -------------------------------------------------------------
    Case("verify-no-manifest", ("verify", "exports/host-1ms"), ("manifest.json not found", "pass an export folder"),
         lambda env: (env.export() / "manifest.json").unlink()),
    Case("verify-manifest-not-json", ("verify", "exports/host-1ms"), ("not valid JSON", "restore it"),
         lambda env: (env.export() / "manifest.json").write_text('{"format": ')),
    Case("verify-manifest-older-version", ("verify", "exports/host-1ms"),
         ("written by an older version of tightfit", "export the model again"),
         lambda env: (env.export(), env.manifest(lambda m: m.update(version=2)))),
    Case("verify-manifest-missing-field", ("verify", "exports/host-1ms"), ("lacks budget.ms", "restore the manifest"),
         lambda env: (env.export(), env.manifest(lambda m: m["budget"].pop("ms")))),
    Case("verify-onnx-changed", ("verify", "exports/host-1ms"), ("changed after export", "restore the exported file"),
         lambda env: _append(env.export() / "model.onnx", b"\0")),
    Case("verify-not-onnx", ("verify", "exports/host-1ms"), ("cannot load", "re-export it"), _not_onnx),
]


def tree(root: Path) -> dict[str, str]:
    """Every file and folder under root (hidden ones too) with a hash of its content."""
    out = {}
    for p in sorted(root.rglob("*")):
        rel = str(p.relative_to(root))
        out[rel] = "dir" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def tightfit(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tightfit", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=600)


@pytest.mark.parametrize("case", [pytest.param(c, id=c.id) for c in CASES])
def test_bad_input_is_one_line_exit_2_and_writes_nothing(case: Case, tmp_path: Path, shared: Shared):
    env = Env(tmp_path, shared)
    if case.setup:
        case.setup(env)
    expect = case.expect + ((case.figure(env),) if case.figure else ())
    before = tree(tmp_path)
    r = tightfit(*case.args, cwd=tmp_path)
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert r.returncode == 2, r.stderr[-3000:]
    assert "Traceback" not in r.stderr and len(lines) == 1, r.stderr[-3000:]
    assert lines[0].startswith("error: ")
    for fragment in expect:
        assert fragment in lines[0]
    assert tree(tmp_path) == before  # nothing new, nothing changed, no temporary files left


def test_enough_cases_across_every_command():
    commands = {c.args[0] for c in CASES}
    assert len(CASES) >= 30 and len({c.id for c in CASES}) == len(CASES)
    assert commands >= {"train", "cut", "demo", "probe", "profile", "check-latency", "verify", "report", "search"}


def test_a_few_corrupt_images_are_skipped_with_one_warning(tmp_path):
    """Under half unreadable: the dataset loads without them and one warning counts them
    (the refusal above half is the data-mostly-corrupt case)."""
    from tightfit.data.dataset import load_dataset
    from tightfit.recipe import DataConfig
    write_images(tmp_path / "imgs", {"a": 10, "b": 10}, corrupt={"a": 2, "b": 1})
    cfg = DataConfig(source="folder", path=str(tmp_path / "imgs"), image_size=16, channels=3)
    with pytest.warns(UserWarning, match=r"skipped 3 unreadable image file\(s\)"):
        ds = load_dataset(cfg, seed=0)
    assert len(ds.train_y) + len(ds.val_y) + len(ds.test_y) == 20 and len(ds.skipped) == 3


def test_mixed_grey_and_rgb_are_converted(tmp_path):
    """PIL's 'L' -> 'RGB' conversion copies the grey value to all three channels (Pillow docs,
    Image.convert), so the grey class loads with R == G == B and the colour class does not."""
    from tightfit.data.folder import load_image_folder
    write_images(tmp_path, {"grey": 3, "rgb": 3}, grey=("grey",))
    x, y, names, skipped = load_image_folder(str(tmp_path), 16, 3)
    assert x.shape == (6, 16, 16, 3) and x.dtype == np.uint8 and names == ("grey", "rgb") and skipped == []
    grey, rgb = x[y == 0], x[y == 1]
    assert (grey[..., 0] == grey[..., 1]).all() and (grey[..., 1] == grey[..., 2]).all()
    assert not (rgb[..., 0] == rgb[..., 1]).all()


def _torch_load_calls(tree_: ast.AST) -> list[ast.Call]:
    return [n for n in ast.walk(tree_) if isinstance(n, ast.Call) and isinstance(n.func, ast.Attribute)
            and n.func.attr == "load" and isinstance(n.func.value, ast.Name) and n.func.value.id == "torch"]


def test_every_torch_load_in_src_is_weights_only():
    """torch.load unpickles arbitrary code unless weights_only=True (PyTorch docs, torch.load
    'Security' warning); every call in src/ must pass it, and nothing else unpickles files."""
    calls, offenders = 0, []
    for path in sorted(SRC.rglob("*.py")):
        text = path.read_text("utf-8")
        module = ast.parse(text)
        for call in _torch_load_calls(module):
            calls += 1
            safe = any(k.arg == "weights_only" and isinstance(k.value, ast.Constant) and k.value.value is True
                       for k in call.keywords)
            if not safe:
                offenders.append(f"{path.relative_to(SRC)}:{call.lineno}")
        for name in ("pickle.load(", "pickle.loads(", "allow_pickle=True", "from torch import load"):
            if name in text:
                offenders.append(f"{path.relative_to(SRC)}: {name}")
    assert calls >= 1  # the checkpoint loader is found, so the scan looks where it should
    assert offenders == []
