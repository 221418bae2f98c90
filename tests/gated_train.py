"""`tightfit train ...` with a gate before every training step, for the kill/resume tests.

Before step s (0-based) starts, the process writes s to GATE.at and waits until GATE holds a number
greater than s. The test that starts it therefore decides how far training may go, and where a kill
can land does not depend on how fast the host is. Everything else is the real command line.

    python tests/gated_train.py GATE train RECIPE --run RUN ...
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import tightfit.train.loop as loop
from tightfit.cli import main


def write_number(path: Path, value: int) -> None:
    """Whole or not at all: the reader never sees half a number."""
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(str(value))
    os.replace(tmp, path)


def read_number(path: Path, default: int = -1) -> int:
    try:
        return int(path.read_text())
    except (FileNotFoundError, ValueError):
        return default


def gated(gate: Path, lr_at):
    """lr_at is called with the step's index just before the step runs: wait there."""
    def wrapped(step: int, *args, **kwargs):
        write_number(gate.with_name(gate.name + ".at"), step)
        while read_number(gate, 0) <= step:
            time.sleep(0.005)
        return lr_at(step, *args, **kwargs)
    return wrapped


if __name__ == "__main__":
    loop.lr_at = gated(Path(sys.argv[1]), loop.lr_at)
    raise SystemExit(main(sys.argv[2:]))
