"""How sure a choice is: the pick against the runner-up on the same validation images, and whether the
validation split can tell the candidates under a budget apart at all.

Both models are scored image by image on the whole validation split (the images the manifest's
validation accuracy counts), so McNemar's paired test (ondevice/accuracy.py) sees only the images
exactly one of them gets right. Per-image vectors are computed for these two only.
"""
from __future__ import annotations

from typing import Optional

from tightfit.ondevice.accuracy import Accuracy, PairedComparison
from tightfit.search.choice_rule import Choice, Tried, keeps_guard


def runner_up(choice: Choice, budget_ms: float, guard: Optional[float]) -> Optional[Tried]:
    """The most accurate other candidate measured that keeps its guard as well: the one the pick beat.
    None when no other candidate could have been the pick."""
    rivals = [t for t in choice.tried if t is not choice.pick and t.measured is not None
              and keeps_guard(t, budget_ms, guard)]
    return max(rivals, key=lambda t: (t.cand.fitness, -t.measured.figure_ms), default=None)


def contenders(choice: Choice, budget_ms: float, guard: Optional[float]) -> list[Tried]:
    """The pick and every measured candidate that could have been it (kept its guard)."""
    return [choice.pick] + [t for t in choice.tried if t is not choice.pick and t.measured is not None
                            and keeps_guard(t, budget_ms, guard)]


def too_small_to_separate(lead: Optional[PairedComparison], validation: Accuracy, scores: list[float]) -> bool:
    """The rule: the split cannot separate the front under a budget when the pick's lead over the
    runner-up is not beyond noise (McNemar, 5 %) and the pick's 95 % interval is wider than the spread
    of the contenders' validation scores (points)."""
    if lead is None or len(scores) < 2 or lead.beyond_noise():
        return False
    low, high = validation.interval_95
    return high - low > max(scores) - min(scores)


def too_small_line(lead: PairedComparison, validation: Accuracy, scores: list[float], label: str) -> str:
    """The one line the search prints when the rule above holds, with what to change."""
    low, high = validation.interval_95
    return (f"  {label}: {validation.images:,} validation images cannot separate the {len(scores)} candidates that fit "
            f"(their scores span {max(scores) - min(scores):.2f} points, the pick's 95 % interval "
            f"{high - low:.2f}; its lead over {lead.against} is not beyond noise, McNemar p = {lead.p_value:.2g}): "
            "give validation more images (the recipe's data.val_fraction)")
