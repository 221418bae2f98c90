"""Repeats of an interleaved measurement in fresh processes, combined into one figure per model.

A process's median can sit several percent (sometimes tens of percent) away from another's,
so one process is one sample: the headline figure is the median over repeats, and anything
noisy is flagged instead of hidden.
"""
from __future__ import annotations

import os
from typing import Any, Collection, Optional

import numpy as np

from tightfit.ondevice.timing import Progress, Protocol, measure_interleaved
from tightfit.ondevice.worker import run_in_fresh_process

_REPEAT_KEYS = ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "min_ms", "budget_stat_ms",
                "cv", "iqr_over_median", "drift")


def measure_repeated(paths: list[str], protocol: Protocol, chunk: int = 10,
                     layers: Collection[str] = (), progress: Optional[Progress] = None,
                     ) -> dict[str, dict[str, Any]]:
    """Repeat the interleaved measurement in `protocol.repeats` fresh processes and combine.

    A process's median can sit several percent (sometimes tens of percent) away
    from another's, so one process is one sample. repeats <= 1 runs in-process.
    """
    absolute = {p: os.path.abspath(p) for p in paths}
    abs_layers = {os.path.abspath(p) for p in layers}
    todo = list(dict.fromkeys(absolute.values()))
    if protocol.repeats <= 1:
        runs = [measure_interleaved(todo, protocol, chunk, abs_layers, progress)]
    else:
        runs = [run_in_fresh_process(todo, protocol, chunk, abs_layers, f"repeat {i + 1}/{protocol.repeats}")
                for i in range(protocol.repeats)]
    return {p: combine_repeats([r[a] for r in runs], protocol) for p, a in absolute.items()}


def combine_repeats(summaries: list[dict[str, Any]], protocol: Protocol) -> dict[str, Any]:
    """Median over repeats of each statistic, the spread of repeat medians, and a verdict."""
    out: dict[str, Any] = {k: float(np.median([s[k] for s in summaries])) for k in _REPEAT_KEYS}
    p50s = [s["p50_ms"] for s in summaries]
    out["repeat_spread"] = float((max(p50s) - min(p50s)) / np.median(p50s)) if len(p50s) > 1 else None
    out["budget_percentile"] = protocol.percentile
    out["runs"] = sum(s["runs"] for s in summaries)
    out["stable"], out["note"] = assess(out, summaries, protocol)
    out["repeats"] = summaries
    return out


def assess(combined: dict[str, Any], summaries: list[dict[str, Any]],
           protocol: Protocol) -> tuple[bool, str]:
    """Stable only when every noise check passes; the note names each failed check."""
    problems = []
    spread = combined["repeat_spread"]
    if spread is None:
        problems.append("only one repeat: drift between processes not measured (use repeats >= 2)")
    elif spread > protocol.max_repeat_spread:
        problems.append(f"repeat medians spread {spread:.1%} > {protocol.max_repeat_spread:.0%}: "
                        "no stable figure, rerun on a quieter device")
    if combined["cv"] > protocol.max_cv:
        problems.append(f"CV {combined['cv']:.3f} > {protocol.max_cv} (hiccups or contention)")
    if combined["iqr_over_median"] > protocol.max_iqr_over_median:
        problems.append(f"IQR/median {combined['iqr_over_median']:.3f} > {protocol.max_iqr_over_median}")
    worst_drift = max(abs(s["drift"]) for s in summaries)
    if worst_drift > protocol.max_drift:
        problems.append(f"median drifted {worst_drift:.1%} within a repeat (> {protocol.max_drift:.0%})")
    if not all(s.get("settled", True) for s in summaries):
        problems.append(f"warm-up did not settle within {protocol.warmup_limit} runs")
    return not problems, "; ".join(problems) if problems else "ok"
