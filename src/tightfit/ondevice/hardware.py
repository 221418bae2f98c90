"""Describe the machine a latency table was measured on (standard library + numpy + onnxruntime).

Latency figures are only meaningful next to the hardware and software that
produced them, so every table carries this record.
"""
from __future__ import annotations

import os
import platform
import socket
import sys
from pathlib import Path
from typing import Any, Optional

import numpy as np
import onnxruntime as ort


def _read(path: str) -> Optional[str]:
    """File contents stripped, or None when absent or unreadable."""
    try:
        return Path(path).read_text(encoding="utf-8", errors="replace").strip()
    except OSError:
        return None


def cpu_model() -> str:
    """CPU name from /proc/cpuinfo (x86 'model name', ARM 'Hardware'/'Model'), else platform."""
    info = _read("/proc/cpuinfo") or ""
    for key in ("model name", "Hardware", "Model", "cpu model", "Processor"):
        for line in info.splitlines():
            name, _, value = line.partition(":")
            if name.strip() == key and value.strip():
                return value.strip()
    return platform.processor() or platform.machine() or "unknown"


def _usable_cores() -> Optional[int]:
    """Cores this process may run on (affinity), which can be fewer than the machine has."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return None


def _cpu_frequency() -> dict[str, Any]:
    """Frequency governor and limits of cpu0 where the kernel exposes them (Linux)."""
    base = "/sys/devices/system/cpu/cpu0/cpufreq/"
    khz = {k: _read(base + f"cpuinfo_{k}_freq") for k in ("min", "max")}
    return {
        "governor": _read(base + "scaling_governor"),
        "min_mhz": int(khz["min"]) // 1000 if khz["min"] and khz["min"].isdigit() else None,
        "max_mhz": int(khz["max"]) // 1000 if khz["max"] and khz["max"].isdigit() else None,
    }


def describe_hardware() -> dict[str, Any]:
    """CPU, cores, OS, Python/numpy/onnxruntime versions, hostname and ORT providers."""
    return {
        "cpu_model": cpu_model(),
        "machine": platform.machine(),
        "logical_cores": os.cpu_count(),
        "usable_cores": _usable_cores(),
        "cpu_frequency": _cpu_frequency(),
        "os": platform.system(),
        "os_release": platform.release(),
        "platform": platform.platform(),
        "python": sys.version.split()[0],
        "python_implementation": platform.python_implementation(),
        "numpy": np.__version__,
        "onnxruntime": ort.__version__,
        "ort_providers": list(ort.get_available_providers()),
        "hostname": socket.gethostname(),
    }


def same_host(table_hardware: dict[str, Any]) -> bool:
    """Direct measurement only means something on the machine a table or manifest describes."""
    here = describe_hardware()
    return all(table_hardware.get(k) == here.get(k) for k in ("cpu_model", "logical_cores", "hostname"))
