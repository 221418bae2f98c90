"""The report's plots: accuracy vs latency, training curves, the picks' latency spread.

matplotlib is imported when plotting, so `tightfit --help` stays quick.
"""
from __future__ import annotations

import statistics
from typing import TYPE_CHECKING, Any, Optional

from tightfit.ondevice.measurement import figure_of
from tightfit.report.data import RunData, _devices, _number, export_folder, front_points

if TYPE_CHECKING:
    from matplotlib.figure import Figure

COLOURS = ["tab:blue", "tab:orange", "tab:green", "tab:purple", "tab:brown", "tab:cyan"]


def plot_accuracy_latency(data: RunData) -> Optional[Figure]:
    """Candidates and Pareto front per device, budgets, picks (predicted -> measured) and baselines."""
    from matplotlib.figure import Figure
    if not (data.candidates or data.fronts or data.baselines):
        return None
    fig = Figure(figsize=(9, 6.6), dpi=110, layout="constrained")
    ax = fig.add_subplot()
    xmax = 0.0
    for d, dev in enumerate(_devices(data)):
        colour = COLOURS[d % len(COLOURS)]
        seen = {c.get("key", i): c for i, c in enumerate(data.candidates) if c.get("device") == dev}
        pts = [(c["predicted_ms"], c["val_acc"]) for c in seen.values()]
        if pts:
            ax.scatter(*zip(*pts), s=12, alpha=0.35, color=colour, label=f"{dev}: {len(pts)} evaluated subnets")
        else:  # no candidate log: draw the search's own front file
            pts = [(r["predicted_ms"], r["val_acc"]) for r in data.fronts.get(dev, [])]
        front = front_points(pts)
        if front:
            ax.plot(*zip(*front), drawstyle="steps-post", marker="o", ms=4, lw=1.5, color=colour,
                    label=f"{dev}: Pareto front")
        budgets = sorted({c["budget_ms"] for c in data.candidates if c.get("device") == dev}
                         | {p["budget_ms"] for p in data.picks if p.get("device") == dev})
        for b in budgets:
            ax.axvline(b, color=colour, ls="--", lw=1, alpha=0.8)
            ax.annotate(f"{b:g} ms", (b, 0), xycoords=("data", "axes fraction"), xytext=(3, 4),
                        textcoords="offset points", fontsize=8, color=colour)
        xmax = max([xmax, *budgets, *(x for x, _ in pts)])
        picks = [p for p in data.picks if p.get("device") == dev]
        qa = [data.qa.get(export_folder(p, data.run_dir)) for p in picks]
        _draw_picks(ax, picks, qa, colour)
    if data.baselines:
        _draw_baselines(ax, data.baselines)
    lo, hi = ax.get_xlim()  # the data's own range: from 0 the demo's points sat in the right 40 %
    ax.set_xlim(left=max(0.0, lo), right=max(hi, xmax * 1.06))
    ax.set_xlabel("latency (ms): candidates as predicted from the table; picks and baselines measured")
    ax.set_ylabel("top-1 accuracy (%) on the validation split")
    ax.set_title("Accuracy vs latency")
    ax.grid(alpha=0.3)
    fig.legend(loc="outside lower center", ncols=3, fontsize=8)
    return fig


def _once(ax: Any, label: str) -> Optional[str]:
    """The legend label the first time it is used on these axes, None after."""
    return None if label in {c.get_label() for c in ax.collections} else label


def _draw_picks(ax: Any, picks: list[dict], qa: list[Optional[dict]], colour: str) -> None:
    """A star at the predicted latency, an arrow to the measured percentile (QA's when only QA measured)."""
    for n, (p, check) in enumerate(zip(picks, qa)):
        x0, acc = p["predicted_ms"], p["val_acc"]
        measured = figure_of(p.get("measured"))
        source, fits = "", p.get("fits")
        if measured is None and check:
            measured, source, fits = figure_of(check.get("measured")), "QA ", check.get("pass")
        ax.scatter([x0], [acc], marker="*", s=160, color=colour, edgecolor="black", zorder=5,
                   label=_once(ax, "pick at predicted latency"))
        if measured is None:
            ax.annotate("not measured", (x0, acc), xytext=(8, -14), textcoords="offset points", fontsize=8)
            continue
        ax.scatter([measured], [acc], marker="*", s=160, facecolor="white", edgecolor=colour, zorder=5,
                   label=_once(ax, "pick at measured latency"))
        ax.annotate("", (measured, acc), (x0, acc), arrowprops=dict(arrowstyle="->", color="black", lw=0.8))
        text = f"{source}p{p.get('percentile', 90):g} {measured:.3g} ms\nbudget {p['budget_ms']:g} ms: "
        ax.annotate(text + ("fits" if fits else "OVER"),
                    (measured, acc), xytext=(10, -30 - 28 * n), textcoords="offset points", fontsize=8,
                    bbox=dict(boxstyle="round,pad=0.2", fc="white", ec=colour, alpha=0.85), zorder=6)


def _draw_baselines(ax: Any, baselines: list[dict]) -> None:
    for b in baselines:
        acc = b.get("test_acc", b.get("val_acc"))
        if not (_number(acc) and _number(b.get("p90_ms"))):
            continue
        split = "test" if "test_acc" in b else "val"
        ax.scatter([b["p90_ms"]], [acc], marker="s", s=50, color="black", zorder=4,
                   label=_once(ax, "hand-scaled baseline (measured p90)"))
        ax.annotate(f"{b.get('name', '?')} ({split})", (b["p90_ms"], acc), xytext=(6, -12),
                    textcoords="offset points", fontsize=8)


def plot_training(metrics: list[dict]) -> Optional[Figure]:
    """Loss of the largest and smallest subnet per step; their validation accuracy per epoch."""
    from matplotlib.figure import Figure
    steps = {r["step"]: r for r in metrics if "loss_largest" in r and "step" in r}
    evals = {r["epoch"]: r for r in metrics if "val_acc_largest" in r and "epoch" in r}
    if not (steps or evals):
        return None
    fig = Figure(figsize=(10, 4), dpi=110, layout="constrained")
    loss_ax, acc_ax = fig.subplots(1, 2)
    for name, style in (("largest", "-"), ("smallest", "--")):
        xs = sorted(steps)
        ys = [steps[s].get(f"loss_{name}") for s in xs]
        loss_ax.plot(xs, ys, style, marker="o" if len(xs) <= 30 else None, ms=3, label=f"{name} subnet")
        es = sorted(evals)
        acc_ax.plot(es, [evals[e].get(f"val_acc_{name}") for e in es], style, marker="o", label=f"{name} subnet")
    loss_ax.set(xlabel="training step", ylabel="training loss", title="Training loss (sandwich rule)")
    acc_ax.set(xlabel="epoch", ylabel="top-1 accuracy (%), validation",
               title="Validation accuracy after BN recalibration")
    for ax in (loss_ax, acc_ax):
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    return fig


Measurement = tuple[list[dict], Optional[dict]]


def _measurement(measured: Optional[dict]) -> Measurement:
    """(per-repeat summaries, the pooled figure) of a measurement; the pooled figure stands in for
    the repeats when they are absent (a manifest)."""
    measured = measured or {}
    if not _number(measured.get("p90_ms")):
        return [], None
    return measured.get("repeats") or [measured], measured


def _repeat_figures(pick: dict, data: RunData) -> tuple[Measurement, Measurement]:
    """(search's measurement, QA re-measurement's) for a pick."""
    folder = export_folder(pick, data.run_dir)
    search = _measurement(pick.get("measured"))
    if not search[0]:  # an older picks.json without figures: the manifest has them
        search = _measurement(data.manifests.get(folder, {}).get("latency"))
    return search, _measurement((data.qa.get(folder) or {}).get("measured"))


def _strip(ax: Any, m: Measurement, shift: float, style: dict, label: str) -> None:
    """Each repeat's p50/p90/p99 as points (jittered), the figure pooled over repeats as a bar."""
    reps, pooled = m
    for j, stat in enumerate(("p50_ms", "p90_ms", "p99_ms")):
        ys = [r[stat] for r in reps if _number(r.get(stat))]
        if not ys:
            continue
        xs = [j + shift + (k - (len(ys) - 1) / 2) * 0.06 for k in range(len(ys))]
        ax.scatter(xs, ys, s=25, zorder=3, label=label if j == 0 else None, **style)
        bar = pooled[stat] if pooled and _number(pooled.get(stat)) else statistics.median(ys)
        ax.hlines(bar, j + shift - 0.14, j + shift + 0.14, color="black", lw=1.5, zorder=4)


def _latency_scale(ax: Any, values: list) -> None:
    """Linear from zero, or logarithmic when hiccups put p99 far above p50 (contended machines)."""
    vals = [v for v in values if _number(v) and v > 0]
    if vals and max(vals) > 8 * min(vals):
        ax.set_yscale("log")
        ax.set_ylabel("latency (ms), batch 1, log scale")
    else:
        ax.set_ylim(0, ax.get_ylim()[1] * 1.08)


def plot_pick_latency(data: RunData) -> Optional[Figure]:
    """One panel per pick: p50/p90/p99 of each repeat (search and QA) as points, the budget as a line."""
    from matplotlib.figure import Figure
    panels = [(p, *_repeat_figures(p, data)) for p in data.picks]
    panels = [t for t in panels if t[1][0] or t[2][0]]
    if not panels:
        return None
    cols = min(len(panels), 3)
    rows = (len(panels) + cols - 1) // cols
    fig = Figure(figsize=(4 * cols, 3.6 * rows), dpi=110, layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax, (pick, reps, qa) in zip(axes, panels):
        _strip(ax, reps, -0.15 if qa[0] else 0.0, {"color": "tab:blue"}, "search: one repeat")
        _strip(ax, qa, 0.15, {"color": "tab:green", "marker": "D"}, "QA verify: one repeat")
        pct = pick.get("percentile", 90)
        ax.axhline(pick["budget_ms"], color="tab:red", ls="--", label=f"budget {pick['budget_ms']:g} ms at p{pct:g}")
        ax.set_xticks(range(3), ["p50", "p90", "p99"])
        ax.set_xlim(-0.5, 2.5)
        ax.set(ylabel="latency (ms), batch 1", title=f"{pick.get('device')} / budget {pick['budget_ms']:g} ms")
        _latency_scale(ax, [r.get(k) for r in reps[0] + qa[0] for k in ("p50_ms", "p99_ms")] + [pick["budget_ms"]])
        ax.grid(alpha=0.3, axis="y")
        ax.legend(fontsize=7, loc="best", title="bar = pooled over repeats", title_fontsize=7)
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    return fig
