"""The rule that chooses a pick among measured candidates (no measuring, no files here).

Measure rungs that span the band under the limit, keep the most accurate whose measured
percentile leaves its guard, rescale predictions by measured/predicted after a miss; the
smallest subnet only as the last resort. choose.py measures and exports; this file decides.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Optional

import numpy as np

from tightfit.export.cut import CutResult
from tightfit.model.extract import StaticNet
from tightfit.ondevice.measurement import Measurement
from tightfit.search.evolution import Candidate


@dataclass
class Tried:
    cand: Candidate
    cut: Optional[CutResult]
    net: Optional[StaticNet]
    measured: Optional[Measurement] = None
    remeasured: bool = False  # measured a second time, its repeats pooled with the first ones


@dataclass
class Choice:
    pick: Tried
    fits: bool
    note: str
    tried: list[Tried]

    def ratio(self) -> Optional[float]:
        return measured_ratio(self.tried)


Measure = Callable[[list[Candidate], int], list[Tried]]
"""(candidates, how many were tried before) -> the candidates cut and measured (``Tried.measured`` set)."""
Remeasure = Callable[[list[Tried]], None]
"""Measure these again and pool the new repeats with the old (``Tried.measured`` replaced)."""


def measured_ratio(tried: list[Tried]) -> Optional[float]:
    """Median measured/predicted over every candidate measured: how far off the predictor is now."""
    r = [t.measured.figure_ms / t.cand.latency_ms for t in tried if t.measured and t.cand.latency_ms > 0]
    return float(np.median(r)) if r else None


def tie_points(best_pct: float, images: int) -> float:
    """Validation scores closer than this to the best are tied: one standard error of the best score as a
    binomial proportion over ``images``, 100 sqrt(p (1 - p) / n) points (common practice); 0 without images."""
    if images <= 0:
        return 0.0
    p = min(max(best_pct / 100.0, 0.0), 1.0)
    return 100.0 * math.sqrt(p * (1.0 - p) / images)


def tied_slowest(pool: list[Candidate], tie: float) -> Candidate:
    """The slowest (predicted) of the candidates within ``tie`` points of the most accurate in ``pool``.
    A larger subnet of the same supernet scored within the split's noise of a smaller one is the better bet,
    and it uses the budget the user gave: the demo's search at fbcf81f picked a subnet at 68 % of a budget
    whose candidates near 90 % scored 0.3 points lower on 1,020 images."""
    best = max(c.fitness for c in pool)
    return max((c for c in pool if c.fitness >= best - tie), key=lambda c: (c.latency_ms, c.fitness))


def _preferred(tried: list[Tried], tie: float) -> Tried:
    """Of measured candidates, the one using the most of the budget among those tied with the most accurate."""
    best = max(t.cand.fitness for t in tried)
    return max((t for t in tried if t.cand.fitness >= best - tie), key=lambda t: (t.measured.figure_ms, t.cand.fitness))


DEFAULT_GUARD = 0.05  # when a candidate's spread is unknown (one repeat) and no --guard is given


def guard_share(measured: Measurement, fixed: Optional[float]) -> float:
    """Share of the budget a measured figure must leave free: ``fixed`` (--guard) when given, else the
    figure's own guard from the spread of its repeats (ondevice/repeats.py guard_from_spread)."""
    if fixed is not None:
        return fixed
    own = measured.guard
    return DEFAULT_GUARD if own is None else float(own)


def guard_of(t: Tried, fixed: Optional[float]) -> float:
    return guard_share(t.measured, fixed)


def keeps_guard(t: Tried, budget_ms: float, fixed: Optional[float]) -> bool:
    return t.measured.fits(budget_ms, guard_of(t, fixed))


RUNG_BOTTOM = 0.9  # the lowest rung: this share of the usable budget (budget less the expected guard)


def rungs(pool: list[Candidate], top: int, bottom_ms: float, tie: float = 0.0) -> list[Candidate]:
    """Up to ``top`` candidates that span the band under the limit: at or under each of ``top`` limits
    spaced geometrically from the pool's highest prediction down to ``bottom_ms``, the most accurate (of
    those within ``tie`` of it, the slowest: the first rung is the most preferred of the whole pool), then
    the next in order if rungs coincide. The top few of an evolution crowd the limit and share one fate
    when measured; a rung lower down is what a miss falls to, instead of the smallest subnet."""
    if not pool:
        return []
    ceiling = max(c.latency_ms for c in pool)
    bottom = min(bottom_ms, ceiling)
    limits = [ceiling * (bottom / ceiling) ** (i / max(1, top - 1)) for i in range(top)] if ceiling > 0 else [ceiling] * top
    chosen: list[Candidate] = []
    for lim in limits:
        below = [c for c in pool if c.latency_ms <= lim and c not in chosen]
        if below:
            chosen.append(tied_slowest(below, tie))
    chosen += [c for c in pool if c not in chosen][:top - len(chosen)]
    return chosen[:top]


def measure_and_choose(ranked: list[Candidate], budget_ms: float, measure: Measure, top: int,
                       fallback: Callable[[], Candidate], say: Callable[[str], None],
                       guard: Optional[float] = None, rounds: int = 3,
                       remeasure: Optional[Remeasure] = None, tie: float = 0.0) -> Choice:
    """Measure ``top`` candidates interleaved: the most preferred and rungs down the band under the limit
    (``rungs``); the most accurate whose measured percentile fits within budget x (1 - its guard) wins,
    so that QA's later measurement still fits (guard: fixed, or None for each candidate's own from its
    measured spread). Scores within ``tie`` points of the most accurate are tied, and of tied candidates
    the slowest is preferred and measured first (``rungs``). If none does, rescale
    predictions by measured/predicted and measure rungs among those that should then fit; the smallest
    subnet only when no ranked candidate is left, and then the note names the fastest ones measured. If
    still none, the most accurate that fits the budget itself. With ``remeasure``, candidates that fit
    the budget but not their guard are measured once more before faster ones are tried: twice the
    repeats narrow a guard that the spread of a few made wide."""
    tried: list[Tried] = []
    ratio: Optional[float] = None
    for attempt in range(rounds):
        done = {t.cand.key for t in tried}
        expected = budget_ms * (1.0 - typical_guard(tried, guard))
        pool = [c for c in ranked if c.key not in done and (ratio is None or c.latency_ms * ratio <= expected)]
        last_resort = not pool
        if last_resort:
            last = fallback()
            pool = [] if last.key in done else [last]
        if not pool:
            break
        tried += measure(rungs(pool, top, RUNG_BOTTOM * expected / (ratio or 1.0), tie), len(tried))
        fitting = [t for t in tried if keeps_guard(t, budget_ms, guard)]
        if not fitting and remeasure is not None:
            fitting = _remeasure_close(tried, budget_ms, remeasure, top, guard, say)
        if fitting:
            pick = _preferred(fitting, tie)
            return Choice(pick, True, _fall_note(attempt, pick, tried, last_resort, budget_ms), tried)
        ratio = measured_ratio(tried)
        vs = "" if ratio is None else f"; measured = {ratio:.2f} x predicted"  # None: no positive prediction
        say(f"  none of {len(tried)} measured candidates fits the budget less its guard "
            f"({_guards_text(tried, guard)}{vs}): trying faster ones")
    within = [t for t in tried if t.measured.fits(budget_ms)]
    if within:
        return Choice(_preferred(within, tie), True, "no candidate kept its guard; this one fits the budget", tried)
    return Choice(min(tried, key=lambda t: t.measured.figure_ms), False,
                  "no candidate measured within the budget: this is the fastest one tried", tried)


def _fall_note(attempt: int, pick: Tried, tried: list[Tried], last_resort: bool, budget_ms: float) -> str:
    """Why the pick is not among the first candidates measured; for the last resort (the smallest
    subnet), the fastest candidates measured above it, so the user sees how close the front came."""
    if attempt == 0:
        return ""
    if not last_resort:
        return "the most accurate candidates measured over budget less their guard: fell back to a lower rung"
    others = sorted((t for t in tried if t is not pick), key=lambda t: t.measured.figure_ms)[:2]
    near = "; ".join(f"{t.cand.key} measured {t.measured.figure_ms:.4g} ms "
                     f"({100 * t.measured.use(budget_ms):.0f} % of the budget)" for t in others)
    return f"every ranked candidate measured over the budget less its guard, the fastest of them: {near}; fell back to the smallest subnet"


def _remeasure_close(tried: list[Tried], budget_ms: float, remeasure: Remeasure, top: int,
                     guard: Optional[float], say: Callable[[str], None]) -> list[Tried]:
    """Measure again the most accurate candidates that fit the budget but not their own guard; return
    those that keep it now. Only for guards from the spread (a fixed --guard does not narrow)."""
    if guard is not None:
        return []
    close = [t for t in tried if not t.remeasured and t.measured.fits(budget_ms)]
    close = sorted(close, key=lambda t: (-t.cand.fitness, t.measured.figure_ms))[:top]
    if not close:
        return []
    say(f"  {len(close)} candidate(s) fit the budget but not their guard ({_guards_text(close, None)}): "
        "measuring them again, pooled with the first repeats")
    remeasure(close)
    return [t for t in tried if keeps_guard(t, budget_ms, guard)]


def typical_guard(tried: list[Tried], fixed: Optional[float]) -> float:
    """The guard an unmeasured candidate will likely need: --guard, else the median of those measured
    (a corrected search centres on the budget less this, correction.corrected_limit)."""
    if fixed is not None:
        return fixed
    return float(np.median([guard_of(t, None) for t in tried])) if tried else DEFAULT_GUARD


def _guards_text(tried: list[Tried], fixed: Optional[float]) -> str:
    if fixed is not None:
        return f"--guard {100 * fixed:g} %"
    g = [100 * guard_of(t, None) for t in tried]
    return f"guards {min(g):.1f}-{max(g):.1f} % from their measured spread"
