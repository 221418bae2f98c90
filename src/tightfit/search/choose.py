"""The last step of a search: measure the top candidates directly and choose the pick.

Predictions only rank candidates; on the machine a table describes, the measured percentile
decides. The pick is a record held in memory (export/pick.py) until the search writes it, once, to
RUN_DIR/exports/<device>-<budget>ms/; its files wait in RUN_DIR/search/staging/ until then.
"""
from __future__ import annotations

import shutil
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Optional

import numpy as np

from tightfit.budgets import budget_label
from tightfit.data.dataset import Dataset
from tightfit.export.cut import cut_one
from tightfit.export.finetuned import finetuned_cut
from tightfit.export.manifest import shipped_hits
from tightfit.export.pick import Guard, Pick
from tightfit.latency.table import LatencyTable
from tightfit.ondevice.accuracy import Accuracy, format_accuracy, paired_comparison
from tightfit.ondevice.files import device_name
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.repeats import combine_repeats, repeat_summaries
from tightfit.ondevice.timing import Protocol
from tightfit.progress import bar as progress_bar
from tightfit.rundir import TrainedRun
from tightfit.search.cache import CachedAccuracy, CachedLatency
from tightfit.search.cpu import CpuSplit, cpu_seconds
from tightfit.search.choice_rule import Tried, guard_of, guard_share, measure_and_choose, tie_points, typical_guard
from tightfit.search.evolution import Candidate
from tightfit.search.fitness import RunAccuracy
from tightfit.search.lead import contenders, runner_up, too_small_line, too_small_to_separate
from tightfit.search.settings import SearchSettings
from tightfit.train.finetune import FinetuneSettings

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
    cpu: CpuSplit = field(default_factory=CpuSplit)  # the current budget's CPU-seconds per phase (driver.py)


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


CHOICE_SECONDS = 0.25  # timed seconds per candidate and repeat while choosing: 5 pooled fresh processes of
#                        0.25 s land within +-5 % of the sustained p90 as often as 5 of 1 s (docs/measurements.md,
#                        "Seconds per process vs processes"); the confirmation measures the picks at full length


def choice_protocol(verification: Protocol) -> Protocol:
    """The verification protocol at CHOICE_SECONDS per repeat: candidates are many, picks few, and more
    processes, not more seconds, is what makes a figure reproduce."""
    return replace(verification, time_seconds=CHOICE_SECONDS)


class _Measurer:
    """Cuts candidates into ``staging`` and measures them whole, interleaved; keeps the time spent.
    ``guard_floor``: no candidate's guard is narrower (a spread seen over a longer window, confirm.py)."""

    def __init__(self, ctx: SearchContext, staging: Path, protocol: Protocol, guard_floor: float = 0.0):
        self.ctx, self.staging, self.protocol, self.guard_floor = ctx, staging, protocol, guard_floor
        self.clock: dict[str, float] = {}
        self.cpu = CpuSplit()  # CPU-seconds per phase, the repeats' child processes included
        self.runs: dict[str, list[dict[str, Any]]] = {}  # each candidate's repeats so far

    def cut(self, cands: list[Candidate], start: int) -> list[Tried]:
        t0 = self._start()
        out = [Tried(c, *cut_one(self.ctx.run, self.ctx.ds, f"candidate{start + i}", c.subnet, self.staging,
                                 validate=False)) for i, c in enumerate(cands)]
        self._tick("cut", t0)
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
        t0 = self._start()
        runs = repeat_summaries([str(t.cut.onnx_path) for t in batch], self.protocol)
        self._tick("measure", t0)
        for t in batch:
            path = str(t.cut.onnx_path)
            self.runs[path] = self.runs.get(path, []) + runs[path]
            t.measured = combine_repeats(self.runs[path], self.protocol)
            if self.guard_floor > 0:
                t.measured = replace(t.measured, guard=max(self.guard_floor, guard_share(t.measured, None)))

    def hits(self, t: Tried, split: str) -> np.ndarray:
        """Right/wrong per image of the candidate's ONNX file on a whole split ("val" or "test")."""
        t0 = self._start()
        out = shipped_hits(Path(t.cut.onnx_path).read_bytes(), self.ctx.ds, split)
        self._tick("score", t0)
        return out

    @staticmethod
    def _start() -> tuple[float, float]:
        return time.perf_counter(), cpu_seconds()

    def _tick(self, phase: str, t0: tuple[float, float]) -> None:
        """Wall seconds into the pick's timings, CPU-seconds (children's included) into its CPU split."""
        self.clock[phase] = self.clock.get(phase, 0.0) + time.perf_counter() - t0[0]
        self.cpu.add(phase, cpu_seconds() - t0[1])


def staging_dir(ctx: SearchContext, device: str, budget_ms: float) -> Path:
    """Where a budget's candidates are cut; the pick's files stay there until it is written."""
    return ctx.run_dir / "search" / "staging" / f"{device_name(device)}-{budget_label(budget_ms)}"


def choose_pick(ctx: SearchContext, table: LatencyTable, ranked: list[Candidate], budget_ms: float,
                latency: CachedLatency, verifiable: bool, guard_floor: float = 0.0) -> Pick:
    """Measure (when the table is for this host) and choose the pick, score it and compare it with the
    runner-up; returns the record, nothing written but its staged files.
    ``ranked``: the order in which candidates are measured (tightfit.search.driver.measuring_order);
    ``guard_floor``: the narrowest guard any candidate gets (a choice made again by confirm.py)."""
    staging = staging_dir(ctx, table.name, budget_ms)
    shutil.rmtree(staging, ignore_errors=True)
    protocol = verification_protocol(table.protocol)
    measurer = _Measurer(ctx, staging, choice_protocol(protocol), guard_floor)

    def fallback() -> Candidate:
        smallest = ctx.run.recipe.space.smallest()
        return Candidate(smallest.to_key(), smallest, ctx.fitness(smallest), latency(smallest), -1)

    fixed, guard = ctx.settings.guard, None
    if verifiable:
        top = ctx.settings.top
        ctx.say(f"  measuring the top {min(top, len(ranked))} candidates directly ({protocol.repeats} repeats of "
                f"{measurer.protocol.time_seconds:g} s)")
        tie = tie_points(max((c.fitness for c in ranked), default=0.0), len(ctx.ds.val_y))
        choice = measure_and_choose(ranked, budget_ms, measurer, top, fallback, ctx.say, guard=fixed,
                                    remeasure=measurer.remeasure, tie=tie)
        chosen, rival, hardware = choice.pick, runner_up(choice, budget_ms, fixed), describe_hardware()
        rivals, fits, note, ratio = contenders(choice, budget_ms, fixed), choice.fits, choice.note, choice.ratio()
        guard = Guard(guard_of(chosen, fixed), guard_rule(fixed, guard_floor), typical_guard(choice.tried, fixed))
    else:  # another device: by prediction; the next candidate within the budget is the runner-up
        rivals = measurer.cut(([c for c in ranked if c.latency_ms <= budget_ms] or [fallback()])[:2], 0)
        chosen, rival, hardware = rivals[0], (rivals[1:] or [None])[0], table.hardware
        fits, note, ratio = True, UNVERIFIED, None
    export_dir = ctx.run_dir / "exports" / staging.name
    val_hits = measurer.hits(chosen, "val")
    validation, test = Accuracy.of(val_hits, "validation"), Accuracy.of(measurer.hits(chosen, "test"), "test")
    lead = None if rival is None else paired_comparison(val_hits, measurer.hits(rival, "val"), against=rival.cand.key)
    if chosen.measured is not None:
        ctx.pick_runs[str(export_dir)] = PickRuns(measurer.runs[str(chosen.cut.onnx_path)], time.time())
    ctx.say("  after the search: " + ", ".join(f"{k} {v:.1f} s" for k, v in measurer.clock.items()))
    scores = [t.cand.fitness for t in rivals]
    if too_small_to_separate(lead, validation, scores):
        ctx.say(too_small_line(lead, validation, scores, budget_label(budget_ms)))
    if note:
        ctx.say(f"  {note}")
    used = measurer.protocol if chosen.measured is not None else protocol  # the figure's, or QA's to measure with
    return Pick(table.name, budget_ms, protocol.percentile, chosen.cand.subnet, chosen.cand.latency_ms,
                chosen.cand.fitness, validation, test, chosen.measured, hardware, used, guard, fits, note,
                chosen.cut, chosen.net, export_dir, ratio, lead,
                timings={k: round(v, 2) for k, v in measurer.clock.items()}, search_cpu_s=measurer.cpu.rounded())


def guard_rule(fixed: Optional[float], floor: float = 0.0) -> str:
    return "--guard" if fixed is not None else "from the spread of its repeats" + (
        f", at least {100 * floor:.1f} % (the spread its device's picks showed when measured again)" if floor > 0 else "")


def finetune_pick(ctx: SearchContext, pick: Pick) -> Pick:
    """The pick fine-tuned from its inherited weights (the graph, and so its measured latency, kept),
    scored again; the inherited accuracies stay in its fine-tune record."""
    s = ctx.settings
    bar = progress_bar(total=s.finetune_steps, desc="fine-tune", unit="step", disable=not ctx.progress)
    cut, net, record = finetuned_cut(ctx.run, ctx.run_dir, ctx.ds, pick.subnet, pick.cut,
                                     FinetuneSettings(steps=s.finetune_steps, lr=s.finetune_lr),
                                     on_step=lambda _: bar.update(1))
    bar.close()
    data = Path(cut.onnx_path).read_bytes()
    validation = Accuracy.of(shipped_hits(data, ctx.ds, "val"), "validation")
    test = Accuracy.of(shipped_hits(data, ctx.ds, "test"), "test")
    record = {**record, "inherited_accuracy": {"validation": pick.validation.to_dict(), "test": pick.test.to_dict()}}
    ctx.say(f"  fine-tuned the pick {record['steps']} steps (lr {record['lr']:g}"
            + (", reused from an earlier budget" if record["reused"] else f", {record['cpu_s']:.0f} CPU-s")
            + f"): validation {format_accuracy(pick.validation)} -> {format_accuracy(validation)}")
    return replace(pick, cut=cut, net=net, validation=validation, test=test, finetune=record)


def remove_staging(ctx: SearchContext, pick: Pick) -> None:
    """Once the pick is written its budget's staged cuts go, and the staging folder once no budget uses it."""
    staging = staging_dir(ctx, pick.device, pick.budget_ms)
    shutil.rmtree(staging, ignore_errors=True)
    try:
        staging.parent.rmdir()
    except OSError:
        pass
