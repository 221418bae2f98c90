"""Deterministic train / validation / test splits held in memory as uint8, plus batching.

Images stay uint8 (N, H, W, C) until a batch is drawn, so even 224x224 folders fit;
normalisation and augmentation (random shift, horizontal flip) happen per batch and are
seeded from (seed, epoch), which makes training resumable and identical on every rank.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Iterator

import numpy as np
import torch

from tightfit.errors import UserError
from tightfit.recipe import DataConfig


@dataclass
class Dataset:
    train_x: torch.Tensor   # (N, H, W, C) uint8
    train_y: torch.Tensor   # (N,) int64
    val_x: torch.Tensor
    val_y: torch.Tensor
    test_x: torch.Tensor
    test_y: torch.Tensor
    class_names: tuple[str, ...]
    mean: tuple[float, ...]  # per channel, on the 0..1 scale
    std: tuple[float, ...]
    skipped: tuple[str, ...] = ()  # unreadable files that were left out

    @property
    def num_classes(self) -> int:
        return len(self.class_names)


def _carve(n: int, fraction: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    perm = rng.permutation(n)
    k = int(round(n * fraction))
    return np.sort(perm[k:]), np.sort(perm[:k])


def _raw(cfg: DataConfig, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None, tuple, tuple]:
    """(train_x, train_y, test_x, test_y, class_names, skipped); test may be None (carved later)."""
    if cfg.source == "builtin":
        from tightfit.data.synthetic import CLASS_NAMES, generate_parts
        x, y = generate_parts(cfg.samples, cfg.image_size, seed)
        if cfg.channels == 1:
            x = np.round(x.astype(np.float32) @ np.array([0.299, 0.587, 0.114], np.float32))[..., None].astype(np.uint8)
        return x, y, None, None, tuple(CLASS_NAMES), ()
    if cfg.source == "fashion-mnist":
        from tightfit.data.fashion_mnist import CLASS_NAMES, load_fashion_mnist
        if cfg.image_size != 28 or cfg.channels != 1:
            raise UserError("Fashion-MNIST images are 28x28 grey: set data.image_size = 28 and data.channels = 1")
        tx, ty, vx, vy = load_fashion_mnist(cfg.path or None)
        return tx[..., None], ty, vx[..., None], vy, tuple(CLASS_NAMES), ()
    from tightfit.data.folder import load_image_folder
    if not cfg.path:
        raise UserError("data.path is empty: point it at a folder with one sub-folder of images per class")
    x, y, names, skipped = load_image_folder(cfg.path, cfg.image_size, cfg.channels)
    return x, y, None, None, tuple(names), tuple(skipped)


def load_dataset(cfg: DataConfig, seed: int) -> Dataset:
    x, y, tx, ty, names, skipped = _raw(cfg, seed)
    if cfg.classes and cfg.classes != len(names):
        raise UserError(f"recipe key 'data.classes' = {cfg.classes}, but the data has {len(names)} classes; "
                        "correct it, or set it to 0 to count them in the data")
    rng = np.random.default_rng(seed + 1)
    if tx is None:
        keep, test = _carve(len(x), cfg.test_fraction, rng)
        x, y, tx, ty = x[keep], y[keep], x[test], y[test]
    keep, val = _carve(len(x), cfg.val_fraction, rng)
    if cfg.max_train_images:
        keep = keep[:cfg.max_train_images]
    tr_x, tr_y = x[keep], y[keep]
    mean = tr_x.reshape(-1, tr_x.shape[-1]).mean(0) / 255.0
    std = tr_x.reshape(-1, tr_x.shape[-1]).std(0) / 255.0
    if cfg.source == "fashion-mnist":
        from tightfit.data.fashion_mnist import MEAN, STD
        mean, std = np.array([MEAN]), np.array([STD])
    t = torch.from_numpy
    return Dataset(t(np.ascontiguousarray(tr_x)), t(tr_y.astype(np.int64)), t(np.ascontiguousarray(x[val])),
                   t(y[val].astype(np.int64)), t(np.ascontiguousarray(tx)), t(ty.astype(np.int64)), names,
                   tuple(float(m) for m in mean), tuple(float(max(s, 1e-3)) for s in std), skipped)


def normalize(x: torch.Tensor, mean: tuple[float, ...], std: tuple[float, ...]) -> torch.Tensor:
    """uint8 (B, H, W, C) → float (B, C, H, W), standardised per channel."""
    m = torch.tensor(mean).view(1, -1, 1, 1) * 255.0
    s = torch.tensor(std).view(1, -1, 1, 1) * 255.0
    return (x.permute(0, 3, 1, 2).float() - m) / s


def augment(x: torch.Tensor, shift: int, flip: bool, gen: torch.Generator) -> torch.Tensor:
    """Random translation by up to ``shift`` pixels (zero padding) and horizontal flips, on uint8 NHWC."""
    b, h, w, _ = x.shape
    if shift > 0:
        xp = torch.nn.functional.pad(x, (0, 0, shift, shift, shift, shift))
        dy = torch.randint(0, 2 * shift + 1, (b,), generator=gen)
        dx = torch.randint(0, 2 * shift + 1, (b,), generator=gen)
        rows = (dy[:, None] + torch.arange(h))[:, :, None]
        cols = (dx[:, None] + torch.arange(w))[:, None, :]
        x = xp[torch.arange(b)[:, None, None], rows, cols]
    if flip:
        mask = torch.rand(b, generator=gen) < 0.5
        x = torch.where(mask[:, None, None, None], x.flip(2), x)
    return x


def train_batches(ds: Dataset, cfg: DataConfig, batch_size: int, seed: int, epoch: int,
                  start: int = 0) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """Shuffled, augmented, normalised batches for one epoch; ``start`` skips batches (resume).
    The last incomplete batch is dropped so every step sees the same batch size."""
    gen = torch.Generator().manual_seed(seed * 1_000_003 + epoch)
    perm = torch.randperm(len(ds.train_y), generator=gen)
    for i in range(len(perm) // batch_size):
        idx = perm[i * batch_size:(i + 1) * batch_size]
        bgen = torch.Generator().manual_seed(seed * 1_000_003 + epoch * 100_003 + i)
        if i < start:
            continue
        x = augment(ds.train_x[idx], cfg.shift, cfg.flip, bgen)
        yield normalize(x, ds.mean, ds.std), ds.train_y[idx]


def steps_per_epoch(ds: Dataset, batch_size: int) -> int:
    return len(ds.train_y) // batch_size


def eval_batches(x: torch.Tensor, y: torch.Tensor, ds: Dataset, batch_size: int) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    for i in range(0, len(y), batch_size):
        yield normalize(x[i:i + batch_size], ds.mean, ds.std), y[i:i + batch_size]


def calibration_batches(ds: Dataset, batch_size: int, count: int, seed: int) -> list[torch.Tensor]:
    """A fixed set of un-augmented training batches for BatchNorm recalibration."""
    gen = torch.Generator().manual_seed(seed + 7)
    perm = torch.randperm(len(ds.train_y), generator=gen)
    out = []
    for i in range(min(count, max(1, len(perm) // batch_size))):
        out.append(normalize(ds.train_x[perm[i * batch_size:(i + 1) * batch_size]], ds.mean, ds.std))
    return out
