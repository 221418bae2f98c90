"""Smoke test of the benchmark script (scripts/bench_fashion_mnist.py) at its smallest setting.

Data: Fashion-MNIST (Xiao et al. 2017), Debian package dataset-fashion-mnist. The benchmark's
figures are not checked here (they come from the full run); this checks that the script runs end
to end and that what it writes is internally consistent.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tightfit.data.fashion_mnist import DEFAULT_DIR

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.skipif(not Path(DEFAULT_DIR).is_dir(), reason="dataset-fashion-mnist is not installed")


def test_benchmark_smoke(tmp_path):
    out, docs = tmp_path / "fm.json", tmp_path / "docs"
    proc = subprocess.run([sys.executable, str(ROOT / "scripts" / "bench_fashion_mnist.py"), "--smoke",
                           "--run", str(tmp_path / "run"), "--out", str(out), "--docs", str(docs)],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    result = json.loads(out.read_text())
    assert result["smoke"] is True
    models = result["models"]
    assert {m["kind"] for m in models} == {"pick", "baseline"}
    devices = {"host-1-thread", "host-2-threads"}
    for m in models:
        assert 0 <= m["test_acc"] <= 100 and m["params"] > 0 and m["macs"] > 0 and set(m["latency"]) == devices
        assert all(f["p90_ms"] >= f["p50_ms"] > 0 for f in m["latency"].values())
    assert {r["device"] for r in result["budgets"]} == devices  # budgets on each device, picks searched for it
    for row in result["budgets"]:
        base = row["baseline"]
        assert row["pick"]["device"] == row["device"]
        assert row["pick"]["p90_ms"] == next(m for m in models if m["name"] == row["pick"]["name"])["latency"][row["device"]]["p90_ms"]
        if base is not None:  # the best fitting baseline really fits on that device and is the most accurate that does
            assert base["p90_ms"] <= row["budget_ms"]
            fitting = [m["test_acc"] for m in models
                       if m["kind"] == "baseline" and m["latency"][row["device"]]["p90_ms"] <= row["budget_ms"]]
            assert base["test_acc"] == max(fitting)
            assert row["gain_points"] == pytest.approx(row["pick"]["test_acc"] - base["test_acc"], abs=0.011)
    # the search measured its top candidates here and recorded how far off the predictions were
    ratios = result["measured_over_predicted"].values()
    assert ratios and all(0.2 < r < 5 for r in ratios)
    c = result["cpu_seconds"]
    assert c["supernet_training"] > 0 and c["family_training"] > 0 and c["family_measuring"] > 0
    assert c["supernet_plus_search"] == pytest.approx(c["supernet_training"] + c["search"])
    assert c["family"] == pytest.approx(c["family_training"] + c["family_measuring"])
    # equal compute: the supernet's epochs follow from the family's CPU-seconds (smoke keeps 1 epoch, records the figure)
    eq = result["equal_compute"]
    assert eq["family_cpu_s"] == pytest.approx(c["family"], rel=0.01) and eq["epoch_cpu_s"] > 0
    page = (docs / "benchmarks.md").read_text()
    assert "SMOKE" in page and (docs / "benchmarks-fashion-mnist.png").stat().st_size > 10_000
    # resuming a finished benchmark skips every phase and rewrites the same table
    again = subprocess.run([sys.executable, str(ROOT / "scripts" / "bench_fashion_mnist.py"), "--smoke",
                            "--run", str(tmp_path / "run"), "--out", str(out), "--docs", str(docs)],
                           capture_output=True, text=True, timeout=300)
    assert again.returncode == 0 and "done earlier" in again.stdout
    resumed = json.loads(out.read_text())
    assert resumed["budgets"] == result["budgets"]
    # provenance: the commit the run started at is kept across a resume (common practice: a result
    # names the code that produced it), and the commit at the end is recorded beside it
    assert resumed["commit"] == result["commit"] and "commit_at_end" in resumed
