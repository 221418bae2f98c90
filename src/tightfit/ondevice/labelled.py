"""`tightfit verify --data FOLDER`: re-check an export's accuracy on labelled images.

numpy, onnxruntime and PIL only (runs on the device, like the rest of verify). Images are
prepared exactly as the manifest's input section describes.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from tightfit.ondevice.accuracy import Accuracy, format_accuracy
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
    """Top-1 of the ONNX model on a labelled folder (the Accuracy record's fields), beside the manifest's
    claims."""
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
    hits = np.concatenate(preds) == np.asarray(ys)
    claims = e.manifest.get("accuracy") or {}
    return {"folder": str(folder), "skipped": skipped, **Accuracy.of(hits).to_dict(),
            "manifest_validation_top1": (claims.get("validation") or {}).get("top1"),
            "manifest_test_top1": (claims.get("test") or {}).get("top1")}


def accuracy_table(exports: list[Export], accuracy: list[dict]) -> str:
    """Each model's top-1 on the folder beside the manifest's claims, each with its interval and count."""
    head = ("model", "top-1 on --data", "skipped", "validation (manifest)", "test (manifest)")
    rows = [head]
    for e, a in zip(exports, accuracy):
        claims = e.manifest.get("accuracy") or {}
        rows.append((e.name[:20], format_accuracy(Accuracy.from_dict(a)), str(a["skipped"]),
                     *(format_accuracy(Accuracy.from_dict(claims.get(s))) for s in ("validation", "test"))))
    widths = [max(len(row[i]) for row in rows) for i in range(len(head))]
    lines = ["top-1 accuracy with its 95 % interval (Wilson score) and image count"]
    lines += ["  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in rows]
    return "\n".join(lines)
