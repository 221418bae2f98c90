"""`tightfit report`: plots and a one-page HTML summary of a run, from whatever pieces exist.

Reading the run folder is tightfit.report.data, drawing is tightfit.report.plots; this module
writes the PNGs and report.html into RUN_DIR/report/. A missing piece (no search yet, say)
becomes a note on the page, not an error.
"""
from __future__ import annotations

import base64
import html
import io
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tightfit.errors import UserError
from tightfit.ondevice.files import write_bytes, write_text
from tightfit.ondevice.measurement import figure_of
from tightfit.report.data import RunData, _devices, _number, accuracy_text, export_folder, load_run, manifest_claim
from tightfit.report.plots import _repeat_figures, plot_accuracy_latency, plot_pick_latency, plot_training

if TYPE_CHECKING:  # matplotlib is imported when plotting, so `tightfit --help` stays quick
    from matplotlib.figure import Figure

CAUTION = ("Latency measured on one machine under stated conditions is not a guarantee on another device; "
           "validation accuracy is not field performance.")

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
    return out  # baselines.json is optional (the benchmark writes it): its absence is not a gap


def _fmt(v: Any, spec: str = ".2f") -> str:
    return format(v, spec) if _number(v) else "-"


def _picks_table(data: RunData) -> str:
    head = ["Device", "Budget ms", "Subnet key", "Validation (95 % interval, images)", "Test (95 % interval, images)",
            "Predicted ms", "Measured ms", "Fits", "QA verify", "Note"]
    rows = []
    for p in data.picks:
        measured = figure_of(p.get("measured"))
        folder = export_folder(p, data.run_dir)
        manifest, qa = data.manifests.get(folder), data.qa.get(folder)
        qa_text = "-" if not qa else f"{'PASS' if qa.get('pass') else 'MISS'} " \
                                     f"{_fmt(figure_of(qa.get('measured')), '.3g')} ms"
        if qa and qa.get("accuracy"):  # verify --data: top-1 on QA's own labelled images
            qa_text += f"; top-1 {accuracy_text(qa['accuracy'])}"
        cells = [p.get("device"), _fmt(p.get("budget_ms"), "g"), p.get("key"),
                 accuracy_text(manifest_claim(manifest, "validation"), p.get("val_acc")),
                 accuracy_text(manifest_claim(manifest, "test"), p.get("test_acc")), _fmt(p.get("predicted_ms"), ".3g"),
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
        parts += ["<h2>Picks</h2>", _picks_table(data)]
    notes = _missing(data) + data.notes
    if notes:
        parts += ["<h2>Not shown yet</h2><ul>"] + [f"<li>{html.escape(n)}</li>" for n in notes] + ["</ul>"]
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
