"""Regularized evolution vs random search on a trained run, one device and one budget.

    .venv/bin/python scripts/compare_search.py RUN_DIR --table T.json --budget 0.3ms [--evaluations 100]

For each seed: the best validation accuracy found by evolution with N evaluations, by random
search with N, and by random search with FACTOR x N (random search = distinct subnets drawn
uniformly within the predicted budget, best one kept). Accuracies go through the run's
accuracy cache (RUN_DIR/search/accuracy_cache.jsonl), shared with `tightfit search`, so a
second run costs nothing, and random search with N is the first N draws of the FACTOR x N
run with the same seed, so it is free too. A fourth column, random search with N drawn only
from the band just under the budget where the evolution draws its first members, shows how
much of the evolution's edge is that band rather than mutation and selection. The best of
many noisy scores is biased upwards (more draws, more bias), so each strategy's pick is also
scored on the validation images the search did not use (with --val-images below the split).
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

from tightfit.errors import UserError


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run")
    p.add_argument("--table", required=True, help="latency table JSON of the device")
    p.add_argument("--budget", required=True, help="latency budget such as 0.3ms")
    p.add_argument("--evaluations", type=int, default=100, help="evaluations for evolution and random search")
    p.add_argument("--factor", type=int, default=10, help="random search also gets FACTOR x the evaluations")
    p.add_argument("--seeds", type=int, default=3)
    p.add_argument("--population", type=int, default=16)
    p.add_argument("--val-images", type=int, default=0, help="as in tightfit search (0 = whole validation split)")
    p.add_argument("--threads", type=int, default=None)
    return p.parse_args(argv)


def compare(args: argparse.Namespace) -> list[dict]:
    from tightfit.data.dataset import load_dataset
    from tightfit.rundir import load_trained
    from tightfit.budgets import parse_budget
    from tightfit.search.cache import AccuracyCache, CachedAccuracy, CachedLatency
    from tightfit.search.driver import load_predictors
    from tightfit.search.evolution import random_search, regularized_evolution
    from tightfit.search.fitness import RunAccuracy
    from tightfit.search.settings import SearchSettings
    budget = parse_budget(args.budget)
    run = load_trained(args.run)
    (table, predictor), = load_predictors([args.table], run.recipe)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    compute = RunAccuracy(run, ds, args.val_images)
    fitness = CachedAccuracy(AccuracyCache(Path(args.run) / "search" / "accuracy_cache.jsonl",
                                           compute.tag(Path(args.run))), compute)
    latency = CachedLatency(predictor)
    # The best of many noisy scores is biased upwards, the more so the more were drawn: each
    # strategy's pick is scored again on the validation images the search did not use.
    held = RunAccuracy(run, ds, skip=compute.images) if compute.images < len(ds.val_y) else None
    held_memo: dict[str, float] = {}

    def held_out(cands) -> float:
        best = max(cands, key=lambda c: c.fitness)
        if held is None:
            return best.fitness
        if best.key not in held_memo:
            held_memo[best.key] = held(best.subnet)["val_acc"]
        return held_memo[best.key]
    space = run.recipe.space
    n = args.evaluations
    print(f"device {table.name}, budget {budget:g} ms, {n} evaluations (random also {args.factor * n}), "
          f"{compute.images} validation images, {len(fitness.cache.entries)} accuracies cached; load {os.getloadavg()[0]:.2f}")
    rows = []
    for seed in range(args.seeds):
        t0, fresh0 = time.perf_counter(), fitness.fresh
        cfg = SearchSettings(population=args.population, evaluations=n, seed=seed).evolution()
        evo = regularized_evolution(space, fitness, latency, budget, cfg, device=table.name)
        rnd = random_search(space, fitness, latency, budget, args.factor * n, seed=seed, device=table.name)
        band = random_search(space, fitness, latency, budget, n, seed=seed, device=table.name, band=cfg.band)
        row = {"seed": seed, "evolution": max(c.fitness for c in evo), "random": max(c.fitness for c in rnd[:n]),
               "random_x": max(c.fitness for c in rnd), "random_band": max(c.fitness for c in band),
               "spread": statistics.quantiles([c.fitness for c in rnd], n=10)[4::4],  # p50, p90 of the draws
               "held": {"evolution": held_out(evo), "random": held_out(rnd[:n]), "random_x": held_out(rnd),
                        "random_band": held_out(band)},
               "evo_ms": max(evo, key=lambda c: c.fitness).latency_ms,
               "seconds": time.perf_counter() - t0, "fresh": fitness.fresh - fresh0}
        rows.append(row)
        print(f"seed {seed}: evolution {row['evolution']:.2f}  random {row['random']:.2f}  "
              f"random x{args.factor} {row['random_x']:.2f}  random in band {row['random_band']:.2f}  "
              f"(evolution's pick predicts {row['evo_ms']:.4f} ms; "
              f"{row['fresh']} new evaluations in {row['seconds']:.0f} s)", flush=True)
        if held is not None:
            h = row["held"]
            print(f"        the same picks on {held.images} held-out validation images: evolution {h['evolution']:.2f}  "
                  f"random {h['random']:.2f}  random x{args.factor} {h['random_x']:.2f}  random in band "
                  f"{h['random_band']:.2f}", flush=True)
    p = statistics.mean(r["evolution"] for r in rows) / 100
    se = 100 * (p * (1 - p) / compute.images) ** 0.5
    print(f"noise: one accuracy on {compute.images} images has a binomial standard error of {se:.2f} points; "
          f"within the budget, random subnets' accuracies have median "
          f"{statistics.mean(r['spread'][0] for r in rows):.2f} and p90 {statistics.mean(r['spread'][1] for r in rows):.2f}")
    return rows


def summarize(rows: list[dict], factor: int) -> str:
    mean = {k: statistics.mean(r[k] for r in rows) for k in ("evolution", "random", "random_x", "random_band")}
    held = {k: statistics.mean(r["held"][k] for r in rows) for k in mean}
    wins = sum(r["evolution"] > r["random"] for r in rows)
    gap_x = mean["evolution"] - mean["random_x"]
    return "\n".join([
        f"mean best val acc: evolution {mean['evolution']:.2f}, random {mean['random']:.2f}, "
        f"random x{factor} {mean['random_x']:.2f}, random in band {mean['random_band']:.2f}",
        f"the same picks on held-out validation images: evolution {held['evolution']:.2f}, random "
        f"{held['random']:.2f}, random x{factor} {held['random_x']:.2f}, random in band {held['random_band']:.2f} "
        f"(evolution {held['evolution'] - held['random']:+.2f} vs random, {held['evolution'] - held['random_x']:+.2f} "
        f"vs random x{factor})",
        f"evolution beats random at equal evaluations: {'yes' if mean['evolution'] > mean['random'] else 'NO'} "
        f"({wins}/{len(rows)} seeds, mean {mean['evolution'] - mean['random']:+.2f} points)",
        f"evolution vs random with {factor}x the evaluations: {gap_x:+.2f} points "
        f"({'within' if gap_x >= -0.3 else 'NOT within'} 0.3)",
    ])


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    if args.threads:
        import torch
        torch.set_num_threads(args.threads)
    try:
        rows = compare(args)
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    print(summarize(rows, args.factor))
    return 0


if __name__ == "__main__":
    sys.exit(main())
