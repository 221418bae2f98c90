"""Benchmark: one supernet + search vs a hand-scaled family trained one by one (Fashion-MNIST, CPU).

    .venv/bin/python scripts/bench_fashion_mnist.py                       # the full run (83 and 102 min on 2 cores, measured)
    .venv/bin/python scripts/bench_fashion_mnist.py --smoke --run runs/bench-smoke --out /tmp/smoke.json

Phases (each recorded in RUN/bench_state.json as it finishes, so an interrupted run resumes
where it stopped; training itself resumes from its last checkpoint):
  1. train the supernet (recipe's epochs), 2. profile this machine (probe bundle + runner),
  3. search three budgets spread over the space's predicted latency range, export + verify picks,
  4. train each member of the hand-scaled family alone, same data, augmentation, schedule, epochs,
  5. measure every model (picks and baselines) in one interleaved session under the latency
     protocol and evaluate all on the test split (never used by search or selection),
  6. machinery figures: elastic overhead, training throughput and peak memory, where time goes.
Writes benchmarks/results/fashion-mnist.json, docs/benchmarks.md and docs/benchmarks-fashion-mnist.png.
"""
from __future__ import annotations

import argparse
import json
import resource
import sys
import time
from dataclasses import replace
from pathlib import Path
from typing import Any, Callable

ROOT = Path(__file__).resolve().parents[1]


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--recipe", default=str(ROOT / "recipes" / "fashion-mnist.toml"))
    p.add_argument("--run", default=str(ROOT / "runs" / "bench-fashion-mnist"), help="run directory (resumable)")
    p.add_argument("--out", default=str(ROOT / "benchmarks" / "results" / "fashion-mnist.json"))
    p.add_argument("--docs", default=str(ROOT / "docs"), help="folder for benchmarks.md and the plot")
    p.add_argument("--smoke", action="store_true",
                   help="smallest setting (a few hundred images, tiny search) to check the script end to end")
    p.add_argument("--threads", type=int, default=None, help="torch threads for training (default: all cores)")
    return p.parse_args(argv)


# ----------------------------------------------------------------------------- bookkeeping

def cpu_seconds() -> float:
    """CPU time of this process (all threads) and of finished child processes."""
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


class State:
    """Finished phases and their figures, kept on disk so a rerun skips them."""

    def __init__(self, path: Path):
        self.path = path
        self.data: dict[str, Any] = json.loads(path.read_text()) if path.is_file() else {}

    def phase(self, name: str, fn: Callable[[], Any]) -> Any:
        if name in self.data:
            print(f"== {name}: done earlier ({self.data[name]['wall_s']:.0f} s), skipped")
            return self.data[name]["result"]
        print(f"\n== {name}", flush=True)
        t0, c0 = time.perf_counter(), cpu_seconds()
        result = fn()
        self.data[name] = {"wall_s": time.perf_counter() - t0, "cpu_s": cpu_seconds() - c0, "result": result}
        from tightfit.ondevice.files import write_json
        write_json(self.path, self.data)
        print(f"   {name}: {self.data[name]['wall_s']:.0f} s wall, {self.data[name]['cpu_s']:.0f} CPU-s")
        return result

    def cpu(self, *names: str) -> float:
        return sum(self.data[n]["cpu_s"] for n in names if n in self.data)


def smoke_recipe(recipe):
    """512 images, one epoch, a space of a few subnets: checks the wiring, not the claim. Only
    the last stage keeps two widths, so elastic width is exercised without many probes."""
    last = recipe.space.stages[-1]
    stages = tuple(replace(st, depths=(min(st.depths),), kernels=(min(st.kernels),),
                           expansions=tuple(sorted({min(st.expansions), max(st.expansions)})),
                           widths=tuple(sorted({min(st.width_choices), st.out_channels})) if st is last else ())
                   for st in recipe.space.stages)
    space = replace(recipe.space, stages=stages, stem_widths=())
    return replace(recipe, data=replace(recipe.data, max_train_images=256), space=space,
                   train=replace(recipe.train, epochs=1, batch_size=64, recalibration_batches=2))


# ----------------------------------------------------------------------------- phases

def smoke_data(recipe, smoke: bool):
    """None (train loads the data itself), or for smoke runs a dataset with 1,000 validation images."""
    if not smoke:
        return None
    from tightfit.data.dataset import load_dataset
    ds = load_dataset(recipe.data, recipe.seed)
    return replace(ds, val_x=ds.val_x[:1000], val_y=ds.val_y[:1000])


def train_supernet(recipe, run: Path, recipe_path: Path, smoke: bool) -> dict:
    from tightfit.train.rundir import checkpoint_path
    from tightfit.train.loop import train
    train(recipe, run, resume=checkpoint_path(run).exists(), recipe_path=recipe_path, ds=smoke_data(recipe, smoke))
    return {"throughput": throughput(run)}


def throughput(run: Path) -> dict:
    rows = [json.loads(line) for line in (run / "metrics.jsonl").read_text().splitlines() if line.strip()]
    ips = [r["images_per_s"] for r in rows if "images_per_s" in r]
    last = [r for r in rows if "val_acc_largest" in r]
    return {"images_per_s": ips[-1] if ips else None, "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "last_epoch": last[-1] if last else None}


def budgets_across(run: Path, table: Path, fractions=(0.2, 0.5, 0.85)) -> list[float]:
    from tightfit.latency.predict import load_predictor
    from tightfit.train.rundir import load_trained
    recipe = load_trained(run).recipe
    pred = load_predictor(recipe, str(table), target="budget_stat_ms")
    lo, hi = pred.predict_ms(recipe.space.smallest()), pred.predict_ms(recipe.space.largest())
    return [round(lo + f * (hi - lo), 4) for f in fractions]


def search(run: Path, table: Path, budgets: list[float], smoke: bool) -> list[dict]:
    from tightfit.search.driver import run_search
    from tightfit.search.settings import SearchSettings
    from tightfit.search.commands import format_picks
    settings = (SearchSettings(population=4, evaluations=8, top=1, val_images=200) if smoke
                else SearchSettings(population=16, evaluations=80, top=4, val_images=3000))
    t, said, picks = {}, {}, []

    def say(line: str) -> None:
        print(line, flush=True)
        said.setdefault(str(b), []).append(line)
    for b in budgets:  # one call per budget so each budget's search time is on record
        t0 = time.perf_counter()
        picks += run_search(run, [str(table)], [f"{b}ms"], settings, progress=not smoke, say=say)
        t[str(b)] = time.perf_counter() - t0
    print(format_picks(picks))
    return [{"budget_ms": p["budget_ms"], "key": p["key"], "export_dir": p["export_dir"], "val_acc": p["val_acc"],
             "fits": p["fits"], "search_s": t[str(p["budget_ms"])], "session_drift": p.get("session_drift"),
             "measured_over_predicted": p.get("measured_over_predicted"),
             "timing": [ln.strip() for ln in said.get(str(p["budget_ms"]), [])
                        if any(w in ln for w in ("evaluations/s", "drift check", "after the search"))]} for p in picks]


def train_member(recipe, member, family_dir: Path, smoke: bool) -> dict:
    from tightfit.train.baselines import member_recipe
    from tightfit.train.rundir import checkpoint_path
    from tightfit.train.loop import train
    r = member_recipe(recipe, member)
    run = family_dir / member.name
    train(r, run, resume=checkpoint_path(run).exists(), ds=smoke_data(recipe, smoke))
    return {"name": member.name, "describe": member.describe(), "key": r.space.largest().to_key(),
            "channels": [r.space.stem_channels] + [s.out_channels for s in r.space.stages], "throughput": throughput(run)}


def export_member(run: Path) -> tuple[Path, int, int]:
    """The trained member as a static net (its own running BN statistics) → ONNX."""
    from tightfit.export.onnx import export_onnx
    from tightfit.model.extract import count_macs, count_params, extract_subnet
    from tightfit.train.rundir import load_trained
    t = load_trained(run)
    net = extract_subnet(t.supernet, t.recipe.space.largest()).eval()
    path = run / "model.onnx"
    export_onnx(net, path, t.recipe.data.channels, t.recipe.data.image_size)
    return path, count_params(net), count_macs(net, t.recipe.data.channels, t.recipe.data.image_size)


def ort_accuracy(onnx_path: Path, ds, split: str = "test") -> float:
    """Top-1 through ONNX Runtime: the same code path for picks and baselines."""
    import onnxruntime as ort
    from tightfit.data.dataset import eval_batches
    opts = ort.SessionOptions()
    opts.log_severity_level = 3
    s = ort.InferenceSession(str(onnx_path), opts, providers=["CPUExecutionProvider"])
    x_all, y_all = getattr(ds, f"{split}_x"), getattr(ds, f"{split}_y")
    correct = sum(int((s.run(None, {"image": x.numpy()})[0].argmax(1) == y.numpy()).sum())
                  for x, y in eval_batches(x_all, y_all, ds, 1000))
    return 100.0 * correct / len(y_all)  # smoke: the first 1,000 test images only


def write_baselines(run: Path, models: list[dict], recipe) -> Path:
    """RUN/baselines.json for `tightfit report`: the family on the validation split, like the candidates."""
    from tightfit.ondevice.files import write_json
    from tightfit.data.dataset import load_dataset
    ds = load_dataset(recipe.data, recipe.seed)
    rows = [{"name": m["name"], "key": m["key"], "val_acc": round(ort_accuracy(Path(m["onnx"]), ds, "val"), 2),
             "p50_ms": m["p50_ms"], "p90_ms": m["p90_ms"], "params": m["params"], "macs": m["macs"]}
            for m in models if m["kind"] == "baseline"]
    return write_json(run / "baselines.json", rows)


def measure_all(picks: list[dict], members: list[dict], run: Path, recipe, smoke: bool) -> dict:
    from tightfit.data.dataset import load_dataset
    from tightfit.ondevice.repeats import measure_repeated
    from tightfit.ondevice.timing import Protocol
    ds = load_dataset(recipe.data, recipe.seed)
    if smoke:
        ds = replace(ds, test_x=ds.test_x[:1000], test_y=ds.test_y[:1000])
    models = []
    for p in picks:
        m = json.loads((Path(p["export_dir"]) / "manifest.json").read_text())
        models.append({"kind": "pick", "name": f"pick-{p['budget_ms']:g}ms", "key": p["key"],
                       "onnx": str(Path(p["export_dir"]) / "model.onnx"), "params": m["architecture"]["params"],
                       "macs": m["architecture"]["macs"], "budget_ms": p["budget_ms"]})
    for mem in members:
        path, params, macs = export_member(run / "family" / mem["name"])
        models.append({"kind": "baseline", "name": mem["name"], "key": mem["key"], "onnx": str(path),
                       "params": params, "macs": macs, "describe": mem["describe"]})
    for m in models:
        m["test_acc"] = round(ort_accuracy(Path(m["onnx"]), ds), 2)
    proto = Protocol(repeats=1, timed_runs=20, timed_seconds=0.1, warmup_runs=5) if smoke else Protocol()
    figures = measure_repeated([m["onnx"] for m in models], proto)
    for m in models:
        f = figures[m["onnx"]]
        m.update({k: f[k] for k in ("p50_ms", "p90_ms", "p99_ms", "iqr_over_median", "repeat_spread", "stable", "note")})
    return {"protocol": proto.to_dict(), "models": models, "test_images": len(ds.test_y)}


def machinery(recipe, smoke: bool) -> dict:
    """Elastic overhead (train step and inference) and where a training step's time goes."""
    import torch
    import torch.nn.functional as F
    from tightfit.model.extract import extract_subnet
    from tightfit.model.supernet import build_supernet
    torch.manual_seed(0)
    sn = build_supernet(recipe, 10).to(memory_format=torch.channels_last)
    x = torch.randn(recipe.train.batch_size, recipe.data.channels, recipe.data.image_size,
                    recipe.data.image_size).contiguous(memory_format=torch.channels_last)
    y = torch.randint(0, 10, (len(x),))
    reps = 1 if smoke else 8

    def timed(fn) -> float:
        for _ in range(2):
            fn()
        t0 = time.perf_counter()
        for _ in range(reps):
            fn()
        return (time.perf_counter() - t0) / reps * 1e3

    out = {}
    for name in ("largest",) if smoke else ("largest", "middle", "smallest"):
        sub = getattr(recipe.space, name)()
        sn.set_subnet(sub)
        static = extract_subnet(sn, sub).to(memory_format=torch.channels_last)

        def step(model):
            def fn():
                model.train()
                model.zero_grad(set_to_none=True)
                F.cross_entropy(model(x), y).backward()
            return fn

        def infer(model):
            def fn():
                model.eval()
                with torch.no_grad():
                    model(x)
            return fn
        # interleave static and elastic twice so drift hits both alike
        st, el, si, ei = [], [], [], []
        for _ in range(2):
            st.append(timed(step(static)))
            el.append(timed(step(sn)))
            si.append(timed(infer(static)))
            ei.append(timed(infer(sn)))
        out[name] = {"train_step_ms_static": min(st), "train_step_ms_elastic": min(el),
                     "train_overhead": min(el) / min(st), "infer_ms_static": min(si), "infer_ms_elastic": min(ei),
                     "infer_overhead": min(ei) / min(si), "key": sub.to_key()}
    from torch.profiler import ProfilerActivity, profile
    sn.set_subnet(recipe.space.largest())
    with profile(activities=[ProfilerActivity.CPU]) as prof:
        for _ in range(2):
            sn.zero_grad(set_to_none=True)
            F.cross_entropy(sn(x), y).backward()
    total = sum(e.self_cpu_time_total for e in prof.key_averages())
    top = sorted(prof.key_averages(), key=lambda e: -e.self_cpu_time_total)[:8]
    out["profile_largest_step"] = [{"op": e.key, "share": round(e.self_cpu_time_total / total, 3)} for e in top]
    return out


# ----------------------------------------------------------------------------- results

def best_fitting(models: list[dict], budget: float) -> dict | None:
    fits = [m for m in models if m["kind"] == "baseline" and m["p90_ms"] <= budget]
    return max(fits, key=lambda m: m["test_acc"]) if fits else None


def summarize(state: State, measured: dict, budgets: list[float]) -> dict:
    models = measured["models"]
    rows = []
    for b in budgets:
        pick = next(m for m in models if m["kind"] == "pick" and m["budget_ms"] == b)
        base = best_fitting(models, b)
        rows.append({"budget_ms": b, "pick": pick, "baseline": base,
                     "pick_fits": pick["p90_ms"] <= b,
                     "gain_points": round(pick["test_acc"] - base["test_acc"], 2) if base else None})
    cpu_sn = state.cpu("train supernet", "profile this machine", "search")
    cpu_family = state.cpu(*[k for k in state.data if k.startswith("train baseline")])
    picks = [m for m in models if m["kind"] == "pick"]
    small = [m for m in picks if m["params"] < 100_000]
    targets = {  # the targets, computed from the measurements
        "pick_at_least_baseline_every_budget": all(r["gain_points"] is None or r["gain_points"] >= 0 for r in rows),
        "best_pick_test_acc": max(m["test_acc"] for m in picks), "best_pick_target": 93.5,
        "best_small_pick_test_acc": max((m["test_acc"] for m in small), default=None), "small_pick_target": 92.5,
        "cpu_ratio_supernet_search_over_family": round(cpu_sn / max(cpu_family, 1e-9), 3), "cpu_ratio_target": 1.0,
    }
    return {"budgets": rows, "targets": targets, "test_images": measured["test_images"],
            "cpu_seconds": {"supernet_training": state.cpu("train supernet"),
                            "search": state.cpu("profile this machine", "search"),
                            "supernet_plus_search": state.cpu("train supernet", "profile this machine", "search"),
                            "family_training": state.cpu(*[k for k in state.data if k.startswith("train baseline")])},
            "models": models}


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    if args.threads:
        import torch
        torch.set_num_threads(args.threads)
    from tightfit.train.baselines import DEFAULT_FAMILY
    from tightfit.latency.table import profile_host
    from tightfit.export.manifest import software_versions
    from tightfit.ondevice.hardware import describe_hardware
    from tightfit.recipe import load_recipe
    recipe_path = Path(args.recipe)
    recipe = load_recipe(recipe_path)
    if args.smoke:
        recipe = smoke_recipe(recipe)
    run = Path(args.run)
    run.mkdir(parents=True, exist_ok=True)
    state = State(run / "bench_state.json")
    t0 = time.perf_counter()
    started_at = state.phase("record commit", git_commit)  # the code the run starts with; a resume keeps it
    state.phase("train supernet", lambda: train_supernet(recipe, run, recipe_path, args.smoke))
    table = run / "latency" / "this-host.json"
    state.phase("profile this machine", lambda: str(profile_host(run, name="this-host", quick=args.smoke,
                                                                  n_subnets=4 if args.smoke else 8, progress=False)))
    fractions = (0.5,) if args.smoke else (0.2, 0.5, 0.85)
    budgets = state.phase("choose budgets", lambda: budgets_across(run, table, fractions))
    print(f"budgets: {budgets} ms ({' / '.join(f'{100 * f:.0f}' for f in fractions)} % of the way from the "
          "smallest to the largest subnet, predicted p90)")
    picks = state.phase("search", lambda: search(run, table, budgets, args.smoke))
    members = [state.phase(f"train baseline {m.name}", lambda m=m: train_member(recipe, m, run / "family", args.smoke))
               for m in (DEFAULT_FAMILY[::len(DEFAULT_FAMILY) - 1] if args.smoke else DEFAULT_FAMILY)]
    measured = state.phase("measure and test every model", lambda: measure_all(picks, members, run, recipe, args.smoke))
    mach = state.phase("machinery figures", lambda: machinery(recipe, args.smoke))
    write_baselines(run, measured["models"], recipe)
    result = summarize(state, measured, budgets)
    result.update({"machinery": mach, "supernet": state.data["train supernet"]["result"], "family": members,
                   "picks_search_s": {str(p["budget_ms"]): p["search_s"] for p in picks},
                   "search_timing": {str(p["budget_ms"]): p["timing"] for p in picks},
                   "session_drift": {str(p["budget_ms"]): p["session_drift"] for p in picks},
                   "measured_over_predicted": {str(p["budget_ms"]): p.get("measured_over_predicted") for p in picks},
                   "phases": {k: {"wall_s": round(v["wall_s"], 1), "cpu_s": round(v["cpu_s"], 1)} for k, v in state.data.items()},
                   "device": describe_hardware(), "software": software_versions(), "recipe": recipe.to_dict(),
                   "recipe_hash": recipe.hash(), "smoke": args.smoke, "commit": started_at, "commit_at_end": git_commit(),
                   "command": "python scripts/bench_fashion_mnist.py " + " ".join(argv if argv is not None else sys.argv[1:]),
                   "wall_s_this_invocation": round(time.perf_counter() - t0, 1)})
    from tightfit.ondevice.files import write_json
    out = write_json(Path(args.out), result)
    from bench_page import write_page  # scripts/bench_page.py: the human page and the plot
    page = write_page(result, Path(args.docs))
    print(format_summary(result))
    print(f"results: {out}\npage: {page}")
    return 0


def git_commit() -> str:
    import subprocess
    try:
        sha = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=ROOT,
                               capture_output=True, text=True).stdout.strip()
        return sha + ("-dirty" if dirty else "")
    except OSError:
        return "unknown"


def format_summary(result: dict) -> str:
    lines = [f"{'budget':>8} {'pick test %':>11} {'p90 ms':>7} {'params':>8}   {'baseline':<10} {'test %':>6} {'p90 ms':>7} {'gain':>6}"]
    for r in result["budgets"]:
        p, b = r["pick"], r["baseline"]
        lines.append(f"{r['budget_ms']:>6.3f}ms {p['test_acc']:>11.2f} {p['p90_ms']:>7.3f} {p['params']:>8,}   "
                     + (f"{b['name']:<10} {b['test_acc']:>6.2f} {b['p90_ms']:>7.3f} {r['gain_points']:>+6.2f}" if b
                        else "(no baseline fits)"))
    c = result["cpu_seconds"]
    lines.append(f"CPU-s: supernet training {c['supernet_training']:.0f} + search {c['search']:.0f} = "
                 f"{c['supernet_plus_search']:.0f}; family training {c['family_training']:.0f}")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from tightfit.errors import Interrupted, UserError
    try:
        sys.exit(main())
    except UserError as e:  # one line, exit 2, as the CLI does
        print(f"error: {e}", file=sys.stderr)
        sys.exit(2)
    except Interrupted as e:
        print(f"{e}; rerun the same command to resume the benchmark", file=sys.stderr)
        sys.exit(e.code)
