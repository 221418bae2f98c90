"""`tightfit verify --data FOLDER`: re-check an export's accuracy on labelled images.

numpy, onnxruntime and PIL only (runs on the device, like the rest of verify). Images are
prepared exactly as the manifest's input section describes.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from tightfit.ondevice.exports import Export, VerifyError
from tightfit.ondevice.timing import Protocol, make_session


def list_labelled(folder: Path, classes: list[str]) -> list[tuple[Path, int]]:
    """(image, label index in the manifest's classes) for folder/<class>/<image>."""
    from PIL import Image
    if not folder.is_dir():
        raise VerifyError(f"--data {folder} is not a folder; pass a folder with one sub-folder per class")
    exts = {ext.lower() for ext, fmt in Image.registered_extensions().items() if fmt in Image.OPEN}
    dirs = sorted(p for p in folder.iterdir() if p.is_dir() and not p.name.startswith("."))
    unknown = [d.name for d in dirs if d.name not in classes]
    if unknown:
        raise VerifyError(f"--data class folder {unknown[0]!r} is not a class of the model ({', '.join(classes)}); "
                          "rename or remove it")
    files = [(f, classes.index(d.name)) for d in dirs for f in sorted(d.iterdir())
             if f.is_file() and f.suffix.lower() in exts and not f.name.startswith(".")]
    if not files:
        raise VerifyError(f"--data {folder} holds no images in class sub-folders named like {classes[:3]}")
    return files


def preprocess(path: Path, spec: dict) -> np.ndarray | None:
    """Image as the manifest describes: shorter side to S (bilinear), centre crop, /255, (x-mean)/std, CHW."""
    from PIL import Image, ImageOps
    size = int(spec["image_size"])
    try:
        with Image.open(path) as img:
            img = ImageOps.exif_transpose(img).convert("L" if spec["color"] == "grey" else "RGB")
    except (OSError, ValueError, SyntaxError):
        return None
    w, h = img.size
    nw, nh = max(size, round(w * size / min(w, h))), max(size, round(h * size / min(w, h)))
    img = img.resize((nw, nh), Image.Resampling.BILINEAR) if (nw, nh) != (w, h) else img
    left, top = (nw - size) // 2, (nh - size) // 2
    x = np.asarray(img.crop((left, top, left + size, top + size)), dtype=np.float32).reshape(size, size, -1) / 255.0
    x = (x - np.asarray(spec["mean"], np.float32)) / np.asarray(spec["std"], np.float32)
    return x.transpose(2, 0, 1)


def folder_accuracy(e: Export, folder: Path, batch: int = 64) -> dict:
    """Top-1 accuracy (percent) of the ONNX model on a labelled folder, beside the manifest's claims."""
    files = list_labelled(folder, list(e.manifest["output"]["classes"]))
    xs, ys, skipped = [], [], 0
    for f, label in files:
        x = preprocess(f, e.manifest["input"])
        skipped += x is None
        if x is not None:
            xs.append(x)
            ys.append(label)
    if not xs:
        raise VerifyError(f"--data {folder}: none of {len(files)} image files could be read")
    session = make_session(e.model, Protocol())
    fixed = session.get_inputs()[0].shape[0]
    step = fixed if isinstance(fixed, int) and fixed > 0 else batch
    x, preds = np.stack(xs), []
    for i in range(0, len(x), step):
        preds.append(session.run(None, {e.manifest["input"]["name"]: x[i:i + step]})[0].argmax(1))
    correct = int((np.concatenate(preds) == np.asarray(ys)).sum())
    claims = e.manifest.get("accuracy") or {}
    return {"folder": str(folder), "images": len(xs), "skipped": skipped, "top1": 100.0 * correct / len(xs),
            "manifest_validation_top1": (claims.get("validation") or {}).get("top1"),
            "manifest_test_top1": (claims.get("test") or {}).get("top1")}


def format_accuracy(rows: list[dict]) -> str:
    def pct(v: Any) -> str:
        return "-" if v is None else f"{v:.2f}"
    lines = [f"{'model':<20} {'images':>7} {'skipped':>7} {'top-1 %':>8} {'val % (manifest)':>17} "
             f"{'test % (manifest)':>18}"]
    for r in rows:
        a = r["accuracy"]
        lines.append(f"{r['name'][:20]:<20} {a['images']:>7} {a['skipped']:>7} {a['top1']:>8.2f} "
                     f"{pct(a['manifest_validation_top1']):>17} {pct(a['manifest_test_top1']):>18}")
    return "\n".join(lines)
