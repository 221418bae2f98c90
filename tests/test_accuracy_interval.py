"""Accuracy records: the Wilson score interval and McNemar's paired test against statsmodels (PyPI)
and the binomial formula written out by hand; the one printed form; old manifest records."""
from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.proportion import proportion_confint

from tightfit.ondevice.accuracy import (Accuracy, format_accuracy, paired_comparison, wilson_interval)

COUNTS = [(0, 1), (1, 1), (0, 10), (10, 10), (1, 10), (9, 10), (0, 229), (229, 229), (207, 229), (5, 270),
          (241, 270), (873, 1000), (1, 1000), (999, 1000), (5000, 10000), (9712, 10000)]


@pytest.mark.parametrize("correct,images", COUNTS)
def test_wilson_interval_matches_statsmodels(correct, images):
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson") (Wilson 1927), alpha 0.05;
    # the cases include 0/n and n/n, where the interval must still have width (unlike the normal one).
    low, high = wilson_interval(correct, images)
    ref_low, ref_high = proportion_confint(correct, images, alpha=0.05, method="wilson")
    assert low == pytest.approx(ref_low, abs=1e-12) and high == pytest.approx(ref_high, abs=1e-12)
    assert 0.0 <= low <= correct / images <= high <= 1.0 and high - low > 0


def test_accuracy_record_writes_count_and_interval_in_percent():
    # Reference: statsmodels' Wilson interval of the same counts, scaled to percent.
    acc = Accuracy(207, 229, "validation")
    d = acc.to_dict()
    ref = proportion_confint(207, 229, alpha=0.05, method="wilson")
    assert d["images"] == 229 and d["correct"] == 207 and d["split"] == "validation"
    assert d["top1"] == pytest.approx(100 * 207 / 229, abs=1e-4)
    assert d["interval_95"] == pytest.approx([100 * ref[0], 100 * ref[1]], abs=1e-4)
    assert Accuracy.from_dict(d) == acc
    assert Accuracy.of(np.arange(229) < 207, "validation") == acc


def test_printed_form():
    # The printed form written out by hand: one decimal, en dash, thousands separator; bounds from statsmodels.
    low, high = (100 * v for v in proportion_confint(873, 1000, alpha=0.05, method="wilson"))
    assert format_accuracy(Accuracy(873, 1000)) == f"87.3 % ({low:.1f}–{high:.1f}, n=1,000)"
    assert format_accuracy(Accuracy(873, 1000)).startswith("87.3 % (85.1–89.2, n=1,000)")  # values from the above
    assert format_accuracy(None) == "-"


def test_old_records_without_counts_still_read():
    # A manifest written before counts were kept has top1 rounded to 4 decimals and images: the count
    # comes back exactly (the rounding moves 100·c/n by at most 5e-5, far less than one image's step).
    rng = np.random.default_rng(0)
    for n in rng.integers(1, 1_000_000, 200):
        c = int(rng.integers(0, n + 1))
        old = {"top1": round(100 * c / int(n), 4), "images": int(n), "split": "test"}
        assert Accuracy.from_dict(old) == Accuracy(c, int(n), "test")
    assert Accuracy.from_dict({"top1": 61.0}) is None and Accuracy.from_dict(None) is None
    assert Accuracy.from_dict({"top1": 101.0, "images": 10}) is None


def test_counts_are_checked():
    with pytest.raises(ValueError):
        Accuracy(11, 10)
    with pytest.raises(TypeError):
        Accuracy(81.234, 600, "validation")  # a percentage is not a count


def _vectors(both: int, only_first: int, only_second: int, neither: int) -> tuple[np.ndarray, np.ndarray]:
    """Right/wrong flags of two models over the same images, with the given 2x2 table, shuffled."""
    first = np.array([1] * both + [1] * only_first + [0] * only_second + [0] * neither, bool)
    second = np.array([1] * both + [0] * only_first + [1] * only_second + [0] * neither, bool)
    order = np.random.default_rng(1).permutation(first.size)
    return first[order], second[order]


@pytest.mark.parametrize("table", [(60, 15, 5, 20), (200, 9, 1, 30), (150, 3, 4, 43), (10, 0, 6, 4),
                                   (400, 40, 22, 38), (700, 31, 30, 239), (50, 0, 0, 50)])
def test_mcnemar_matches_statsmodels(table):
    # Reference: statsmodels.stats.contingency_tables.mcnemar on the 2x2 table [[both, only first],
    # [only second, neither]]: exact=True (binomial) and exact=False with correction=True (McNemar 1947
    # with Edwards' continuity correction).
    both, b, c, neither = table
    first, second = _vectors(*table)
    exact = paired_comparison(first, second, exact=True)
    approx = paired_comparison(first, second, exact=False)
    assert (exact.only_first, exact.only_second, exact.images) == (b, c, sum(table))
    assert exact.p_value == pytest.approx(mcnemar([[both, b], [c, neither]], exact=True).pvalue, rel=1e-9)
    if b + c:  # statsmodels divides by b + c; with no discordant images there is no evidence: p = 1
        ref = mcnemar([[both, b], [c, neither]], exact=False, correction=True).pvalue
        assert approx.p_value == pytest.approx(ref, rel=1e-9)
    else:
        assert approx.p_value == 1.0


def test_mcnemar_known_answers_by_hand():
    # The binomial formula written out: p = 2 · Σ_{k ≤ min(b,c)} C(b+c, k) / 2^(b+c).
    # 6 discordant images all won by the second: p = 2 / 64.
    first, second = _vectors(10, 0, 6, 4)
    result = paired_comparison(first, second)
    assert result.method == "exact binomial" and result.p_value == pytest.approx(2 / 64)
    assert not result.beyond_noise()            # significant, but the first is behind
    assert paired_comparison(second, first).beyond_noise()
    # 15 against 5: p = 2 · (1 + 20 + 190 + 1140 + 4845 + 15504) / 2^20 = 0.0414 (< 0.05: beyond noise).
    first, second = _vectors(60, 15, 5, 20)
    assert paired_comparison(first, second).p_value == pytest.approx(2 * 21700 / 2 ** 20)
    assert paired_comparison(first, second).beyond_noise()
    # Equal discordant counts: no evidence either way.
    first, second = _vectors(100, 7, 7, 10)
    assert paired_comparison(first, second).p_value == 1.0
    # 40 against 22 (62 discordant, over the exact threshold): chi-square (|40 − 22| − 1)² / 62 with 1 degree
    # of freedom, its survival function written as erfc(√(x / 2)).
    first, second = _vectors(400, 40, 22, 38)
    result = paired_comparison(first, second)
    assert result.method.startswith("chi-square")
    assert result.p_value == pytest.approx(math.erfc(math.sqrt(17 ** 2 / 62 / 2)))


def test_paired_comparison_needs_the_same_images():
    with pytest.raises(ValueError):
        paired_comparison(np.ones(10, bool), np.ones(11, bool))
