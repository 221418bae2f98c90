"""Accuracies that say how sure they are: counts, a 95 % interval, and a paired comparison.

A top-1 figure is a count of right answers over a counted set of images, so it carries the
Wilson score interval (Wilson 1927), which keeps its coverage near 0 % and 100 % and on small
splits where the plain normal interval does not. Two models scored on the same images are compared
with McNemar's paired test (McNemar 1947) on the images exactly one of them gets right: far more
sensitive than comparing two intervals, since the images both get right or both get wrong say
nothing about which is better. Standard library and numpy only: QA's `verify --data` uses it on
the device, and the search and the manifest use the same record.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist
from typing import Any, Optional

import numpy as np

LEVEL = 0.95
Z95 = NormalDist().inv_cdf(0.5 + LEVEL / 2)   # 1.95996...: the two-sided 95 % normal quantile
EXACT_BELOW = 25  # fewer discordant images than this: exact binomial test, else chi-square (common practice)


def wilson_interval(correct: int, images: int, z: float = Z95) -> tuple[float, float]:
    """(low, high) as fractions: the Wilson score interval of correct / images. With no images every
    proportion is possible, so (0, 1)."""
    if not 0 <= correct <= images:
        raise ValueError(f"correct must be in 0..images, got {correct} of {images}")
    if images == 0:
        return 0.0, 1.0
    p, n = correct / images, images
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    # At 0/n and n/n the bound is exactly 0 or 1 (the two terms cancel); say so rather than leave rounding.
    low = 0.0 if correct == 0 else max(0.0, centre - half)
    return low, 1.0 if correct == images else min(1.0, centre + half)


@dataclass(frozen=True)
class Accuracy:
    """Top-1 on a counted set of images: the count and the interval travel with the figure."""
    correct: int
    images: int
    split: str = ""   # "validation", "test", or "" for images that are no split (a QA folder)

    def __post_init__(self) -> None:
        if not (isinstance(self.correct, (int, np.integer)) and isinstance(self.images, (int, np.integer))):
            raise TypeError(f"correct and images are counts, got {self.correct!r} and {self.images!r}")
        if not 0 <= self.correct <= self.images:
            raise ValueError(f"correct must be in 0..images, got {self.correct} of {self.images}")

    @classmethod
    def of(cls, hits: np.ndarray, split: str = "") -> Accuracy:
        """From one right/wrong flag per image."""
        hits = np.asarray(hits, dtype=bool)
        return cls(int(hits.sum()), int(hits.size), split)

    @classmethod
    def from_dict(cls, d: Any) -> Optional[Accuracy]:
        """A record as to_dict wrote it; one without ``correct`` (written before counts were kept)
        gets it back from top1 and images. None when the record has no usable figure."""
        if not isinstance(d, dict) or not _count(d.get("images")):
            return None
        correct = d.get("correct")
        if not _count(correct):
            top1 = d.get("top1")
            if not isinstance(top1, (int, float)) or isinstance(top1, bool) or not 0 <= top1 <= 100:
                return None
            correct = round(top1 * d["images"] / 100)   # top1 was 100·correct/images, rounded to 4 decimals
        if correct > d["images"]:
            return None
        return cls(int(correct), int(d["images"]), str(d.get("split") or ""))

    @property
    def top1(self) -> float:
        """Percent right (0 with no images, as the interval then says nothing is known)."""
        return 100.0 * self.correct / self.images if self.images else 0.0

    @property
    def interval_95(self) -> tuple[float, float]:
        """The Wilson score interval in percent."""
        low, high = wilson_interval(self.correct, self.images)
        return 100.0 * low, 100.0 * high

    def to_dict(self) -> dict[str, Any]:
        low, high = self.interval_95
        out: dict[str, Any] = {"top1": round(self.top1, 4), "correct": self.correct, "images": self.images,
                               "interval_95": [round(low, 4), round(high, 4)]}
        return {**out, "split": self.split} if self.split else out


def _count(v: Any) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 0


def format_accuracy(acc: Optional[Accuracy]) -> str:
    """The one printed form of an accuracy: ``87.3 % (83.9–90.1, n=1,000)``; '-' when there is none."""
    if acc is None:
        return "-"
    if acc.images == 0:
        return "- (n=0)"
    low, high = acc.interval_95
    return f"{acc.top1:.1f} % ({low:.1f}–{high:.1f}, n={acc.images:,})"


# ---- paired comparison ---------------------------------------------------------------------

@dataclass(frozen=True)
class PairedComparison:
    """McNemar's test of two models on the same images: only the images exactly one gets right count."""
    images: int
    only_first: int        # images the first model gets right and the second wrong
    only_second: int       # and the other way round
    p_value: float         # two-sided
    method: str            # "exact binomial" or "chi-square, continuity-corrected"
    against: str = ""      # what the second model is (a subnet key, say)

    def beyond_noise(self, alpha: float = 1 - LEVEL) -> bool:
        """The first is ahead and the lead is unlikely under 'equally accurate' (p < alpha)."""
        return self.only_first > self.only_second and self.p_value < alpha

    def to_dict(self) -> dict[str, Any]:
        out = {"images": self.images, "only_first_right": self.only_first, "only_second_right": self.only_second,
               "p_value": round(self.p_value, 6), "method": f"McNemar, {self.method}",
               "beyond_noise": self.beyond_noise()}
        return {"against": self.against, **out} if self.against else out


def exact_p_value(only_first: int, only_second: int) -> float:
    """Two-sided binomial test of min(b, c) among b + c discordant images at p = 1/2 (exact integers)."""
    n = only_first + only_second
    tail = sum(math.comb(n, k) for k in range(min(only_first, only_second) + 1))
    return min(1.0, 2 * tail / 2 ** n)


def chi_square_p_value(only_first: int, only_second: int) -> float:
    """(|b − c| − 1)² / (b + c) against chi-square with 1 degree of freedom (its survival is erfc(√(x/2)))."""
    n = only_first + only_second
    if n == 0:
        return 1.0
    statistic = (abs(only_first - only_second) - 1) ** 2 / n
    return math.erfc(math.sqrt(statistic / 2))


def paired_comparison(first: np.ndarray, second: np.ndarray, *, exact: Optional[bool] = None,
                      against: str = "") -> PairedComparison:
    """Compare two right/wrong vectors over the same images in the same order. ``exact`` None: the
    exact test below EXACT_BELOW discordant images, the corrected chi-square from there."""
    a, b = np.asarray(first, dtype=bool), np.asarray(second, dtype=bool)
    if a.shape != b.shape or a.ndim != 1:
        raise ValueError(f"the two vectors must cover the same images, got shapes {a.shape} and {b.shape}")
    only_first, only_second = int((a & ~b).sum()), int((~a & b).sum())
    if exact is None:
        exact = only_first + only_second < EXACT_BELOW
    p = exact_p_value(only_first, only_second) if exact else chi_square_p_value(only_first, only_second)
    method = "exact binomial" if exact else "chi-square, continuity-corrected"
    return PairedComparison(int(a.size), only_first, only_second, p, method, against)
