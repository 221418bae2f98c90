"""Does the latency figure reproduce? Run `verify` N times, each in a fresh process, and count.

    tightfit reproduce EXPORT_DIR [EXPORT_DIR ...] --runs 10
    python -m tightfit.ondevice.reproduce EXPORT_DIR ... --runs 10      (on the device: numpy + onnxruntime)

For each export folder it prints how many runs PASSed its budget and how many measured the budget
percentile within +/- --tolerance of the figure its manifest recorded at export, with the range seen,
and writes the per-run figures to a JSON file (default: reproducibility.json beside the exports).
Exit codes: 0 every run of every model PASSed, 1 any run missed or failed to measure, 2 bad input
(one `error:` line, nothing written), 130 interrupted.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

from tightfit.ondevice.arguments import module_parser
from tightfit.ondevice.exports import Export, VerifyError, load_export
from tightfit.ondevice.files import check_writable, write_json
from tightfit.ondevice.measurement import Measurement, figure_of

_PACKAGE_ROOT = str(Path(__file__).resolve().parents[2])  # folder that holds tightfit/
REPRODUCE_FORMAT = "tightfit-reproducibility"


def export_figure(e: Export) -> float | None:
    """The figure the manifest recorded at export (its budget percentile); None when not measured there."""
    return figure_of(e.manifest["latency"])


def one_run(folders: list[str], extra: list[str], out: Path) -> tuple[int, dict[str, Any] | None, str]:
    """One `verify` in a fresh interpreter: (exit code, verdict or None, last stderr line)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [_PACKAGE_ROOT, env.get("PYTHONPATH")]))
    proc = subprocess.run([sys.executable, "-m", "tightfit.ondevice.verify", *folders, *extra, "--out", str(out)],
                          env=env, stdin=subprocess.DEVNULL, capture_output=True, text=True)
    verdict = json.loads(out.read_text("utf-8")) if out.is_file() else None
    tail = (proc.stderr.strip().splitlines() or [""])[-1]
    return proc.returncode, verdict, tail


def summarize_runs(exports: list[Export], verdicts: list[dict[str, Any] | None], tolerance: float) -> list[dict]:
    """Per model: PASS count, runs within tolerance of the export-time figure, the range seen."""
    rows = []
    for e in exports:
        ref = export_figure(e)
        figures, passes = [], 0
        for v in verdicts:
            m = next((r for r in (v or {}).get("models", []) if Path(r["export_dir"]).resolve() == e.folder), None)
            if m is None:
                figures.append(None)
                continue
            figures.append(Measurement.from_dict(m["measured"]).figure_ms)
            passes += m["pass"] is not False
        seen = [f for f in figures if f is not None]
        within = sum(ref is not None and abs(f / ref - 1) <= tolerance for f in seen)
        budget = e.manifest["budget"]["ms"]
        rows.append({"name": e.name, "export_dir": str(e.folder), "budget_ms": None if budget is None else float(budget),
                     "percentile": float(e.manifest["budget"]["percentile"]), "export_figure_ms": ref,
                     "runs": len(verdicts), "measured": len(seen), "passed": passes, "within_tolerance": within,
                     "tolerance": tolerance, "figures_ms": figures,
                     "min_ms": min(seen) if seen else None, "max_ms": max(seen) if seen else None})
    return rows


def format_rows(rows: list[dict]) -> str:
    head = f"{'model':<24} {'budget ms':>10} {'export':>8} {'range seen':>17} {'PASS':>7} {'within':>8}"
    lines = [head, "-" * len(head)]
    for r in rows:
        ref = "-" if r["export_figure_ms"] is None else f"{r['export_figure_ms']:.4f}"
        span = "-" if r["min_ms"] is None else f"{r['min_ms']:.4f}-{r['max_ms']:.4f}"
        budget = "none" if r["budget_ms"] is None else format(r["budget_ms"], ".4g")
        lines.append(f"{r['name'][:24]:<24} {budget:>10} {ref:>8} {span:>17} "
                     f"{r['passed']:>3}/{r['runs']:<3} {r['within_tolerance']:>3}/{r['runs']:<3}")
    tol, pct = (rows[0]["tolerance"], rows[0]["percentile"]) if rows else (0.1, 90.0)
    lines.append(f"(export: the manifest's p{pct:g} at export; within: runs within +/-{100 * tol:.0f} % of it)")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Check the folders, run verify --runs times, print the counts, write the JSON."""
    try:
        if args.runs < 1:
            raise VerifyError(f"--runs {args.runs} must be at least 1")
        if not 0 < args.tolerance < 100:
            raise VerifyError(f"--tolerance {args.tolerance:g} must be a percentage between 0 and 100")
        exports = list({e.folder: e for e in map(load_export, args.export_dirs)}.values())
        out = Path(args.out) if args.out else Path(os.path.commonpath([str(e.folder.parent) for e in exports])) \
            / "reproducibility.json"
        check_writable(out, VerifyError, "reproducibility.json")
    except VerifyError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    extra = [] if args.threads is None else ["--threads", str(args.threads)]
    verdicts: list[dict[str, Any] | None] = []
    try:
        with tempfile.TemporaryDirectory(prefix="tightfit-reproduce-") as tmp:
            for k in range(args.runs):
                code, verdict, tail = one_run([str(e.folder) for e in exports], extra, Path(tmp) / f"run{k}.json")
                if code == 2:
                    print(tail, file=sys.stderr)
                    return 2
                verdicts.append(verdict)
                shown = ", ".join(f"{Measurement.from_dict(r['measured']).figure_ms:.4f}"
                                  for r in (verdict or {}).get("models", []))
                print(f"run {k + 1}/{args.runs}: {'PASS' if code == 0 else 'MISS' if verdict else 'FAILED'}"
                      + (f" ({shown} ms)" if shown else f" ({tail})"), file=sys.stderr, flush=True)
    except KeyboardInterrupt:
        print("error: interrupted; nothing written", file=sys.stderr)
        return 130
    rows = summarize_runs(exports, verdicts, args.tolerance / 100)
    print(format_rows(rows))
    write_json(out, {"format": REPRODUCE_FORMAT, "version": 1, "runs": args.runs, "models": rows})
    ok = all(r["passed"] == r["runs"] for r in rows)
    print(f"reproducibility: {'every run PASSed' if ok else 'some runs MISSed'} -> {out}", file=sys.stderr)
    return 0 if ok else 1


def _add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("export_dirs", nargs="+", metavar="EXPORT_DIR", help="export folder(s) holding manifest.json")
    p.add_argument("--runs", type=int, default=10, help="fresh-process verify runs (default 10)")
    p.add_argument("--tolerance", type=float, default=10.0,
                   help="percent from the manifest's figure that counts as reproduced (default 10)")
    p.add_argument("--threads", type=int, default=None, help="override the manifest's intra-op thread count")
    p.add_argument("--out", default=None, help="JSON to write (default: reproducibility.json beside the exports)")


def add_reproduce_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """The `tightfit reproduce` subcommand; like verify, it never imports torch."""
    p = sub.add_parser("reproduce", help="run verify N times in fresh processes: how often the figure reproduces",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_arguments(p)
    p.set_defaults(func=run)
    return p


def main(argv: list[str] | None = None) -> int:
    p = module_parser("reproduce", __doc__)
    _add_arguments(p)
    return run(p.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
