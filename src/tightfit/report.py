"""`tightfit report`: plots and a one-page HTML summary of a run, from whatever pieces exist.

Reads RUN_DIR/metrics.jsonl, search/candidates.jsonl, search/front-*.json, search/picks.json,
baselines.json and the exports' manifests and verdicts; writes PNGs and report.html into
RUN_DIR/report/. A missing piece (no search yet, say) becomes a note on the page, not an error.
"""
from __future__ import annotations

import base64
import html
import io
import json
import statistics
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Optional

from tightfit.atomic import write_bytes, write_text
from tightfit.errors import UserError

if TYPE_CHECKING:  # matplotlib is imported when plotting, so `tightfit --help` stays quick
    from matplotlib.figure import Figure

CAUTION = ("Latency measured on one machine under stated conditions is not a guarantee on another device; "
           "validation accuracy is not field performance.")
COLOURS = ["tab:blue", "tab:orange", "tab:green", "tab:purple", "tab:brown", "tab:cyan"]


@dataclass
class RunData:
    """Everything the report draws, as read from the run folder."""
    run_dir: Path
    recipe: dict[str, Any] = field(default_factory=dict)
    metrics: list[dict] = field(default_factory=list)
    candidates: list[dict] = field(default_factory=list)
    fronts: dict[str, list[dict]] = field(default_factory=dict)
    picks: list[dict] = field(default_factory=list)
    baselines: list[dict] = field(default_factory=list)
    tables: dict[str, dict] = field(default_factory=dict)     # device name -> latency table "device" record
    manifests: dict[str, dict] = field(default_factory=dict)  # export_dir -> manifest
    qa: dict[str, dict] = field(default_factory=dict)         # export_dir -> verify verdict row
    notes: list[str] = field(default_factory=list)


def _read_json(path: Path, notes: list[str]) -> Any:
    """Parsed JSON, or None with a note when the file is unreadable (absent files give None silently)."""
    if not path.is_file():
        return None
    try:
        return json.loads(path.read_text("utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        notes.append(f"{path.name} could not be read ({exc}); it is left out")
        return None


def _read_jsonl(path: Path, notes: list[str]) -> list[dict]:
    """Records of a JSON-lines log; a torn or malformed line is skipped and counted."""
    if not path.is_file():
        return []
    rows, bad = [], 0
    for line in path.read_text("utf-8", errors="replace").splitlines():
        try:
            rec = json.loads(line) if line.strip() else None
        except json.JSONDecodeError:
            rec = None
            bad += 1
        if isinstance(rec, dict):
            rows.append(rec)
    if bad:
        notes.append(f"{path.name}: {bad} malformed line(s) skipped")
    return rows


def _read_recipe(run_dir: Path, notes: list[str]) -> dict[str, Any]:
    """Recipe name and hash; the hash only when the recipe still loads."""
    path = run_dir / "recipe.toml"
    if not path.is_file():
        notes.append("no recipe.toml in the run folder")
        return {}
    import tomllib
    from tightfit.recipe import load_recipe
    try:
        recipe = load_recipe(path)
        return {"name": recipe.name, "hash": recipe.hash()}
    except (UserError, OSError, tomllib.TOMLDecodeError) as exc:
        notes.append(f"recipe.toml does not load ({exc})")
        return {}


def export_folder(pick: dict, run_dir: Path) -> str:
    """The pick's export folder as an absolute path; a relative one is tried from here, then in RUN_DIR/exports."""
    given = Path(pick.get("export_dir") or "")
    if given.is_absolute() or given.is_dir() or not given.name:
        return str(given.resolve())
    return str((run_dir / "exports" / given.name).resolve())


def _read_exports(data: RunData) -> None:
    """Manifests of the picks' exports and the latest QA verdict rows that mention them."""
    for pick in data.picks:
        folder = export_folder(pick, data.run_dir)
        man = _read_json(Path(folder) / "manifest.json", data.notes)
        if isinstance(man, dict):
            data.manifests[folder] = man
    for path in sorted(data.run_dir.glob("exports/**/verdict.json"), key=lambda p: p.stat().st_mtime):
        verdict = _read_json(path, data.notes)
        for row in (verdict or {}).get("models", []) if isinstance(verdict, dict) else []:
            data.qa[str(Path(row.get("export_dir", "")).resolve())] = row


def load_run(run_dir: str | Path) -> RunData:
    """Read every piece the report can use; refuse only a folder that is not a run at all."""
    root = Path(run_dir)
    if not root.is_dir():
        raise UserError(f"run folder {root} not found; pass a folder written by 'tightfit train'")
    if not any((root / p).exists() for p in ("recipe.toml", "metrics.jsonl", "search")):
        raise UserError(f"{root} holds no recipe.toml, metrics.jsonl or search/; "
                        "pass a run folder from 'tightfit train'")
    data = RunData(root)
    data.recipe = _read_recipe(root, data.notes)
    data.metrics = _read_jsonl(root / "metrics.jsonl", data.notes)
    data.candidates = [c for c in _read_jsonl(root / "search" / "candidates.jsonl", data.notes)
                       if _has_numbers(c, "val_acc", "predicted_ms", "budget_ms")]
    for path in sorted((root / "search").glob("front-*.json")):
        raw = _read_json(path, data.notes)
        rows = raw.get("front") if isinstance(raw, dict) else raw
        name = raw.get("device") if isinstance(raw, dict) else None
        if isinstance(rows, list):
            data.fronts[name or path.stem[len("front-"):]] = [r for r in rows
                                                              if _has_numbers(r, "val_acc", "predicted_ms")]
    picks = _read_json(root / "search" / "picks.json", data.notes)
    data.picks = [p for p in picks if _has_numbers(p, "val_acc", "predicted_ms", "budget_ms")] \
        if isinstance(picks, list) else []
    baselines = _read_json(root / "baselines.json", data.notes)
    data.baselines = [b for b in baselines if isinstance(b, dict)] if isinstance(baselines, list) else []
    for path in sorted((root / "latency").glob("*.json")):
        table = _read_json(path, data.notes)
        if isinstance(table, dict) and isinstance(table.get("device"), dict):
            data.tables[path.stem] = table["device"]
    _read_exports(data)
    return data


def _number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _has_numbers(row: Any, *keys: str) -> bool:
    """A record the plots can use: a dict with numbers under these keys (others are skipped)."""
    return isinstance(row, dict) and all(_number(row.get(k)) for k in keys)


def pareto_front(points: list[tuple[float, float]]) -> list[tuple[float, float]]:
    """Non-dominated (latency ms, accuracy) points, fastest first: lower latency and higher accuracy win."""
    front: list[tuple[float, float]] = []
    for ms, acc in sorted(set(points), key=lambda p: (p[0], -p[1])):
        if not front or acc > front[-1][1]:
            front.append((ms, acc))
    return front


def _devices(data: RunData) -> list[str]:
    names = [c.get("device") for c in data.candidates] + list(data.fronts) + [p.get("device") for p in data.picks]
    return [n for n in dict.fromkeys(names) if n]


# ---- plots ---------------------------------------------------------------------------------

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
        front = pareto_front(pts)
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
    ax.set_xlim(left=0, right=max(ax.get_xlim()[1], xmax * 1.06))
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
        measured = (p.get("measured") or {}).get("budget_stat_ms")
        source, fits = "", p.get("fits")
        if measured is None and check:
            measured, source, fits = (check.get("measured") or {}).get("budget_stat_ms"), "QA ", check.get("pass")
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


def _repeats(measured: Optional[dict]) -> list[dict]:
    """Per-repeat summaries of a measurement; the combined figure stands in when repeats are absent."""
    measured = measured or {}
    return measured.get("repeats") or ([measured] if _number(measured.get("p90_ms")) else [])


def _repeat_figures(pick: dict, data: RunData) -> tuple[list[dict], list[dict]]:
    """(search's repeats, QA re-measurement's repeats) for a pick."""
    folder = export_folder(pick, data.run_dir)
    reps = _repeats(pick.get("measured"))
    if not reps:  # an older picks.json without figures: the manifest has them
        lat = data.manifests.get(folder, {}).get("latency") or {}
        reps = _repeats(lat)
    return reps, _repeats((data.qa.get(folder) or {}).get("measured"))


def _strip(ax: Any, reps: list[dict], shift: float, style: dict, label: str) -> None:
    """Each repeat's p50/p90/p99 as points (jittered), the median over repeats as a bar."""
    for j, stat in enumerate(("p50_ms", "p90_ms", "p99_ms")):
        ys = [r[stat] for r in reps if _number(r.get(stat))]
        if not ys:
            continue
        xs = [j + shift + (k - (len(ys) - 1) / 2) * 0.06 for k in range(len(ys))]
        ax.scatter(xs, ys, s=25, zorder=3, label=label if j == 0 else None, **style)
        ax.hlines(statistics.median(ys), j + shift - 0.14, j + shift + 0.14, color="black", lw=1.5, zorder=4)


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
    panels = [t for t in panels if t[1] or t[2]]
    if not panels:
        return None
    cols = min(len(panels), 3)
    rows = (len(panels) + cols - 1) // cols
    fig = Figure(figsize=(4 * cols, 3.6 * rows), dpi=110, layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax, (pick, reps, qa) in zip(axes, panels):
        _strip(ax, reps, -0.15 if qa else 0.0, {"color": "tab:blue"}, "search: one repeat")
        _strip(ax, qa, 0.15, {"color": "tab:green", "marker": "D"}, "QA verify: one repeat")
        pct = pick.get("percentile", 90)
        ax.axhline(pick["budget_ms"], color="tab:red", ls="--", label=f"budget {pick['budget_ms']:g} ms at p{pct:g}")
        ax.set_xticks(range(3), ["p50", "p90", "p99"])
        ax.set_xlim(-0.5, 2.5)
        ax.set(ylabel="latency (ms), batch 1", title=f"{pick.get('device')} / budget {pick['budget_ms']:g} ms")
        _latency_scale(ax, [r.get(k) for r in reps + qa for k in ("p50_ms", "p99_ms")] + [pick["budget_ms"]])
        ax.grid(alpha=0.3, axis="y")
        ax.legend(fontsize=7, loc="best", title="bar = median of repeats", title_fontsize=7)
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    return fig


# ---- page ----------------------------------------------------------------------------------

def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def _missing(data: RunData) -> list[str]:
    """What the page cannot show yet, and the command that would produce it."""
    out = []
    if not data.metrics:
        out.append("no training metrics (metrics.jsonl): run 'tightfit train'")
    if not (data.candidates or data.fronts):
        out.append("no search results (search/candidates.jsonl, search/front-*.json): run 'tightfit search'")
    if not data.picks:
        out.append("no picks (search/picks.json): run 'tightfit search' with --budget")
    elif not any(any(_repeat_figures(p, data)) for p in data.picks):
        out.append("no pick was measured here (tables for other devices): run 'tightfit verify' on the device")
    if not data.baselines:
        out.append("no hand-scaled baselines (baselines.json: [{name, test_acc or val_acc, p90_ms}])")
    return out


def _fmt(v: Any, spec: str = ".2f") -> str:
    return format(v, spec) if _number(v) else "-"


def _picks_table(data: RunData) -> str:
    head = ["device", "budget ms", "key", "val %", "test %", "predicted ms", "measured ms", "fits", "QA verify", "note"]
    rows = []
    for p in data.picks:
        measured = (p.get("measured") or {}).get("budget_stat_ms")
        qa = data.qa.get(export_folder(p, data.run_dir))
        qa_text = "-" if not qa else f"{'PASS' if qa.get('pass') else 'MISS'} " \
                                     f"{_fmt((qa.get('measured') or {}).get('budget_stat_ms'), '.3g')} ms"
        cells = [p.get("device"), _fmt(p.get("budget_ms"), "g"), p.get("key"), _fmt(p.get("val_acc")),
                 _fmt(p.get("test_acc")), _fmt(p.get("predicted_ms"), ".3g"),
                 f"{_fmt(measured, '.3g')} (p{p.get('percentile', 90):g})",
                 "unverified" if p.get("verified") is False else "yes" if p.get("fits") else "NO",
                 qa_text, p.get("note") or ""]
        rows.append("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in cells) + "</tr>")
    return ("<table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>" + "".join(rows) + "</table>"
            if rows else "")


def _header(data: RunData, created: str) -> str:
    devices = [f"{name} ({dev.get('cpu_model', '?')}, {dev.get('logical_cores', '?')} cores)"
               for name, dev in data.tables.items()]
    devices += [d for d in _devices(data) if d not in data.tables]
    ckpt = data.run_dir / "checkpoint.pt"
    trained = datetime.fromtimestamp(ckpt.stat().st_mtime, timezone.utc).isoformat(timespec="minutes") \
        if ckpt.is_file() else "-"
    recipe = f"{data.recipe.get('name', '?')} (hash {data.recipe.get('hash', '?')})" if data.recipe else "-"
    items = [("run", str(data.run_dir.resolve())), ("recipe", recipe), ("device(s)", ", ".join(devices) or "-"),
             ("checkpoint written", trained), ("report written", created)]
    return "<dl>" + "".join(f"<dt>{k}</dt><dd>{html.escape(v)}</dd>" for k, v in items) + "</dl>"


CAPTIONS = {  # file -> (heading, caption)
    "accuracy_latency.png": ("Accuracy vs latency",
                             "Every evaluated subnet (validation accuracy after BN recalibration vs latency "
                             "predicted from the table), the Pareto front per device, budgets (dashed), and the "
                             "picks: filled star at the predicted latency, open star at the measured percentile."),
    "training.png": ("Training curves", "Supernet training: loss of the largest and smallest subnet, and their "
                     "validation accuracy."),
    "pick_latency.png": ("Latency of the picks", "p50/p90/p99 of every fresh-process repeat of each pick's "
                         "measurement, the QA re-measurement where a verdict exists, and the budget."),
}


def render_html(data: RunData, images: dict[str, bytes], created: str) -> str:
    """One self-contained page: images embedded, each also linked to its PNG file beside the page."""
    style = ("body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}"
             "table{border-collapse:collapse;font-size:90%}td,th{border:1px solid #ccc;padding:3px 6px}"
             "dt{font-weight:bold;float:left;width:11em}dd{margin-left:12em}.caution{background:#fff4d6;"
             "padding:.6em;border-left:4px solid #e0a800}img{max-width:100%}")
    parts = [f"<!doctype html><html><head><meta charset='utf-8'><title>tightfit report: "
             f"{html.escape(data.run_dir.name)}</title><style>{style}</style></head><body>",
             f"<h1>tightfit report: {html.escape(data.run_dir.name)}</h1>", _header(data, created),
             f"<p class='caution'>{html.escape(CAUTION)}</p>"]
    for name, png in images.items():
        b64 = base64.b64encode(png).decode()
        heading, caption = CAPTIONS[name]
        parts.append(f"<h2>{heading}</h2><p>{html.escape(caption)}</p>"
                     f"<a href='{name}'><img src='data:image/png;base64,{b64}' alt='{name}'></a>")
    if data.picks:
        parts += ["<h2>picks</h2>", _picks_table(data)]
    notes = _missing(data) + data.notes
    if notes:
        parts += ["<h2>not shown</h2><ul>"] + [f"<li>{html.escape(n)}</li>" for n in notes] + ["</ul>"]
    return "\n".join(parts + ["</body></html>\n"])


def write_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Render every plot that has data, then the page; returns the page's path."""
    data = load_run(run_dir)
    out_dir = Path(out) if out else data.run_dir / "report"
    try:  # fail before plotting, not half-way through writing
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise UserError(f"cannot write the report to {out_dir} ({e.strerror}); choose another --out") from None
    figures = {"accuracy_latency.png": plot_accuracy_latency(data), "training.png": plot_training(data.metrics),
               "pick_latency.png": plot_pick_latency(data)}
    images = {name: _png(fig) for name, fig in figures.items() if fig is not None}
    for name, png in images.items():
        write_bytes(out_dir / name, png)
    created = datetime.now(timezone.utc).isoformat(timespec="seconds")
    return write_text(out_dir / "report.html", render_html(data, images, created))


def _cmd_report(args: Any) -> int:
    page = write_report(args.run, args.out)
    print(f"report: {page}")
    return 0


def add_report_parser(sub: Any) -> None:
    r = sub.add_parser("report", help="plots and a one-page HTML report of a run",
                       description="Write PNG plots and report.html into RUN_DIR/report/: accuracy vs latency "
                                   "(candidates, Pareto front, budgets, picks, baselines), training curves, and "
                                   "the picks' latency distributions. Renders whatever exists and lists what "
                                   "is missing.")
    r.add_argument("run", help="run directory")
    r.add_argument("--out", default=None, help="folder for the report (default RUN_DIR/report)")
    r.set_defaults(func=_cmd_report)
