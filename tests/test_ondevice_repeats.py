"""The sustained-load figure, its guard and its words, against synthetic two-state timing sources.

The machines this tool measures switch between speed states under continuous load (this project's
2-core CI VM: two states 1.8 x apart, every few seconds, measured). The sources here are built so the
right answer is known: the long-run percentile of the same source.
"""
from __future__ import annotations

import numpy as np
import pytest

from tightfit.ondevice.repeats import MIN_GUARD, combine_repeats, describe_states, guard_from_spread
from tightfit.ondevice.timing import Protocol, summarize

FAST, SLOW = 1.0, 1.8


def two_state_runs(n: int, slow_share: float, rng: np.random.Generator, jitter: float = 0.02) -> np.ndarray:
    """n run times (ms): a contiguous slow stretch holding `slow_share` of the runs, 2 % jitter."""
    k = int(round(n * slow_share))
    ms = np.r_[np.full(n - k, FAST), np.full(k, SLOW)]
    return ms * (1 + jitter * rng.standard_normal(n))


def repeat(ms: np.ndarray) -> dict:
    """One repeat's summary, as the worker returns it (tightfit.ondevice.timing.measure_interleaved)."""
    return {**summarize(ms / 1e3), "times_ms": list(ms), "settled": True}


def test_pooled_figure_keeps_a_state_that_only_some_repeats_caught():
    # Five fresh processes: three caught the slow state for 5 % of their runs, two for 40 %. Run continuously,
    # the machine spends 19 % of its runs slow, so its p90 is a slow run (~1.8 ms). Each repeat's own p90 is
    # fast in three of five, so their median (the protocol until 2026-12-03) reports ~1.0 ms: 44 % optimistic.
    rng = np.random.default_rng(0)
    reps = [two_state_runs(2000, s, rng) for s in (0.05, 0.40, 0.05, 0.40, 0.05)]
    truth = float(np.percentile(np.concatenate(reps), 90))
    assert truth == pytest.approx(SLOW, rel=0.05)
    out = combine_repeats([repeat(r) for r in reps], Protocol(repeats=5))
    assert out.p90_ms == pytest.approx(truth, rel=0.02)
    naive = float(np.median([np.percentile(r, 90) for r in reps]))
    assert naive < 0.7 * truth                      # the estimator this test exists to rule out
    assert out.stable is False and "spread" in out.note   # the repeats disagree: flagged, and said why


def test_pooled_figure_reproduces_a_markov_two_state_machine_better_than_the_median_of_repeats():
    # A two-state Markov chain: leaves the fast state with probability 0.001 per run, the slow one with 0.003
    # (stretches of ~1,000 and ~330 runs, seconds at the demo's latencies; long-run slow share 25 %). Five
    # repeats of 1,500 runs, each from a random point of the chain; the sustained figure is the chain's p90
    # over 10^6 runs. Over 40 independent measurements the pooled p90 lands within +/-10 % of it more often.
    rng = np.random.default_rng(1)

    def chain(n: int) -> np.ndarray:
        slow, out = rng.random() < 0.25, np.empty(n)
        u = rng.random(n)
        for i in range(n):
            slow = (u[i] >= 0.003) if slow else (u[i] < 0.001)
            out[i] = SLOW if slow else FAST
        return out * (1 + 0.02 * rng.standard_normal(n))

    truth = float(np.percentile(chain(1_000_000), 90))
    assert truth == pytest.approx(SLOW, rel=0.05)
    pooled_ok = naive_ok = 0
    for _ in range(40):
        reps = [chain(1500) for _ in range(5)]
        pooled = combine_repeats([repeat(r) for r in reps], Protocol(repeats=5)).p90_ms
        naive = float(np.median([np.percentile(r, 90) for r in reps]))
        pooled_ok += abs(pooled / truth - 1) <= 0.10
        naive_ok += abs(naive / truth - 1) <= 0.10
    assert pooled_ok >= 36 and pooled_ok - naive_ok >= 4      # measured with this seed: 38 of 40 against 31


def test_guard_is_the_one_sided_95_percent_bound_on_a_later_pooled_figure():
    # By hand: figures 1.0, 1.1, 0.9, 1.0, 1.0 (n = 5): s = sqrt(0.02 / 4) = 0.0707; t(0.95, 4) = 2.132 (any
    # t table); guard = 2.132 * 0.0707 * sqrt(2 / 5) / 1.0 = 0.0954.
    assert guard_from_spread([1.0, 1.1, 0.9, 1.0, 1.0], 1.0) == pytest.approx(2.132 * np.sqrt(0.005) * np.sqrt(0.4))
    assert guard_from_spread([1.0] * 5, 1.0) == MIN_GUARD        # identical repeats: the floor
    assert guard_from_spread([1.0], 1.0) is None                 # one repeat: spread unknown


def test_guard_covers_a_later_measurement_95_percent_of_the_time():
    # The rule's promise, checked by simulation: each repeat's figure varies by 5 % between processes; a pick at
    # figure F fits a later pooled measurement F' <= F x (1 + guard) in at least ~95 % of 4,000 trials.
    rng = np.random.default_rng(2)
    covered = 0
    for _ in range(4000):
        now, later = 1 + 0.05 * rng.standard_normal(5), 1 + 0.05 * rng.standard_normal(5)
        figure = float(now.mean())
        covered += later.mean() <= figure * (1 + guard_from_spread(list(now), figure))
    assert 0.93 <= covered / 4000 <= 0.985


def test_guard_of_ten_repeats_against_a_later_five_still_covers_95_percent():
    # A candidate measured twice (10 repeats pooled, search/choose.py) meets QA's 5: the difference of the two
    # means has standard deviation s * sqrt(1/10 + 1/5), wider than sqrt(2/10) would assume. Same simulation.
    rng = np.random.default_rng(5)
    covered = narrow = 0
    for _ in range(4000):
        now, later = 1 + 0.05 * rng.standard_normal(10), 1 + 0.05 * rng.standard_normal(5)
        figure = float(now.mean())
        covered += later.mean() <= figure * (1 + guard_from_spread(list(now), figure, later=5))
        narrow += later.mean() <= figure * (1 + guard_from_spread(list(now), figure))
    assert 0.93 <= covered / 4000 <= 0.985 and narrow < covered


def test_states_are_described_in_words():
    rng = np.random.default_rng(3)
    two = describe_states(two_state_runs(5000, 0.38, rng))
    assert two.two_states and two.slow_share == pytest.approx(0.38, abs=0.01)
    assert two.text == "two speed states: 38 % of runs in the slower one (1.8 x the faster); p90 covers both"
    rare = describe_states(two_state_runs(5000, 0.07, rng))
    assert rare.text.endswith("p90 sits in the faster one")
    assert describe_states(FAST * (1 + 0.03 * rng.standard_normal(5000))).text == "one speed state"
