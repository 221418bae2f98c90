"""Repeats of an interleaved measurement in fresh processes, pooled into one sustained-load figure.

A budget applies to a model running continuously, and small CPUs (a shared VM, a phone, a fanless
box) switch between speed states every few seconds. One process sees only a stretch of that, so:
- the figure is the percentile of the pooled runs of every repeat (a longer, spread-out sample of
  the machine's states), not a median of per-repeat percentiles, which drops a state that only some
  repeats caught;
- the repeats' own figures tell how well it reproduces: their spread, and from it the guard a search
  needs so that a later measurement still fits (`guard_from_spread`);
- the note says in words what was seen (`describe_states`), and a figure is flagged only when its
  repeats disagree by more than the protocol's tolerance.
"""
from __future__ import annotations

import math
import os
from typing import Any, Collection, Optional, Sequence

import numpy as np

from tightfit.ondevice.measurement import FIGURE_KEY, Measurement, SpeedStates
from tightfit.ondevice.timing import Progress, Protocol, measure_interleaved, stderr_progress, summarize
from tightfit.ondevice.worker import run_in_fresh_process

MIN_GUARD = 0.01      # below the timer's and the session's own run-to-run noise on a quiet CPU
STATE_RATIO = 1.25    # two groups of runs this far apart (medians) count as two speed states
STATE_SHARE = 0.05    # ... when the smaller group holds at least this share of the runs
# One-sided 95 % quantiles of Student's t for 1..10 degrees of freedom (any statistics table).
_T95 = (6.314, 2.920, 2.353, 2.132, 2.015, 1.943, 1.895, 1.860, 1.833, 1.812)


def measure_repeated(paths: list[str], protocol: Protocol, chunk: int = 10,
                     layers: Collection[str] = (), progress: Optional[Progress] = None,
                     ) -> dict[str, Measurement]:
    """Repeat the interleaved measurement in `protocol.repeats` fresh processes and pool the runs.

    A process's median can sit several percent (sometimes tens of percent) away
    from another's, so one process is one sample. repeats <= 1 runs in-process.
    """
    runs = repeat_summaries(paths, protocol, chunk, layers, progress)
    return {p: combine_repeats(runs[p], protocol) for p in paths}


def repeat_summaries(paths: list[str], protocol: Protocol, chunk: int = 10,
                     layers: Collection[str] = (), progress: Optional[Progress] = None,
                     ) -> dict[str, list[dict[str, Any]]]:
    """Each path's per-repeat summaries (with their run times), not yet pooled: a caller that measures
    again later pools the old repeats with the new ones (combine_repeats)."""
    absolute = {p: os.path.abspath(p) for p in paths}
    abs_layers = {os.path.abspath(p) for p in layers}
    todo = list(dict.fromkeys(absolute.values()))
    if protocol.repeats <= 1:
        runs = [measure_interleaved(todo, protocol, chunk, abs_layers, progress)]
    else:
        # off a terminal the fresh processes stay quiet: one line per batch (or every few seconds) here
        report = progress or stderr_progress(f"measuring {len(todo)} model(s)", every_s=5.0)
        runs = []
        for i in range(protocol.repeats):
            runs.append(run_in_fresh_process(todo, protocol, chunk, abs_layers, f"repeat {i + 1}/{protocol.repeats}"))
            report("fresh-process repeats", i + 1, protocol.repeats)
    return {p: [r[a] for r in runs] for p, a in absolute.items()}


def combine_repeats(summaries: list[dict[str, Any]], protocol: Protocol) -> Measurement:
    """Statistics of the pooled runs, the repeats' figures and spread, the guard, and a verdict."""
    pooled_ms = np.concatenate([np.asarray(s["times_ms"], dtype=np.float64) for s in summaries])
    pooled = summarize(pooled_ms / 1e3, protocol.percentile)
    figure = pooled[FIGURE_KEY]
    figures = [float(s[FIGURE_KEY]) for s in summaries]
    spread = float((max(figures) - min(figures)) / figure) if len(figures) > 1 else None
    guard = guard_from_spread(figures, figure, later=max(1, protocol.repeats))
    states = describe_states(pooled_ms, protocol.percentile)
    stable, note = assess(spread, guard, states, summaries, protocol)
    return Measurement(figure, protocol.percentile, pooled["p50_ms"], pooled["p90_ms"], pooled["p99_ms"],
                       pooled["mean_ms"], pooled["min_ms"], pooled["max_ms"], pooled["cv"], pooled["iqr_over_median"],
                       pooled["runs"], tuple(round(f, 6) for f in figures), spread, guard, states, stable, note,
                       tuple({k: v for k, v in s.items() if k != "times_ms"} for s in summaries))


def guard_from_spread(figures: Sequence[float], figure: float, later: Optional[int] = None) -> Optional[float]:
    """Share of `figure` a pick must keep free so that a later measurement pooled over ``later`` fresh
    processes (default: as many as now) still fits, with 95 % confidence.

    Treat each repeat's figure as one draw with standard deviation s; a pooled figure of n repeats
    then varies by about s / sqrt(n), and the difference of this figure and a later one of m repeats by
    s * sqrt(1/n + 1/m). The one-sided 95 % bound uses Student's t with n - 1 degrees of freedom (s is
    estimated from n draws). Never below MIN_GUARD; None with one repeat (the spread is unknown)."""
    n = len(figures)
    if n < 2 or figure <= 0:
        return None
    m = n if later is None else later
    t = _T95[min(n - 1, len(_T95)) - 1] if n - 1 <= len(_T95) else 1.645
    s = float(np.std(figures, ddof=1))
    return max(MIN_GUARD, t * s * math.sqrt(1.0 / n + 1.0 / m) / figure)


def describe_states(times_ms: np.ndarray, percentile: float = 90.0) -> SpeedStates:
    """Whether the runs fall into a faster and a slower speed state, in words a QA engineer can act on.

    The split is the threshold on log-duration that best separates two groups (Otsu 1979: largest
    between-group variance); two states are reported when the groups' medians are at least
    STATE_RATIO apart and the smaller holds at least STATE_SHARE of the runs."""
    ms = np.sort(np.asarray(times_ms, dtype=np.float64))
    one = SpeedStates()
    if ms.size < 20:
        return one
    logs = np.log(ms)
    n = logs.size
    csum = np.cumsum(logs)
    k = np.arange(1, n)                        # split after k runs
    mean_lo, mean_hi = csum[:-1] / k, (csum[-1] - csum[:-1]) / (n - k)
    between = k * (n - k) * (mean_lo - mean_hi) ** 2
    cut = int(np.argmax(between)) + 1
    fast, slow = float(np.median(ms[:cut])), float(np.median(ms[cut:]))
    share = (n - cut) / n
    if slow / fast < STATE_RATIO or min(share, 1 - share) < STATE_SHARE:
        return one
    covers = share > 1 - percentile / 100
    text = (f"two speed states: {100 * share:.0f} % of runs in the slower one ({slow / fast:.1f} x the faster); "
            + (f"p{percentile:g} covers both" if covers else f"p{percentile:g} sits in the faster one"))
    return SpeedStates(True, round(share, 4), round(slow / fast, 3), text)


def assess(spread: Optional[float], bound: Optional[float], states: SpeedStates, summaries: list[dict[str, Any]],
           protocol: Protocol) -> tuple[bool, str]:
    """Stable when a later measurement of the same kind is expected (one-sided 95 %, guard_from_spread)
    within the protocol's tolerance of this figure, and every repeat settled; the note says what was
    seen either way. Not the range of the repeats: five processes that span 18 % still pin the pooled
    figure to a few percent, which is what QA's re-measurement meets."""
    problems: list[str] = []
    p, n, tol = f"p{protocol.percentile:g}", len(summaries), 100 * protocol.reproduce_tolerance
    if spread is None or bound is None:
        problems.append("one repeat: reproducibility not measured (use repeats >= 2)")
    elif bound > protocol.reproduce_tolerance:
        problems.append(f"a later measurement may differ by up to {100 * bound:.0f} % (> {tol:.0f} %; the {n} repeats' "
                        f"{p} spread {100 * spread:.0f} %): the machine changed speed between processes; use more "
                        "repeats or a quieter device")
    if not all(s.get("settled", True) for s in summaries):
        problems.append(f"the running median did not settle within {protocol.settle_limit} untimed runs")
    seen = states.text
    if problems:
        return False, "; ".join(problems) + f"; {seen}"
    return True, (f"{p} reproduces within {100 * bound:.0f} % (95 % bound from {n} repeats, which spread "
                  f"{100 * spread:.0f} %); {seen}")
