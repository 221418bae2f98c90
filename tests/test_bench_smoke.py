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
    for m in models:
        assert 0 <= m["test_acc"] <= 100 and m["p90_ms"] >= m["p50_ms"] > 0 and m["params"] > 0 and m["macs"] > 0
    for row in result["budgets"]:
        base = row["baseline"]
        if base is not None:  # the best fitting baseline really fits and is the most accurate that does
            assert base["p90_ms"] <= row["budget_ms"]
            fitting = [m["test_acc"] for m in models if m["kind"] == "baseline" and m["p90_ms"] <= row["budget_ms"]]
            assert base["test_acc"] == max(fitting)
            assert row["gain_points"] == pytest.approx(row["pick"]["test_acc"] - base["test_acc"], abs=0.011)
    # the search measured its top candidates here and recorded how far off the predictions were
    ratios = result["measured_over_predicted"].values()
    assert ratios and all(0.2 < r < 5 for r in ratios)
    c = result["cpu_seconds"]
    assert c["supernet_training"] > 0 and c["family_training"] > 0
    assert c["supernet_plus_search"] == pytest.approx(c["supernet_training"] + c["search"])
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
