"""After a device's last budget: measure its picks once more and pool both windows.

A pick is chosen on a few fresh-process repeats taken back to back, which sample seconds of the
machine's behaviour; a machine that changes speed over minutes (a shared VM, a device warming up)
then gives QA a different figure later. Measuring every pick of the device again once all its
budgets are searched, and pooling those repeats with the ones it was chosen on, makes the figure and
its guard describe minutes instead of seconds. A pick that no longer keeps its guard is chosen again
(choose.py) with every candidate's guard at least that wide.
"""
from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any, Callable, Optional

from tightfit.export.manifest import budget_use, latency_section
from tightfit.latency.table import LatencyTable
from tightfit.ondevice.files import write_json
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.repeats import combine_repeats, repeat_summaries
from tightfit.ondevice.timing import Protocol
from tightfit.search.choice_rule import guard_share
from tightfit.search.choose import SearchContext, guard_rule, verification_protocol

MeasureAgain = Callable[[list[str], Protocol], dict[str, list[dict[str, Any]]]]
"""(model paths, protocol) -> each path's new repeat summaries (ondevice.repeats.repeat_summaries)."""


def confirm_picks(ctx: SearchContext, table: LatencyTable, rows: list[dict[str, Any]],
                  measure: MeasureAgain = repeat_summaries) -> list[dict[str, Any]]:
    """Measure the verified picks among ``rows`` again (interleaved, fresh processes), pool the new
    repeats with those each was chosen on, rewrite each manifest's latency section and return the
    rows with the pooled figure, its guard and whether the pick still keeps it (``confirmed``)."""
    protocol = verification_protocol(table.protocol)
    todo = [r for r in rows if r.get("verified") and r["export_dir"] in ctx.pick_runs]
    if not todo:
        return rows
    paths = {r["export_dir"]: str(Path(r["export_dir"]) / "model.onnx") for r in todo}
    t0 = time.perf_counter()
    new = measure(list(paths.values()), protocol)
    ctx.say(f"{table.name}: measured its {len(todo)} pick(s) again ({protocol.repeats} repeats, "
            f"{time.perf_counter() - t0:.1f} s), pooled with the repeats each was chosen on")
    done = {r["export_dir"]: _pooled_row(ctx, r, new[paths[r["export_dir"]]], protocol) for r in todo}
    return [done.get(r["export_dir"], r) for r in rows]


def _pooled_row(ctx: SearchContext, row: dict[str, Any], later: list[dict[str, Any]], protocol: Protocol) -> dict[str, Any]:
    first = ctx.pick_runs[row["export_dir"]]
    pooled = combine_repeats(first.runs + later, protocol)
    fixed = ctx.settings.guard
    share = guard_share(pooled, fixed)
    budget, figure = row["budget_ms"], pooled["budget_stat_ms"]
    keeps = figure <= budget * (1 - share)
    record = {"first_ms": round(combine_repeats(first.runs, protocol)["budget_stat_ms"], 6),
              "later_ms": round(combine_repeats(later, protocol)["budget_stat_ms"], 6),
              "pooled_ms": round(figure, 6), "repeats": len(first.runs) + len(later),
              "after_s": round(time.time() - first.at, 1), "keeps_guard": keeps}
    note = (f"measured again {record['after_s']:.0f} s after it was chosen: p{protocol.percentile:g} "
            f"{record['first_ms']:.4g} then {record['later_ms']:.4g} ms, pooled {figure:.4g} ms")
    if not keeps:
        note += (f"; {'within' if figure <= budget else 'OVER'} the budget but not its guard ({100 * share:.1f} %)")
    guard = {"share": round(share, 4), "rule": guard_rule(fixed)}
    _rewrite_latency(Path(row["export_dir"]), pooled, protocol, note, guard, record)
    fits = figure <= budget
    return {**row, "measured": pooled, "fits": fits, "guard": guard, "confirmed": record,
            "budget_use": round(figure / budget, 4),
            "note": "; ".join(filter(None, [row.get("note"), None if fits else "over its budget when measured again"]))}


def _rewrite_latency(export_dir: Path, pooled: dict[str, Any], protocol: Protocol, note: str,
                     guard: dict[str, Any], record: dict[str, Any]) -> None:
    path = export_dir / "manifest.json"
    manifest = json.loads(path.read_text("utf-8"))
    old = manifest["latency"]
    section = latency_section(pooled, describe_hardware(), protocol.to_dict(), old.get("predicted_ms"), note, guard)
    manifest["latency"] = {**section, "confirmation": record}
    manifest["budget"]["use"] = budget_use(section, manifest["budget"]["ms"], manifest["budget"]["percentile"])
    write_json(path, manifest)


def guard_floor_of(row: dict[str, Any]) -> Optional[float]:
    """The guard a pick that failed its confirmation showed over both windows: the floor for its new choice."""
    rec = row.get("confirmed")
    if not rec or rec["keeps_guard"]:
        return None
    return float(row["guard"]["share"])
