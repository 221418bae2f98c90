"""How far this machine's speed has moved since its latency table was profiled.

A table is a snapshot: on a shared VM the same subnet measured minutes apart can differ by
tens of percent. Before a budget is searched on the machine the table describes, the
table's whole-subnet calibration entries are measured again (short protocol, interleaved,
fresh processes) and the median ratio now/then rescales the search's predicted limit, so
the budget is searched against the machine as it is, not as it was when profiled. Without
this a machine that sped up yields picks that use too little of their budget and the
search must run again; one that slowed down yields candidates that all miss.
"""
from __future__ import annotations

import tempfile
from dataclasses import replace
from pathlib import Path
from typing import Any, Optional, Sequence

import numpy as np
from tightfit.progress import bar

from tightfit.model.onnx import onnx_bytes
from tightfit.latency.probe import single_thread
from tightfit.latency.table import LatencyTable
from tightfit.model.extract import extract_subnet
from tightfit.model.space import Subnet
from tightfit.model.supernet import Supernet
from tightfit.ondevice.repeats import measure_repeated
from tightfit.ondevice.timing import Protocol

DEADBAND = 0.03  # ratios within 3 % of 1 are measurement noise: the limit is left alone
STAT = "p50_ms"  # the steadiest statistic: the speed change, not the tail's noise


def write_subnet_onnx(supernet: Supernet, subnets: Sequence[Subnet], folder: Path, in_channels: int,
                      image_size: int, progress: bool = False) -> list[str]:
    """Each subnet extracted and exported to folder/<i>.onnx (weights do not change latency)."""
    paths = []
    with single_thread():
        for i, s in enumerate(bar(subnets, desc="export", unit="model", disable=not progress)):
            paths.append(str(Path(folder) / f"{i}.onnx"))
            Path(paths[-1]).write_bytes(onnx_bytes(extract_subnet(supernet, s), in_channels, image_size))
    return paths


def drift_protocol(table_protocol: dict[str, Any]) -> Protocol:
    """The table's protocol, shortened: two fresh processes, a second per model per repeat."""
    p = Protocol.from_dict(table_protocol)
    return replace(p, repeats=min(p.repeats, 2), time_seconds=min(p.time_seconds, 1.0), time_runs=min(p.time_runs, 100))


def drift_ratio(now_ms: Sequence[float], then_ms: Sequence[float]) -> Optional[float]:
    """Median of now/then over the calibration subnets (None without any)."""
    ratios = [n / t for n, t in zip(now_ms, then_ms) if t > 0]
    return float(np.median(ratios)) if ratios else None


def measure_drift(supernet: Supernet, table: LatencyTable, keys: Sequence[str], in_channels: int, image_size: int) -> Optional[float]:
    """Measure the table's calibration subnets `keys` now; the ratio now/then (None without keys)."""
    if not keys:
        return None
    protocol = drift_protocol(table.protocol)
    with tempfile.TemporaryDirectory(prefix="tightfit-drift-") as tmp:
        paths = write_subnet_onnx(supernet, [Subnet.from_key(k) for k in keys], Path(tmp), in_channels, image_size)
        measured = measure_repeated(paths, protocol, int(table.protocol.get("chunk", 10)))
    entries = table.subnet_entries()
    return drift_ratio([getattr(measured[p], STAT) for p in paths], [float(entries[k][STAT]) for k in keys])


def drifted_limit(limit_ms: float, drift: Optional[float]) -> float:
    """The predicted limit that means `limit_ms` on the machine now: predictions are in the
    table's time, so a machine 10 % slower than then allows predictions up to limit / 1.1."""
    if drift is None or abs(drift - 1.0) <= DEADBAND:
        return limit_ms
    return limit_ms / drift
