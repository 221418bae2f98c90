"""Choosing the pick from measured candidates (injected measurements)."""
from __future__ import annotations

import pytest

from tightfit.search.choose import Choice, Tried, measure_and_choose
from tightfit.search.evolution import Candidate

def test_choice_ratio_is_the_median_over_measured_candidates():
    # Median, not mean: one candidate caught by a hiccup must not move the correction (common practice).

    def tried(key, predicted, measured):
        return Tried(Candidate(key, None, 90.0, predicted, 0), None, None,
                     None if measured is None else {"budget_stat_ms": measured})
    measured = [tried("a", 1.0, 1.1), tried("b", 2.0, 2.2), tried("c", 1.0, 3.0)]   # ratios 1.1, 1.1, 3.0
    assert Choice(measured[0], True, "", measured).ratio() == pytest.approx(1.1)     # the mean would be 1.73
    unmeasured = [tried("d", 1.0, None)]                                             # another device
    assert Choice(unmeasured[0], True, "", unmeasured).ratio() is None
    assert Choice(measured[0], True, "", measured + unmeasured).ratio() == pytest.approx(1.1)


def test_pick_leaves_the_guard_margin_when_a_candidate_can():
    """A measured pick must fit budget x (1 - guard) if any measured candidate does; otherwise the most
    accurate that fits the budget itself. (Guard band: common practice for a figure that the next
    measurement session will move by a few percent; this project measured 8-12 % on p90.)"""
    measured = {"a": 0.98, "b": 0.93, "c": 0.70}
    cands = [Candidate(k, None, acc, 0.9, 0) for k, acc in (("a", 90.0), ("b", 89.0), ("c", 85.0))]

    def measure(cs, start):
        return [Tried(c, None, None, {"budget_stat_ms": measured[c.key]}) for c in cs]

    def choose(ranked, guard, top=3):
        choice = measure_and_choose(ranked, 1.0, measure, top, lambda: ranked[-1], lambda line: None, guard=guard)
        return choice.pick.cand.key, choice.fits, choice.note
    assert choose(cands, 0.0) == ("a", True, "")        # 0.98 <= 1.0: the most accurate fits
    assert choose(cands, 0.05) == ("b", True, "")       # 0.98 > 0.95: the next most accurate leaves the margin
    key, fits, note = choose(cands[:1], 0.05, top=1)    # nothing else to try: it still fits the budget itself
    assert (key, fits) == ("a", True) and "guard" in note
