"""Benchmark: one supernet + search vs a hand-scaled family trained one by one, at equal compute, on
two latency profiles of this machine (ONNX Runtime at 1 and at 2 intra-op threads). Fashion-MNIST, CPU.

    .venv/bin/python benchmarks/fashion_mnist.py                 # the full run (about 90 min on 2 cores)
    .venv/bin/python benchmarks/fashion_mnist.py --smoke --run runs/bench-smoke --out /tmp/smoke.json

Phases, in the order a user meets them (each recorded in RUN/bench_state.json as it finishes, so an
interrupted run resumes where it stopped; training itself resumes from its last checkpoint):
  1. profile each device from the recipe (latency needs no trained weights),
  2. measure the family's architectures on each device, as a family user must before choosing a member,
     and place the budgets: just above three members (the family's best case) and between two adjacent
     members (neutral); the supernet will train for every budget whose band holds subnets,
  3. train each member of the family alone (recipe's epochs, same data, augmentation, schedule); its
     CPU-seconds are the bill the supernet side must meet, so they are known before the supernet trains,
  4. equal compute: the family's CPU-seconds, less the profiles, a share per budget for its search and the
     picks' fine-tunes, buy supernet epochs at the cost of real steps of the package's training loop (targets
     included); train the supernet for the targets,
  5. search each device's budgets, export + verify the picks, fine-tune each from its inherited weights,
  6. measure every model (picks and family) on each device in one interleaved session and evaluate all
     on the test split (never used by search or selection); machinery figures and the ranking check.
Writes benchmarks/results/fashion-mnist.json, docs/benchmarks.md and docs/benchmarks-fashion-mnist.png.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import asdict, replace
from pathlib import Path
from typing import Any, Callable

from fashion_mnist_budgets import NEUTRAL_BUDGETS, Placement, place_budgets, rule_text
from fashion_mnist_machinery import machinery, ranking_check
from fashion_mnist_compute import SEARCH_SHARE, cpu_seconds, sample_finetune_cpu, sample_step_cpu, supernet_epochs
from fashion_mnist_models import (DEVICES, measure_all, measure_family, relative, search, search_settings, smoke_data,
                                  throughput, train_member, write_baselines)
from fashion_mnist_summary import FAMILY_SIDE, format_summary, on_device, phase_cpu, portable_recipe, summarize

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent
BUDGET_MEMBERS = ("w0.5-min", "w0.5-mid", "w0.75-max")  # a budget sits just above each of these members


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--recipe", default=None, help="default recipes/fashion-mnist.toml; with --smoke "
                                                  "benchmarks/fashion-mnist-smoke.toml")
    p.add_argument("--run", default=str(ROOT / "runs" / "bench-fashion-mnist"), help="run directory (resumable)")
    p.add_argument("--out", default=str(ROOT / "benchmarks" / "results" / "fashion-mnist.json"))
    p.add_argument("--docs", default=str(ROOT / "docs"), help="folder for benchmarks.md and the plot")
    p.add_argument("--smoke", action="store_true",
                   help="smallest setting (a few hundred images, tiny space and search) to check the script end to end")
    p.add_argument("--threads", type=int, default=None, help="torch threads for training (default: all cores)")
    p.add_argument("--search-share", type=float, default=SEARCH_SHARE,
                   help="share of the family's CPU-seconds kept for each budget's search (fine-tune apart); the "
                        f"rest, less the profiles and the fine-tunes, buys supernet epochs (default {SEARCH_SHARE})")
    return p.parse_args(argv)


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


def profile(recipe_path: Path, run: Path, device: str, threads: int, smoke: bool) -> str:
    """The device's latency table from the recipe, before anything is trained (tightfit profile RECIPE --out)."""
    from tightfit.latency.table import profile_host
    table = profile_host(recipe_path, name=device, threads=threads, quick=smoke, n_subnets=4 if smoke else 8,
                         progress=False, out=run / "latency" / f"{device}.json")
    return relative(table, run)


def check_bands(recipe, tables: dict[str, Path], placements: dict[str, list[Placement]]) -> dict[str, dict[str, str | None]]:
    """Per device and budget, why the supernet cannot train for it (its band holds no subnet by the
    table's prediction, tightfit.train.targets.target_bands), or None: refused targets are named, not fatal."""
    from tightfit.errors import UserError
    from tightfit.recipe import Target
    from tightfit.train.targets import target_bands
    out: dict[str, dict[str, str | None]] = {}
    for device, places in placements.items():
        out[device] = {}
        for p in places:
            one = replace(recipe, train=replace(recipe.train, targets=(Target(str(tables[device]), p.budget_ms),)))
            try:
                target_bands(one)
                out[device][str(p.budget_ms)] = None
            except UserError as e:
                print(f"not trained for {device} {p.budget_ms:g} ms: {e}")
                out[device][str(p.budget_ms)] = str(e)
    return out


def with_targets(recipe, tables: dict[str, Path], placements: dict[str, list[Placement]], refused: dict):
    """The recipe with every budget it can train for as a target (tightfit train --table T --budget B per device)."""
    from tightfit.train.commands import with_command_line_targets
    for device, places in placements.items():
        budgets = [f"{p.budget_ms}ms" for p in places if refused[device].get(str(p.budget_ms)) is None]
        if budgets:
            recipe, _ = with_command_line_targets(recipe, [str(tables[device])], budgets)
    return recipe


def train_supernet(recipe, run: Path, smoke: bool) -> dict:
    from tightfit.rundir import checkpoint_path
    from tightfit.train.loop import train
    train(recipe, run, resume=checkpoint_path(run).exists(), ds=smoke_data(recipe, smoke), progress=not smoke)
    return {"throughput": throughput(run)}


def equal_compute(state: State, recipe, targeted, budgets: int, run: Path, args: argparse.Namespace) -> dict:
    """The supernet's epochs bought with the family's CPU-seconds, at the sampled cost of its steps (with
    ``targeted``'s targets) and of the picks' fine-tunes; the samples are phases of their own (resumable)."""
    from tightfit.errors import UserError
    step_cpu = state.phase("sample supernet step cost",
                           lambda: sample_step_cpu(targeted, run / "step-cost", smoke_data(recipe, args.smoke)))
    if step_cpu["cpu_s_per_step"] <= 0 and not args.smoke:
        raise UserError(f"the sampled supernet step cost nothing ({step_cpu}): the host was too noisy to time it; "
                        f"delete the phase 'sample supernet step cost' from {state.path} and rerun")
    ft_cpu = state.phase("sample fine-tune step cost", lambda: sample_finetune_cpu(recipe))
    compute = supernet_epochs(phase_cpu(state.data, FAMILY_SIDE), step_cpu["cpu_s_per_epoch"], recipe.train.epochs,
                              profiling_cpu=phase_cpu(state.data, ("profile ",)), budgets=budgets,
                              search_share=args.search_share,
                              finetune_cpu=budgets * search_settings(args.smoke).finetune_steps * ft_cpu["cpu_s_per_step"])
    if args.smoke:  # the wiring only: the recipe's epochs whatever the family cost
        compute["epochs"] = recipe.train.epochs
    print(f"equal compute: family {compute['family_cpu_s']:.0f} CPU-s, less profiles {compute['profiling_cpu_s']:.0f}, "
          f"{budgets} searches ~{compute['search_cpu_s_estimate']:.0f} and their fine-tunes "
          f"~{compute['finetune_cpu_s_estimate']:.0f}; one supernet epoch ~{compute['epoch_cpu_s']:.0f} CPU-s with "
          f"{len(targeted.train.targets)} targets: {compute['epochs']:g} epochs")
    return {**compute, "sampled": step_cpu, "sampled_finetune": ft_cpu}


# long: the phases in the order the module docstring gives, each a resumable step; splitting would hide the order
def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    if args.threads:
        import torch
        torch.set_num_threads(args.threads)
    from tightfit.export.manifest import software_versions
    from tightfit.ondevice.hardware import describe_hardware
    from tightfit.recipe import load_recipe
    from tightfit.train.baselines import DEFAULT_FAMILY
    recipe_path = Path(args.recipe or (HERE / "fashion-mnist-smoke.toml" if args.smoke else ROOT / "recipes" / "fashion-mnist.toml"))
    recipe = load_recipe(recipe_path)
    run = Path(args.run)
    run.mkdir(parents=True, exist_ok=True)
    state = State(run / "bench_state.json")
    t0 = time.perf_counter()
    started_at = state.phase("record commit", git_commit)  # the code the run starts with; a resume keeps it
    tables = {d: run / state.phase(f"profile {d}", lambda d=d, t=t: profile(recipe_path, run, d, t, args.smoke))
              for d, t in DEVICES}
    family = DEFAULT_FAMILY[::len(DEFAULT_FAMILY) - 1] if args.smoke else DEFAULT_FAMILY
    family_p90 = {d: state.phase(f"measure family {d}", lambda t=t: measure_family(recipe, family, run, t, args.smoke))
                  for d, t in DEVICES}
    above, neutral = ((family[-1].name,), 1) if args.smoke else (BUDGET_MEMBERS, NEUTRAL_BUDGETS)
    placements = {d: place_budgets(family_p90[d], above, neutral) for d, _ in DEVICES}
    for d, places in placements.items():
        print(f"budgets {d}: " + ", ".join(f"{p.budget_ms:g} ms ({p.placement}: {', '.join(p.members)})" for p in places))
    refused = state.phase("check target bands", lambda: check_bands(recipe, tables, placements))
    targeted = with_targets(recipe, tables, placements, refused)
    members = [state.phase(f"train baseline {m.name}", lambda m=m: train_member(recipe, m, run / "family", args.smoke))
               for m in family]
    compute = equal_compute(state, recipe, targeted, sum(map(len, placements.values())), run, args)
    sn_recipe = replace(targeted, train=replace(targeted.train, epochs=compute["epochs"]))
    state.phase("train supernet", lambda: train_supernet(sn_recipe, run, args.smoke))
    picks = [p for d, _ in DEVICES for p in state.phase(
        f"search {d}", lambda d=d: search(run, tables[d], [p.budget_ms for p in placements[d]], args.smoke))]
    measured = state.phase("measure and test every model", lambda: measure_all(picks, members, run, sn_recipe, args.smoke))
    mach = state.phase("machinery figures", lambda: machinery(sn_recipe, args.smoke))
    ranking = state.phase("ranking check", lambda: ranking_check(run, args.smoke))
    write_baselines(run, [on_device(m, DEVICES[0][0]) for m in measured["models"]], sn_recipe)
    phases = {k: {"wall_s": round(v["wall_s"], 1), "cpu_s": round(v["cpu_s"], 1)} for k, v in state.data.items()}
    result = summarize(phases, measured, placements, refused, picks)
    result.update({
        "machinery": mach, "ranking_check": ranking, "supernet": state.data["train supernet"]["result"], "family": members,
        "equal_compute": compute, "family_p90_ms": family_p90,
        "budget_rule": rule_text(above, neutral),
        "placements": {d: [p.to_dict() for p in places] for d, places in placements.items()},
        "devices": {d: {"intra_op_threads": t, "table": relative(tables[d], run)} for d, t in DEVICES},
        "search_settings": asdict(search_settings(args.smoke)),
        "search_wall_s": {d: phases[f"search {d}"]["wall_s"] for d, _ in DEVICES},
        "search_timing": {f"{p['device']} {p['budget_ms']:g}": p["timings"] for p in picks},
        "measured_over_predicted": {f"{p['device']} {p['budget_ms']:g}": p.get("measured_over_predicted") for p in picks},
        "phases": phases, "device": describe_hardware(), "software": software_versions(),
        "recipe": portable_recipe(sn_recipe, run), "recipe_hash": sn_recipe.hash(), "smoke": args.smoke,
        "commit": started_at, "commit_at_end": git_commit(), "command": command_line(argv),
        "wall_s_this_invocation": round(time.perf_counter() - t0, 1)})
    from tightfit.ondevice.files import write_json
    out = write_json(Path(args.out), result)
    sys.path.insert(0, str(ROOT / "scripts"))
    from bench_page import write_page  # scripts/bench_page.py: the human page and the plot
    page = write_page(result, Path(args.docs))
    print(format_summary(result))
    print(f"results: {out}\npage: {page}")
    return 0


def command_line(argv: list[str] | None) -> str:
    """The command as run, paths inside the repository relative to it."""
    def portable(arg: str) -> str:
        p = Path(arg)
        return str(p.relative_to(ROOT)) if p.is_absolute() and p.is_relative_to(ROOT) else arg
    args = argv if argv is not None else sys.argv[1:]
    return " ".join(["python benchmarks/fashion_mnist.py", *map(portable, args)])


def git_commit() -> str:
    import subprocess
    try:
        sha = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=ROOT,
                               capture_output=True, text=True).stdout.strip()
        return sha + ("-dirty" if dirty else "")
    except OSError:
        return "unknown"


if __name__ == "__main__":
    from tightfit.errors import Interrupted, UserError
    try:
        sys.exit(main())
    except UserError as e:  # one line, exit 2, as the CLI does
        print(f"error: {e}", file=sys.stderr)
        sys.exit(2)
    except Interrupted as e:
        print(f"{e}; rerun the same command to resume the benchmark", file=sys.stderr)
        sys.exit(e.code)
