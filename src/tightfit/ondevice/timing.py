"""Timing in one process: the protocol's settings, sessions, then settle and time, summaries.

The rule is "settle, then time": each model runs untimed until its running median settles
(at least `settle_runs`, at most `settle_limit` runs), then is timed for at least `time_runs`
runs and `time_seconds` seconds. Timings on small shared CPUs drift over minutes, so
candidates are timed interleaved (round-robin in short chunks); repeats.py repeats this in
fresh processes.
"""
from __future__ import annotations

import os
import sys
import time
from dataclasses import asdict, dataclass, fields
from time import perf_counter
from typing import Any, Callable, Collection, Optional, TextIO

import numpy as np
import onnxruntime as ort

from tightfit.ondevice.measurement import FIGURE_KEY, PERCENTILE_KEY

Progress = Callable[[str, int, int], None]
"""Progress callback: (stage, done, total)."""


def stderr_progress(label: str, every_s: float = 2.0, stream: TextIO | None = None) -> Progress:
    """Plain progress lines on stderr, at most one per `every_s` except at stage ends."""
    last = [0.0]

    def report(stage: str, done: int, total: int) -> None:
        now = time.monotonic()
        if done == total or now - last[0] >= every_s:
            last[0] = now
            print(f"{label}: {stage} {done}/{total}", file=stream or sys.stderr, flush=True)
    return report

_DTYPES = {
    "tensor(float)": np.float32, "tensor(float16)": np.float16, "tensor(double)": np.float64,
    "tensor(int64)": np.int64, "tensor(int32)": np.int32, "tensor(int8)": np.int8,
    "tensor(uint8)": np.uint8, "tensor(bool)": np.bool_,
}


@dataclass(frozen=True)
class Protocol:
    """Every knob that changes a latency figure, so a table records how it was made."""

    threads: int = 1
    inter_op_threads: int = 1
    batch: int = 1
    settle_runs: int = 50  # untimed runs at least, before timing
    settle_limit: int = 500  # untimed runs at most, when the median never settles
    settle_window: int = 20
    settle_tolerance: float = 0.02  # settled when the window median moves less than this
    time_runs: int = 200  # timed runs at least, per repeat
    time_seconds: float = 1.0  # per repeat; more repeats, not more seconds, is what reproduces (docs/measurements.md)
    layer_time_runs: int = 100  # single-layer probes are many and tiny: a smaller budget each
    layer_time_seconds: float = 0.05  # 0.2 cost 333 s of profile for 217 entries, 0.05 124 s, no worse (docs/measurements.md)
    rewarm_runs: int = 1  # untimed runs at the start of each chunk, after switching models
    repeats: int = 5  # fresh processes, pooled
    percentile: float = 90.0  # a budget is met when this percentile <= budget
    intra_op_spinning: bool = False  # idle pool threads spin; with many sessions interleaved they steal the timed
    #                                  one's cores (2 threads, 40 layers: 6.8 s wall / 13.5 CPU-s vs 2.7 / 3.1 off)
    reproduce_tolerance: float = 0.10  # stable: a later pooled figure lands within this share (95 % bound, repeats.py)

    def to_dict(self) -> dict[str, Any]:
        """Fields plus the fixed session settings, for the table header."""
        return {**asdict(self), "provider": "CPUExecutionProvider",
                "graph_optimization": "ORT_ENABLE_ALL", "execution_mode": "ORT_SEQUENTIAL"}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "Protocol":
        """Inverse of to_dict; unknown keys (the fixed settings) are ignored."""
        names = {f.name for f in fields(cls)}
        return cls(**{k: v for k, v in data.items() if k in names})


def make_session(onnx_path: str | os.PathLike, protocol: Protocol) -> ort.InferenceSession:
    """CPU session with the protocol's thread counts, sequential execution, full graph optimisation."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = protocol.threads
    opts.inter_op_num_threads = protocol.inter_op_threads
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    opts.log_severity_level = 3
    opts.add_session_config_entry("session.intra_op.allow_spinning", "1" if protocol.intra_op_spinning else "0")
    return ort.InferenceSession(str(onnx_path), sess_options=opts, providers=["CPUExecutionProvider"])


def random_input(session: ort.InferenceSession, batch: int, seed: int) -> dict[str, np.ndarray]:
    """Random feeds shaped from the model; a symbolic leading axis becomes the batch."""
    rng = np.random.default_rng(seed)
    feeds = {}
    for node in session.get_inputs():
        shape = []
        for axis, dim in enumerate(node.shape):
            if isinstance(dim, int) and dim >= 0:
                shape.append(dim)
            elif axis == 0:
                shape.append(batch)
            else:
                raise ValueError(f"input {node.name!r} has a dynamic axis {axis} ({dim!r}); "
                                 "export probes with fixed shapes except the batch axis")
        dtype = _DTYPES.get(node.type)
        if dtype is None:
            raise ValueError(f"input {node.name!r} has unsupported type {node.type}")
        if np.issubdtype(dtype, np.floating):
            feeds[node.name] = rng.standard_normal(shape).astype(dtype)
        else:
            feeds[node.name] = rng.integers(0, 2 if dtype is np.bool_ else 10, shape).astype(dtype)
    return feeds


def summarize(times_s: np.ndarray, percentile: float = 90.0) -> dict[str, float]:
    """Robust statistics in milliseconds; drift compares the second half's median to the first's."""
    ms = np.asarray(times_s, dtype=np.float64) * 1e3
    if ms.size == 0:
        raise ValueError("no timings to summarize")
    p25, p50, p75, p90, p99, pb = np.percentile(ms, [25, 50, 75, 90, 99, percentile])
    mean = float(ms.mean())
    half = ms.size // 2
    drift = (np.median(ms[half:]) - np.median(ms[:half])) / p50 if half else 0.0
    return {
        "p50_ms": float(p50), "p90_ms": float(p90), "p99_ms": float(p99),
        "mean_ms": mean, "min_ms": float(ms.min()), "max_ms": float(ms.max()),
        FIGURE_KEY: float(pb), PERCENTILE_KEY: float(percentile),
        "cv": float(ms.std(ddof=1) / mean) if ms.size > 1 else 0.0,
        "iqr_over_median": float((p75 - p25) / p50), "drift": float(drift),
        "runs": int(ms.size), "total_s": float(ms.sum() / 1e3),
    }


def _run_chunk(session: ort.InferenceSession, feeds: dict, n: int) -> list[float]:
    """n back-to-back timed runs."""
    out = []
    for _ in range(n):
        t0 = perf_counter()
        session.run(None, feeds)
        out.append(perf_counter() - t0)
    return out


def settle(session: ort.InferenceSession, feeds: dict, protocol: Protocol) -> tuple[int, bool]:
    """Run untimed until the median of the last window is within tolerance of the window before.

    Returns (runs used, settled). The first call is several times slower than
    steady state and the next few still settle, so a fixed tiny number of runs is not enough.
    """
    w = max(protocol.settle_window, 1)
    need = max(protocol.settle_runs, 2 * w)
    times: list[float] = []
    while len(times) < protocol.settle_limit:
        times += _run_chunk(session, feeds, 1)
        if len(times) >= need:
            before, last = np.median(times[-2 * w:-w]), np.median(times[-w:])
            if abs(last - before) <= protocol.settle_tolerance * before:
                return len(times), True
    return len(times), False


def _minimums(protocol: Protocol, is_layer: bool) -> tuple[int, float]:
    """(min runs, min seconds) for one entry."""
    if is_layer:
        return protocol.layer_time_runs, protocol.layer_time_seconds
    return protocol.time_runs, protocol.time_seconds


def measure_interleaved(paths: list[str], protocol: Protocol, chunk: int = 10,
                        layers: Collection[str] = (), progress: Optional[Progress] = None,
                        ) -> dict[str, dict[str, Any]]:
    """Load every model in one process, settle each, then time them round-robin in chunks.

    Interleaving makes slow drift (thermal, neighbours, frequency) hit all
    candidates alike, so their ratios stay meaningful even when absolute figures move.
    Paths in `layers` get the smaller per-entry layer budget.
    Each result keeps its raw run times (`times_ms`) so repeats can be pooled (repeats.py).
    """
    paths = list(dict.fromkeys(paths))
    sessions = {p: make_session(p, protocol) for p in paths}
    feeds = {p: random_input(s, protocol.batch, seed=i) for i, (p, s) in enumerate(sessions.items())}
    settled = {}
    for i, p in enumerate(paths):
        settled[p] = settle(sessions[p], feeds[p], protocol)
        _report(progress, "settle", i + 1, len(paths))
    times: dict[str, list[float]] = {p: [] for p in paths}
    totals = dict.fromkeys(paths, 0.0)
    pending = list(paths)
    rng = np.random.default_rng(0)
    while pending:
        for p in [pending[i] for i in rng.permutation(len(pending))]:
            _run_chunk(sessions[p], feeds[p], protocol.rewarm_runs)
            new = _run_chunk(sessions[p], feeds[p], chunk)
            times[p] += new
            totals[p] += sum(new)
            min_runs, min_s = _minimums(protocol, p in layers)
            if len(times[p]) >= min_runs and totals[p] >= min_s:
                pending.remove(p)
                _report(progress, "time", len(paths) - len(pending), len(paths))
    return {p: {**summarize(np.array(times[p]), protocol.percentile),
                "settle_runs": settled[p][0], "settled": settled[p][1],
                "times_ms": [round(t * 1e3, 6) for t in times[p]]} for p in paths}


def _report(progress: Optional[Progress], stage: str, done: int, total: int) -> None:
    if progress is not None:
        progress(stage, done, total)
