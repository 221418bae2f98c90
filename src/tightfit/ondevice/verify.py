"""QA re-measurement of exported models (needs only numpy and onnxruntime; PIL only for --data).

For each export folder: the manifest is read and checked, model.onnx must still
have the SHA-256 the manifest records, and ONNX Runtime must load it. All models
are then timed again, interleaved, under the protocol the manifest records, and
each is judged against its budget. A JSON verdict is written atomically.

Exit codes: 0 every model meets its budget (a model cut by hand without a budget
is measured and reported, never judged), 1 any misses (or measuring fails),
2 bad input (one `error:` line, nothing written).
"""
from __future__ import annotations

import argparse
import dataclasses
import os
import sys
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from tightfit.ondevice.arguments import module_parser
from tightfit.ondevice.exports import Export, VerifyError, load_export
from tightfit.ondevice.files import VERDICT_FORMAT, VERDICT_VERSION, check_writable, write_json
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.labelled import accuracy_table, folder_accuracy
from tightfit.ondevice.repeats import measure_repeated
from tightfit.ondevice.runner import QUICK
from tightfit.ondevice.measurement import Measurement
from tightfit.ondevice.timing import Protocol, stderr_progress


def protocol_for(e: Export, threads: int | None, repeats: int | None, quick: bool) -> Protocol:
    """The manifest's protocol, judged at the budget's percentile, with the user's overrides."""
    base = Protocol.from_dict(e.manifest["latency"]["protocol"])
    changes: dict[str, Any] = {"percentile": float(e.manifest["budget"]["percentile"])}
    if quick:
        changes.update(QUICK)
    if threads is not None:
        changes["threads"] = threads
    if repeats is not None:
        changes["repeats"] = repeats
    return dataclasses.replace(base, **changes)


def environment_warnings(e: Export, hardware: dict, protocol: Protocol) -> list[str]:
    """What differs between the export's measurement and this one, one line each."""
    was, out = e.manifest["latency"]["hardware"], []
    for key, label in (("cpu_model", "CPU"), ("logical_cores", "core count"), ("onnxruntime", "onnxruntime version")):
        if key in was and was[key] != hardware.get(key):
            out.append(f"{label} differs: export measured on {was[key]!r}, this is {hardware.get(key)!r}")
    threads = Protocol.from_dict(e.manifest["latency"]["protocol"]).threads
    if protocol.threads != threads:
        out.append(f"threads differ: export used {threads}, this run uses {protocol.threads}")
    return out


def measure(exports: list[Export], protocols: list[Protocol]) -> dict[Path, Measurement]:
    """Interleave all models that share a protocol (usually all of them) and return summaries."""
    groups: dict[Protocol, list[str]] = {}
    for e, p in zip(exports, protocols):
        groups.setdefault(p, []).append(str(e.model))
    out: dict[Path, Measurement] = {}
    for p, paths in groups.items():
        print(f"measuring {len(paths)} model(s): {max(p.repeats, 1)} repeat(s), at least {p.time_seconds:g} s "
              f"and {p.time_runs} runs each, {p.threads} thread(s)", file=sys.stderr)
        res = measure_repeated(paths, p, progress=stderr_progress("verify"))
        out.update({Path(k).resolve(): v for k, v in res.items()})
    return out


def judge(e: Export, m: Measurement, protocol: Protocol, warnings: list[str], threads: int | None) -> dict:
    """One model's verdict record: the budget is met when the measurement fits it (Measurement.fits)."""
    budget = None if e.manifest["budget"]["ms"] is None else float(e.manifest["budget"]["ms"])
    lat = e.manifest["latency"]
    return {
        "name": e.name, "export_dir": str(e.folder), "model_file": e.manifest["model_file"],
        "sha256": e.manifest["sha256"], "sha256_ok": True,
        "budget_ms": budget, "percentile": protocol.percentile,
        "budget_device": e.manifest["budget"].get("device"),
        "measured": m.to_dict(),
        "at_export": {k: lat[k] for k in ("p50_ms", "p90_ms", "p99_ms") if k in lat},
        "margin": None if budget is None else (budget - m.figure_ms) / budget,
        "pass": None if budget is None else m.fits(budget), "noisy": not m.stable,
        "warnings": warnings, "threads_override": threads, "protocol": protocol.to_dict(),
    }


def format_table(rows: list[dict]) -> str:
    head = (f"{'model':<20} {'budget ms':>13} {'p50':>8} {'p90':>8} {'p99':>8} {'IQR/med':>8} "
            f"{'rep spr':>8} {'margin':>8}  verdict")
    lines = [head, "-" * len(head)]
    for r in rows:
        m, spread = r["measured"], r["measured"].get("repeat_spread")
        budget = "none" if r["budget_ms"] is None else f"{r['budget_ms']:.3f} (p{r['percentile']:g})"
        verdict = {True: "PASS", False: "MISS", None: "no budget"}[r["pass"]] + (" noisy" if r["noisy"] else "")
        margin = "-" if r["margin"] is None else format(r["margin"], "+.1%")
        lines.append(f"{r['name'][:20]:<20} {budget:>13} {m['p50_ms']:>8.3f} {m['p90_ms']:>8.3f} "
                     f"{m['p99_ms']:>8.3f} {m['iqr_over_median']:>8.1%} "
                     f"{'-' if spread is None else format(spread, '.1%'):>8} {margin:>8}  {verdict}")
    lines += [f"  {r['name']}: {'noisy: ' if r['noisy'] else ''}{r['measured']['note']}" for r in rows]
    return "\n".join(lines)


# ---- command line --------------------------------------------------------------------------

def default_out(folders: list[str]) -> Path:
    parents = [str(Path(f).resolve().parent) for f in folders]
    return Path(os.path.commonpath(parents)) / "verdict.json"


def _check_args(args: argparse.Namespace) -> Path:
    for flag, low in (("threads", 1), ("repeats", 0)):
        value = getattr(args, flag)
        if value is not None and value < low:
            raise VerifyError(f"--{flag} {value} is out of range (must be >= {low})")
    return Path(args.out) if args.out else default_out(args.export_dirs)


def run(args: argparse.Namespace) -> int:
    """Check, measure, print, write; returns the exit code (handles its own bad input)."""
    try:
        out = _check_args(args)
        exports = list({e.folder: e for e in map(load_export, args.export_dirs)}.values())
        accuracy = [folder_accuracy(e, Path(args.data)) for e in exports] if args.data else None
        check_writable(out, VerifyError, "verdict.json")
    except VerifyError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    hardware = describe_hardware()
    protocols = [protocol_for(e, args.threads, args.repeats, args.quick) for e in exports]
    warned = [environment_warnings(e, hardware, p) for e, p in zip(exports, protocols)]
    for text in dict.fromkeys(w for ws in warned for w in ws):
        names = [e.name for e, ws in zip(exports, warned) if text in ws]
        print(f"warning: {text} ({', '.join(names)})", file=sys.stderr)
    if args.quick:
        print("warning: --quick: short measurement, figures are not stable", file=sys.stderr)
    try:
        summaries = measure(exports, protocols)
    except RuntimeError as exc:
        print(f"error: {' '.join(str(exc).split())}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("error: interrupted; no verdict written", file=sys.stderr)
        return 130
    rows = [judge(e, summaries[e.model], p, w, args.threads) for e, p, w in zip(exports, protocols, warned)]
    for row, acc in zip(rows, accuracy or []):
        row["accuracy"] = acc
    print(format_table(rows))
    if accuracy:
        print("\n" + accuracy_table(exports, accuracy))
    verdict = {"format": VERDICT_FORMAT, "version": VERDICT_VERSION, "pass": all(r["pass"] is not False for r in rows),
               "quick": bool(args.quick), "hardware": hardware,
               "created": datetime.now(timezone.utc).isoformat(timespec="seconds"), "models": rows}
    try:
        write_json(out, verdict)
    except OSError as exc:
        print(f"error: cannot write {out} ({exc.strerror}); choose a writable --out path", file=sys.stderr)
        return 2
    print(f"verdict: {'PASS' if verdict['pass'] else 'MISS'} -> {out}", file=sys.stderr)
    return 0 if verdict["pass"] else 1


def _add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("export_dirs", nargs="+", metavar="EXPORT_DIR", help="export folder(s) holding manifest.json")
    p.add_argument("--threads", type=int, default=None, help="override the manifest's intra-op thread count")
    p.add_argument("--repeats", type=int, default=None, help="override the number of fresh-process repeats")
    p.add_argument("--quick", action="store_true", help="short smoke-test measurement (figures not stable)")
    p.add_argument("--data", default=None, metavar="FOLDER",
                   help="labelled images (one sub-folder per class) to re-check top-1 accuracy")
    p.add_argument("--out", default=None, help="verdict JSON to write (default: verdict.json beside the exports)")


def add_verify_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """The `tightfit verify` subcommand; its handler never imports torch."""
    p = sub.add_parser("verify", help="re-measure exported models against their manifests and budgets",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_arguments(p)
    p.set_defaults(func=run)
    return p


def main(argv: list[str] | None = None) -> int:
    p = module_parser("verify", __doc__)
    _add_arguments(p)
    return run(p.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
