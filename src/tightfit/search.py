"""`tightfit search`: for each latency table and budget, the most accurate subnet that fits.

Per (device, budget): regularized evolution under the predicted latency (search_evolution),
fitness = validation accuracy with inherited weights after BN recalibration (never the
test split), cached per subnet in RUN_DIR/search/accuracy_cache.jsonl so re-runs and
other budgets reuse it. Then the top candidates are exported whole and measured directly
(interleaved, fresh processes) and only the measured percentile decides the pick
(tightfit.manifest). Each pick is exported with a manifest to RUN_DIR/exports/<device>-<budget>ms/.
"""
from __future__ import annotations

import json
import re
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Optional

from tightfit.atomic import write_json, write_text
from tightfit.errors import UserError
from tightfit.search_evolution import (AccuracyCache, CachedAccuracy, CachedLatency, Candidate, EvolutionSettings,
                                       append_jsonl, fastest_check, pareto_front, read_jsonl, regularized_evolution)
from tightfit.space import SpaceSpec, Subnet

_UNITS = {"s": 1000.0, "ms": 1.0, "us": 1e-3, "µs": 1e-3}
_BUDGET_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(s|ms|us|µs)\s*$")


def parse_budget(text: str) -> float:
    """'0.3ms', '300us', '1.2 ms', '0.0012s' → milliseconds; anything else is a UserError."""
    m = _BUDGET_RE.match(str(text))
    if not m:
        raise UserError(f"budget {text!r} is not a duration: write it like 0.3ms, 300us or 0.0012s")
    ms = float(m.group(1)) * _UNITS[m.group(2)]
    if not ms > 0:
        raise UserError(f"budget {text!r} must be greater than zero: write it like 0.3ms")
    return ms


def budget_label(ms: float) -> str:
    return f"{ms:.6g}ms"


def safe_name(text: str) -> str:
    """A device name usable in a file name."""
    return re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-") or "device"


@dataclass(frozen=True)
class SearchSettings:
    population: int = 32
    generations: int = 9          # evaluations = population * (generations + 1) unless set
    evaluations: int = 0
    sample_size: int = 8
    seed: int = 0
    top: int = 4                  # candidates measured directly per budget
    val_images: int = 0           # cap on validation images per evaluation (0 = the whole split)

    def evolution(self) -> EvolutionSettings:
        n = self.evaluations or self.population * (self.generations + 1)
        return EvolutionSettings(population=self.population, sample_size=min(self.sample_size, self.population),
                                 evaluations=n, seed=self.seed)


# ----------------------------------------------------------------------------- one (device, budget)

@dataclass
class BudgetResult:
    device: str
    budget_ms: float
    candidates: list[Candidate]
    seconds: float
    fresh: int
    cached: int


def search_budget(space: SpaceSpec, fitness: CachedAccuracy, latency: CachedLatency, budget_ms: float,
                  device: str, settings: SearchSettings, log_path: Optional[Path] = None,
                  progress: bool = False) -> BudgetResult:
    """Evolution for one budget; every evaluated candidate is appended to ``log_path``."""
    cfg = settings.evolution()
    fresh0, hits0, t0 = fitness.fresh, fitness.hits, time.perf_counter()
    bar = _bar(cfg.evaluations, f"{device} {budget_label(budget_ms)}", progress)
    best = [float("-inf")]

    def on_eval(c: Candidate) -> None:
        rec = fitness.cache.get(c.key) or {}
        if log_path is not None:
            append_jsonl(log_path, {"device": device, "budget_ms": budget_ms, "generation": c.generation,
                                    "key": c.key, "val_acc": c.fitness, "predicted_ms": round(c.latency_ms, 5),
                                    "params": rec.get("params"), "macs": rec.get("macs")})
        best[0] = max(best[0], c.fitness)
        if bar is not None:
            bar.update(1)
            bar.set_postfix(best=f"{best[0]:.2f}")

    try:
        cands = regularized_evolution(space, fitness, latency, budget_ms, cfg, on_eval, device)
    finally:
        if bar is not None:
            bar.close()
    return BudgetResult(device, budget_ms, cands, time.perf_counter() - t0,
                        fitness.fresh - fresh0, fitness.hits - hits0)


def _bar(total: int, desc: str, enabled: bool):
    if not enabled:
        return None
    from tqdm import tqdm
    return tqdm(total=total, desc=desc, unit="eval", leave=False)


def drop_logged(path: Path, device: str, budget_ms: float) -> None:
    """Forget an earlier search's lines for this (device, budget), so the log shows the latest one."""
    rows = read_jsonl(path)
    keep = [r for r in rows if not (r.get("device") == device and r.get("budget_ms") == budget_ms)]
    if len(keep) != len(rows):
        write_text(path, "".join(json.dumps(r) + "\n" for r in keep))


def write_front(path: Path, device: str, log_path: Path) -> list[dict[str, Any]]:
    """Pareto front (validation accuracy vs predicted latency) over every candidate logged for
    the device, whichever budget or earlier invocation evaluated it."""
    points = {r["key"]: (r["key"], r["val_acc"], r["predicted_ms"]) for r in read_jsonl(log_path)
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


def time_report(r: BudgetResult, recal_s: float, val_s: float, latency_s: float) -> str:
    n = len(r.candidates)
    return (f"{r.device} {budget_label(r.budget_ms)}: {n} candidates ({r.fresh} evaluated, {r.cached} from cache) "
            f"in {r.seconds:.1f} s = {n / max(r.seconds, 1e-9):.2f} candidates/s; "
            f"BN recalibration {recal_s:.1f} s, validation {val_s:.1f} s, latency prediction {latency_s:.2f} s")


# ----------------------------------------------------------------------------- a trained run

class RunAccuracy:
    """``compute`` for CachedAccuracy on a trained run: recalibrate BN on training batches, then
    top-1 on the (optionally capped) validation split; time spent per phase is kept."""

    def __init__(self, run: Any, ds: Any, val_images: int = 0):
        from tightfit.data.dataset import calibration_batches, eval_batches
        cfg = run.recipe
        self.run = run
        self.calib = calibration_batches(ds, cfg.train.batch_size, cfg.train.recalibration_batches, cfg.seed)
        self.images = len(ds.val_y) if val_images <= 0 else min(val_images, len(ds.val_y))
        # The validation split is a random carve, so its first N images are a uniform subsample.
        self.val = list(eval_batches(ds.val_x[:self.images], ds.val_y[:self.images], ds,
                                     max(cfg.train.eval_batch_size, 512)))
        self.recal_s = self.val_s = 0.0

    def tag(self, run_dir: Path) -> dict[str, Any]:
        """What the cached figures depend on: recipe, the exact weights, recalibration and images."""
        import hashlib
        from tightfit.rundir import checkpoint_path
        weights = hashlib.sha256(checkpoint_path(run_dir).read_bytes()).hexdigest()[:16]
        return {"recipe_hash": self.run.recipe.hash(), "weights": weights,
                "recalibration_batches": len(self.calib), "images": self.images}

    def __call__(self, subnet: Subnet) -> dict[str, Any]:
        from tightfit.manifest import architecture_size
        from tightfit.recalibrate import accuracy, preserved_bn_stats, recalibrate_bn
        sn, data = self.run.supernet, self.run.recipe.data
        sn.set_subnet(subnet)
        t0 = time.perf_counter()
        with preserved_bn_stats(sn):
            recalibrate_bn(sn, self.calib)
            t1 = time.perf_counter()
            acc = accuracy(sn, self.val)
        self.recal_s += t1 - t0
        self.val_s += time.perf_counter() - t1
        params, macs = architecture_size(self.run.recipe.space, subnet, data.channels, data.image_size,
                                         len(self.run.class_names))
        return {"val_acc": round(acc, 4), "params": params, "macs": macs}


def load_predictors(paths: list[str], recipe: Any) -> list[tuple[Any, Any]]:
    """(table, predictor of the table's budget percentile) per --table; tables measured for
    another space are refused by the latency module."""
    from tightfit.latency.predict import load_predictor
    out = []
    for p in paths:
        predictor = load_predictor(recipe, p, target="budget_stat_ms")
        out.append((predictor.table, predictor))
    names = [t.name for t, _ in out]
    if len(set(names)) != len(names):
        raise UserError(f"two --table files name the same device {names}: pass each device once")
    return out


def run_search(run_dir: str | Path, table_paths: list[str], budgets: list[str], settings: SearchSettings,
               progress: bool = True, say: Callable[[str], None] = print) -> list[dict[str, Any]]:
    """Search, verify and export every (device, budget); returns the rows of picks.json written."""
    from tightfit.data.dataset import load_dataset
    from tightfit.manifest import choose_and_export
    from tightfit.rundir import load_trained
    budget_ms = [parse_budget(b) for b in budgets]
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
    compute = RunAccuracy(run, ds, settings.val_images)
    out = run_dir / "search"
    fitness = CachedAccuracy(AccuracyCache(out / "accuracy_cache.jsonl", compute.tag(run_dir)), compute)
    say(f"validation images per evaluation: {compute.images} of {len(ds.val_y)}; "
        f"{len(fitness.cache.entries)} accuracies cached")
    picks = []
    for table, predictor in tables:
        latency, seen = CachedLatency(predictor), []
        for b in budget_ms:
            drop_logged(out / "candidates.jsonl", table.name, b)
            r0, v0, l0 = compute.recal_s, compute.val_s, latency.seconds
            result = search_budget(cfg.space, fitness, latency, b, table.name, settings,
                                   out / "candidates.jsonl", progress)
            say(time_report(result, compute.recal_s - r0, compute.val_s - v0, latency.seconds - l0))
            seen += result.candidates
            write_front(out / f"front-{safe_name(table.name)}.json", table.name, out / "candidates.jsonl")
            picks.append(choose_and_export(run, ds, table, ranked_within(seen, b), b, settings.top,
                                           run_dir, fitness, latency, say))
            merge_picks(out / "picks.json", picks)
    return picks


def merge_picks(path: Path, rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """picks.json keeps earlier (device, budget) picks and replaces the ones searched again."""
    new = {(r["device"], r["budget_ms"]) for r in rows}
    old = []
    if path.is_file():
        try:
            old = [r for r in json.loads(path.read_text("utf-8")) if (r.get("device"), r.get("budget_ms")) not in new]
        except (json.JSONDecodeError, AttributeError, TypeError):
            old = []
    merged = old + rows
    write_json(path, merged)
    return merged


def format_picks(rows: list[dict[str, Any]]) -> str:
    head = (f"{'device':<16} {'budget':>8} {'val %':>6} {'test %':>6} {'pred ms':>8} {'meas ms':>8} "
            f"{'margin':>7} {'use':>6}  key")
    lines = [head, "-" * len(head)]
    for r in rows:
        m = r["measured"]["budget_stat_ms"] if r["measured"] else None
        used = m if m is not None else r["predicted_ms"]
        lines.append(f"{r['device'][:16]:<16} {r['budget_ms']:>6.4g}ms {r['val_acc']:>6.2f} {r['test_acc']:>6.2f} "
                     f"{r['predicted_ms']:>8.4f} {m if m is not None else float('nan'):>8.4f} "
                     f"{100 * (r['budget_ms'] - used) / r['budget_ms']:>6.1f}% {100 * used / r['budget_ms']:>5.1f}%  "
                     f"{r['key']}{'' if r['fits'] else '  (DOES NOT FIT)'}{'' if r['verified'] else '  (unverified)'}")
    pct = rows[0]["percentile"] if rows else 90.0
    lines.append(f"meas ms = measured p{pct:g} (median over repeats); margin and use are against the budget "
                 "(predicted where unverified)")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- command line

def _positive(name: str, value: int, minimum: int = 1) -> int:
    if value < minimum:
        raise UserError(f"--{name} {value} is too small: use at least {minimum}")
    return value


def _cmd_search(args: Any) -> int:
    if args.threads:
        import torch
        torch.set_num_threads(args.threads)
    for b in args.budget:
        parse_budget(b)
    settings = SearchSettings(population=_positive("population", args.population, 2),
                              generations=_positive("generations", args.generations, 0),
                              evaluations=_positive("evaluations", args.evaluations, 0), seed=args.seed,
                              top=_positive("top", args.top), val_images=_positive("val-images", args.val_images, 0))
    rows = run_search(args.run, args.table, args.budget, settings, progress=not args.quiet)
    print(format_picks(rows))
    print(f"picks: {Path(args.run) / 'search' / 'picks.json'}")
    return 0


def add_search_parser(sub: Any) -> None:
    s = sub.add_parser("search", help="find the most accurate subnet within each latency budget, verify, export",
                       description="For each latency table (device) and budget: regularized evolution over the "
                                   "space under the table's predicted latency, fitness = validation accuracy after "
                                   "BN recalibration (cached in RUN_DIR/search). The top candidates are exported and "
                                   "measured directly when the table is for this machine; the most accurate whose "
                                   "measured percentile fits is exported to RUN_DIR/exports/DEVICE-BUDGETms.")
    s.add_argument("run", help="run directory written by 'tightfit train'")
    s.add_argument("--table", action="append", required=True, help="latency table JSON; repeatable (one per device)")
    s.add_argument("--budget", action="append", required=True, help="latency budget such as 0.3ms, 300us; repeatable")
    s.add_argument("--population", type=int, default=32, help="aging-evolution population (default 32)")
    s.add_argument("--generations", type=int, default=9,
                   help="children per budget = population x generations (default 9)")
    s.add_argument("--evaluations", type=int, default=0,
                   help="candidates per budget, overriding --generations (default population x (generations+1))")
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--top", type=int, default=4, help="candidates measured directly per budget (default 4)")
    s.add_argument("--val-images", type=int, default=0,
                   help="validation images per accuracy evaluation (default 0 = the whole validation split)")
    s.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=_cmd_search)
