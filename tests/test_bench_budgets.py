"""Budget placement of the Fashion-MNIST benchmark (benchmarks/fashion_mnist_budgets.py), on the family's
p90 figures of the committed run at 9cfdefb (benchmarks/results/fashion-mnist.json, 1 thread), with each
rule written out by hand: above a member = 1.12 x its p90; between members = the geometric mean of two
adjacent members' p90, at the widest gaps (largest ratio of the two)."""
from __future__ import annotations

import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
from fashion_mnist_budgets import ABOVE, BETWEEN, Placement, place_budgets  # noqa: E402

P90 = {"w1.0-max": 0.4071, "w0.75-max": 0.3369, "w0.75-mid": 0.3093, "w0.5-mid": 0.1973, "w0.5-min": 0.1208}


def test_budgets_above_members_and_at_the_two_widest_gaps():
    places = place_budgets(P90, ("w0.5-min", "w0.5-mid", "w0.75-max"))
    # gaps by hand: min->0.5-mid 1.633, 0.5-mid->0.75-mid 1.568, 0.75-mid->0.75-max 1.089, 0.75-max->1.0-max 1.208
    assert places == [
        Placement(round(1.12 * 0.1208, 4), ABOVE, ("w0.5-min",)),
        Placement(round(math.sqrt(0.1208 * 0.1973), 4), BETWEEN, ("w0.5-min", "w0.5-mid")),
        Placement(round(1.12 * 0.1973, 4), ABOVE, ("w0.5-mid",)),
        Placement(round(math.sqrt(0.1973 * 0.3093), 4), BETWEEN, ("w0.5-mid", "w0.75-mid")),
        Placement(round(1.12 * 0.3369, 4), ABOVE, ("w0.75-max",)),
    ]


@pytest.mark.parametrize("neutral", [0, 1, 4])
def test_a_neutral_budget_lies_strictly_between_two_adjacent_members(neutral):
    between = [p for p in place_budgets(P90, (), neutral) if p.placement == BETWEEN]
    assert len(between) == neutral
    for p in between:
        small, large = (P90[n] for n in p.members)
        assert small < p.budget_ms < large and not any(small < v < large for v in P90.values())


def test_a_placement_round_trips_through_its_dict():
    p = Placement(0.1544, BETWEEN, ("w0.5-min", "w0.5-mid"))
    assert Placement.from_dict(p.to_dict()) == p
