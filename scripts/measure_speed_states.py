"""How a latency figure reproduces on this machine: traces from fresh processes, and estimators compared.

    .venv/bin/python scripts/measure_speed_states.py MODEL.onnx [MODEL.onnx ...] \
        --processes 24 --seconds 8 --out benchmarks/results/speed-states.json

Each of --processes fresh processes loads every model (one intra-op thread, the protocol's session),
warms each up as the protocol does, then times them round-robin in chunks of 10 runs for --seconds of
wall time, recording every run's start time and duration. From those traces it prints, per model:
- the speed states seen: the share of 0.5-s windows whose median is nearer the slow mode than the fast
  one, and how long each state lasted;
- for each (seconds per repeat, repeats) setting, how often an estimate built from that much of the
  traces lands within +/-5 % and +/-10 % of the sustained figure (the pooled p90 of every trace), for
  two estimators: the median of per-repeat p90s (the protocol until 2026-12-03) and the p90 of the
  pooled runs. Estimates use disjoint groups of processes, so they are independent samples.
The JSON keeps the summary, not the raw traces. Nothing else should run on the machine meanwhile.
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "src"))

from tightfit.ondevice.timing import Protocol, make_session, random_input, settle  # noqa: E402

SECONDS = (0.25, 0.5, 1.0, 2.0, 4.0, 8.0)
REPEATS = (1, 3, 5)
WINDOW_S = 0.5


def child(paths: list[str], seconds: float, out: str) -> None:
    """One fresh process: warm up, then interleave chunks of 10 runs for `seconds` of wall time."""
    from time import perf_counter
    protocol = Protocol()
    sessions = [make_session(p, protocol) for p in paths]
    feeds = [random_input(s, 1, seed=i) for i, s in enumerate(sessions)]
    for s, f in zip(sessions, feeds):
        settle(s, f, protocol)
    traces: list[list[tuple[float, float]]] = [[] for _ in paths]
    t_start = perf_counter()
    rng = np.random.default_rng(0)
    while perf_counter() - t_start < seconds:
        for i in rng.permutation(len(paths)):
            sessions[i].run(None, feeds[i])  # re-warm after switching models, as the protocol does
            for _ in range(10):
                t0 = perf_counter()
                sessions[i].run(None, feeds[i])
                traces[i].append((t0 - t_start, perf_counter() - t0))
    Path(out).write_text(json.dumps(traces))


def collect(paths: list[str], processes: int, seconds: float) -> list[list[np.ndarray]]:
    """traces[process][model] = array of (start s, duration ms)."""
    out = []
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(processes):
            f = Path(tmp) / f"{k}.json"
            subprocess.run([sys.executable, __file__, "--child", str(seconds), str(f), *paths], check=True)
            out.append([np.array(t) * [1.0, 1e3] for t in json.loads(f.read_text())])
            print(f"process {k + 1}/{processes} done", file=sys.stderr, flush=True)
    return out


def states(trace: list[np.ndarray]) -> dict:
    """Two-state summary from 0.5-s window medians pooled over processes."""
    meds, dwell = [], []
    for t in trace:
        w = (t[:, 0] // WINDOW_S).astype(int)
        m = [float(np.median(t[w == i, 1])) for i in np.unique(w)]
        meds.append(m)
    flat = np.concatenate([np.array(m) for m in meds])
    fast, slow = np.percentile(flat, 10), np.percentile(flat, 90)
    cut = (fast + slow) / 2
    for m in meds:
        run, prev = 0, None
        for v in m:
            s = v > cut
            if prev is None or s == prev:
                run += 1
            else:
                dwell.append((prev, run * WINDOW_S))
                run = 1
            prev = s
        dwell.append((prev, run * WINDOW_S))
    slow_share = float(np.mean(flat > cut))
    return {"fast_window_ms": round(float(fast), 5), "slow_window_ms": round(float(slow), 5),
            "slow_over_fast": round(float(slow / fast), 3), "slow_window_share": round(slow_share, 3),
            "mean_slow_stretch_s": round(float(np.mean([d for s, d in dwell if s] or [0])), 2),
            "mean_fast_stretch_s": round(float(np.mean([d for s, d in dwell if not s] or [0])), 2)}


def first_seconds(t: np.ndarray, seconds: float) -> np.ndarray:
    """Durations of the runs whose own time adds up to `seconds` (time spent on this model)."""
    return t[np.cumsum(t[:, 1]) <= seconds * 1e3, 1]


def curve(trace: list[np.ndarray], percentile: float = 90.0) -> tuple[float, list[dict]]:
    reference = float(np.percentile(np.concatenate([t[:, 1] for t in trace]), percentile))
    rows = []
    for r in REPEATS:
        groups = [trace[i:i + r] for i in range(0, len(trace) - r + 1, r)]
        for s in SECONDS:
            parts = [[first_seconds(t, s) for t in g] for g in groups]
            if any(len(p) < 5 for g in parts for p in g):
                continue
            median_of = [float(np.median([np.percentile(p, percentile) for p in g])) for g in parts]
            pooled = [float(np.percentile(np.concatenate(g), percentile)) for g in parts]
            row = {"seconds_per_repeat": s, "repeats": r, "seconds_per_model": s * r, "estimates": len(groups)}
            for name, est in (("median_of_repeat_p90", median_of), ("pooled_p90", pooled)):
                err = np.abs(np.array(est) / reference - 1)
                row[name] = {"within_5pct": round(float(np.mean(err <= 0.05)), 3),
                             "within_10pct": round(float(np.mean(err <= 0.10)), 3),
                             "worst_error": round(float(err.max()), 3)}
            rows.append(row)
    return reference, rows


def main() -> int:
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(sys.argv[4:], float(sys.argv[2]), sys.argv[3])
        return 0
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("models", nargs="+", help="ONNX files (e.g. RUN/exports/*/model.onnx)")
    p.add_argument("--processes", type=int, default=24)
    p.add_argument("--seconds", type=float, default=8.0, help="wall time per process after warm-up")
    p.add_argument("--out", default=None, help="JSON summary path")
    args = p.parse_args()
    t0 = time.perf_counter()
    traces = collect(args.models, args.processes, args.seconds)
    result = {"processes": args.processes, "seconds": args.seconds, "models": []}
    for i, path in enumerate(args.models):
        trace = [t[i] for t in traces]
        reference, rows = curve(trace)
        entry = {"model": path, "runs": int(sum(len(t) for t in trace)), "sustained_p90_ms": round(reference, 5),
                 "states": states(trace), "curve": rows}
        result["models"].append(entry)
        print(f"\n{path}: sustained p90 {reference:.4f} ms over {entry['runs']} runs; states {entry['states']}")
        print(f"{'s/repeat':>8} {'repeats':>7} {'s/model':>7} {'n':>3}   median-of-p90 5%/10%/worst   pooled 5%/10%/worst")
        for r in rows:
            a, b = r["median_of_repeat_p90"], r["pooled_p90"]
            print(f"{r['seconds_per_repeat']:>8g} {r['repeats']:>7} {r['seconds_per_model']:>7g} {r['estimates']:>3}   "
                  f"{a['within_5pct']:>8.0%} {a['within_10pct']:>5.0%} {a['worst_error']:>6.1%}       "
                  f"{b['within_5pct']:>5.0%} {b['within_10pct']:>5.0%} {b['worst_error']:>6.1%}")
    result["wall_s"] = round(time.perf_counter() - t0, 1)
    if args.out:
        Path(args.out).write_text(json.dumps(result, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
