"""The last step of a search: measure the top candidates directly, choose the pick, export it.

Predictions only rank candidates; on the machine a table describes, the measured percentile
decides. The pick is exported with its manifest to RUN_DIR/exports/<device>-<budget>ms/.
"""
from __future__ import annotations

import shutil
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Optional


from tightfit.data.dataset import Dataset
from tightfit.export.cut import cut_one
from tightfit.export.finetuned import finetune_export
from tightfit.export.manifest import export_pick, latency_section
from tightfit.latency.table import LatencyTable
from tightfit.ondevice.files import device_name
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.repeats import combine_repeats, repeat_summaries
from tightfit.ondevice.timing import Protocol
from tightfit.budgets import budget_label
from tightfit.progress import bar as progress_bar
from tightfit.search.cache import CachedAccuracy, CachedLatency
from tightfit.search.choice_rule import Tried, guard_of, guard_share, measure_and_choose
from tightfit.search.evolution import Candidate
from tightfit.search.fitness import RunAccuracy
from tightfit.search.settings import SearchSettings
from tightfit.train.finetune import FinetuneSettings
from tightfit.rundir import TrainedRun

@dataclass
class SearchContext:
    """The trained run, its data and the shared accuracy cache, for every (device, budget)."""
    run_dir: Path
    run: TrainedRun
    ds: Dataset
    settings: SearchSettings
    fitness: CachedAccuracy
    compute: RunAccuracy
    progress: bool
    say: Callable[[str], None]
    whole: Optional[CachedAccuracy] = None  # the whole validation split, when ``compute`` sees a capped part
    pick_runs: dict[str, PickRuns] = field(default_factory=dict)  # export folder -> its pick's raw repeats


@dataclass(frozen=True)
class PickRuns:
    """A pick's raw repeat summaries and when they ended (time.time()), to pool a later measurement with."""
    runs: list[dict[str, Any]]
    at: float


UNVERIFIED = "unverified: measure on the device with tightfit verify"


def verification_protocol(table_protocol: dict[str, Any]) -> Protocol:
    """The table's protocol, with at least 2 fresh-process repeats and the full per-model timing."""
    p, full = Protocol.from_dict(table_protocol), Protocol()
    return replace(p, repeats=max(2, p.repeats), time_seconds=max(p.time_seconds, full.time_seconds),
                   time_runs=max(p.time_runs, full.time_runs))


class _Measurer:
    """Cuts candidates into ``staging`` and measures them whole, interleaved; keeps the time spent.
    ``guard_floor``: no candidate's guard is narrower (a spread seen over a longer window, confirm.py)."""

    def __init__(self, ctx: SearchContext, staging: Path, protocol: Protocol, guard_floor: float = 0.0):
        self.ctx, self.staging, self.protocol, self.guard_floor = ctx, staging, protocol, guard_floor
        self.clock: dict[str, float] = {}
        self.runs: dict[str, list[dict[str, Any]]] = {}  # each candidate's repeats so far

    def cut(self, cands: list[Candidate], start: int) -> list[Tried]:
        t0 = time.perf_counter()
        out = [Tried(c, *cut_one(self.ctx.run, self.ctx.ds, f"candidate{start + i}", c.subnet, self.staging,
                                 validate=False)) for i, c in enumerate(cands)]
        self.clock["cut"] = self.clock.get("cut", 0.0) + time.perf_counter() - t0
        return out

    def __call__(self, cands: list[Candidate], start: int) -> list[Tried]:
        batch = self.cut(cands, start)
        self._measure(batch)
        return batch

    def remeasure(self, tried: list[Tried]) -> None:
        self._measure(tried)
        for t in tried:
            t.remeasured = True

    def _measure(self, batch: list[Tried]) -> None:
        t0 = time.perf_counter()
        runs = repeat_summaries([str(t.cut.onnx_path) for t in batch], self.protocol)
        self.clock["measure"] = self.clock.get("measure", 0.0) + time.perf_counter() - t0
        for t in batch:
            path = str(t.cut.onnx_path)
            self.runs[path] = self.runs.get(path, []) + runs[path]
            t.measured = combine_repeats(self.runs[path], self.protocol)
            if self.guard_floor > 0:
                t.measured["guard"] = max(self.guard_floor, guard_share(t.measured, None))


def choose_and_export(ctx: SearchContext, table: LatencyTable, ranked: list[Candidate], budget_ms: float,
                      latency: CachedLatency, verifiable: bool, guard_floor: float = 0.0) -> dict[str, Any]:
    """Verify (when the table is for this host), export the pick, and return its picks.json row.
    ``ranked``: the order in which candidates are measured (tightfit.search.driver.measuring_order);
    ``guard_floor``: the narrowest guard any candidate gets (a choice made again by confirm.py)."""
    label = f"{device_name(table.name)}-{budget_label(budget_ms)}"
    staging = ctx.run_dir / "search" / "staging" / label
    shutil.rmtree(staging, ignore_errors=True)
    protocol = verification_protocol(table.protocol)
    measurer = _Measurer(ctx, staging, protocol, guard_floor)
    smallest = ctx.run.recipe.space.smallest()

    def fallback() -> Candidate:
        return Candidate(smallest.to_key(), smallest, ctx.fitness(smallest), latency(smallest), -1)

    if verifiable:
        top = ctx.settings.top
        ctx.say(f"  measuring the top {min(top, len(ranked))} candidates directly ({protocol.repeats} repeats)")
        choice = measure_and_choose(ranked, budget_ms, measurer, top, fallback, ctx.say,
                                    guard=ctx.settings.guard, remeasure=measurer.remeasure)
        pick, fits, note, ratio, hardware = choice.pick, choice.fits, choice.note, choice.ratio(), describe_hardware()
        guard = {"share": round(guard_of(pick, ctx.settings.guard), 4), "rule": guard_rule(ctx.settings.guard, guard_floor)}
    else:
        within = [c for c in ranked if c.latency_ms <= budget_ms] or [fallback()]
        pick, fits, note, ratio, hardware = measurer.cut(within[:1], 0)[0], True, UNVERIFIED, None, table.hardware
        guard = None
    export_dir = ctx.run_dir / "exports" / label
    t0 = time.perf_counter()
    manifest = export_pick(ctx.run, ctx.ds, subnet=pick.cand.subnet, cut=pick.cut, net=pick.net, export_dir=export_dir,
                           latency=latency_section(pick.measured, hardware, protocol.to_dict(), pick.cand.latency_ms,
                                                   note, guard),
                           budget_ms=budget_ms, percentile=protocol.percentile, device=table.name)
    measurer.clock["score and export the pick"] = time.perf_counter() - t0
    if pick.measured is not None:
        ctx.pick_runs[str(export_dir)] = PickRuns(measurer.runs[str(pick.cut.onnx_path)], time.time())
    ctx.say("  after the search: " + ", ".join(f"{k} {v:.1f} s" for k, v in measurer.clock.items()))
    _remove_staging(staging)
    if note:
        ctx.say(f"  {note}")
    return {"device": table.name, "budget_ms": budget_ms, "percentile": protocol.percentile, "key": pick.cand.key,
            "val_acc": pick.cand.fitness, "predicted_ms": round(pick.cand.latency_ms, 5), "measured": pick.measured,
            "export_dir": str(export_dir), "fits": fits, "verified": pick.measured is not None, "note": note,
            "guard": guard,
            "measured_over_predicted": None if ratio is None else round(ratio, 4),
            "budget_use": None if pick.measured is None else round(pick.measured["budget_stat_ms"] / budget_ms, 4),
            "test_acc": manifest["accuracy"]["test"]["top1"]}


def guard_rule(fixed: Optional[float], floor: float = 0.0) -> str:
    return "--guard" if fixed is not None else "from the spread of its repeats" + (
        f", at least {100 * floor:.1f} % (the spread its device's picks showed when measured again)" if floor > 0 else "")


def finetune_pick(ctx: SearchContext, row: dict[str, Any]) -> dict[str, Any]:
    """Fine-tune the pick of ``row`` from its inherited weights (its export folder rewritten, the
    measured latency kept: the graph is unchanged) and return the row with the new accuracy."""
    s = ctx.settings
    bar = progress_bar(total=s.finetune_steps, desc="fine-tune", unit="step", disable=not ctx.progress)
    manifest = finetune_export(ctx.run, ctx.run_dir, ctx.ds, Path(row["export_dir"]),
                               FinetuneSettings(steps=s.finetune_steps, lr=s.finetune_lr), on_step=lambda _: bar.update(1))
    bar.close()
    ft, acc = manifest["finetune"], manifest["accuracy"]
    before = ft["inherited_accuracy"]["validation"]["top1"]
    ctx.say(f"  fine-tuned the pick {ft['steps']} steps (lr {ft['lr']:g}"
            + (", reused from an earlier budget" if ft["reused"] else f", {ft['cpu_s']:.0f} CPU-s")
            + f"): validation {before:.2f} -> {acc['validation']['top1']:.2f} %")
    return {**row, "test_acc": acc["test"]["top1"],
            "finetune": {"steps": ft["steps"], "lr": ft["lr"], "cpu_s": ft["cpu_s"], "reused": ft["reused"],
                         "val_acc_before": before, "val_acc_after": acc["validation"]["top1"],
                         "test_acc_before": ft["inherited_accuracy"]["test"]["top1"]}}


def _remove_staging(staging: Path) -> None:
    shutil.rmtree(staging, ignore_errors=True)
    try:
        staging.parent.rmdir()  # the staging folder goes once no budget uses it
    except OSError:
        pass
