"""Built-in dataset: top-down camera shots of machined parts at a conveyor inspection station.

Drawn from a seed, so the project trains and tests with no download. Parts are signed
distance shapes in a part-local frame (negative inside), turned into soft anti-aliased
coverage, shaded like bare metal and laid over a rubber belt with debris, neighbouring
parts, uneven lighting and sensor noise. Defect classes differ from their good twins by a
detail a few pixels across at 32x32 (hairline crack, missing tooth or ball, chipped
corner): that is what separates a large network from a tiny one. Material colour is drawn
independently of the class, so shape is the only reliable cue (greyscale mode works too).

Images are rendered a chunk at a time on broadcast coordinate grids (each class's shape on
its share of the chunk), and the layers are kept as grey weight maps that are coloured in
one mix at the end, so the cost is a few hundred numpy operations per chunk
rather than per image.
"""
from __future__ import annotations

import numpy as np

CLASS_NAMES: tuple[str, ...] = (
    "washer", "washer_cracked", "hex_nut", "square_nut", "gear", "gear_missing_tooth",
    "bolt", "spring", "l_bracket", "bearing", "bearing_missing_ball", "hex_nut_chipped",
)

_F = np.float32
_METALS = np.array([[0.66, 0.68, 0.72], [0.42, 0.44, 0.48], [0.78, 0.64, 0.34],
                    [0.80, 0.80, 0.74], [0.70, 0.48, 0.36]], _F)
_BELTS = np.array([[0.16, 0.17, 0.18], [0.13, 0.24, 0.17], [0.20, 0.22, 0.27], [0.28, 0.27, 0.25]], _F)


def _p(rng: np.random.Generator, b: int, lo: float, hi: float) -> np.ndarray:
    """Per-image parameter shaped (b, 1, 1) so it broadcasts over a batch of grids."""
    return rng.uniform(lo, hi, (b, 1, 1)).astype(_F)


def _colour(rng: np.random.Generator, table: np.ndarray, b: int, lo: float, hi: float) -> np.ndarray:
    """Pick a palette entry per image and vary its brightness; shaped (b, 3)."""
    return table[rng.integers(0, len(table), b)] * rng.uniform(lo, hi, (b, 1)).astype(_F)


def _noise(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """Zero-mean, unit-variance uniform noise, one random byte per value: far cheaper than
    Gaussian sampling, and sensor noise does not need the exact shape."""
    u = np.frombuffer(rng.bytes(int(np.prod(shape))), np.uint8).reshape(shape).astype(_F)
    u -= 127.5
    u *= _F(1 / 73.9)
    return u


def _box(u, v, hw, hh):
    return np.maximum(np.abs(u) - hw, np.abs(v) - hh)


def _hexagon(u, v, apothem):
    au, av = np.abs(u), np.abs(v)
    return np.maximum(av, 0.866 * au + 0.5 * av) - apothem


def _cut(sdf, hole):
    """Remove the region inside `hole` from a solid."""
    return np.maximum(sdf, -hole)


def _washer(u, v, rng):
    r, b = np.hypot(u, v), len(u)
    return np.maximum(r - _p(rng, b, 0.44, 0.50), _p(rng, b, 0.17, 0.25) - r)


def _washer_cracked(u, v, rng):
    """A hairline radial crack through one side of the ring, slightly wavy."""
    w = _p(rng, len(u), 0.015, 0.03)
    crack = np.maximum(np.abs(v + 0.025 * np.sin(u * 40)) - w, -u)
    return _cut(_washer(u, v, rng), crack)


def _nut(u, v, rng):
    """Hex nut outline, plus its corner radius so a defect can be cut relative to it."""
    b = len(u)
    apothem = _p(rng, b, 0.38, 0.43)
    return _cut(_hexagon(u, v, apothem), np.hypot(u, v) - _p(rng, b, 0.15, 0.21)), apothem / 0.866


def _hex_nut(u, v, rng):
    return _nut(u, v, rng)[0]


def _hex_nut_chipped(u, v, rng):
    """One corner knocked off: a round bite out of the vertex on the local +u axis."""
    sdf, corner = _nut(u, v, rng)
    return _cut(sdf, np.hypot(u - corner, v) - _p(rng, len(u), 0.15, 0.19))


def _square_nut(u, v, rng):
    b = len(u)
    side = _p(rng, b, 0.33, 0.38)
    return _cut(_box(u, v, side, side), np.hypot(u, v) - _p(rng, b, 0.14, 0.20))


def _teeth(u, v, rng, missing: bool):
    """Gear outline: a hub plus a smoothed square wave of teeth around the rim.

    The tooth count is fixed, so a gap reads as a defect rather than as another gear size.
    """
    b, n = len(u), 8
    r, phi = np.hypot(u, v), np.arctan2(v, u)
    tooth = np.clip(2.2 * np.cos(n * phi) + 0.4, 0.0, 1.0)
    if missing:
        tooth = tooth * (np.abs(phi) > np.pi / n)
    solid = r - (_p(rng, b, 0.31, 0.34) + 0.15 * tooth)
    return _cut(solid, r - _p(rng, b, 0.10, 0.15))


def _gear(u, v, rng):
    return _teeth(u, v, rng, False)


def _gear_missing_tooth(u, v, rng):
    return _teeth(u, v, rng, True)


def _bolt(u, v, rng):
    """Bolt lying on its side: a head block and a threaded shank."""
    b = len(u)
    length = _p(rng, b, 0.32, 0.42)
    head = _box(u + 0.36, v, 0.09, _p(rng, b, 0.18, 0.22))
    thread = 0.022 * np.sin(u * 75) * (u > -0.05)
    shank = _box(u - (length - 0.27) / 2, v, (length + 0.27) / 2, 0.085 + thread)
    return np.minimum(head, shank)


def _spring(u, v, rng):
    """Coil spring lying flat: a capsule sliced into slanted wire turns."""
    b = len(u)
    period = _p(rng, b, 0.15, 0.19)
    body = np.hypot(np.maximum(np.abs(u) - _p(rng, b, 0.30, 0.38), 0), v) - 0.15
    s = np.mod((u + 0.45 * v) / period, 1.0)
    return np.maximum(body, (0.2 - np.abs(s - 0.5)) * period)


def _l_bracket(u, v, rng):
    """Flat angle bracket with a mounting hole in each leg."""
    t = _p(rng, len(u), 0.11, 0.14)
    legs = np.minimum(_box(u + 0.45 - t, v, t, 0.45), _box(u, v - 0.45 + t, 0.45, t))
    holes = np.minimum(np.hypot(u + 0.45 - t, v + 0.22), np.hypot(u - 0.22, v - 0.45 + t))
    return _cut(legs, holes - 0.065)


def _balls(u, v, rng, missing: bool):
    """Ball bearing: outer and inner races with six balls between them."""
    b = len(u)
    r, phi = np.hypot(u, v), np.arctan2(v, u)
    step = _F(2 * np.pi / 6)
    k = np.round(phi / step)
    ang = k * step
    ball = np.hypot(u - 0.285 * np.cos(ang), v - 0.285 * np.sin(ang)) - _p(rng, b, 0.085, 0.095)
    if missing:
        ball = np.where(k == 0, 1.0, ball)
    outer = np.maximum(r - 0.48, 0.40 - r)
    inner = np.maximum(r - 0.17, _p(rng, b, 0.07, 0.10) - r)
    return np.minimum(np.minimum(outer, inner), ball)


def _bearing(u, v, rng):
    return _balls(u, v, rng, False)


def _bearing_missing_ball(u, v, rng):
    return _balls(u, v, rng, True)


_SHAPES = {name: globals()["_" + name] for name in CLASS_NAMES}


def _grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates on [-1, 1]: x shaped (1, 1, S), y shaped (1, S, 1).

    Kept thin so per-axis terms stay cheap; they broadcast to (b, S, S) when combined.
    """
    t = (np.arange(size, dtype=_F) + 0.5) / size * 2 - 1
    return t[None, None, :], t[None, :, None]


def _part_sdf(labels, x, y, rng):
    """Place every part (shift, turn, scale) and evaluate its class shape in the local frame."""
    b = len(labels)
    cx, cy, scale = _p(rng, b, -0.2, 0.2), _p(rng, b, -0.2, 0.2), _p(rng, b, 0.95, 1.25)
    th = _p(rng, b, 0, 2 * np.pi)
    dx, dy = (x - cx) / scale, (y - cy) / scale
    u, v = np.cos(th) * dx + np.sin(th) * dy, np.cos(th) * dy - np.sin(th) * dx
    sdf = np.empty(u.shape, _F)
    for k, name in enumerate(CLASS_NAMES):
        idx = np.flatnonzero(labels == k)
        if len(idx):
            sdf[idx] = _SHAPES[name](u[idx], v[idx], rng)
    return sdf * scale


def _coverage(sdf, size):
    """Soft anti-aliased inside-ness: one pixel wide ramp across the zero contour."""
    return np.clip(0.5 - sdf * (size / 2), 0.0, 1.0)


def _metal(sdf, x, y, rng):
    """Brushed-metal brightness: darker bevelled rims, a broad sheen across the part."""
    a = _p(rng, len(sdf), 0, 2 * np.pi)
    bevel = np.sqrt(np.clip(sdf * _F(-1 / 0.07), 0.0, 1.0))
    return (0.55 + 0.45 * bevel) * (1.0 + 0.3 * (x * np.cos(a) + y * np.sin(a)))


def _present(rng, b: int, chance: float, extent: np.ndarray) -> np.ndarray:
    """Keep a clutter item's extent with `chance`, else make it hugely negative (drawn nowhere)."""
    return np.where(rng.random((b, 1, 1)) < chance, extent, _F(-9.0))


def _scratch(x, y, rng, b, chance):
    """Signed distance to a randomly placed short scratch, present with `chance`."""
    px, py, a = _p(rng, b, -1, 1), _p(rng, b, -1, 1), _p(rng, b, 0, np.pi)
    along = (x - px) * np.cos(a) + (y - py) * np.sin(a)
    across = (y - py) * np.cos(a) - (x - px) * np.sin(a)
    width, half = _p(rng, b, 0.01, 0.03), _present(rng, b, chance, _p(rng, b, 0.1, 0.4))
    return np.maximum(np.abs(across) - width, np.abs(along) - half)


def _blobs(x, y, size, rng, b, count: int, chance: float, tones: tuple[float, float]):
    """Chips and oil drops: up to `count` small blobs, each light or dark; (tone, coverage)."""
    near, tone = np.full((b, size, size), 9.0, _F), np.zeros((b, size, size), _F)
    for _ in range(count):
        d = (x - _p(rng, b, -1, 1)) ** 2 + (y - _p(rng, b, -1, 1)) ** 2
        d = np.sqrt(d) - _present(rng, b, chance, _p(rng, b, 0.03, 0.08))
        pick = np.where(rng.random((b, 1, 1)) < 0.5, _F(tones[0]), _F(tones[1]))
        tone = np.where(d < near, pick, tone)
        near = np.minimum(near, d)
    return tone, _coverage(near, size)


def _belt(x, y, size, rng, b):
    """Rubber belt brightness: streaks along the travel direction, grain, scratches, debris."""
    tex = 1.0 + rng.normal(0, 0.07, (b, size, 1)).astype(_F) + _noise(rng, (b, size, size)) * 0.04
    scratch = np.minimum(_scratch(x, y, rng, b, 0.5), _scratch(x, y, rng, b, 0.5))
    tex *= 1.0 + 0.8 * _coverage(scratch, size)
    tone, cov = _blobs(x, y, size, rng, b, 3, 0.5, (0.3, 3.0))
    return tex * (1.0 + (tone - 1.0) * cov)


def _neighbour(x, y, size, rng, b):
    """A plain or holed disc from the next part in line, poking in from the frame edge."""
    ang, dist = _p(rng, b, 0, 2 * np.pi), _p(rng, b, 1.2, 1.55)
    r = np.hypot(x - dist * np.cos(ang), y - dist * np.sin(ang))
    hole = _present(rng, b, 0.5, _p(rng, b, 0.0, 0.25))
    sdf = np.maximum(r - _present(rng, b, 0.6, _p(rng, b, 0.35, 0.55)), hole - r)
    return _metal(sdf, x, y, rng), _coverage(sdf, size)


def _layers(labels, x, y, size, rng):
    """Grey weight map per layer (belt, neighbour, part, dust on top), shaped (b, 4, S, S).

    Each layer is a brightness field times its coverage after occlusion by the layers above;
    colours are applied later in one mix, so compositing stays single-channel.
    """
    b = len(labels)
    belt = _belt(x, y, size, rng, b)
    near, near_cov = _neighbour(x, y, size, rng, b)
    sdf = _part_sdf(labels, x, y, rng)
    cov = _coverage(sdf, size)
    shadow = 0.5 * (np.roll(cov, (1, 1), (1, 2)) + np.roll(cov, (2, 2), (1, 2)))
    dust, dust_cov = _blobs(x, y, size, rng, b, 1, 0.3, (0.08, 0.75))
    under = (1.0 - cov) * (1.0 - 0.5 * shadow) * (1.0 - dust_cov)
    return np.stack([belt * (1.0 - near_cov) * under, near * near_cov * under,
                     _metal(sdf, x, y, rng) * cov * (1.0 - dust_cov), dust * dust_cov], 1)


def _camera(weights, x, y, rng):
    """Colour the layers, add uneven lamp light, colour cast and sensor noise, quantise."""
    b = len(weights)
    colours = np.stack([_colour(rng, _BELTS, b, 0.8, 1.25), _colour(rng, _METALS, b, 0.7, 0.95),
                        _colour(rng, _METALS, b, 0.8, 1.1), np.ones((b, 3), _F)], 1)
    colours *= rng.uniform(0.9 * 255, 1.1 * 255, (b, 1, 3)).astype(_F)
    a = _p(rng, b, 0, 2 * np.pi)
    lamp = _p(rng, b, 0.75, 1.25) * (1.0 + _p(rng, b, 0.0, 0.3) * (x * np.cos(a) + y * np.sin(a)))
    weights = weights * lamp[:, None]
    img = weights[:, :1] * colours[:, 0, :, None, None]  # channel-first: long inner loops
    for i in range(1, 4):  # plain multiply-adds (no BLAS), so every machine rounds alike
        img += weights[:, i:i + 1] * colours[:, i, :, None, None]
    noise = _noise(rng, img.shape)
    noise *= _p(rng, b, 0.01 * 255, 0.035 * 255)[:, None]
    img += noise + 0.5
    return np.clip(img, 0, 255, out=img).astype(np.uint8).transpose(0, 2, 3, 1)


def generate_parts(n: int, size: int = 32, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """n images, uint8 array (n, size, size, 3), and int64 labels (n,), classes balanced
    (label i % num_classes then shuffled deterministically).

    Rendering goes in fixed-size chunks drawn from one generator, so the output depends
    only on (n, size, seed).
    """
    if n < 0 or size < 4:
        raise ValueError(f"need n >= 0 and size >= 4, got n={n}, size={size}")
    rng = np.random.default_rng(seed)
    labels = rng.permutation(np.arange(n, dtype=np.int64) % len(CLASS_NAMES))
    images = np.empty((n, size, size, 3), np.uint8)
    x, y = _grid(size)
    chunk = max(16, 2 ** 16 // (size * size))
    for start in range(0, n, chunk):
        part = labels[start:start + chunk]
        images[start:start + chunk] = _camera(_layers(part, x, y, size, rng), x, y, rng)
    return images, labels
