"""Benchmark: one supernet + search vs a hand-scaled family trained one by one, at equal compute, on
two latency profiles of this machine (ONNX Runtime at 1 and at 2 intra-op threads). Fashion-MNIST, CPU.

    .venv/bin/python scripts/bench_fashion_mnist.py                       # the full run (about an hour on 2 cores)
    .venv/bin/python scripts/bench_fashion_mnist.py --smoke --run runs/bench-smoke --out /tmp/smoke.json

Phases (each recorded in RUN/bench_state.json as it finishes, so an interrupted run resumes
where it stopped; training itself resumes from its last checkpoint):
  1. train each member of the hand-scaled family alone (recipe's epochs, same data, augmentation, schedule),
  2. measure the family on each device, as its user must, and place budgets just above three members,
  3. equal compute: the family's CPU-seconds, less a reserve for profiling + search and the picks'
     fine-tunes (estimated from sampled steps), buy supernet epochs at the CPU cost of real sandwich
     steps sampled here; train the supernet,
  4. profile each device (probe bundle + runner), search its budgets, export + verify the picks, fine-tune
     each pick from its inherited weights (tightfit search --finetune-steps),
  5. measure every model (picks and family) on each device in one interleaved session and evaluate
     all on the test split (never used by search or selection),
  6. machinery figures (elastic overhead, throughput, memory) and the search's cheap-score check.
Writes benchmarks/results/fashion-mnist.json, docs/benchmarks.md and docs/benchmarks-fashion-mnist.png.
"""
from __future__ import annotations

import argparse
import json
import resource
import sys
import time
from dataclasses import asdict, replace
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
    p.add_argument("--reserve", type=float, default=0.31,
                   help="share of the family's CPU-seconds kept for profiling + search; the rest buys supernet "
                        "epochs (default 0.31)")
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


def train_supernet(recipe, run: Path, smoke: bool) -> dict:
    from tightfit.rundir import checkpoint_path
    from tightfit.train.loop import train
    train(recipe, run, resume=checkpoint_path(run).exists(), ds=smoke_data(recipe, smoke))
    return {"throughput": throughput(run)}


def throughput(run: Path) -> dict:
    rows = [json.loads(line) for line in (run / "metrics.jsonl").read_text().splitlines() if line.strip()]
    ips = [r["images_per_s"] for r in rows if "images_per_s" in r]
    last = [r for r in rows if "val_acc_largest" in r]
    return {"images_per_s": ips[-1] if ips else None, "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "last_epoch": last[-1] if last else None}


DEVICES = (("host-1-thread", 1), ("host-2-threads", 2))  # two latency profiles of this machine (intra-op threads)
BUDGET_MEMBERS = ("w0.5-min", "w0.5-mid", "w0.75-max")     # a budget sits just above each of these members
BUDGET_ROOM = 1.12  # x the member's measured p90: at 1.08 the final session (8 % slower, 9300263) pushed 4 of 6 over


def budgets_at_members(family_p90: dict[str, float], names: tuple[str, ...]) -> dict[float, str]:
    """The budgets a family user would meet: just above a member's measured p90, so that member fits
    (budget -> the member it was placed above)."""
    return dict(sorted((round(family_p90[n] * BUDGET_ROOM, 4), n) for n in names if n in family_p90))


FINETUNE_STEPS = 200  # per pick, from its inherited weights (docs/measurements.md, "Fine-tuning the picks: screen")
FINETUNE_LR = 0.1


def search_settings(smoke: bool):
    """Cheap ranking (3,000 validation images), the best 8 re-scored on all 6,000, 3 measured per budget,
    each pick fine-tuned FINETUNE_STEPS steps."""
    from tightfit.search.settings import SearchSettings
    return (SearchSettings(population=4, evaluations=8, top=1, val_images=200, rescore=2, finetune_steps=2,
                           finetune_lr=FINETUNE_LR) if smoke
            else SearchSettings(population=12, evaluations=24, top=3, val_images=3000, rescore=8,
                                finetune_steps=FINETUNE_STEPS, finetune_lr=FINETUNE_LR))


def search(run: Path, table: Path, budgets: list[float], smoke: bool) -> list[dict]:
    """All of a device's budgets in one call, so its picks are confirmed minutes after they were chosen
    (search/confirm.py). Each budget's wall time runs from the end of the one before to its own last
    line (its evolution is silent until its time report); the device's confirmation, and any choice
    made again after it, is shared equally among its picks."""
    import torch
    from tightfit.budgets import budget_label
    from tightfit.search.driver import run_search
    from tightfit.search.commands import format_picks
    from tightfit.latency.table import load_table
    settings = search_settings(smoke)
    device = load_table(table).name
    heads = {f"{device} {budget_label(b)}:": str(b) for b in budgets}
    t, said, current, last = {}, {}, [str(budgets[0])], [time.perf_counter()]

    def say(line: str) -> None:
        print(line, flush=True)
        now = time.perf_counter()
        current[0] = next((b for h, b in heads.items() if line.startswith(h)), current[0])
        if line.startswith(f"{device}: measured its"):
            current[0] = "confirm"
        t[current[0]] = t.get(current[0], 0.0) + now - last[0]
        last[0] = now
        said.setdefault(current[0], []).append(line)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # recalibration and validation: 1 thread is the fewest CPU-seconds per candidate
    picks = run_search(run, [str(table)], [float(b) for b in budgets], settings, progress=not smoke, say=say)
    t[current[0]] = t.get(current[0], 0.0) + time.perf_counter() - last[0]
    torch.set_num_threads(threads)
    print(format_picks(picks))
    confirm_s = t.get("confirm", 0.0) / max(1, len(picks))
    return [{"device": p["device"], "budget_ms": p["budget_ms"], "key": p["key"], "export_dir": p["export_dir"],
             "val_acc": p["val_acc"], "fits": p["fits"], "search_s": t.get(str(p["budget_ms"]), 0.0) + confirm_s,
             "measured_over_predicted": p.get("measured_over_predicted"), "finetune": p.get("finetune"),
             "confirmed": p.get("confirmed"), "chosen_again": p.get("chosen_again"),
             "timing": [ln.strip() for ln in said.get(str(p["budget_ms"]), []) + said.get("confirm", [])
                        if any(w in ln for w in ("evaluations/s", "re-scored", "after the search", "measured its", "choosing again"))]}
            for p in picks]


def sample_epoch_cpu(recipe, steps: int = 30, skip: int = 3) -> dict:
    """CPU-seconds of one epoch of sandwich training, from a few real steps (first ``skip`` not counted)."""
    import torch
    from tightfit.data.dataset import load_dataset, steps_per_epoch, train_batches
    from tightfit.recipe import build_supernet
    from tightfit.train.initialise import zero_init_residual
    from tightfit.train.sandwich import make_optimizer, step_subnets, train_step
    ds = load_dataset(recipe.data, recipe.seed)
    cfg = recipe.train
    spe = steps_per_epoch(ds, cfg.batch_size)
    torch.manual_seed(recipe.seed)
    model = build_supernet(recipe, ds.num_classes)
    if cfg.zero_init_residual:
        zero_init_residual(model)
    if cfg.channels_last:
        model = model.to(memory_format=torch.channels_last)
    opt, times = make_optimizer(model, cfg), []
    model.train()
    batches = (b for epoch in range(steps) for b in train_batches(ds, recipe.data, cfg.batch_size, recipe.seed, epoch))
    for step in range(steps):
        c0 = time.process_time()
        x, y = next(batches)
        if cfg.channels_last:
            x = x.contiguous(memory_format=torch.channels_last)
        train_step(model, opt, x, y, step_subnets(recipe, step, spe), cfg)
        times.append(time.process_time() - c0)
    per_step = sum(times[skip:]) / max(1, len(times) - skip)
    return {"steps_timed": len(times) - skip, "cpu_s_per_step": per_step, "steps_per_epoch": spe,
            "cpu_s_per_epoch": per_step * spe}


def sample_finetune_cpu(recipe, steps: int = 15) -> dict:
    """CPU-seconds of one fine-tune step (teacher forward + the middle subnet's step), from a few real steps
    of tightfit.train.finetune on an untrained supernet (its setup and final recalibration included: a
    slight overestimate)."""
    from tightfit.data.dataset import calibration_batches, load_dataset
    from tightfit.recipe import build_supernet
    from tightfit.train.finetune import FinetuneSettings, finetune, inherited_net
    from tightfit.rundir import TrainedRun
    import torch
    ds = load_dataset(recipe.data, recipe.seed)
    run = TrainedRun(build_supernet(recipe, ds.num_classes), recipe, ds.class_names, ds.mean, ds.std, False)
    calib = calibration_batches(ds, recipe.train.batch_size, recipe.train.recalibration_batches, recipe.seed)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # as in the search phases, where the fine-tunes run
    rec = finetune(run, ds, inherited_net(run, recipe.space.middle(), calib), FinetuneSettings(steps=steps, lr=0.01))
    torch.set_num_threads(threads)
    return {"steps_timed": steps, "cpu_s_per_step": rec["cpu_s"] / steps}


def supernet_epochs(family_cpu: float, epoch_cpu: float, reserve: float, family_epochs: float,
                    finetune_cpu: float = 0.0) -> dict:
    """Equal compute: the family's CPU-seconds, less a reserve for profiling + search and the picks'
    estimated fine-tunes, buy supernet epochs (0.1 epoch steps, at least 1)."""
    room = family_cpu * (1.0 - reserve) - finetune_cpu
    epochs = max(1.0, int(10 * room / max(epoch_cpu, 1e-9)) / 10)
    return {"family_cpu_s": round(family_cpu, 1), "reserve_share": reserve, "epoch_cpu_s": round(epoch_cpu, 1),
            "finetune_cpu_s_estimate": round(finetune_cpu, 1), "epochs": epochs, "family_epochs": family_epochs}


def train_member(recipe, member, family_dir: Path, smoke: bool) -> dict:
    from tightfit.train.baselines import member_recipe
    from tightfit.rundir import checkpoint_path
    from tightfit.train.loop import train
    r = member_recipe(recipe, member)
    run = family_dir / member.name
    train(r, run, resume=checkpoint_path(run).exists(), ds=smoke_data(recipe, smoke))
    return {"name": member.name, "describe": member.describe(), "key": r.space.largest().to_key(),
            "channels": [r.space.stem_channels] + [s.out_channels for s in r.space.stages], "throughput": throughput(run)}


def export_member(run: Path) -> tuple[Path, int, int]:
    """The trained member as a static net (its own running BN statistics) → ONNX."""
    from tightfit.model.onnx import export_onnx
    from tightfit.model.extract import count_macs, count_params, extract_subnet
    from tightfit.rundir import load_trained
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


def protocol_for(threads: int, smoke: bool):
    from tightfit.ondevice.timing import Protocol
    return (Protocol(threads=threads, repeats=1, time_runs=20, time_seconds=0.1, settle_runs=5) if smoke
            else Protocol(threads=threads))


def family_models(members: list[dict], run: Path) -> list[dict]:
    out = []
    for mem in members:
        path, params, macs = export_member(run / "family" / mem["name"])
        out.append({"kind": "baseline", "name": mem["name"], "key": mem["key"], "onnx": str(path),
                    "params": params, "macs": macs, "describe": mem["describe"]})
    return out


def measure_family(members: list[dict], run: Path, threads: int, smoke: bool) -> dict[str, float]:
    """What a family user must do before choosing a member: measure each on the device (p90 ms)."""
    from tightfit.ondevice.repeats import measure_repeated
    models = family_models(members, run)
    figures = measure_repeated([m["onnx"] for m in models], protocol_for(threads, smoke))
    return {m["name"]: figures[m["onnx"]].p90_ms for m in models}


def measure_all(picks: list[dict], members: list[dict], run: Path, recipe, smoke: bool) -> dict:
    """Every pick and member: test accuracy once (ONNX Runtime), latency on each device in one
    interleaved session per device."""
    from tightfit.data.dataset import load_dataset
    from tightfit.ondevice.repeats import measure_repeated
    ds = load_dataset(recipe.data, recipe.seed)
    if smoke:
        ds = replace(ds, test_x=ds.test_x[:1000], test_y=ds.test_y[:1000])
    models = []
    for p in picks:
        m = json.loads((Path(p["export_dir"]) / "manifest.json").read_text())
        inherited = (m.get("finetune") or {}).get("inherited_accuracy")
        models.append({"kind": "pick", "name": f"pick-{p['device']}-{p['budget_ms']:g}ms", "key": p["key"],
                       "onnx": str(Path(p["export_dir"]) / "model.onnx"), "params": m["architecture"]["params"],
                       "macs": m["architecture"]["macs"], "budget_ms": p["budget_ms"], "device": p["device"],
                       "test_acc_inherited": None if smoke or not inherited else round(inherited["test"]["top1"], 2),
                       "finetune": p.get("finetune")})
    models += family_models(members, run)
    for m in models:
        m["test_acc"] = round(ort_accuracy(Path(m["onnx"]), ds), 2)
        m["latency"] = {}
    protocols = {}
    for device, threads in DEVICES:
        proto = protocol_for(threads, smoke)
        protocols[device] = proto.to_dict()
        figures = measure_repeated([m["onnx"] for m in models], proto)
        for m in models:
            m["latency"][device] = figures[m["onnx"]].to_dict()
    return {"protocols": protocols, "models": models, "test_images": len(ds.test_y)}


def ranking_check(run: Path, smoke: bool, n: int = 24) -> dict:
    """How well the search's cheap score (its capped validation images) ranks subnets against the whole
    split, and what each costs: the measurement behind the search settings (not billed to either side)."""
    import random
    import torch
    from tightfit.data.dataset import load_dataset
    from tightfit.latency.predict import kendall_tau
    from tightfit.search.fitness import RunAccuracy
    from tightfit.rundir import load_trained
    settings, t = search_settings(smoke), load_trained(run)
    ds = load_dataset(t.recipe.data, t.recipe.seed)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    cheap = RunAccuracy(t, ds, settings.val_images)
    whole = RunAccuracy(t, ds, 0, recalibrator=cheap.recalibrate)
    rng, rows = random.Random(1), []
    subnets = list({s.to_key(): s for s in (t.recipe.space.sample(rng) for _ in range(4 if smoke else n))}.values())
    for s in subnets:
        t0 = time.process_time()
        a = cheap(s)["val_acc"]
        t1 = time.process_time()
        b = whole(s)["val_acc"]
        rows.append({"key": s.to_key(), "cheap": a, "whole": b, "cheap_cpu_s": t1 - t0, "whole_cpu_s": time.process_time() - t1})
    torch.set_num_threads(threads)
    best_whole = max(rows, key=lambda r: r["whole"])
    top = sorted(rows, key=lambda r: -r["cheap"])[:settings.rescore]
    tau = kendall_tau([r["cheap"] for r in rows], [r["whole"] for r in rows])
    return {"images": cheap.images, "whole_images": whole.images, "subnets": len(rows),
            "kendall_tau": None if tau != tau else round(tau, 3),  # NaN: one side constant (smoke)
            "mean_abs_diff_points": round(sum(abs(r["cheap"] - r["whole"]) for r in rows) / len(rows), 2),
            "best_whole_in_cheap_top": best_whole["key"] in {r["key"] for r in top},
            "cheap_cpu_s_per_subnet": round(sum(r["cheap_cpu_s"] for r in rows) / len(rows), 3),
            "whole_cpu_s_per_subnet": round(sum(r["whole_cpu_s"] for r in rows) / len(rows), 3), "rows": rows}


def machinery(recipe, smoke: bool) -> dict:
    """Elastic overhead (train step and inference) and where a training step's time goes."""
    import torch
    import torch.nn.functional as F
    from tightfit.model.extract import extract_subnet
    from tightfit.recipe import build_supernet
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

def on_device(m: dict, device: str) -> dict:
    """A model row with the device's latency figures in front (p50_ms, p90_ms, ...)."""
    return {**{k: v for k, v in m.items() if k != "latency"}, **m["latency"][device]}


def best_fitting(models: list[dict], budget: float) -> dict | None:
    fits = [m for m in models if m["kind"] == "baseline" and m["p90_ms"] <= budget]
    return max(fits, key=lambda m: m["test_acc"]) if fits else None


SUPERNET_SIDE = ("train supernet", "profile ", "search ")  # a search phase includes its picks' fine-tunes
FAMILY_SIDE = ("train baseline ", "measure family ")


def side_cpu(state: State, prefixes: tuple[str, ...]) -> float:
    return state.cpu(*[k for k in state.data if k.startswith(prefixes)])


def summarize(state: State, measured: dict, budgets: dict[str, list[float]], targeted: dict[str, dict]) -> dict:
    """Per (device, budget): the pick vs the most accurate member that fits in the final session; ``targeted``
    names the member each budget was placed above, and whether it still fit (if not, a smaller member is the
    comparison, which flatters the pick: the page says so)."""
    rows = []
    for device, _ in DEVICES:
        models = [on_device(m, device) for m in measured["models"]]
        for b in budgets[device]:
            pick = next(m for m in models if m["kind"] == "pick" and m["device"] == device and m["budget_ms"] == b)
            base = best_fitting(models, b)
            aimed = targeted[device].get(b)
            aimed_row = next((m for m in models if m["name"] == aimed), None)
            inherited = pick.get("test_acc_inherited")
            rows.append({"device": device, "budget_ms": b, "pick": pick, "baseline": base, "placed_above": aimed,
                         "placed_above_fits": None if aimed_row is None else aimed_row["p90_ms"] <= b,
                         "pick_fits": pick["p90_ms"] <= b,
                         "gain_points": round(pick["test_acc"] - base["test_acc"], 2) if base else None,
                         "gain_points_inherited": round(inherited - base["test_acc"], 2)
                         if base and inherited is not None else None})
    cpu_sn, cpu_family = side_cpu(state, SUPERNET_SIDE), side_cpu(state, FAMILY_SIDE)
    cpu_train = state.cpu("train supernet")
    picks = [m for m in measured["models"] if m["kind"] == "pick"]
    small = [m for m in picks if m["params"] < 100_000]
    gains = [r["gain_points"] for r in rows]
    targets = {  # the targets, computed from the measurements
        "min_gain_points": min((g for g in gains if g is not None), default=None), "gain_target": 0.5,
        "gain_at_every_budget": all(g is not None and g >= 0.5 for g in gains),
        "best_pick_test_acc": max(m["test_acc"] for m in picks), "best_pick_target": 92.5,
        "best_small_pick_test_acc": max((m["test_acc"] for m in small), default=None), "small_pick_target": 92.0,
        "cpu_ratio_supernet_search_over_family": round(cpu_sn / max(cpu_family, 1e-9), 3), "cpu_ratio_target": 1.0,
        "search_share_of_training": round((cpu_sn - cpu_train) / max(cpu_train, 1e-9), 3), "search_share_aim": 0.15,
    }
    return {"budgets": rows, "targets": targets, "test_images": measured["test_images"],
            "cpu_seconds": {"supernet_training": cpu_train, "search": cpu_sn - cpu_train, "supernet_plus_search": cpu_sn,
                            "family_training": state.cpu(*[k for k in state.data if k.startswith("train baseline ")]),
                            "family_measuring": state.cpu(*[k for k in state.data if k.startswith("measure family ")]),
                            "family": cpu_family},
            "models": measured["models"], "protocols": measured["protocols"]}


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
    recipe = load_recipe(Path(args.recipe))
    if args.smoke:
        recipe = smoke_recipe(recipe)
    run = Path(args.run)
    run.mkdir(parents=True, exist_ok=True)
    state = State(run / "bench_state.json")
    t0 = time.perf_counter()
    started_at = state.phase("record commit", git_commit)  # the code the run starts with; a resume keeps it
    family = DEFAULT_FAMILY[::len(DEFAULT_FAMILY) - 1] if args.smoke else DEFAULT_FAMILY
    members = [state.phase(f"train baseline {m.name}", lambda m=m: train_member(recipe, m, run / "family", args.smoke))
               for m in family]
    family_p90 = {d: state.phase(f"measure family {d}", lambda t=t: measure_family(members, run, t, args.smoke))
                  for d, t in DEVICES}
    names = (family[-1].name,) if args.smoke else BUDGET_MEMBERS
    targeted = {d: budgets_at_members(family_p90[d], names) for d, _ in DEVICES}
    budgets = {d: list(targeted[d]) for d, _ in DEVICES}
    for d, bs in budgets.items():
        print(f"budgets {d}: {bs} ms ({BUDGET_ROOM:g} x the measured p90 of {', '.join(names)})")
    epoch_cpu = state.phase("sample supernet step cost", lambda: sample_epoch_cpu(recipe))
    ft_cpu = state.phase("sample fine-tune step cost", lambda: sample_finetune_cpu(recipe))
    ft_estimate = sum(len(bs) for bs in budgets.values()) * search_settings(args.smoke).finetune_steps * ft_cpu["cpu_s_per_step"]
    compute = supernet_epochs(side_cpu(state, FAMILY_SIDE), epoch_cpu["cpu_s_per_epoch"], args.reserve,
                              recipe.train.epochs, ft_estimate)
    if args.smoke:  # the wiring only: one epoch whatever the family cost
        compute["epochs"] = recipe.train.epochs
    print(f"equal compute: family {compute['family_cpu_s']:.0f} CPU-s, {100 * args.reserve:.0f} % kept for profiling "
          f"+ search and ~{ft_estimate:.0f} for fine-tuning the picks, "
          f"one supernet epoch ~{compute['epoch_cpu_s']:.0f} CPU-s: {compute['epochs']:g} epochs")
    sn_recipe = replace(recipe, train=replace(recipe.train, epochs=compute["epochs"]))
    state.phase("train supernet", lambda: train_supernet(sn_recipe, run, args.smoke))
    tables = {d: Path(state.phase(f"profile {d}", lambda d=d, t=t: str(profile_host(
        run, name=d, threads=t, quick=args.smoke, n_subnets=4 if args.smoke else 8, progress=False))))
        for d, t in DEVICES}
    picks = [p for d, _ in DEVICES for p in state.phase(f"search {d}", lambda d=d: search(run, tables[d], budgets[d], args.smoke))]
    measured = state.phase("measure and test every model", lambda: measure_all(picks, members, run, sn_recipe, args.smoke))
    mach = state.phase("machinery figures", lambda: machinery(sn_recipe, args.smoke))
    ranking = state.phase("ranking check", lambda: ranking_check(run, args.smoke))
    write_baselines(run, [on_device(m, DEVICES[0][0]) for m in measured["models"]], sn_recipe)
    result = summarize(state, measured, budgets, targeted)
    result.update({"machinery": mach, "ranking_check": ranking, "supernet": state.data["train supernet"]["result"], "family": members,
                   "equal_compute": {**compute, "sampled": epoch_cpu, "sampled_finetune": ft_cpu},
                   "finetune_cpu_s": round(sum((p.get("finetune") or {}).get("cpu_s", 0.0) for p in picks
                                               if not (p.get("finetune") or {}).get("reused")), 1),
                   "family_p90_ms": family_p90,
                   "budget_rule": f"{BUDGET_ROOM:g} x the measured p90 of {', '.join(names)} on each device",
                   "devices": {d: {"intra_op_threads": t, "table": str(tables[d])} for d, t in DEVICES},
                   "search_settings": asdict(search_settings(args.smoke)),
                   "picks_search_s": {f"{p['device']} {p['budget_ms']:g}": p["search_s"] for p in picks},
                   "search_timing": {f"{p['device']} {p['budget_ms']:g}": p["timing"] for p in picks},
                   "measured_over_predicted": {f"{p['device']} {p['budget_ms']:g}": p.get("measured_over_predicted")
                                               for p in picks},
                   "phases": {k: {"wall_s": round(v["wall_s"], 1), "cpu_s": round(v["cpu_s"], 1)} for k, v in state.data.items()},
                   "device": describe_hardware(), "software": software_versions(), "recipe": sn_recipe.to_dict(),
                   "recipe_hash": sn_recipe.hash(), "smoke": args.smoke, "commit": started_at, "commit_at_end": git_commit(),
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
    lines = [f"{'device':<15} {'budget':>8} {'pick test %':>11} {'p90 ms':>7} {'params':>8}   {'baseline':<10} "
             f"{'test %':>6} {'p90 ms':>7} {'gain':>6}"]
    for r in result["budgets"]:
        p, b = r["pick"], r["baseline"]
        lines.append(f"{r['device']:<15} {r['budget_ms']:>6.3f}ms {p['test_acc']:>11.2f} {p['p90_ms']:>7.3f} {p['params']:>8,}   "
                     + (f"{b['name']:<10} {b['test_acc']:>6.2f} {b['p90_ms']:>7.3f} {r['gain_points']:>+6.2f}" if b
                        else "(no baseline fits)"))
    c = result["cpu_seconds"]
    lines.append(f"CPU-s: supernet training {c['supernet_training']:.0f} + profiling and search {c['search']:.0f} = "
                 f"{c['supernet_plus_search']:.0f}; family training {c['family_training']:.0f} + measuring "
                 f"{c['family_measuring']:.0f} = {c['family']:.0f}")
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
