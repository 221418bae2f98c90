"""After a device's last budget: measure its picks once more and pool both windows.

A pick is chosen on a few fresh-process repeats taken back to back, which sample seconds of the
machine's behaviour; a machine that changes speed over minutes (a shared VM, a device warming up)
then gives QA a different figure later. Measuring every pick of the device again once all its
budgets are searched, and pooling those repeats with the ones it was chosen on, makes the figure and
its guard describe minutes instead of seconds. A pick that no longer keeps its guard is chosen again
(choose.py) with every candidate's guard at least that wide.
"""
from __future__ import annotations

import time
from dataclasses import replace
from typing import Any, Callable, Optional

from tightfit.export.pick import Confirmation, Guard, Pick
from tightfit.latency.table import LatencyTable
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.repeats import combine_repeats, repeat_summaries
from tightfit.ondevice.timing import Protocol
from tightfit.search.choice_rule import guard_share
from tightfit.search.choose import SearchContext, guard_rule, verification_protocol
from tightfit.search.cpu import cpu_seconds, merged

MeasureAgain = Callable[[list[str], Protocol], dict[str, list[dict[str, Any]]]]
"""(model paths, protocol) -> each path's new repeat summaries (ondevice.repeats.repeat_summaries)."""


def confirm_picks(ctx: SearchContext, table: LatencyTable, picks: list[Pick],
                  measure: MeasureAgain = repeat_summaries) -> list[Pick]:
    """Measure the verified picks among ``picks`` again (interleaved, fresh processes), pool the new
    repeats with those each was chosen on, and return the picks with the pooled figure, its guard and
    whether each still keeps it (``confirmation``). Nothing is written here: the search writes a pick once."""
    protocol = verification_protocol(table.protocol)
    todo = [p for p in picks if p.measurement is not None and str(p.export_dir) in ctx.pick_runs]
    if not todo:
        return picks
    paths = {str(p.export_dir): str(p.cut.onnx_path) for p in todo}
    t0, c0 = time.perf_counter(), cpu_seconds()
    new = measure(list(paths.values()), protocol)
    share = {"confirm": round((cpu_seconds() - c0) / len(todo), 2)}  # one measurement of them all: each bills a share
    ctx.say(f"{table.name}: measured its {len(todo)} pick(s) again ({protocol.repeats} repeats, "
            f"{time.perf_counter() - t0:.1f} s), pooled with the repeats each was chosen on")
    done = {str(p.export_dir): replace(_pooled(ctx, p, new[paths[str(p.export_dir)]], protocol),
                                       search_cpu_s=merged(p.search_cpu_s, share)) for p in todo}
    return [done.get(str(p.export_dir), p) for p in picks]


def _pooled(ctx: SearchContext, pick: Pick, later: list[dict[str, Any]], protocol: Protocol) -> Pick:
    first = ctx.pick_runs[str(pick.export_dir)]
    pooled = combine_repeats(first.runs + later, protocol)
    fixed = ctx.settings.guard
    share = guard_share(pooled, fixed)
    keeps = pooled.fits(pick.budget_ms, share)
    record = Confirmation(first_ms=combine_repeats(first.runs, protocol).figure_ms,
                          later_ms=combine_repeats(later, protocol).figure_ms,
                          pooled_ms=pooled.figure_ms, repeats=len(first.runs) + len(later),
                          after_s=time.time() - first.at, keeps_guard=keeps)
    fits = pooled.fits(pick.budget_ms)
    typical = None if pick.guard is None else pick.guard.typical
    return replace(pick, measurement=pooled, fits=fits, guard=Guard(share, guard_rule(fixed), typical), confirmation=record,
                   hardware=describe_hardware(), protocol=protocol,
                   note="; ".join(filter(None, [pick.note, None if fits else "over its budget when measured again"])))


def guard_floor_of(pick: Pick) -> Optional[float]:
    """The guard a pick that failed its confirmation showed over both windows: the floor for its new choice."""
    rec = pick.confirmation
    if rec is None or rec.keeps_guard:
        return None
    return float(pick.guard.share)
