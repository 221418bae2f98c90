"""The human page of the Fashion-MNIST benchmark: docs/benchmarks.md and its plot.

Kept apart from bench_fashion_mnist.py so the page can be rewritten from the JSON alone:
    .venv/bin/python scripts/bench_page.py benchmarks/results/fashion-mnist.json
"""
from __future__ import annotations

import json
import sys
from pathlib import Path


def _end_commit(result: dict) -> str:
    """Names the commit at the end when the run was resumed or the tree changed while it ran."""
    end = result.get("commit_at_end")
    return f", finished at `{end}`" if end and end != result["commit"] else ""


def plot(result: dict, path: Path) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(7.5, 4.8), dpi=120)
    models = result["models"]
    base = sorted((m for m in models if m["kind"] == "baseline"), key=lambda m: m["p90_ms"])
    picks = [m for m in models if m["kind"] == "pick"]
    ax.plot([m["p90_ms"] for m in base], [m["test_acc"] for m in base], "s--", color="tab:gray",
            label="hand-scaled family (each trained alone)")
    for m in base:
        ax.annotate(m["name"], (m["p90_ms"], m["test_acc"]), textcoords="offset points", xytext=(4, -11), fontsize=7,
                    color="tab:gray")
    ax.plot([m["p90_ms"] for m in picks], [m["test_acc"] for m in picks], "o", color="tab:blue", ms=8,
            label="tightfit picks (one supernet)")
    for r in result["budgets"]:
        ax.axvline(r["budget_ms"], color="tab:red", lw=0.8, ls=":")
        ax.annotate(f"budget {r['budget_ms']:g} ms", (r["budget_ms"], 1.0), xycoords=("data", "axes fraction"),
                    rotation=90, fontsize=7, color="tab:red", xytext=(-9, -4), textcoords="offset points", va="top")
    ax.set_xlabel("measured p90 latency, ms (ONNX Runtime, batch 1, 1 thread)")
    ax.set_ylabel("test accuracy, % (Fashion-MNIST test split)")
    ax.set_title("Fashion-MNIST: accuracy vs measured latency")
    ax.grid(alpha=0.3)
    ax.legend(loc="lower right", fontsize=8)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path)
    plt.close(fig)
    return path


def _row(r: dict) -> str:
    p, b = r["pick"], r["baseline"]
    base = (f"{b['name']} | {b['test_acc']:.2f} | {b['p90_ms']:.3f} | {b['params']:,} | {b['macs'] / 1e6:.2f}"
            if b else "none fits | | | |")
    gain = f"{r['gain_points']:+.2f}" if r["gain_points"] is not None else "n/a"
    return (f"| {r['budget_ms']:g} | {p['test_acc']:.2f} | {p['p90_ms']:.3f} | {p['params']:,} | {p['macs'] / 1e6:.2f} | "
            f"{base} | {gain} |")


def page_text(result: dict, plot_name: str) -> str:
    t = result["targets"]
    c, mach, dev, sw = result["cpu_seconds"], result["machinery"], result["device"], result["software"]
    lines = [
        "# Benchmark: one supernet vs a hand-scaled family (Fashion-MNIST, CPU)",
        "",
        "Written by `scripts/bench_fashion_mnist.py` from one run"
        f" (started at commit `{result['commit']}`{_end_commit(result)}"
        f"{', SMOKE setting: not a result' if result['smoke'] else ''}).",
        f"Reproduce: `{result['command']}` (figures: `benchmarks/results/fashion-mnist.json`).",
        "",
        "Latency and accuracy here were measured on one machine under the conditions below; they are not a "
        "guarantee on another device, and test accuracy is not field performance.",
        "",
        "## Picks vs the best fitting baseline, per budget",
        "",
        "| budget ms (p90) | pick test % | pick p90 ms | pick params | pick MMACs | best fitting baseline | "
        "test % | p90 ms | params | MMACs | gain (points) |",
        "|---|---|---|---|---|---|---|---|---|---|---|",
        *[_row(r) for r in result["budgets"]],
        "",
        f"![accuracy vs latency]({plot_name})",
        "",
        "All models were measured in one interleaved session under the same protocol "
        "(ONNX Runtime CPU, batch 1, 1 intra-op thread, median over fresh processes) and evaluated on the same "
        f"{result['test_images']:,}-image test split, which neither the search nor the selection saw.",
        "",
        "## Targets",
        "",
        "- pick at least as accurate as the best fitting baseline at every budget: "
        f"{'yes' if t['pick_at_least_baseline_every_budget'] else 'NO'}",
        f"- best pick test accuracy {t['best_pick_test_acc']:.2f} % (target {t['best_pick_target']} %)",
        "- best pick under 100K parameters: " + (f"{t['best_small_pick_test_acc']:.2f} %" if t["best_small_pick_test_acc"]
                                                   is not None else "none") + f" (target {t['small_pick_target']} %)",
        f"- CPU time (supernet + search) / family: {t['cpu_ratio_supernet_search_over_family']:.2f} (target <= 1)",
        "",
        "## Every model",
        "",
        "| model | key | params | MMACs | test % | p50 ms | p90 ms | stable |",
        "|---|---|---|---|---|---|---|---|",
        *[f"| {m['name']} | `{m['key']}` | {m['params']:,} | {m['macs'] / 1e6:.2f} | {m['test_acc']:.2f} | "
          f"{m['p50_ms']:.3f} | {m['p90_ms']:.3f} | {'yes' if m['stable'] else 'no: ' + m['note']} |"
          for m in result["models"]],
        "",
        "## Cost",
        "",
        f"- CPU-seconds, supernet training: {c['supernet_training']:.0f}; profiling + search of all budgets: "
        f"{c['search']:.0f}; together {c['supernet_plus_search']:.0f}.",
        f"- CPU-seconds, training the {len(result['family'])}-member family: {c['family_training']:.0f}.",
        f"- Ratio (supernet + search) / family: {c['supernet_plus_search'] / max(c['family_training'], 1e-9):.2f}.",
        "- Search time per budget (wall, s): " + ", ".join(f"{k} ms: {v:.0f}" for k, v in result["picks_search_s"].items()),
        "",
        "## The machinery itself",
        "",
        "Elastic overhead: the supernet with subnet S active vs S extracted as a static net, same batch "
        f"({result['recipe']['train']['batch_size']} images), best of interleaved repeats:",
        "",
        "| subnet | train step static ms | elastic ms | ratio | inference static ms | elastic ms | ratio |",
        "|---|---|---|---|---|---|---|",
        *[f"| {n} | {v['train_step_ms_static']:.1f} | {v['train_step_ms_elastic']:.1f} | {v['train_overhead']:.2f} | "
          f"{v['infer_ms_static']:.1f} | {v['infer_ms_elastic']:.1f} | {v['infer_overhead']:.2f} |"
          for n, v in mach.items() if n != "profile_largest_step"],
        "",
        f"Supernet training throughput: {result['supernet']['throughput']['images_per_s']:.0f} images/s "
        f"(sandwich of {2 + result['recipe']['train']['random_subnets']} subnets per batch); peak resident memory "
        f"{result['supernet']['throughput']['peak_rss_mib']:.0f} MiB.",
        "",
        "Where a training step of the largest subnet spends its CPU time (torch.profiler, self time):",
        "",
        *[f"- {e['op']}: {100 * e['share']:.1f} %" for e in mach["profile_largest_step"]],
        "",
        "Search timing per budget (from `tightfit search`):",
        "",
        *[f"- {k} ms: {'; '.join(v)}" for k, v in result["search_timing"].items()],
        "",
        *_drift_lines(result.get("session_drift") or {}, result.get("measured_over_predicted") or {}),
        "## Machine and software",
        "",
        f"- CPU: {dev.get('cpu_model')}, {dev.get('logical_cores', dev.get('cores'))} logical cores; OS: {dev.get('os')}",
        "- " + ", ".join(f"{k} {v}" for k, v in sw.items()),
        f"- recipe `{result['recipe']['name']}` (hash {result['recipe_hash']}), "
        f"{result['recipe']['train']['epochs']} epochs for the supernet and for every family member.",
        "",
    ]
    return "\n".join(lines)


def _drift_lines(drift: dict, ratio: dict) -> list[str]:
    """How far the machine had moved from its latency table: the drift check's reading before each
    budget's search (when on) and what the measured top candidates showed (measured / predicted p90)."""
    out = []
    if any(v is not None for v in drift.values()):
        shown = ", ".join(f"{k} ms {'not checked' if v is None else f'{v:.3f} x'}" for k, v in drift.items())
        out += [f"Drift check before each budget's search (the table's calibration subnets, time now / time when "
                f"profiled; beyond ±3 % the search limit is rescaled): {shown}.", ""]
    if any(v is not None for v in ratio.values()):
        shown = ", ".join(f"{k} ms {'-' if v is None else f'{v:.3f} x'}" for k, v in ratio.items())
        out += [f"The measured top candidates against their predictions (median measured / predicted p90, "
                f"last search of each budget): {shown}.", ""]
    return out


NOTES = Path(__file__).resolve().parents[1] / "benchmarks" / "fashion-mnist-notes.md"


def write_page(result: dict, docs: Path) -> Path:
    """The generated page, then the hand-written reading of it (benchmarks/fashion-mnist-notes.md) if present."""
    from tightfit.ondevice.files import write_text
    name = "benchmarks-fashion-mnist.png"
    plot(result, docs / name)
    notes = "" if result["smoke"] or not NOTES.is_file() else "\n" + NOTES.read_text("utf-8")
    return write_text(docs / "benchmarks.md", page_text(result, name) + notes)


def main(argv: list[str] | None = None) -> int:
    import argparse
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("result", type=Path, help="benchmark result JSON (benchmarks/results/fashion-mnist.json)")
    ap.add_argument("docs", type=Path, nargs="?", default=Path("docs"), help="folder for the page (default docs)")
    args = ap.parse_args(argv)
    try:
        result = json.loads(args.result.read_text("utf-8"))
    except (OSError, json.JSONDecodeError) as e:
        print(f"error: cannot read {args.result}: {e}", file=sys.stderr)
        return 2
    print(write_page(result, args.docs))
    return 0


if __name__ == "__main__":
    sys.exit(main())
