"""Latency tables on the host: load and validate one, or profile this machine into one.

A table is what ``tightfit.ondevice.runner`` writes after measuring a probe bundle on a
device. Its file stem names the device (RUN_DIR/latency/<device>.json), and its space
hash ties it to one search space and input shape, so a table from another space is refused.
"""
from __future__ import annotations

import json
import math
import os
import re
import subprocess
import sys
import tempfile
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tightfit.errors import UserError
from tightfit.ondevice.files import TABLE_FORMAT, TABLE_VERSION, device_name, older_version

STATS = ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "budget_stat_ms")
_PACKAGE_ROOT = str(Path(__file__).resolve().parents[2])  # folder that holds tightfit/


@dataclass(frozen=True)
class LatencyTable:
    """One device's measured entries: {id: {kind, meta, p50_ms, p90_ms, ...}}."""
    path: Path
    name: str                      # the device name: the file stem
    space_hash: str
    hardware: dict[str, Any]       # describe_hardware() of the machine it was measured on
    protocol: dict[str, Any]
    entries: dict[str, dict[str, Any]] = field(repr=False)

    @property
    def percentile(self) -> float:
        return float(self.protocol.get("percentile", 90.0))

    def subnet_entries(self) -> dict[str, dict[str, Any]]:
        """Whole-subnet entries by subnet key (the predictor's calibration points)."""
        return {e["meta"]["key"]: e for e in self.entries.values()
                if e["kind"] == "subnet" and isinstance(e.get("meta", {}).get("key"), str)}


def _bad(path: Path, what: str) -> UserError:
    return UserError(f"latency table {path} {what}; re-measure it with the on-device runner or 'tightfit profile'")


def _check_entry(path: Path, eid: str, entry: Any) -> None:
    if not isinstance(entry, dict) or entry.get("kind") not in ("layer", "subnet"):
        raise _bad(path, f"has a malformed entry {eid!r} (needs kind 'layer' or 'subnet')")
    if not isinstance(entry.get("meta", {}), dict):
        raise _bad(path, f"entry {eid!r} has a 'meta' that is not an object")
    for stat in STATS:
        v = entry.get(stat)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
            raise _bad(path, f"entry {eid!r} lacks a valid {stat} (got {v!r})")


def load_table(path: str | Path, expected_space_hash: str | None = None) -> LatencyTable:
    """Read and validate a latency table; refuse one measured for another search space."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"latency table not found: {path} (measure one with 'tightfit profile RUN_DIR' "
                        "or the on-device runner)")
    try:
        data = json.loads(path.read_text("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise _bad(path, f"is not valid JSON ({e})") from None
    if not isinstance(data, dict) or data.get("format") != TABLE_FORMAT:
        got = data.get("format") if isinstance(data, dict) else type(data).__name__
        raise _bad(path, f"has format {got!r}, not {TABLE_FORMAT!r}")
    if data.get("version") != TABLE_VERSION:
        raise UserError(older_version(f"latency table {path}", "table", data.get("version"), TABLE_VERSION,
                                      "measure it again with the on-device runner or 'tightfit profile'"))
    for key, kind in (("space_hash", str), ("entries", dict), ("hardware", dict), ("protocol", dict)):
        if not isinstance(data.get(key), kind):
            raise _bad(path, f"has no valid '{key}'")
    if not data["entries"]:
        raise _bad(path, "has no entries")
    if expected_space_hash is not None and data["space_hash"] != expected_space_hash:
        raise UserError(f"latency table {path} was measured for another search space (hash "
                        f"{data['space_hash']} ≠ {expected_space_hash}); probe this run's space with "
                        f"'tightfit probe RUN_DIR'")
    for eid, entry in data["entries"].items():
        _check_entry(path, eid, entry)
    return LatencyTable(path, path.stem, data["space_hash"], data["hardware"], data["protocol"], data["entries"])


def check_device_name(name: str) -> str:
    if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9._-]*", name or ""):
        raise UserError(f"device name {name!r} must be letters, digits, '.', '_' or '-' (it becomes a file name)")
    return name


def run_runner(bundle: Path, out: Path, args: list[str]) -> None:
    """``python -m tightfit.ondevice.runner`` in a subprocess: the very code a device runs.

    Its progress lines pass through to stderr; a failure becomes one error line.
    """
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [_PACKAGE_ROOT, env.get("PYTHONPATH")]))
    cmd = [sys.executable, "-m", "tightfit.ondevice.runner", str(bundle), "--out", str(out), *args]
    proc = subprocess.Popen(cmd, env=env, stdin=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    tail: deque[str] = deque(maxlen=3)
    for line in proc.stderr or ():
        sys.stderr.write(line)
        tail.append(line.strip())
    code = proc.wait()
    if code == 2:
        raise UserError(tail[-1].removeprefix("error: ") if tail else "the runner refused its input")
    if code != 0:
        raise RuntimeError(f"latency runner failed (exit {code}): {' | '.join(tail)}")


def profile_host(run_dir: str | Path, name: str | None = None, threads: int = 1, quick: bool = False,
                 n_subnets: int = 8, progress: bool = True, out: str | Path | None = None) -> Path:
    """Probe the space of a run (or of a recipe: latency needs no trained weights, so a table can
    exist before training), measure the bundle on this machine, write ``out`` (default
    RUN_DIR/latency/NAME.json; a recipe needs ``out``)."""
    run_dir = Path(run_dir)
    if not (run_dir.is_dir() or run_dir.is_file()):
        raise UserError(f"run directory or recipe not found: {run_dir}")
    if run_dir.is_file() and out is None:
        raise UserError(f"profiling the recipe {run_dir} needs --out TABLE.json (a run directory keeps its tables)")
    if threads < 1:
        raise UserError(f"--threads {threads} must be at least 1")
    device = check_device_name(name or device_name())
    out = Path(out) if out is not None else run_dir / "latency" / f"{device}.json"
    from tightfit.latency.probe import write_bundle  # torch: only once the arguments are known good
    with tempfile.TemporaryDirectory(prefix="tightfit-probe-") as tmp:
        bundle = write_bundle(run_dir, Path(tmp) / "probe", n_subnets=n_subnets, progress=progress)
        run_runner(bundle, out, ["--threads", str(threads)] + (["--quick"] if quick else []))
    return out
