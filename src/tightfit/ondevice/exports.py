"""An export folder as QA sees it: manifest read and checked, model file present and unchanged,
loadable by ONNX Runtime with the input the manifest describes (numpy + onnxruntime only)."""
from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path

import onnxruntime as ort

from tightfit.ondevice.files import MANIFEST_FORMAT, MANIFEST_VERSION, older_version
from tightfit.ondevice.timing import Protocol, make_session, random_input

REQUIRED = {  # section -> fields verify relies on; the rest of the manifest is informational
    "input": ("name", "channels", "image_size", "color", "mean", "std"),
    "output": ("classes",),
    "latency": ("hardware", "protocol"),
    "budget": ("ms", "percentile"),
}


class VerifyError(Exception):
    """Bad input the user can fix: one `error:` line, exit code 2, nothing written."""


@dataclass(frozen=True)
class Export:
    name: str
    folder: Path
    model: Path
    manifest: dict


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def read_manifest(folder: Path) -> dict:
    """Parsed manifest.json with every field verify relies on present and sane."""
    path = folder / "manifest.json"
    if not path.is_file():
        raise VerifyError(f"{path} not found; pass an export folder written by 'tightfit search' or 'tightfit cut'")
    try:
        m = json.loads(path.read_text("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise VerifyError(f"{path} is not valid JSON ({exc}); restore it from the export") from None
    if not isinstance(m, dict) or m.get("format") != MANIFEST_FORMAT:
        raise VerifyError(f"{path} is not a {MANIFEST_FORMAT} file; restore it from the export")
    if m.get("version") != MANIFEST_VERSION:
        raise VerifyError(older_version(path, "manifest", m.get("version"), MANIFEST_VERSION,
                                        "export the model again with this tightfit ('tightfit cut' or 'tightfit search')"))
    for key in ("model_file", "sha256"):
        if not isinstance(m.get(key), str) or not m[key]:
            raise VerifyError(f"{path} lacks '{key}'; restore the manifest from the export")
    for section, keys in REQUIRED.items():
        missing = [k for k in keys if k not in (m.get(section) or {})]
        if not isinstance(m.get(section), dict) or missing:
            raise VerifyError(f"{path} lacks {section}.{(missing or ['*'])[0]}; restore the manifest from the export")
    ms, pct = m["budget"]["ms"], m["budget"]["percentile"]   # ms None: cut by hand, no budget claimed

    def number(v: object) -> bool:
        return isinstance(v, (int, float)) and not isinstance(v, bool)
    if not number(pct) or not 0 < pct <= 100 or not (ms is None or (number(ms) and ms > 0)):
        raise VerifyError(f"{path}: budget.ms {ms!r} / budget.percentile {pct!r} must be positive numbers "
                          "(percentile <= 100; ms may be null when no budget is claimed)")
    return m


def _check_session(model: Path, m: dict) -> None:
    """ONNX Runtime loads the file and its input is the one the manifest describes."""
    try:
        session = make_session(model, Protocol())
        random_input(session, 1, seed=0)
    except Exception as exc:  # ORT raises several pybind types; all mean "cannot load"
        reason = " ".join(str(exc).split())[:200]
        raise VerifyError(f"onnxruntime {ort.__version__} cannot load {model} ({reason}); "
                          "re-export it or restore the original file") from None
    inputs = {i.name: i.shape for i in session.get_inputs()}
    spec = m["input"]
    want = [spec["channels"], spec["image_size"], spec["image_size"]]
    if spec["name"] not in inputs or list(inputs[spec["name"]][1:]) != want:
        raise VerifyError(f"{model} has inputs {inputs} but the manifest describes "
                          f"{spec['name']!r} (N, {', '.join(map(str, want))}); the manifest belongs to another model")


def load_export(folder: str | os.PathLike) -> Export:
    """Manifest read, file present, hash unchanged, loadable by ONNX Runtime."""
    folder = Path(folder)
    if not folder.is_dir():
        what = "is not a folder" if folder.exists() else "not found"
        raise VerifyError(f"export folder {folder} {what}; pass folders such as RUN_DIR/exports/<device>-<budget>ms")
    m = read_manifest(folder)
    rel = Path(m["model_file"])
    if rel.is_absolute() or ".." in rel.parts:
        raise VerifyError(f"{folder}/manifest.json: model_file {m['model_file']!r} must be a file inside the folder")
    model = folder / rel
    if not model.is_file():
        raise VerifyError(f"{model} is missing; copy the whole export folder")
    digest = sha256_file(model)
    if digest != m["sha256"].lower():
        raise VerifyError(f"{rel} in {folder} changed after export (sha256 {digest[:12]}..., manifest says "
                          f"{m['sha256'][:12]}...); restore the exported file")
    _check_session(model, m)
    return Export(folder.name, folder.resolve(), model.resolve(), m)
