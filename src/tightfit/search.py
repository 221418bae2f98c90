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
    population: int = 16
    generations: int = 5          # evaluations = population * (generations + 1) unless set
    evaluations: int = 0
    sample_size: int = 6
    seed: int = 0
    top: int = 4                  # candidates measured directly per budget
    val_images: int = 0           # cap on validation images per evaluation (0 = the whole split)
    backend: str = "onnxruntime"  # validation pass: "onnxruntime" (fast) or "torch"
    slack: Optional[float] = None # search up to budget x (1 + slack) when picks are measured here;
    #                               None: the predictor's leave-one-out error, clamped to 5-25 %

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


def search_slack(settings: SearchSettings, predictor: Any, verifiable: bool) -> float:
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
                  progress: bool = False, limit_ms: Optional[float] = None) -> BudgetResult:
    """Evolution under predicted latency <= limit_ms (default: the budget); every evaluated
    candidate is appended to ``log_path``."""
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
        cands = regularized_evolution(space, fitness, latency, limit_ms, cfg, on_eval, device)
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


def time_report(r: BudgetResult, phases: dict[str, float]) -> str:
    """Where one budget's search time went."""
    n = len(r.candidates)
    other = r.seconds - sum(phases.values())
    spent = ", ".join(f"{k} {v:.1f} s" for k, v in [*phases.items(), ("other", other)])
    return (f"{r.device} {budget_label(r.budget_ms)}: {n} candidates ({r.fresh} evaluated, {r.cached} from cache) "
            f"in {r.seconds:.1f} s = {r.fresh / max(r.seconds, 1e-9):.2f} evaluations/s; {spent}")


# ----------------------------------------------------------------------------- a trained run

def fixed_stages(space: SpaceSpec) -> int:
    """Leading stages with a single choice everywhere: every subnet shares them."""
    n = 0
    while n < len(space.stages) and all(len(v) == 1 for v in (space.stages[n].depths, space.stages[n].exp_ratios,
                                                                space.stages[n].kernels)):
        n += 1
    return n


def _cumulative(bns: list[Any]) -> list[Optional[float]]:
    """Reset running statistics to a cumulative average (momentum None); returns the old momenta."""
    saved = [bn.momentum for bn in bns]
    for bn in bns:
        bn.reset_running_stats()
        bn.momentum = None
    return saved


def _bn_state(bns: list[Any]) -> list[tuple]:
    return [(bn, bn.running_mean.clone(), bn.running_var.clone(), bn.num_batches_tracked.clone()) for bn in bns]


class Recalibrator:
    """BN recalibration (tightfit.recalibrate.recalibrate_bn) that reuses what subnets share.

    In training mode a layer's output and batch statistics depend only on the layers before
    it, so the outputs of the stem and fixed stages are computed once, and the outputs of
    the first variable block once per (expansion, kernel) choice; only the rest is re-run.
    Cached outputs are capped at ``max_bytes`` (big images): beyond it, plain recalibration."""

    def __init__(self, supernet: Any, calib: list[Any], max_bytes: int = 1 << 30):
        import torch
        from tightfit.recalibrate import _bns, preserved_bn_stats, recalibrate_bn
        self.sn, self.calib, self.n, self.budget = supernet, calib, fixed_stages(supernet.space), max_bytes
        prefix = torch.nn.Sequential(supernet.stem, *[b for blocks in supernet.stages[:self.n] for b in blocks])
        was_training = supernet.training
        with preserved_bn_stats(prefix), torch.no_grad():
            recalibrate_bn(prefix, calib)
            self.prefix_stats = _bn_state(_bns(prefix))
            prefix.train()
            first = prefix(calib[0])  # (B, C, H, W) after the shared layers
            self.inputs = [first] + [prefix(x) for x in calib[1:]] if self._take(first) else None
        supernet.train(was_training)
        self.variants: dict[tuple, tuple[list[Any], list[tuple]]] = {}
        self.first = supernet.stages[self.n][0] if self.n < len(supernet.stages) else None
        prefix_ids = {id(bn) for bn, *_ in self.prefix_stats}
        self.rest = [bn for bn in _bns(supernet) if id(bn) not in prefix_ids]
        self.first_ids = {id(bn) for bn in _bns(self.first)} if self.first is not None else set()

    def _take(self, sample: Any) -> bool:
        """Reserve room for len(calib) tensors shaped like ``sample``, if the cap allows."""
        size = sample.element_size() * sample.numel() * len(self.calib)
        if size > self.budget:
            return False
        self.budget -= size
        return True

    def _first_block(self) -> Optional[tuple[list[Any], list[tuple]]]:
        """Outputs and statistics of the first variable block for its current choice (cached)."""
        import torch
        from tightfit.recalibrate import _bns, preserved_bn_stats
        key = (self.first.exp_ratio, self.first.kernel)
        if key not in self.variants:
            bns = _bns(self.first)
            with preserved_bn_stats(self.first), torch.no_grad():
                saved, was_training = _cumulative(bns), self.first.training
                self.first.train()
                outs = [self.first(h) for h in self.inputs]
                self.first.train(was_training)
                for bn, m in zip(bns, saved):
                    bn.momentum = m
                stats = _bn_state(bns)
            self.variants[key] = (outs, stats) if self._take(outs[0]) else None
        return self.variants[key]

    def __call__(self) -> None:
        """Recalibrate the active subnet's BatchNorm statistics (call inside preserved_bn_stats)."""
        import torch
        from tightfit.recalibrate import recalibrate_bn
        if self.inputs is None:
            return recalibrate_bn(self.sn, self.calib)
        cached = self._first_block() if self.first is not None else None
        hs, keep = (cached[0], self.prefix_stats + cached[1]) if cached else (self.inputs, self.prefix_stats)
        rest = [bn for bn in self.rest if not (cached and id(bn) in self.first_ids)]
        saved = _cumulative(rest)
        was_training = self.sn.training
        self.sn.train()
        with torch.no_grad():
            for h in hs:
                for i, (blocks, depth) in enumerate(zip(self.sn.stages[self.n:], self.sn.depths[self.n:])):
                    for block in blocks[1 if cached and i == 0 else 0:depth]:
                        h = block(h)
                self.sn.head(h)
        self.sn.train(was_training)
        for bn, m in zip(rest, saved):
            bn.momentum = m
        for bn, mean, var, count in keep:
            bn.running_mean.copy_(mean)
            bn.running_var.copy_(var)
            bn.num_batches_tracked.copy_(count)


class RunAccuracy:
    """``compute`` for CachedAccuracy on a trained run: recalibrate BN on training batches, then
    top-1 on the (optionally capped) validation split; time spent per phase is kept.

    With backend "onnxruntime" the recalibrated subnet is extracted and exported (tightfit.export)
    and the validation pass runs in ONNX Runtime, which fuses conv + BatchNorm + activation:
    3-4x faster than eager torch here, same predictions (export parity <= 1e-4 is checked
    for every pick by tightfit.cut). Backend "torch" is tightfit.recalibrate.subnet_accuracy."""

    def __init__(self, run: Any, ds: Any, val_images: int = 0, backend: str = "onnxruntime"):
        from tightfit.data.dataset import calibration_batches, eval_batches
        if backend not in ("onnxruntime", "torch"):
            raise UserError(f"evaluation backend {backend!r} is unknown: use 'onnxruntime' or 'torch'")
        cfg = run.recipe
        self.run, self.backend = run, backend
        self.calib = calibration_batches(ds, cfg.train.batch_size, cfg.train.recalibration_batches, cfg.seed)
        self.images = len(ds.val_y) if val_images <= 0 else min(val_images, len(ds.val_y))
        # The validation split is a random carve, so its first N images are a uniform subsample.
        self.val = list(eval_batches(ds.val_x[:self.images], ds.val_y[:self.images], ds,
                                     max(cfg.train.eval_batch_size, 512)))
        self.recal_s = self.export_s = self.val_s = 0.0
        self.recalibrate = Recalibrator(run.supernet, self.calib)

    def tag(self, run_dir: Path) -> dict[str, Any]:
        """What the cached figures depend on: recipe, the exact weights, recalibration and images."""
        import hashlib
        from tightfit.rundir import checkpoint_path
        weights = hashlib.sha256(checkpoint_path(run_dir).read_bytes()).hexdigest()[:16]
        return {"recipe_hash": self.run.recipe.hash(), "weights": weights,
                "recalibration_batches": len(self.calib), "images": self.images}

    def phases(self, latency: CachedLatency) -> dict[str, float]:
        return {"BN recalibration": self.recal_s, "export": self.export_s, "validation": self.val_s,
                "latency prediction": latency.seconds}

    def _ort_accuracy(self, net: Any) -> float:
        import onnxruntime as ort
        import torch
        from tightfit.export import onnx_bytes
        data = self.run.recipe.data
        t0 = time.perf_counter()
        opts = ort.SessionOptions()
        opts.intra_op_num_threads, opts.inter_op_num_threads, opts.log_severity_level = torch.get_num_threads(), 1, 3
        session = ort.InferenceSession(onnx_bytes(net, data.channels, data.image_size), opts,
                                       providers=["CPUExecutionProvider"])
        t1 = time.perf_counter()
        correct = sum(int((session.run(None, {"image": x.numpy()})[0].argmax(1) == y.numpy()).sum())
                      for x, y in self.val)
        self.export_s += t1 - t0
        self.val_s += time.perf_counter() - t1
        return 100.0 * correct / max(self.images, 1)

    def __call__(self, subnet: Subnet) -> dict[str, Any]:
        from tightfit.extract import extract_subnet
        from tightfit.manifest import architecture_size
        from tightfit.recalibrate import accuracy, preserved_bn_stats
        sn, data = self.run.supernet, self.run.recipe.data
        sn.set_subnet(subnet)
        t0 = time.perf_counter()
        with preserved_bn_stats(sn):
            self.recalibrate()
            self.recal_s += time.perf_counter() - t0
            if self.backend == "torch":
                t1 = time.perf_counter()
                acc = accuracy(sn, self.val)
                self.val_s += time.perf_counter() - t1
            else:
                net = extract_subnet(sn, subnet)
        if self.backend != "torch":
            acc = self._ort_accuracy(net)
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
    compute = RunAccuracy(run, ds, settings.val_images, settings.backend)
    fitness = CachedAccuracy(AccuracyCache(run_dir / "search" / "accuracy_cache.jsonl", compute.tag(run_dir)), compute)
    ctx = _Context(run_dir, run, ds, settings, fitness, compute, progress, say)
    say(f"fitness: validation top-1 on {compute.images} of {len(ds.val_y)} validation images ({compute.backend}) "
        f"after BN recalibration on {len(compute.calib)} training batches; {len(fitness.cache.entries)} cached")
    picks: list[dict[str, Any]] = []
    for table, predictor in tables:
        picks += _search_device(ctx, table, predictor, budget_ms)
    return picks


@dataclass
class _Context:
    run_dir: Path
    run: Any
    ds: Any
    settings: SearchSettings
    fitness: CachedAccuracy
    compute: RunAccuracy
    progress: bool
    say: Callable[[str], None]


def _search_device(ctx: _Context, table: Any, predictor: Any, budgets: list[float]) -> list[dict[str, Any]]:
    """Every budget for one device: search, then verify and export the pick."""
    from tightfit.manifest import choose_and_export, same_host
    out, compute, say = ctx.run_dir / "search", ctx.compute, ctx.say
    latency, seen, picks = CachedLatency(predictor), [], []
    verifiable = same_host(table.device)
    slack = search_slack(ctx.settings, predictor, verifiable)
    say(f"{table.name}: " + (f"picks measured here; search up to {100 * slack:.0f} % over each budget (predicted)"
                             if verifiable else "another machine: picks by predicted latency, to be verified there"))
    for b in budgets:
        drop_logged(out / "candidates.jsonl", table.name, b)
        before = compute.phases(latency)
        result = search_budget(ctx.run.recipe.space, ctx.fitness, latency, b, table.name, ctx.settings,
                               out / "candidates.jsonl", ctx.progress, limit_ms=b * (1 + slack))
        say(time_report(result, {k: v - before[k] for k, v in compute.phases(latency).items()}))
        seen += result.candidates
        write_front(out / f"front-{safe_name(table.name)}.json", table.name, out / "candidates.jsonl")
        picks.append(choose_and_export(ctx.run, ctx.ds, table, ranked_within(seen, b * (1 + slack)), b,
                                       ctx.settings.top, ctx.run_dir, ctx.fitness, latency, say, verifiable))
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


def _slack(percent: Optional[float]) -> Optional[float]:
    if percent is not None and not 0 <= percent <= 100:
        raise UserError(f"--slack {percent:g} must be a percentage between 0 and 100")
    return None if percent is None else percent / 100


def _cmd_search(args: Any) -> int:
    if args.threads:
        import torch
        torch.set_num_threads(args.threads)
    for b in args.budget:
        parse_budget(b)
    settings = SearchSettings(population=_positive("population", args.population, 2),
                              generations=_positive("generations", args.generations, 0),
                              evaluations=_positive("evaluations", args.evaluations, 0), seed=args.seed,
                              top=_positive("top", args.top), val_images=_positive("val-images", args.val_images, 0),
                              backend=args.eval_backend, slack=_slack(args.slack))
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
    s.add_argument("--population", type=int, default=16, help="aging-evolution population (default 16)")
    s.add_argument("--generations", type=int, default=5,
                   help="children per budget = population x generations (default 5: 96 evaluations in all)")
    s.add_argument("--evaluations", type=int, default=0,
                   help="candidates per budget, overriding --generations (default population x (generations+1))")
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--top", type=int, default=4, help="candidates measured directly per budget (default 4)")
    s.add_argument("--val-images", type=int, default=0,
                   help="validation images per accuracy evaluation (default 0 = the whole validation split)")
    s.add_argument("--slack", type=float, default=None,
                   help="search up to this many percent over each budget (predicted) when picks are measured here "
                        "(default: the predictor's leave-one-out error, 5-25)")
    s.add_argument("--eval-backend", choices=("onnxruntime", "torch"), default="onnxruntime",
                   help="run the validation pass in ONNX Runtime (default, faster) or torch")
    s.add_argument("--threads", type=int, default=None, help="torch/ORT CPU threads for evaluation (default: all cores)")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=_cmd_search)
