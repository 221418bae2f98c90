"""Smoke test of the benchmark (benchmarks/fashion_mnist.py) at its smallest setting.

Data: Fashion-MNIST (Xiao et al. 2017), Debian package dataset-fashion-mnist. The benchmark's
figures are not checked here (they come from the full run); this checks that the script runs end
to end and that what it writes is internally consistent.
"""
from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

from tightfit.data.fashion_mnist import DEFAULT_DIR

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "benchmarks" / "fashion_mnist.py"
pytestmark = pytest.mark.skipif(not Path(DEFAULT_DIR).is_dir(), reason="dataset-fashion-mnist is not installed")


def test_benchmark_smoke(tmp_path):
    out, docs = tmp_path / "fm.json", tmp_path / "docs"
    proc = subprocess.run([sys.executable, str(SCRIPT), "--smoke",
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
    check_placements(result)
    check_targets(result)
    check_no_absolute_paths(result, tmp_path)
    c = result["cpu_seconds"]
    assert c["supernet_training"] > 0 and c["family_training"] > 0 and c["family_measuring"] > 0
    assert c["profiling"] > 0 and 0 <= c["finetune"] <= c["search"]
    assert c["supernet_plus_search"] == pytest.approx(c["supernet_training"] + c["profiling"] + c["search"], abs=0.2)
    assert c["family"] == pytest.approx(c["family_training"] + c["family_measuring"])
    # equal compute: the supernet's epochs follow from the family's CPU-seconds (smoke keeps 1 epoch, records the figure)
    eq = result["equal_compute"]
    # the page's phases are rounded to 0.1 CPU-s each, the equal-compute sum is taken before rounding
    family_phases = [k for k in result["phases"] if k.startswith(("train baseline ", "measure family "))]
    assert eq["family_cpu_s"] == pytest.approx(c["family"], abs=0.05 * len(family_phases) + 0.05) and eq["epoch_cpu_s"] >= 0
    assert eq["profiling_cpu_s"] == pytest.approx(c["profiling"], abs=0.2) and eq["budgets"] == len(result["budgets"])
    assert eq["search_cpu_s_estimate"] == pytest.approx(
        eq["budgets"] * eq["search_share_per_budget"] * eq["family_cpu_s"], abs=0.2)
    page = (docs / "benchmarks.md").read_text()
    assert "SMOKE" in page and (docs / "benchmarks-fashion-mnist.png").stat().st_size > 10_000
    # resuming a finished benchmark skips every phase and rewrites the same table
    again = subprocess.run([sys.executable, str(SCRIPT), "--smoke",
                            "--run", str(tmp_path / "run"), "--out", str(out), "--docs", str(docs)],
                           capture_output=True, text=True, timeout=300)
    assert again.returncode == 0 and "done earlier" in again.stdout
    resumed = json.loads(out.read_text())
    assert resumed["budgets"] == result["budgets"]
    # provenance: the commit the run started at is kept across a resume (common practice: a result
    # names the code that produced it), and the commit at the end is recorded beside it
    assert resumed["commit"] == result["commit"] and "commit_at_end" in resumed


def check_placements(result: dict) -> None:
    """Each device has a budget above a member and one between two adjacent members, placed from the
    family's p90 measured before training; the rules written out by hand: above = 1.12 x the member's
    p90, between = the geometric mean of the two p90s, with no member's p90 between them (adjacent), so
    the smaller of the two is the largest member that fits there."""
    for device, p90 in result["family_p90_ms"].items():
        rows = [r for r in result["budgets"] if r["device"] == device]
        assert sorted(r["placement"] for r in rows) == ["above a member", "between members"]
        for r in rows:
            assert r["budget_use"] == pytest.approx(r["pick"]["p90_ms"] / r["budget_ms"], abs=1e-4)
            if r["placement"] == "above a member":
                (member,) = r["members"]
                assert r["budget_ms"] == pytest.approx(1.12 * p90[member], abs=1e-4)
                continue
            small, large = r["members"]
            assert p90[small] < r["budget_ms"] < p90[large]
            assert r["budget_ms"] == pytest.approx(math.sqrt(p90[small] * p90[large]), abs=1e-4)
            assert not any(p90[small] < v < p90[large] for v in p90.values())
            assert max((n for n in p90 if p90[n] <= r["budget_ms"]), key=p90.__getitem__) == small


def check_targets(result: dict) -> None:
    """The supernet trained for every budget whose band holds subnets: the recipe's targets are exactly
    those (table, budget) pairs, its step cost was sampled with them, and the tables are the profiles."""
    declared = {(t["table"], t["budget_ms"]) for t in result["recipe"]["train"]["targets"]}
    trained = {(result["devices"][r["device"]]["table"], r["budget_ms"]) for r in result["budgets"] if r["trained_for"]}
    assert declared == trained and trained
    assert all(r["not_trained_because"] for r in result["budgets"] if not r["trained_for"])
    assert result["equal_compute"]["sampled"]["targets"] == len(declared)
    assert result["equal_compute"]["sampled"]["cpu_s_per_step"] >= 0  # one timed step in the smoke: noise may cancel it


def check_no_absolute_paths(result: dict, tmp_path: Path) -> None:
    """Paths are stored relative to the run folder (or the repository): no value names the machine's
    folders, save the command line that was typed."""
    def strings(v):
        if isinstance(v, dict):
            for k, x in v.items():
                yield from strings(x) if k != "command" else ()
        elif isinstance(v, list):
            for x in v:
                yield from strings(x)
        elif isinstance(v, str):
            yield v
    leaks = [s for s in strings(result) if str(tmp_path) in s or str(ROOT) in s]
    assert not leaks, leaks[:3]
