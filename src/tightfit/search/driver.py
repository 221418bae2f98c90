"""`tightfit search`: for each latency table and budget, the most accurate subnet that fits.

Per (device, budget): regularized evolution under the predicted latency (evolution.py),
fitness = validation accuracy with inherited weights after BN recalibration (never the
test split), cached per subnet in RUN_DIR/search/accuracy_cache.jsonl so re-runs and
other budgets reuse it. Then the top candidates are exported whole and measured directly
(interleaved, fresh processes) and only the measured percentile decides the pick
(choose.py). Each pick is exported with a manifest to RUN_DIR/exports/<device>-<budget>ms/.
"""
from __future__ import annotations

import json
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Callable, Optional, Sequence


from tightfit.data.dataset import load_dataset
from tightfit.errors import UserError
from tightfit.latency.drift import drifted_limit, measure_drift
from tightfit.latency.predict import LatencyPredictor, load_predictor
from tightfit.latency.table import LatencyTable
from tightfit.model.space import SpaceSpec
from tightfit.ondevice.files import append_jsonl, device_name, read_jsonl, write_json, write_text
from tightfit.recipe import Recipe
from tightfit.budgets import budget_label
from tightfit.progress import bar
from tightfit.search.cache import AccuracyCache, CachedAccuracy, CachedLatency
from tightfit.ondevice.hardware import same_host
from tightfit.export.pick import Pick, write_picks
from tightfit.search.choose import SearchContext, choose_pick, finetune_pick, remove_staging
from tightfit.search.confirm import confirm_picks, guard_floor_of
from tightfit.search.correction import centre_guard, corrected_limit, expected_guard
from tightfit.search.evolution import Candidate, fastest_check, front_first, pareto_front, regularized_evolution
from tightfit.search.cpu import CpuSplit, merged
from tightfit.search.fitness import RunAccuracy, WholeSplit
from tightfit.search.settings import SearchSettings
from tightfit.rundir import load_trained

# ----------------------------------------------------------------------------- one (device, budget)

@dataclass
class BudgetResult:
    device: str
    budget_ms: float
    candidates: list[Candidate]
    seconds: float
    fresh: int
    cached: int


def search_slack(settings: SearchSettings, predictor: LatencyPredictor, verifiable: bool) -> float:
    """How far above the budget (predicted) the search may go. Direct measurement decides the
    pick, so where it is possible, a predictor that overestimates must not hide subnets that
    fit; where it is not (another device), predictions are all there is: no slack."""
    if not verifiable:
        return 0.0
    if settings.slack is not None:
        return settings.slack
    loo = getattr(getattr(predictor, "calibration", None), "loo_mape", None)
    return min(0.25, max(0.05, (10.0 if loo is None else loo) / 100))


def search_budget(space: SpaceSpec, fitness: CachedAccuracy, latency: CachedLatency, budget_ms: float,
                  device: str, settings: SearchSettings, log_path: Optional[Path] = None,
                  progress: bool = False, limit_ms: Optional[float] = None,
                  usable_ms: Optional[float] = None, seeds: Sequence[Candidate] = ()) -> BudgetResult:
    """Evolution under predicted latency <= limit_ms (default: the budget), its preferred band under
    ``usable_ms`` (the budget less its expected guard; default: the limit), started from ``seeds`` (the
    device's candidates so far) that lie in its band; every candidate is appended to ``log_path``."""
    cfg = settings.evolution()
    limit_ms = budget_ms if limit_ms is None else limit_ms
    fresh0, hits0, t0 = fitness.fresh, fitness.hits, time.perf_counter()
    bar = _bar(cfg.evaluations, f"{device} {budget_label(budget_ms)}", progress)
    best = [float("-inf")]

    def on_eval(c: Candidate) -> None:
        rec = fitness.cache.get(c.key) or {}
        if log_path is not None:
            append_jsonl(log_path, {"device": device, "budget_ms": budget_ms, "generation": c.generation,
                                    "key": c.key, "val_acc": c.fitness, "predicted_ms": round(c.latency_ms, 5),
                                    "params": rec.get("params"), "macs": rec.get("macs"),
                                    "limit_ms": round(limit_ms, 5)})
        best[0] = max(best[0], c.fitness)
        if bar is not None:
            bar.update(1)
            bar.set_postfix(best=f"{best[0]:.2f}")

    try:
        cands = regularized_evolution(space, fitness, latency, limit_ms, cfg, on_eval, device, usable_ms, seeds)
    finally:
        if bar is not None:
            bar.close()
    return BudgetResult(device, budget_ms, cands, time.perf_counter() - t0,
                        fitness.fresh - fresh0, fitness.hits - hits0)


def _bar(total: int, desc: str, enabled: bool) -> Optional[Any]:
    if not enabled:
        return None
    return bar(total=total, desc=desc, unit="eval", leave=False)


def drop_logged(path: Path, device: str, budget_ms: float) -> None:
    """Forget an earlier search's lines for this (device, budget), so the log shows the latest one."""
    rows = read_jsonl(path)[0]
    keep = [r for r in rows if not (r.get("device") == device and r.get("budget_ms") == budget_ms)]
    if len(keep) != len(rows):
        write_text(path, "".join(json.dumps(r) + "\n" for r in keep))


def write_front(path: Path, device: str, log_path: Path) -> list[dict[str, Any]]:
    """Pareto front (validation accuracy vs predicted latency) over every candidate logged for
    the device, whichever budget or earlier invocation evaluated it."""
    points = {r["key"]: (r["key"], r["val_acc"], r["predicted_ms"]) for r in read_jsonl(log_path)[0]
              if r.get("device") == device}
    rows = [{"key": k, "val_acc": a, "predicted_ms": ms} for k, a, ms in pareto_front(list(points.values()))]
    write_json(path, rows)
    return rows


def ranked_within(candidates: list[Candidate], budget_ms: float) -> list[Candidate]:
    """Distinct candidates under the predicted budget, most accurate first (faster first on ties)."""
    seen: dict[str, Candidate] = {}
    for c in candidates:
        if c.latency_ms <= budget_ms:
            seen[c.key] = c
    return sorted(seen.values(), key=lambda c: (-c.fitness, c.latency_ms))


def measuring_order(ctx: SearchContext, ranked: list[Candidate]) -> list[Candidate]:
    """The order in which candidates are measured: Pareto front first (evolution.front_first). When the
    search scored a capped part of the validation split, its best ``rescore`` candidates are scored
    again on the whole split and only they are ordered by that; the rest follow, reached only if none
    of them fits. A cheap ranking's noise then picks what is re-scored, not the pick."""
    n = ctx.settings.rescore
    if ctx.whole is None or n <= 0:
        return front_first(ranked)
    t0, fresh = time.perf_counter(), ctx.whole.fresh
    with ctx.cpu.phase("rescore"):
        head = sorted((replace(c, fitness=ctx.whole(c.subnet)) for c in ranked[:n]), key=lambda c: (-c.fitness, c.latency_ms))
    ctx.say(f"  re-scored the best {len(head)} on the whole validation split ({ctx.whole.fresh - fresh} new) "
            f"in {time.perf_counter() - t0:.1f} s")
    return front_first(head) + ranked[n:]


def time_report(r: BudgetResult, phases: dict[str, float]) -> str:
    """Where one budget's search time went."""
    n = len(r.candidates)
    other = r.seconds - sum(phases.values())
    spent = ", ".join(f"{k} {v:.1f} s" for k, v in [*phases.items(), ("other", other)])
    shared = n - r.fresh - r.cached  # adopted from the device's other budgets without a fitness call
    return (f"{r.device} {budget_label(r.budget_ms)}: {n} candidates ({r.fresh} evaluated, {r.cached} from cache, "
            f"{shared} from other budgets) "
            f"in {r.seconds:.1f} s = {r.fresh / max(r.seconds, 1e-9):.2f} evaluations/s; {spent}")


def load_predictors(paths: list[str], recipe: Recipe) -> list[tuple[LatencyTable, LatencyPredictor]]:
    """(table, predictor of the table's budget percentile) per --table; tables measured for
    another space are refused by the latency module."""
    out = []
    for p in paths:
        predictor = load_predictor(recipe, p, target="budget_stat_ms")
        out.append((predictor.table, predictor))
    names = [t.name for t, _ in out]
    if len(set(names)) != len(names):
        raise UserError(f"two --table files name the same device {names}: pass each device once")
    return out


def run_search(run_dir: str | Path, table_paths: list[str], budget_ms: list[float], settings: SearchSettings,
               progress: bool = True, say: Callable[[str], None] = print) -> list[dict[str, Any]]:
    """Search, verify and export every (device, budget) (budgets in ms, parsed by the caller: a command
    checks them before anything loads); returns the rows of picks.json written."""
    run_dir = Path(run_dir)
    run = load_trained(run_dir)
    cfg = run.recipe
    tables = load_predictors(table_paths, cfg)
    ds = load_dataset(cfg.data, cfg.seed)
    if ds.class_names != run.class_names:
        raise UserError(f"the data the recipe points at has classes {ds.class_names}, the run was trained on {run.class_names}")
    for table, predictor in tables:  # impossible budgets fail before anything is written
        for b in budget_ms:
            fastest_check(cfg.space, predictor.predict_ms, b, table.name)
    compute = RunAccuracy(run, ds, settings.val_images, settings.backend)
    fitness = CachedAccuracy(AccuracyCache(run_dir / "search" / "accuracy_cache.jsonl", compute.tag(run_dir)), compute)
    whole = None
    if settings.rescore > 0 and compute.images < len(ds.val_y):
        rest = RunAccuracy(run, ds, 0, settings.backend, skip=compute.images, recalibrator=compute.recalibrate)
        full = WholeSplit(fitness, compute.images, rest)  # a re-score pays for the images not yet scored only
        whole = CachedAccuracy(AccuracyCache(run_dir / "search" / "accuracy_cache.jsonl", full.tag(run_dir)), full)
    ctx = SearchContext(run_dir, run, ds, settings, fitness, compute, progress, say, whole)
    say(f"fitness: validation top-1 on {compute.images} of {len(ds.val_y)} validation images ({compute.backend}) "
        f"after BN recalibration on {len(compute.calib)} training batches; {len(fitness.cache.entries)} cached"
        + (f"; the best {settings.rescore} per budget scored again on all {len(ds.val_y)}" if whole else ""))
    picks: list[dict[str, Any]] = []
    for table, predictor in tables:
        picks += _search_device(ctx, table, predictor, budget_ms)
    return picks


# long: a budget's steps in the order they run (search, one correction, choose, fine-tune, bill its CPU)
def _search_device(ctx: SearchContext, table: LatencyTable, predictor: LatencyPredictor, budgets: list[float]) -> list[dict[str, Any]]:
    """Every budget for one device: search, choose (and fine-tune) the pick; then confirm the device's
    picks and write each once (export folder and picks.json row, export/pick.py write_pick)."""
    out, compute, say = ctx.run_dir / "search", ctx.compute, ctx.say
    latency, seen, picks = CachedLatency(predictor), [], []
    verifiable = same_host(table.hardware)
    slack = search_slack(ctx.settings, predictor, verifiable)
    say(f"{table.name}: " + (f"picks measured here; search up to {100 * slack:.0f} % over each budget (predicted)"
                             if verifiable else "another machine: picks by predicted latency, to be verified there"))
    orders: dict[float, list[Candidate]] = {}  # each budget's measuring order, for a choice made again
    for b in budgets:
        drop_logged(out / "candidates.jsonl", table.name, b)
        ctx.cpu = CpuSplit()  # this budget's CPU-seconds per phase, into its pick's record
        t0 = time.perf_counter()
        drift = _drift(ctx, table, predictor) if verifiable and ctx.settings.drift_check else None
        # picks measured here must fit budget x (1 - guard): search around that, not the budget itself
        usable = b * (1 - (expected_guard(ctx.settings) if verifiable else 0.0))
        base = usable * (1 + slack)
        limit = drifted_limit(base, drift)
        if drift is not None:
            say(f"  {budget_label(b)}: this machine now runs the table's calibration subnets at {drift:.2f} x their "
                f"profiled time (drift check {time.perf_counter() - t0:.1f} s)"
                + (f": searching up to {limit:.4g} ms predicted" if limit != base else ""))
        settings = ctx.settings
        for attempt in range(2):
            before = compute.phases(latency)
            with ctx.cpu.phase("evaluate"):
                result = search_budget(ctx.run.recipe.space, ctx.fitness, latency, b, table.name, settings,
                                       out / "candidates.jsonl", ctx.progress, limit_ms=limit, usable_ms=usable,
                                       seeds=seen if attempt == 0 else ())
            say(time_report(result, {k: v - before[k] for k, v in compute.phases(latency).items()}))
            seen += result.candidates
            write_front(out / f"front-{device_name(table.name)}.json", table.name, out / "candidates.jsonl")
            orders[b] = measuring_order(ctx, ranked_within(seen, limit))
            pick = replace(choose_pick(ctx, table, orders[b], b, latency, verifiable), session_drift=drift)
            ctx.cpu.merge(pick.search_cpu_s)  # measuring and scoring, every attempt's
            centre = centre_guard(pick, ctx.settings)
            fell_back = pick.subnet == ctx.run.recipe.space.smallest()
            again = corrected_limit(pick, b, centre, slack, limit, fell_back) if attempt == 0 else None
            if again is None:
                break
            limit, usable = again
            say(f"  the pick uses {pick.use():.0%} of the budget; the measured candidates ran "
                f"{pick.measured_over_predicted:.2f} x their predictions and needed guards of about {100 * centre:.0f} %: "
                f"searching again up to {limit:.4g} ms predicted")
            # a correction, not a new search: half the evaluations (the budget's time bar holds on a noisy host),
            # all fresh: seeded with the candidates seen, it once took all of them from those (the demo at fbcf81f)
            settings = replace(settings, evaluations=max(settings.population, settings.evaluations // 2))
        if ctx.settings.finetune_steps > 0:
            with ctx.cpu.phase("finetune"):
                pick = finetune_pick(ctx, pick)
        picks.append(replace(pick, search_cpu_s=ctx.cpu.rounded()))
    if verifiable and ctx.settings.confirm:
        picks = _confirm(ctx, table, picks, orders, latency)
    rows = write_picks(ctx.run, picks, out / "picks.json")
    for p in picks:
        remove_staging(ctx, p)
    return rows


def _confirm(ctx: SearchContext, table: LatencyTable, picks: list[Pick], orders: dict[float, list[Candidate]],
             latency: CachedLatency) -> list[Pick]:
    """Measure the device's picks again (confirm.py); where one no longer keeps its guard and the guard
    comes from the spread, choose that budget again with every candidate's guard at least as wide."""
    picks = confirm_picks(ctx, table, picks)
    out = []
    for pick in picks:
        floor = guard_floor_of(pick) if ctx.settings.guard is None else None
        if floor is not None:
            ctx.cpu = CpuSplit()
            ctx.say(f"  {budget_label(pick.budget_ms)}: the pick measured {pick.confirmation.pooled_ms:.4g} ms over both "
                    f"windows and no longer keeps its {100 * floor:.1f} % guard: choosing again with guards of at least that")
            again = choose_pick(ctx, table, orders[pick.budget_ms], pick.budget_ms, latency, True, guard_floor=floor)
            ctx.cpu.merge(again.search_cpu_s)
            if ctx.settings.finetune_steps > 0:
                with ctx.cpu.phase("finetune"):
                    again = finetune_pick(ctx, again)
            spent = {"choose again": ctx.cpu.rounded()["total"]}
            pick = replace(again, session_drift=pick.session_drift, chosen_again=pick.confirmation,
                           search_cpu_s=merged(pick.search_cpu_s, spent))
        out.append(pick)
    return out


def _drift(ctx: SearchContext, table: LatencyTable, predictor: LatencyPredictor) -> Optional[float]:
    """This machine's speed now against the table's, from its calibration subnets (None without them)."""
    cfg = ctx.run.recipe
    with ctx.cpu.phase("drift check"):
        return measure_drift(ctx.run.supernet, table, getattr(predictor, "calibration_keys", []), cfg.data.channels, cfg.data.image_size)
