"""CPU-seconds of a search, split by phase, so a caller can bill the search against training.

Counted as the CPU time of this process (every thread) plus that of its finished child processes (the
fresh-process latency repeats), not wall time: on a shared host CPU-seconds are roughly what the work
took, wall time is not.
"""
from __future__ import annotations

import resource
import time
from contextlib import contextmanager
from typing import Iterator


def cpu_seconds() -> float:
    """This process's CPU time (all threads) and that of its finished children."""
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return time.process_time() + kids.ru_utime + kids.ru_stime


class CpuSplit:
    """CPU-seconds per phase name, summed over every ``with split.phase(name):``."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}

    @contextmanager
    def phase(self, name: str) -> Iterator[None]:
        c0 = cpu_seconds()
        try:
            yield
        finally:
            self.add(name, cpu_seconds() - c0)

    def add(self, name: str, seconds: float) -> None:
        self.seconds[name] = self.seconds.get(name, 0.0) + seconds

    def merge(self, split: dict[str, float]) -> None:
        """Add another split's phases (its "total" left out)."""
        for k, v in split.items():
            if k != "total":
                self.add(k, v)

    def rounded(self) -> dict[str, float]:
        """The split with its total, to 0.01 CPU-s (the phases do not overlap: the total is their sum)."""
        out = {k: round(v, 2) for k, v in self.seconds.items()}
        return {**out, "total": round(sum(self.seconds.values()), 2)}


def merged(split: dict[str, float], more: dict[str, float]) -> dict[str, float]:
    """Two rounded splits added phase by phase, their total made again."""
    out = {k: v for k, v in split.items() if k != "total"}
    for k, v in more.items():
        if k != "total":
            out[k] = round(out.get(k, 0.0) + v, 2)
    return {**out, "total": round(sum(out.values()), 2)}
