"""One repeat of an interleaved measurement, run in a fresh Python process.

Usage (internal): python -m tightfit.ondevice.worker JOB.json RESULT.json

JOB.json = {"paths": [...], "layers": [...], "protocol": Protocol.to_dict(),
"chunk": int, "label": str}. RESULT.json (written atomically) is either
{"results": {path: summary}} or {"error": "one line"}; the exit code is 0 or 1.
A fresh process per repeat is the point: between-process drift is the largest
source of error on small shared CPUs, so it has to be sampled, not assumed away.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any, Collection

from tightfit.ondevice.files import write_json
from tightfit.ondevice.timing import Protocol, measure_interleaved, stderr_progress

_PACKAGE_ROOT = str(Path(__file__).resolve().parents[2])  # folder that holds tightfit/


def run_in_fresh_process(paths: list[str], protocol: Protocol, chunk: int,
                         layers: Collection[str], label: str) -> dict[str, dict[str, Any]]:
    """Run one repeat in a new interpreter (same executable) and return its summaries."""
    with tempfile.TemporaryDirectory(prefix="tightfit-measure-") as tmp:
        job, result = Path(tmp) / "job.json", Path(tmp) / "result.json"
        write_json(job, {"paths": list(paths), "layers": sorted(layers), "chunk": chunk,
                                "protocol": protocol.to_dict(), "label": label})
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(filter(None, [_PACKAGE_ROOT, env.get("PYTHONPATH")]))
        flags = ["-S"] if sys.flags.no_site else []  # a child sees the same packages as its parent
        proc = subprocess.run([sys.executable, *flags, "-m", "tightfit.ondevice.worker",
                               str(job), str(result)], env=env, stdin=subprocess.DEVNULL)
        data = json.loads(result.read_text("utf-8")) if result.exists() else {}
        if proc.returncode != 0 or "results" not in data:
            reason = data.get("error", f"exit code {proc.returncode}, no result written")
            raise RuntimeError(f"measurement process ({label}) failed: {reason}")
        return data["results"]


def main(argv: list[str] | None = None) -> int:
    """Read the job, measure, write the result; failures become an {"error"} result."""
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 2:
        print("error: usage: python -m tightfit.ondevice.worker JOB.json RESULT.json",
              file=sys.stderr)
        return 2
    job_path, result_path = args
    try:
        job = json.loads(Path(job_path).read_text("utf-8"))
        label = job.get("label", "measure")
        results = measure_interleaved(job["paths"], Protocol.from_dict(job["protocol"]),
                                      int(job["chunk"]), set(job["layers"]),
                                      stderr_progress(label) if sys.stderr.isatty() else None)
    except Exception as exc:  # reported to the parent as one line, which re-raises it
        write_json(result_path, {"error": f"{type(exc).__name__}: {exc}".replace("\n", " ")})
        return 1
    write_json(result_path, {"results": results})
    return 0


if __name__ == "__main__":
    sys.exit(main())
