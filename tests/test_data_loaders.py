"""Fashion-MNIST IDX reader and image-folder loader, checked against outside references."""
from __future__ import annotations

import gzip
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from tightfit.data.fashion_mnist import (CLASS_NAMES, DEFAULT_DIR, MEAN, STD,
                                         load_fashion_mnist, read_idx)
from tightfit.data.folder import load_image_folder
from tightfit.errors import UserError

FMNIST = Path(DEFAULT_DIR)
needs_fmnist = pytest.mark.skipif(
    not (FMNIST / "train-images-idx3-ubyte.gz").is_file(),
    reason=f"Fashion-MNIST not installed at {DEFAULT_DIR} (apt-get install dataset-fashion-mnist)")


# ---------------------------------------------------------------- Fashion-MNIST

@pytest.fixture(scope="module")
def fmnist() -> tuple[np.ndarray, ...]:
    return load_fashion_mnist()


@needs_fmnist
def test_fmnist_shapes_and_balance(fmnist):
    train_x, train_y, test_x, test_y = fmnist
    # Reference: Xiao et al. 2017 (Fashion-MNIST paper), Sec. 2: 28x28 grey, 10 classes,
    # 60,000 training + 10,000 test images, 7,000 per class overall.
    assert train_x.shape == (60000, 28, 28) and train_x.dtype == np.uint8
    assert test_x.shape == (10000, 28, 28) and test_x.dtype == np.uint8
    assert train_y.dtype == np.int64 and test_y.dtype == np.int64
    assert len(CLASS_NAMES) == 10
    # Reference: Xiao et al. 2017, balanced classes -> 6,000 per class (train), 1,000 (test).
    assert np.bincount(train_y, minlength=10).tolist() == [6000] * 10
    assert np.bincount(test_y, minlength=10).tolist() == [1000] * 10


@needs_fmnist
def test_fmnist_training_statistics(fmnist):
    x = fmnist[0].astype(np.float64) / 255.0
    # Reference: commonly quoted Fashion-MNIST normalisation constants (0.2860, 0.3530),
    # recalled from memory / common practice, not taken from the dataset paper.
    assert round(float(x.mean()), 4) == 0.2860 == MEAN
    assert round(float(x.std()), 4) == 0.3530 == STD


@needs_fmnist
@pytest.mark.parametrize("stem,offset,shape", [
    ("t10k-images-idx3-ubyte", 16, (-1, 28, 28)),
    ("t10k-labels-idx1-ubyte", 8, (-1,)),
])
def test_read_idx_matches_independent_parse(stem, offset, shape):
    # Reference: IDX format description on LeCun et al.'s MNIST page (16-byte header for
    # images, 8-byte header for labels, big-endian, unsigned bytes), parsed here with
    # gzip.open + numpy.frombuffer only.
    with gzip.open(FMNIST / f"{stem}.gz", "rb") as fh:
        raw = fh.read()
    expected = np.frombuffer(raw, dtype=np.uint8, offset=offset).reshape(shape)
    np.testing.assert_array_equal(read_idx(FMNIST / f"{stem}.gz"), expected)


@needs_fmnist
def test_plain_files_accepted(tmp_path):
    # Reference: same independent gzip + numpy.frombuffer parse, offset 8 (IDX labels header).
    for stem in ("train-images-idx3-ubyte", "train-labels-idx1-ubyte", "t10k-images-idx3-ubyte"):
        (tmp_path / f"{stem}.gz").symlink_to(FMNIST / f"{stem}.gz")
    with gzip.open(FMNIST / "t10k-labels-idx1-ubyte.gz", "rb") as fh:
        raw = fh.read()
    (tmp_path / "t10k-labels-idx1-ubyte").write_bytes(raw)
    *_, test_y = load_fashion_mnist(str(tmp_path))
    np.testing.assert_array_equal(test_y, np.frombuffer(raw, np.uint8, offset=8))


@needs_fmnist
def test_truncated_gz_is_user_error(tmp_path):
    src = (FMNIST / "t10k-labels-idx1-ubyte.gz").read_bytes()
    bad = tmp_path / "t10k-labels-idx1-ubyte.gz"
    bad.write_bytes(src[: len(src) // 2])
    with pytest.raises(UserError, match="t10k-labels-idx1-ubyte.gz"):
        read_idx(bad)


def test_bad_magic_and_size_mismatch(tmp_path):
    # Reference: IDX format (LeCun et al. MNIST page): magic = 0x00 0x00 <type> <ndim>.
    wrong = tmp_path / "wrong"
    wrong.write_bytes(b"\x12\x34\x08\x01" + (3).to_bytes(4, "big") + b"abc")
    with pytest.raises(UserError, match="magic"):
        read_idx(wrong)
    short = tmp_path / "short"
    short.write_bytes(b"\x00\x00\x08\x01" + (5).to_bytes(4, "big") + b"abc")
    with pytest.raises(UserError, match="short"):
        read_idx(short)
    ok = tmp_path / "ok"   # 0x0B = big-endian int16 per the IDX type table
    ok.write_bytes(b"\x00\x00\x0b\x01" + (2).to_bytes(4, "big") + b"\x01\x00\xff\xfe")
    np.testing.assert_array_equal(read_idx(ok), np.array([256, -2], dtype=np.int16))


def test_missing_folder_and_file(tmp_path):
    with pytest.raises(UserError, match="apt-get install dataset-fashion-mnist"):
        load_fashion_mnist(str(tmp_path / "nope"))
    with pytest.raises(UserError, match="train-images-idx3-ubyte.gz.*data.path"):
        load_fashion_mnist(str(tmp_path))


# ---------------------------------------------------------------- image folders

def _pattern(w: int, h: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 256, size=(h, w, 3), dtype=np.uint8)


@pytest.fixture()
def tree(tmp_path) -> Path:
    """cats: two RGB PNGs + one grey JPEG; dogs: one RGB PNG + a corrupt .png; plus noise."""
    root = tmp_path / "imgs"
    (root / "cats").mkdir(parents=True)
    (root / "dogs").mkdir()
    (root / ".hidden_class").mkdir()
    Image.fromarray(_pattern(40, 20, 0)).save(root / "cats" / "a.png")
    Image.fromarray(_pattern(16, 16, 1)).save(root / "cats" / "b.png")
    Image.fromarray(_pattern(12, 30, 2)[..., 0]).save(root / "cats" / "c.jpg", quality=95)
    Image.fromarray(_pattern(64, 64, 3)).save(root / "dogs" / "d.png")
    (root / "dogs" / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n not really a png")
    (root / "dogs" / ".DS_Store").write_bytes(b"junk")
    (root / "dogs" / "notes.txt").write_text("not an image")
    return root


def test_folder_shapes_order_and_corrupt(tree):
    with pytest.warns(UserWarning, match="skipped 1"):
        x, y, names, skipped = load_image_folder(str(tree), 16, 3)
    assert names == ("cats", "dogs")            # sorted sub-folder names, hidden ignored
    assert x.shape == (4, 16, 16, 3) and x.dtype == np.uint8
    assert y.tolist() == [0, 0, 0, 1] and y.dtype == np.int64
    assert skipped == [str(tree / "dogs" / "broken.png")]


def test_grey_to_rgb_matches_pil_convert(tree):
    with pytest.warns(UserWarning):
        x, *_ = load_image_folder(str(tree), 12, 3)
    # Reference: PIL Image.convert("RGB"); 12 px is the short side so no resize, crop only.
    with Image.open(tree / "cats" / "c.jpg") as img:
        ref = np.asarray(img.convert("RGB"))[9:21]
    np.testing.assert_array_equal(x[2], ref)


def test_resize_matches_pil_bilinear(tree):
    with pytest.warns(UserWarning):
        x, *_ = load_image_folder(str(tree), 32, 3)
        g, *_ = load_image_folder(str(tree), 10, 1)
    # Reference: PIL Image.resize(..., BILINEAR) on a square image (no crop needed).
    with Image.open(tree / "dogs" / "d.png") as img:
        ref = np.asarray(img.resize((32, 32), Image.Resampling.BILINEAR))
    np.testing.assert_array_equal(x[3], ref)
    # Reference: PIL convert("L") + resize 40x20 -> 20x10 bilinear, then centre crop cols 5:15.
    with Image.open(tree / "cats" / "a.png") as img:
        ref = np.asarray(img.convert("L").resize((20, 10), Image.Resampling.BILINEAR))[:, 5:15]
    np.testing.assert_array_equal(g[0, :, :, 0], ref)


def test_folder_errors(tmp_path, tree):
    with pytest.raises(UserError, match="does not exist"):
        load_image_folder(str(tmp_path / "missing"), 16, 3)
    with pytest.raises(UserError, match="not a directory"):
        load_image_folder(str(tree / "cats" / "a.png"), 16, 3)
    shutil.rmtree(tree / "dogs")
    with pytest.raises(UserError, match="at least 2 classes"):
        load_image_folder(str(tree), 16, 3)
    (tree / "birds").mkdir()
    (tree / "birds" / "readme.txt").write_text("no images here")
    with pytest.raises(UserError, match="birds"):
        load_image_folder(str(tree), 16, 3)
    with pytest.raises(UserError, match="channels"):
        load_image_folder(str(tree), 16, 2)


def test_mostly_corrupt_and_unreadable_class(tmp_path):
    root = tmp_path / "r"
    for cls in ("a", "b"):
        (root / cls).mkdir(parents=True)
        Image.fromarray(_pattern(8, 8, 0)).save(root / cls / "ok.png")
    for i in range(3):
        (root / "a" / f"bad{i}.png").write_bytes(b"garbage")
    with pytest.raises(UserError, match="3 of 5"):
        load_image_folder(str(root), 8, 3)
    for i in range(3):
        (root / "a" / f"bad{i}.png").unlink()
    (root / "b" / "ok.png").write_bytes(b"garbage")   # class b now has no readable image
    with pytest.raises(UserError, match="no readable image"):
        load_image_folder(str(root), 8, 3)


@pytest.mark.skipif(not Path("/usr/share/datasets/fashion-mnist").is_dir(),
                    reason="Debian package dataset-fashion-mnist not installed")
def test_fashion_mnist_splits_validation_from_train_and_test_is_the_official_test():
    # Xiao et al. 2017: 60,000 training and 10,000 test images. Validation is carved from the training
    # images (never the official test set); the test split is the official test set, whole.
    from tightfit.data.dataset import load_dataset
    from tightfit.data.fashion_mnist import DEFAULT_DIR, load_fashion_mnist
    from tightfit.recipe import DataConfig
    ds = load_dataset(DataConfig(source="fashion-mnist", path=DEFAULT_DIR, image_size=28, channels=1), seed=0)
    tr, _, te, te_y = load_fashion_mnist(DEFAULT_DIR)

    def rows(a):
        return {bytes(r) for r in np.asarray(a).reshape(len(a), -1)}
    train, val, test = rows(ds.train_x), rows(ds.val_x), rows(ds.test_x)
    official_train, official_test = rows(tr), rows(te)
    assert len(ds.train_y) + len(ds.val_y) == 60000 and len(ds.test_y) == 10000
    assert val <= official_train and train <= official_train and test == official_test
    assert not (val & train) and np.array_equal(np.sort(ds.test_y.numpy()), np.sort(te_y))
