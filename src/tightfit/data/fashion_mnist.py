"""Fashion-MNIST (Xiao et al. 2017) read straight from its IDX files, numpy only.

No download code: the files come from the Debian package ``dataset-fashion-mnist``
or from a folder the user names in ``data.path``. Both ``.gz`` and plain files work.
"""
from __future__ import annotations

import gzip
import zlib
from pathlib import Path

import numpy as np

from tightfit.errors import UserError

CLASS_NAMES = ("t-shirt/top", "trouser", "pullover", "dress", "coat",
               "sandal", "shirt", "sneaker", "bag", "ankle boot")
DEFAULT_DIR = "/usr/share/datasets/fashion-mnist"
MEAN, STD = 0.2860, 0.3530   # training-set statistics of pixel/255

_FILES = {
    "train_x": "train-images-idx3-ubyte",
    "train_y": "train-labels-idx1-ubyte",
    "test_x": "t10k-images-idx3-ubyte",
    "test_y": "t10k-labels-idx1-ubyte",
}
_EXPECTED_COUNT = {"train": 60000, "test": 10000}
_INSTALL_HINT = ("install it with `apt-get install dataset-fashion-mnist` "
                 "or set data.path to the folder holding it")

# IDX type code -> big-endian numpy dtype (the format stores multi-byte values MSB first).
_IDX_DTYPES = {
    0x08: np.dtype(">u1"), 0x09: np.dtype(">i1"), 0x0B: np.dtype(">i2"),
    0x0C: np.dtype(">i4"), 0x0D: np.dtype(">f4"), 0x0E: np.dtype(">f8"),
}


def _read_bytes(path: Path) -> bytes:
    """Whole file, decompressed when it ends in .gz; corrupt/truncated gz becomes a UserError."""
    try:
        if path.suffix == ".gz":
            with gzip.open(path, "rb") as fh:
                return fh.read()
        return path.read_bytes()
    except FileNotFoundError:
        raise UserError(f"file not found: {path}; {_INSTALL_HINT}") from None
    except (OSError, EOFError, zlib.error) as exc:
        raise UserError(f"cannot read {path} ({exc}); the file is truncated or corrupt, "
                        "re-install or re-copy it") from None


def _parse_header(raw: bytes, path: Path) -> tuple[np.dtype, tuple[int, ...], int]:
    """Magic = two zero bytes, a type code, a dim count; then one big-endian uint32 per dim."""
    if len(raw) < 4 or raw[0] != 0 or raw[1] != 0 or raw[2] not in _IDX_DTYPES or raw[3] == 0:
        raise UserError(f"{path} is not an IDX file (bad magic number {raw[:4].hex() or 'none'}); "
                        "point data.path at the Fashion-MNIST files")
    ndim = raw[3]
    offset = 4 + 4 * ndim
    if len(raw) < offset:
        raise UserError(f"{path} ends inside its IDX header; the file is truncated, re-copy it")
    dims = tuple(int(d) for d in np.frombuffer(raw, dtype=">u4", count=ndim, offset=4))
    return _IDX_DTYPES[raw[2]], dims, offset


def read_idx(path: str | Path) -> np.ndarray:
    """Parse one IDX file (gz or plain) into a native-endian array shaped by its header."""
    path = Path(path)
    raw = _read_bytes(path)
    dtype, dims, offset = _parse_header(raw, path)
    expected = int(np.prod(dims, dtype=np.int64)) * dtype.itemsize
    if len(raw) - offset != expected:
        raise UserError(f"{path} holds {len(raw) - offset} data bytes but its header {dims} "
                        f"needs {expected}; the file is truncated or corrupt, re-copy it")
    data = np.frombuffer(raw, dtype=dtype, offset=offset).reshape(dims)
    return data.astype(dtype.newbyteorder("="), copy=True)  # writable, native byte order


def _find(folder: Path, stem: str) -> Path:
    """Prefer ``stem.gz``; fall back to the un-gzipped file of the same name."""
    for candidate in (folder / f"{stem}.gz", folder / stem):
        if candidate.is_file():
            return candidate
    raise UserError(f"Fashion-MNIST file {folder / (stem + '.gz')} not found; {_INSTALL_HINT}")


def _check_pair(images: np.ndarray, labels: np.ndarray, prefix: str, where: Path) -> None:
    """Catch files that parse as IDX but are not Fashion-MNIST (or are mixed up)."""
    n = _EXPECTED_COUNT[prefix]
    if images.dtype != np.uint8 or images.shape != (n, 28, 28):
        raise UserError(f"{where / _FILES[prefix + '_x']}: expected uint8 images of shape "
                        f"({n}, 28, 28), got {images.dtype} {images.shape}; "
                        "point data.path at the Fashion-MNIST files")
    if labels.shape != (n,) or labels.min() < 0 or labels.max() >= len(CLASS_NAMES):
        raise UserError(f"{where / _FILES[prefix + '_y']}: expected {n} labels in 0..9, got shape "
                        f"{labels.shape}; point data.path at the Fashion-MNIST files")


def load_fashion_mnist(folder: str | None = None
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return train_x uint8 (60000,28,28), train_y int64, test_x uint8 (10000,28,28), test_y int64."""
    where = Path(folder or DEFAULT_DIR).expanduser()
    if not where.is_dir():
        raise UserError(f"Fashion-MNIST folder {where} not found; {_INSTALL_HINT}")
    arrays = {key: read_idx(_find(where, stem)) for key, stem in _FILES.items()}
    for prefix in ("train", "test"):
        _check_pair(arrays[f"{prefix}_x"], arrays[f"{prefix}_y"], prefix, where)
    return (arrays["train_x"], arrays["train_y"].astype(np.int64),
            arrays["test_x"], arrays["test_y"].astype(np.int64))
