"""The human page of the Fashion-MNIST benchmark: docs/benchmarks.md and its plot.

Kept apart from benchmarks/fashion_mnist.py so the page can be rewritten from the JSON alone (results
written before budgets had a placement read as placed above a member):
    .venv/bin/python scripts/bench_page.py benchmarks/results/fashion-mnist.json
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

from bench_page_lines import (fmt, finetune_text, kept_text, placement_gains, ranking_lines, ratio_lines, sampled_text,
                              search_cost, search_wall, targets_text, pick_timing, timing_heading, use_lines)


def _end_commit(result: dict) -> str:
    """Names the commit at the end when the run was resumed or the tree changed while it ran."""
    end = result.get("commit_at_end")
    return f", finished at `{end}`" if end and end != result["commit"] else ""


def _devices(result: dict) -> list[str]:
    return list(dict.fromkeys(r["device"] for r in result["budgets"]))


def _on(m: dict, device: str) -> dict:
    return {**m, **m["latency"][device]}


BUDGET_STYLE = {"above a member": ("tab:red", ":"), "between members": ("tab:purple", "-.")}  # colour, line style


def plot(result: dict, path: Path) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    devices = _devices(result)
    fig, axes = plt.subplots(1, len(devices), figsize=(6.2 * len(devices), 4.8), dpi=110, squeeze=False)
    for ax, device in zip(axes[0], devices):
        models = [_on(m, device) for m in result["models"]]
        base = sorted((m for m in models if m["kind"] == "baseline"), key=lambda m: m["p90_ms"])
        picks = [m for m in models if m["kind"] == "pick" and m["device"] == device]
        ax.plot([m["p90_ms"] for m in base], [m["test_acc"] for m in base], "s--", color="tab:gray",
                label="hand-scaled family (each trained alone)")
        for m in base:
            ax.annotate(m["name"], (m["p90_ms"], m["test_acc"]), textcoords="offset points", xytext=(4, -11),
                        fontsize=7, color="tab:gray")
        ax.plot([m["p90_ms"] for m in picks], [m["test_acc"] for m in picks], "o", color="tab:blue", ms=8,
                label="tightfit picks (one supernet)")
        for r in (r for r in result["budgets"] if r["device"] == device):
            colour, style = BUDGET_STYLE[r.get("placement", "above a member")]
            ax.axvline(r["budget_ms"], color=colour, lw=0.8, ls=style)
            ax.annotate(f"budget {r['budget_ms']:g} ms, {_placement(r)}", (r["budget_ms"], 1.0),
                        xycoords=("data", "axes fraction"), rotation=90, fontsize=7, color=colour, xytext=(-9, -4),
                        textcoords="offset points", va="top")
        threads = result["protocols"][device]["threads"]
        ax.set_xlabel(f"measured p90 latency, ms (ONNX Runtime, batch 1, {threads} thread{'s' * (threads > 1)})")
        ax.set_ylabel("test accuracy, % (Fashion-MNIST test split)")
        ax.set_title(f"{device}: accuracy vs measured latency", fontsize=10)
        ax.grid(alpha=0.3)
        ax.legend(loc="best", fontsize=8)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path)
    plt.close(fig)
    return path


def _script(result: dict) -> str:
    """The script that wrote the result, as its command names it."""
    words = result.get("command", "").split()
    return words[1] if len(words) > 1 else "benchmarks/fashion_mnist.py"


def _placement(r: dict) -> str:
    """How the budget was placed: just above a member, or between two adjacent members."""
    members = r.get("members") or [r.get("placed_above")]
    if r.get("placement", "above a member") == "between members":
        return f"between {members[0]} and {members[1]}"
    return f"above {members[0]}"


def _row(r: dict) -> str:
    p, b = r["pick"], r["baseline"]
    base = (f"{b['name']} | {b['test_acc']:.2f} | {b['p90_ms']:.3f} | {b['params']:,} | {b['macs'] / 1e6:.2f}"
            if b else "none fits | | | |")
    gain = f"{r['gain_points']:+.2f}" if r["gain_points"] is not None else "n/a"
    inherited = fmt(p.get("test_acc_inherited"), ".2f", "-")
    gain_inherited = fmt(r.get("gain_points_inherited"), "+.2f", "-")
    use = fmt(r.get("budget_use", p["p90_ms"] / r["budget_ms"]), ".2f")
    return (f"| {r['budget_ms']:g} | {_placement(r)} | `{p['key']}` | {inherited} | {p['test_acc']:.2f} | {p['p90_ms']:.3f} | "
            f"{use} | {p['params']:,} | {p['macs'] / 1e6:.2f} | {base} | {gain_inherited} | {gain} |")


def _device_section(result: dict, device: str) -> list[str]:
    threads = result["protocols"][device]["threads"]
    rows = [r for r in result["budgets"] if r["device"] == device]
    notes = [*(_placed_note(r) for r in rows if r.get("placement_holds", r.get("placed_above_fits")) is False),
             *(f"- The supernet did not train for the {r['budget_ms']:g} ms budget: {r['not_trained_because']}"
               for r in rows if r.get("trained_for") is False),
             *(f"- The {r['budget_ms']:g} ms pick measured {r['pick']['p90_ms']:.3f} ms in the final session: over "
               "its budget there, though its search measured it inside." for r in rows if r.get("pick_fits") is False)]
    return [f"### {device} ({threads} intra-op thread{'s' * (threads > 1)})", "",
            "| budget ms (p90) | placed | pick | test %, inherited weights | test %, fine-tuned | p90 ms | budget use | "
            "params | MMACs | best fitting family member | test % | p90 ms | params | MMACs | gain, inherited (points) | "
            "gain (points) |",
            "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
            *[_row(r) for r in rows], "", *notes, *([""] if notes else [])]


def _placed_note(r: dict) -> str:
    """A placement that did not hold in the final session, and what that does to the comparison."""
    members = r.get("members") or [r.get("placed_above")]
    if r.get("placement") == "between members":
        return (f"- The {r['budget_ms']:g} ms budget was placed between {members[0]} and {members[1]}, which no longer "
                "held in the final session: the comparison is with " + (f"{r['baseline']['name']}." if r["baseline"]
                                                                        else "no member (none fits), so no gain is counted."))
    head = f"- The {r['budget_ms']:g} ms budget was placed above {members[0]}, which measured over it in the final session: "
    return head + ("the comparison is with a smaller member, which flatters the pick." if r["baseline"]
                   else "no member fits, so no gain is counted.")


def page_text(result: dict, plot_name: str) -> str:
    t = result["targets"]
    c, mach, dev, sw = result["cpu_seconds"], result["machinery"], result["device"], result["software"]
    devices, eq = _devices(result), result["equal_compute"]
    lines = [
        "# Benchmark: one supernet vs a hand-scaled family (Fashion-MNIST, CPU)",
        "",
        f"Written by `{_script(result)}` from one run"
        f" (started at commit `{result['commit']}`{_end_commit(result)}"
        f"{', SMOKE setting: not a result' if result['smoke'] else ''}).",
        f"Reproduce: `{result['command']}` (figures: `benchmarks/results/fashion-mnist.json`).",
        "",
        "Latency and accuracy here were measured on one machine under the conditions below; they are not a "
        "guarantee on another device, and test accuracy is not field performance.",
        "",
        "## Picks vs the best fitting family member, per device and budget",
        "",
        f"Budgets: {result['budget_rule']} (the family measured before the supernet was trained). Equal compute: "
        f"the family cost {eq['family_cpu_s']:.0f} CPU-s (training at {eq['family_epochs']:g} epochs each, plus "
        f"measuring every member on each device); {kept_text(eq)} and the rest bought the supernet {eq['epochs']:g} "
        f"epochs at ~{eq['epoch_cpu_s']:.0f} CPU-s each ({sampled_text(eq)}).{targets_text(result)}"
        f"{finetune_text(result)}",
        "",
        *[line for d in devices for line in _device_section(result, d)],
        f"![accuracy vs latency]({plot_name})",
        "",
        "On each device every model was measured in one interleaved session under that device's protocol "
        "(ONNX Runtime CPU, batch 1, pooled runs from fresh processes) and all were evaluated on the same "
        f"{result['test_images']:,}-image test split, which neither the search nor the selection saw.",
        "",
        "## Targets",
        "",
        f"- gain at every (device, budget) >= +{t['gain_target']} points: "
        f"{'yes' if t['gain_at_every_budget'] else 'NO'} (smallest gain {fmt(t['min_gain_points'], '+.2f')}"
        f"{placement_gains(t)})",
        *use_lines(t),
        f"- best pick test accuracy {t['best_pick_test_acc']:.2f} % (target {t['best_pick_target']} %)",
        f"- best pick under 100K parameters: {fmt(t['best_small_pick_test_acc'], '.2f')} % (target {t['small_pick_target']} %)",
        f"- CPU time (supernet + profiling + search) / family: {t['cpu_ratio_supernet_search_over_family']:.2f} (target <= 1)",
        f"- profiling + search / supernet training: {t['search_share_of_training']:.2f} (aim <= {t['search_share_aim']})",
        "",
        "## Every model",
        "",
        "| model | key | params | MMACs | test % | " + " | ".join(f"p50 / p90 ms {d}" for d in devices) + " | stable |",
        "|---|---|---|---|---|" + "---|" * len(devices) + "---|",
        *[f"| {m['name']} | `{m['key']}` | {m['params']:,} | {m['macs'] / 1e6:.2f} | {m['test_acc']:.2f} | "
          + " | ".join(f"{m['latency'][d]['p50_ms']:.3f} / {m['latency'][d]['p90_ms']:.3f}" for d in devices)
          + " | " + "; ".join(f"{d}: {'yes' if m['latency'][d]['stable'] else m['latency'][d]['note']}" for d in devices)
          + " |" for m in result["models"]],
        "",
        "## Cost",
        "",
        f"- CPU-seconds, supernet training: {c['supernet_training']:.0f}; {search_cost(c)}; together "
        f"{c['supernet_plus_search']:.0f}.",
        f"- CPU-seconds, the {len(result['family'])}-member family: training {c['family_training']:.0f}, measuring "
        f"on each device {c['family_measuring']:.0f}; together {c['family']:.0f}.",
        f"- Ratio (supernet side) / family: {c['supernet_plus_search'] / max(c['family'], 1e-9):.2f}.",
        search_wall(result),
        "- Per phase (wall s / CPU-s): " + "; ".join(f"{k} {v['wall_s']:.0f} / {v['cpu_s']:.0f}"
                                                   for k, v in result["phases"].items() if v["wall_s"] >= 1),
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
        *ranking_lines(result.get("ranking_check")),
        timing_heading(result["search_timing"]),
        "",
        *[f"- {k} ms: {pick_timing(v)}" for k, v in result["search_timing"].items()],
        "",
        *ratio_lines(result.get("measured_over_predicted") or {}),
        *_screen_lines(SCREEN),
        "## Machine and software",
        "",
        f"- CPU: {dev.get('cpu_model')}, {dev.get('logical_cores', dev.get('cores'))} logical cores; OS: {dev.get('os')}",
        "- " + ", ".join(f"{k} {v}" for k, v in sw.items()),
        f"- recipe `{result['recipe']['name']}` (hash {result['recipe_hash']}): the supernet at "
        f"{result['recipe']['train']['epochs']:g} epochs, every family member at {eq['family_epochs']:g}.",
        "",
    ]
    return "\n".join(lines)


NOTES = Path(__file__).resolve().parents[1] / "benchmarks" / "fashion-mnist-notes.md"
SCREEN = Path(__file__).resolve().parents[1] / "benchmarks" / "results" / "training-screen-benchmark-length.json"


def _screen_lines(path: Path) -> list[str]:
    """The training levers screened at the benchmark's length, each against the two baseline seeds."""
    if not path.is_file():
        return []
    from screen_summary import BASELINES, COLUMNS, summarise  # scripts/screen_summary.py
    doc = json.loads(path.read_text("utf-8"))
    rows = [r for r in summarise(doc) if r["label"] not in BASELINES]
    return ["## Training levers screened at the benchmark's length", "",
            f"`scripts/bench_train_settings.py` ({path.name}, {doc['protocol'].get('date', '')}): "
            f"{doc['protocol'].get('note', '')} Validation points against the mean of two seeds of the recipe "
            f"as written (one run's noise σ {rows[0]['sigma']:.2f}, clear beyond {rows[0]['threshold']:.2f}); an "
            "\"alone\" row is that subnet trained by itself, i.e. what weight sharing costs it; an epochs row "
            "changes the compute, so it is no lever at equal compute. docs/measurements.md, \"Training levers at the benchmark's "
            "length\", has the protocol and the CPU checks.", "",
            "| change | " + " | ".join(f"Δ {c.replace('_', ' ')}" for c in COLUMNS) + " | verdict |",
            "|---|" + "---|" * len(COLUMNS) + "---|",
            *[f"| {r['label']} | " + " | ".join(f"{r['delta'][c]:+.2f}" if c in r["delta"] else "" for c in COLUMNS) + f" | {_verdict(r)} |"
              for r in rows], ""]


def _verdict(row: dict) -> str:
    """An epochs row changes the compute, so it is no lever at equal compute whatever its figures say."""
    return "other compute" if row["label"].startswith("epochs=") and ":" not in row["label"] else row.get("verdict", "")


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
