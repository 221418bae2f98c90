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

import numpy as np

from tightfit.data.dataset import Dataset
from tightfit.export.cut import CutResult, cut_one
from tightfit.export.finetuned import finetune_export
from tightfit.export.manifest import export_pick, latency_section
from tightfit.latency.table import LatencyTable
from tightfit.model.extract import StaticNet
from tightfit.ondevice.files import device_name
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.repeats import combine_repeats, repeat_summaries
from tightfit.ondevice.timing import Protocol
from tightfit.budgets import budget_label
from tightfit.progress import bar as progress_bar
from tightfit.search.cache import CachedAccuracy, CachedLatency
from tightfit.search.evolution import Candidate
from tightfit.search.fitness import RunAccuracy
from tightfit.search.settings import SearchSettings
from tightfit.train.finetune import FinetuneSettings
from tightfit.train.rundir import TrainedRun

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
    return replace(p, repeats=max(2, p.repeats), timed_seconds=max(p.timed_seconds, full.timed_seconds),
                   timed_runs=max(p.timed_runs, full.timed_runs))


@dataclass
class Tried:
    cand: Candidate
    cut: Optional[CutResult]
    net: Optional[StaticNet]
    measured: Optional[dict[str, Any]] = None
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
    r = [t.measured["budget_stat_ms"] / t.cand.latency_ms for t in tried if t.measured and t.cand.latency_ms > 0]
    return float(np.median(r)) if r else None


def _most_accurate(tried: list[Tried]) -> Tried:
    return max(tried, key=lambda t: (t.cand.fitness, -t.measured["budget_stat_ms"]))


DEFAULT_GUARD = 0.05  # when a candidate's spread is unknown (one repeat) and no --guard is given


def guard_share(measured: dict[str, Any], fixed: Optional[float]) -> float:
    """Share of the budget a measured figure must leave free: ``fixed`` (--guard) when given, else the
    figure's own guard from the spread of its repeats (ondevice/repeats.py guard_from_spread)."""
    if fixed is not None:
        return fixed
    own = measured.get("guard")
    return DEFAULT_GUARD if own is None else float(own)


def guard_of(t: Tried, fixed: Optional[float]) -> float:
    return guard_share(t.measured, fixed)


def keeps_guard(t: Tried, budget_ms: float, fixed: Optional[float]) -> bool:
    return t.measured["budget_stat_ms"] <= budget_ms * (1.0 - guard_of(t, fixed))


def measure_and_choose(ranked: list[Candidate], budget_ms: float, measure: Measure, top: int,
                       fallback: Callable[[], Candidate], say: Callable[[str], None],
                       guard: Optional[float] = None, rounds: int = 3,
                       remeasure: Optional[Remeasure] = None) -> Choice:
    """Measure the first ``top`` candidates (front first) interleaved; the most accurate whose measured
    percentile fits within budget x (1 - its guard) wins, so that QA's later measurement still fits
    (guard: fixed, or None for each candidate's own from its measured spread). If none does, rescale
    predictions by measured/predicted and try the most accurate of those that should then fit (the
    smallest subnet last); if still none, the most accurate that fits the budget itself. With
    ``remeasure``, candidates that fit the budget but not their guard are measured once more before
    faster ones are tried: twice the repeats narrow a guard that the spread of a few made wide."""
    tried: list[Tried] = []
    ratio: Optional[float] = None
    for attempt in range(rounds):
        done = {t.cand.key for t in tried}
        expected = budget_ms * (1.0 - _expected_guard(tried, guard))
        pool = [c for c in ranked if c.key not in done and (ratio is None or c.latency_ms * ratio <= expected)]
        if not pool:
            last = fallback()
            pool = [] if last.key in done else [last]
        if not pool:
            break
        tried += measure(pool[:top], len(tried))
        fitting = [t for t in tried if keeps_guard(t, budget_ms, guard)]
        if not fitting and remeasure is not None:
            fitting = _remeasure_close(tried, budget_ms, remeasure, top, guard, say)
        if fitting:
            note = "" if attempt == 0 else "the most accurate candidates measured over budget: fell back to faster ones"
            return Choice(_most_accurate(fitting), True, note, tried)
        ratio = measured_ratio(tried)
        vs = "" if ratio is None else f"; measured = {ratio:.2f} x predicted"  # None: no positive prediction
        say(f"  none of {len(tried)} measured candidates fits the budget less its guard "
            f"({_guards_text(tried, guard)}{vs}): trying faster ones")
    within = [t for t in tried if t.measured["budget_stat_ms"] <= budget_ms]
    if within:
        return Choice(_most_accurate(within), True, "no candidate kept its guard; this one fits the budget", tried)
    return Choice(min(tried, key=lambda t: t.measured["budget_stat_ms"]), False,
                  "no candidate measured within the budget: this is the fastest one tried", tried)


def _remeasure_close(tried: list[Tried], budget_ms: float, remeasure: Remeasure, top: int,
                     guard: Optional[float], say: Callable[[str], None]) -> list[Tried]:
    """Measure again the most accurate candidates that fit the budget but not their own guard; return
    those that keep it now. Only for guards from the spread (a fixed --guard does not narrow)."""
    if guard is not None:
        return []
    close = [t for t in tried if not t.remeasured and t.measured["budget_stat_ms"] <= budget_ms]
    close = sorted(close, key=lambda t: (-t.cand.fitness, t.measured["budget_stat_ms"]))[:top]
    if not close:
        return []
    say(f"  {len(close)} candidate(s) fit the budget but not their guard ({_guards_text(close, None)}): "
        "measuring them again, pooled with the first repeats")
    remeasure(close)
    return [t for t in tried if keeps_guard(t, budget_ms, guard)]


def _expected_guard(tried: list[Tried], fixed: Optional[float]) -> float:
    """The guard an unmeasured candidate will likely need: --guard, else the median of those measured."""
    if fixed is not None:
        return fixed
    return float(np.median([guard_of(t, None) for t in tried])) if tried else DEFAULT_GUARD


def _guards_text(tried: list[Tried], fixed: Optional[float]) -> str:
    if fixed is not None:
        return f"--guard {100 * fixed:g} %"
    g = [100 * guard_of(t, None) for t in tried]
    return f"guards {min(g):.1f}-{max(g):.1f} % from their measured spread"


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
