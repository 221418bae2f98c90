"""Built-in parts dataset: reproducible, balanced, classes distinct, learnable but not trivial."""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from tightfit.data import synthetic
from tightfit.data.synthetic import CLASS_NAMES, generate_parts

K = len(CLASS_NAMES)


def test_class_names_are_unique_and_enough():
    assert len(CLASS_NAMES) >= 10
    assert len(set(CLASS_NAMES)) == K
    assert all(isinstance(n, str) and n for n in CLASS_NAMES)


def test_same_arguments_give_byte_identical_output():
    x1, y1 = generate_parts(50, 32, seed=5)
    x2, y2 = generate_parts(50, 32, seed=5)
    assert x1.tobytes() == x2.tobytes()
    assert y1.tobytes() == y2.tobytes()


def test_different_seeds_differ():
    x1, y1 = generate_parts(50, 32, seed=1)
    x2, y2 = generate_parts(50, 32, seed=2)
    assert not np.array_equal(x1, x2)
    assert not np.array_equal(y1, y2)


@pytest.mark.parametrize("size", [24, 32, 48, 64])
def test_shapes_dtypes_and_value_range(size):
    x, y = generate_parts(30, size, seed=0)
    assert x.shape == (30, size, size, 3) and x.dtype == np.uint8
    assert y.shape == (30,) and y.dtype == np.int64
    assert y.min() >= 0 and y.max() < K
    assert x.min() < 60 and x.max() > 150  # dark belt and bright metal both present


def test_empty_request_and_bad_arguments():
    x, y = generate_parts(0, 32)
    assert x.shape == (0, 32, 32, 3) and y.shape == (0,)
    with pytest.raises(ValueError):
        generate_parts(-1)


@pytest.mark.parametrize("n", [K * 10, K * 10 + 5, 7])
def test_classes_are_balanced(n):
    _, y = generate_parts(n, 24, seed=3)
    expected = np.bincount(np.arange(n) % K, minlength=K)  # label i % K, then shuffled
    np.testing.assert_array_equal(np.bincount(y, minlength=K), expected)


def test_labels_are_shuffled():
    _, y = generate_parts(K * 4, 24, seed=0)
    assert not np.array_equal(y, np.arange(K * 4) % K)


def test_every_class_shape_is_distinct():
    """Render each class outline at one fixed pose: every pair must differ in visible pixels."""
    t = np.linspace(-0.6, 0.6, 96, dtype=np.float32)
    u, v = t[None, None, :].repeat(96, 1), t[None, :, None].repeat(96, 2)
    masks = [synthetic._SHAPES[name](u, v, np.random.default_rng(0))[0] < 0 for name in CLASS_NAMES]
    for a, b in itertools.combinations(range(K), 2):
        differ = np.count_nonzero(masks[a] != masks[b])
        assert differ >= 20, f"{CLASS_NAMES[a]} vs {CLASS_NAMES[b]}: only {differ} pixels differ"
    for name, m in zip(CLASS_NAMES, masks):
        assert 0.05 < m.mean() < 0.8, name


def test_every_class_shows_a_part():
    """The centre region holds more metal (brighter, more varied) than the corners."""
    x, y = generate_parts(K * 10, 32, seed=4)
    g = x.astype(np.float32).mean(-1)
    for k, name in enumerate(CLASS_NAMES):
        imgs = g[y == k]
        centre = imgs[:, 10:22, 10:22].std(axis=(1, 2)).mean()
        corner = imgs[:, :6, :6].std(axis=(1, 2)).mean()
        assert centre > corner * 1.5, name


def test_learnable_but_not_trivial():
    """Nearest class mean on normalised 16x16 grey pixels: above chance, far from perfect."""
    x, y = generate_parts(K * 120, 32, seed=7)
    g = x.astype(np.float32).mean(-1).reshape(len(x), 16, 2, 16, 2).mean((2, 4)).reshape(len(x), -1)
    f = (g - g.mean(1, keepdims=True)) / (g.std(1, keepdims=True) + 1e-6)
    split = K * 80
    means = np.stack([f[:split][y[:split] == k].mean(0) for k in range(K)])
    pred = ((f[split:, None, :] - means[None]) ** 2).sum(-1).argmin(1)
    acc = float((pred == y[split:]).mean())
    assert 2.0 / K < acc < 0.6, acc
