"""Save a grid of built-in dataset samples (one row per class) to a PNG, to eyeball the data.

Usage: python scripts/preview_dataset.py OUT.png [--size 32] [--per-class 8] [--seed 0]
"""
from __future__ import annotations

import argparse

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from tightfit.data.synthetic import CLASS_NAMES, generate_parts  # noqa: E402


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", help="PNG path to write")
    ap.add_argument("--size", type=int, default=32)
    ap.add_argument("--per-class", type=int, default=8)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    k, m = len(CLASS_NAMES), args.per_class
    x, y = generate_parts(k * m, args.size, args.seed)
    fig, axes = plt.subplots(k, m, figsize=(m * 1.1 + 1.6, k * 1.1), squeeze=False)
    for c, name in enumerate(CLASS_NAMES):
        for j, i in enumerate(np.flatnonzero(y == c)[:m]):
            ax = axes[c, j]
            ax.imshow(x[i], interpolation="nearest")
            ax.set_xticks([])
            ax.set_yticks([])
        axes[c, 0].set_ylabel(name, rotation=0, ha="right", va="center", fontsize=8)
    fig.tight_layout(pad=0.3)
    fig.savefig(args.out, dpi=100)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
