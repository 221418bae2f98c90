"""Figures of the machinery itself, measured beside the Fashion-MNIST benchmark and billed to neither
side: elastic overhead against static subnets, where a training step's time goes, and how well the
search's cheap score ranks subnets against the whole validation split.
"""
from __future__ import annotations

import time
from pathlib import Path

from fashion_mnist_models import search_settings


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
