"""Image-folder datasets: ``root/<class>/<image>``, class names = sorted sub-folder names.

Every image is converted to the recipe's mode ("L" for 1 channel, "RGB" for 3), so a
folder mixing grey and colour files loads fine; alpha is dropped, palettes expanded.
EXIF orientation is applied so photos come out the way viewers show them; 16-bit
greys are scaled to 8 bits rather than clipped. Each image
has its shorter side resized to ``image_size`` (bilinear) and is then centre-cropped.
"""
from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps
from tightfit.progress import bar

from tightfit.errors import UserError

PROGRESS_THRESHOLD = 2000      # show a progress bar above this many files
MAX_CORRUPT_FRACTION = 0.5     # more unreadable files than this means the folder is wrong
_MODES = {1: "L", 3: "RGB"}


def _image_extensions() -> frozenset[str]:
    """Extensions PIL can open; other files (README, .csv, ...) are not treated as images."""
    return frozenset(ext.lower() for ext, fmt in Image.registered_extensions().items()
                     if fmt in Image.OPEN)


def _visible(path: Path) -> bool:
    """Hidden entries (.DS_Store, .ipynb_checkpoints, ...) are never classes or images."""
    return not path.name.startswith(".")


def _list_classes(root: Path) -> list[Path]:
    """Sorted class folders; fails on a missing root or fewer than two classes."""
    if not root.exists():
        raise UserError(f"image folder {root} does not exist; set data.path to a folder "
                        "with one sub-folder per class")
    if not root.is_dir():
        raise UserError(f"data.path {root} is not a directory; point it at a folder "
                        "with one sub-folder per class")
    classes = sorted((p for p in root.iterdir() if p.is_dir() and _visible(p)), key=lambda p: p.name)
    if len(classes) < 2:
        raise UserError(f"{root} has {len(classes)} class folder(s); a classifier needs at least "
                        "2 classes, add one sub-folder per class")
    return classes


def _list_images(class_dir: Path, extensions: frozenset[str]) -> list[Path]:
    """Image files directly inside one class folder (sorted, so loading order is repeatable)."""
    files = sorted((p for p in class_dir.iterdir()
                    if p.is_file() and _visible(p) and p.suffix.lower() in extensions),
                   key=lambda p: p.name)
    if not files:
        raise UserError(f"class folder {class_dir} has no image files; add images or remove "
                        "the folder")
    return files


def fit_square(img: Image.Image, size: int) -> Image.Image:
    """Shorter side to ``size`` (bilinear), then centre crop to size x size."""
    w, h = img.size
    scale = size / min(w, h)
    new_w, new_h = max(size, round(w * scale)), max(size, round(h * scale))
    if (new_w, new_h) != (w, h):
        img = img.resize((new_w, new_h), Image.Resampling.BILINEAR)
    left, top = (new_w - size) // 2, (new_h - size) // 2
    return img.crop((left, top, left + size, top + size))


def _to_8bit(img: Image.Image) -> Image.Image:
    """16-bit greys: keep the top byte, because PIL's own convert clips everything above 255."""
    if img.mode.startswith("I;16"):
        return Image.fromarray((np.asarray(img).astype(np.uint16) >> 8).astype(np.uint8), "L")
    return img


def _load_one(path: Path, size: int, mode: str) -> np.ndarray | None:
    """One image as uint8 (size, size, C), or None when PIL cannot decode the file."""
    try:
        with Image.open(path) as img:
            img.load()
            img = _to_8bit(ImageOps.exif_transpose(img)).convert(mode)
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombError):
        return None
    arr = np.asarray(fit_square(img, size), dtype=np.uint8)
    return arr.reshape(size, size, -1)


def _check_args(image_size: int, channels: int) -> None:
    """Reject settings that would otherwise fail deep inside numpy or PIL."""
    if channels not in _MODES:
        raise UserError(f"data.channels is {channels}; it must be 1 (grey) or 3 (RGB)")
    if isinstance(image_size, bool) or not isinstance(image_size, (int, np.integer)) \
            or image_size < 1:
        raise UserError(f"data.image_size is {image_size!r}; it must be a positive integer")


def _check_skipped(root: Path, skipped: list[str], total: int, empty: list[str]) -> None:
    """Fail when the folder is mostly unreadable; otherwise warn once with a count."""
    if len(skipped) == total:
        raise UserError(f"no readable image in {root} ({total} files failed to decode); "
                        "check the files are real images")
    if len(skipped) > MAX_CORRUPT_FRACTION * total:
        raise UserError(f"{len(skipped)} of {total} image files in {root} could not be read "
                        f"(e.g. {skipped[0]}); fix or remove them")
    if empty:
        raise UserError(f"class folder {empty[0]} has no readable image; add images or remove "
                        "the folder")
    if skipped:
        warnings.warn(f"skipped {len(skipped)} unreadable image file(s) in {root}, "
                      f"e.g. {skipped[0]}", stacklevel=3)


def load_image_folder(root: str, image_size: int, channels: int
                      ) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], list[str]]:
    """Load every class folder under ``root`` into one preallocated uint8 array.

    Returns x (N, image_size, image_size, channels), y int64, class names, and the
    paths of files that could not be decoded (skipped, with one warning).
    """
    _check_args(image_size, channels)
    root_path = Path(root).expanduser()
    classes = _list_classes(root_path)
    extensions = _image_extensions()
    files = [(label, path) for label, class_dir in enumerate(classes)
             for path in _list_images(class_dir, extensions)]
    x = np.empty((len(files), image_size, image_size, channels), dtype=np.uint8)
    y = np.empty(len(files), dtype=np.int64)
    skipped: list[str] = []
    count = 0
    for label, path in bar(files, desc="loading images", unit="img",
                            disable=len(files) <= PROGRESS_THRESHOLD):
        arr = _load_one(path, image_size, _MODES[channels])
        if arr is None:
            skipped.append(str(path))
            continue
        x[count], y[count] = arr, label
        count += 1
    found = np.bincount(y[:count], minlength=len(classes))
    empty = [str(classes[i]) for i in np.flatnonzero(found == 0)]
    _check_skipped(root_path, skipped, len(files), empty)
    return x[:count], y[:count], tuple(c.name for c in classes), skipped
