"""`tightfit report`: plots and page from a fabricated run folder, the plotted front, missing pieces."""
from __future__ import annotations

import argparse
import json
import math
import random
from pathlib import Path

import pytest

from tightfit.report import page as report
from tightfit.report.commands import add_report_parser
from tightfit.report.data import front_points
from tightfit.errors import UserError

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


def _metrics(rng: random.Random) -> list[dict]:
    rows = []
    for step in range(1, 61):
        rows.append({"step": step, "epoch": step / 12, "lr": 0.1, "images_per_s": 900.0,
                     "loss_largest": 2.3 * math.exp(-step / 25) + 0.3 + rng.random() * 0.05,
                     "loss_smallest": 2.3 * math.exp(-step / 30) + 0.5 + rng.random() * 0.05})
        if step % 12 == 0:
            rows.append({"step": step, "epoch": step // 12, "val_acc_largest": 40 + 8 * step / 12,
                         "val_acc_smallest": 35 + 6 * step / 12})
    return rows


def _candidates(rng: random.Random) -> list[dict]:
    rows = []
    for device, scale in (("host", 1.0), ("pi4", 4.0)):
        for budget in (0.3 * scale, 0.6 * scale):
            for gen in range(60):
                ms = rng.uniform(0.08 * scale, budget)
                acc = 70 + 8 * math.log(ms / scale) + rng.gauss(0, 2)
                rows.append({"device": device, "budget_ms": budget, "generation": gen // 10,
                             "key": f"{device}-{budget}-{gen}", "val_acc": round(acc, 3),
                             "predicted_ms": round(ms, 5), "params": 1000, "macs": 10000})
    return rows


def brute_force_front(points: list[tuple[float, float]]) -> set[tuple[float, float]]:
    """Non-dominated set by the definition (Deb et al. 2002, NSGA-II, Sec. II): q dominates p when q is
    no worse in both objectives (latency down, accuracy up) and better in at least one."""
    def dominated(p):
        return any(q[0] <= p[0] and q[1] >= p[1] and q != p for q in points)
    return {p for p in points if not dominated(p)}


def _picks(cands: list[dict], rng: random.Random) -> list[dict]:
    picks = []
    for device, budget in sorted({(c["device"], c["budget_ms"]) for c in cands}):
        best = max((c for c in cands if c["device"] == device and c["budget_ms"] == budget),
                   key=lambda c: c["val_acc"])
        reps = []
        for _ in range(3):
            p50 = best["predicted_ms"] * rng.uniform(0.95, 1.15)
            reps.append({"p50_ms": p50, "p90_ms": p50 * 1.08, "p99_ms": p50 * 1.3, "budget_stat_ms": p50 * 1.08})
        p90 = sorted(r["p90_ms"] for r in reps)[1]
        measured = {"p50_ms": sorted(r["p50_ms"] for r in reps)[1], "p90_ms": p90, "p99_ms": p90 * 1.2,
                    "budget_stat_ms": p90, "repeats": reps}
        picks.append({"device": device, "budget_ms": budget, "percentile": 90.0, "key": best["key"],
                      "val_acc": best["val_acc"], "predicted_ms": best["predicted_ms"],
                      "measured": measured if device == "host" else None,
                      "export_dir": f"exports/{device}-{budget:g}ms", "fits": p90 <= budget,
                      "verified": device == "host", "note": "", "test_acc": best["val_acc"] - 1})
    return picks


def fake_run(root: Path, search: bool = True) -> Path:
    rng = random.Random(7)
    root.mkdir(parents=True)
    (root / "metrics.jsonl").write_text("".join(json.dumps(r) + "\n" for r in _metrics(rng)) + '{"step": 6')
    if not search:
        return root
    cands = _candidates(rng)
    (root / "search").mkdir()
    (root / "search" / "candidates.jsonl").write_text("".join(json.dumps(c) + "\n" for c in cands))
    for device in ("host", "pi4"):
        front = brute_force_front([(c["predicted_ms"], c["val_acc"]) for c in cands if c["device"] == device])
        rows = [{"key": "?", "val_acc": a, "predicted_ms": ms} for ms, a in sorted(front)]
        (root / "search" / f"front-{device}.json").write_text(json.dumps({"device": device, "front": rows}))
    (root / "search" / "picks.json").write_text(json.dumps(_picks(cands, rng)))
    (root / "baselines.json").write_text(json.dumps([{"name": "width x0.5", "test_acc": 58.0, "p90_ms": 0.2},
                                                     {"name": "width x1.0", "val_acc": 66.0, "p90_ms": 0.5}]))
    qa_reps = [{"p50_ms": 1.3 + 0.05 * i, "p90_ms": 1.4 + 0.05 * i, "p99_ms": 1.9} for i in range(3)]
    verdict = {"models": [{"export_dir": str(root / "exports" / "pi4-2.4ms"), "pass": True,
                           "measured": {"p90_ms": 1.45, "budget_stat_ms": 1.45, "repeats": qa_reps}}]}
    (root / "exports").mkdir()
    (root / "exports" / "verdict.json").write_text(json.dumps(verdict))
    (root / "latency").mkdir()
    (root / "latency" / "host.json").write_text(json.dumps({"hardware": {"cpu_model": "Test CPU", "logical_cores": 2}}))
    return root


def test_report_writes_every_plot_and_page_references_each(tmp_path):
    run = fake_run(tmp_path / "run")
    page = report.write_report(run)
    assert page == run / "report" / "report.html"
    text = page.read_text()
    for name in ("accuracy_latency.png", "training.png", "pick_latency.png"):
        assert (run / "report" / name).read_bytes().startswith(PNG_MAGIC)
        assert f"href='{name}'" in text and f"alt='{name}'" in text
    assert "not a guarantee on another device" in text and "Test CPU" in text
    assert "1 malformed line(s) skipped" in text  # the torn last line of metrics.jsonl
    assert text.count("<tr>") == 1 + 4  # header + one row per (device, budget) pick


def test_plotted_front_is_the_non_dominated_set(tmp_path):
    run = fake_run(tmp_path / "run")
    data = report.load_run(run)
    ax = report.plot_accuracy_latency(data).axes[0]
    for device in ("host", "pi4"):
        [line] = [ln for ln in ax.get_lines() if ln.get_label() == f"{device}: Pareto front"]
        plotted = set(zip(line.get_xdata(), line.get_ydata()))
        points = [(c["predicted_ms"], c["val_acc"]) for c in data.candidates if c["device"] == device]
        expected = brute_force_front(points)
        assert plotted == expected and 3 <= len(expected) < len(points)


def test_latency_axis_spans_the_data_not_zero(tmp_path):
    # Plotting practice (a range that shows where the points lie): the fake run's points sit at 0.08-2.4 ms, so
    # the axis must not start at 0 when the data start well above it, and must still show every budget line.
    run = fake_run(tmp_path / "run")
    data = report.load_run(run)
    for c in data.candidates:  # move every point far from 0, as the demo's (0.05-0.1 ms on a 0-0.1 axis)
        c["predicted_ms"] += 1.0
        c["budget_ms"] += 1.0
    data.picks.clear()
    data.baselines.clear()
    lo, hi = report.plot_accuracy_latency(data).axes[0].get_xlim()
    assert lo > 0.5 and hi >= max(c["predicted_ms"] for c in data.candidates)


def test_pareto_front_keeps_one_of_equal_points():
    # Equal points do not dominate each other (Deb et al. 2002 definition); the plot needs one copy.
    assert front_points([(1.0, 50.0), (1.0, 50.0), (2.0, 40.0), (0.5, 30.0)]) == [(0.5, 30.0), (1.0, 50.0)]


def test_without_search_the_report_still_renders_and_says_so(tmp_path):
    run = fake_run(tmp_path / "run", search=False)
    page = report.write_report(run, tmp_path / "out")
    text = page.read_text()
    assert (tmp_path / "out" / "training.png").is_file()
    assert not (tmp_path / "out" / "accuracy_latency.png").exists()
    assert "no search results" in text and "run &#x27;tightfit search&#x27;" in text
    assert "href='training.png'" in text and "accuracy_latency.png" not in text


@pytest.mark.parametrize("case", ["missing", "empty"])
def test_not_a_run_folder_is_bad_input(tmp_path, case):
    if case == "empty":
        (tmp_path / "run").mkdir()
    with pytest.raises(UserError, match="tightfit train"):
        report.write_report(tmp_path / "run")


def test_report_subcommand_plugs_into_a_parser(tmp_path, capsys):
    run = fake_run(tmp_path / "run", search=False)
    parser = argparse.ArgumentParser()
    add_report_parser(parser.add_subparsers())  # the way cli.py plugs it in
    args = parser.parse_args(["report", str(run)])
    assert args.func(args) == 0
    assert str(run / "report" / "report.html") in capsys.readouterr().out


def test_picks_table_cells_follow_each_pick_and_verdict(tmp_path):
    # What QA reads on the page: a pick that does not fit says NO, a failed re-measurement says MISS.
    from tightfit.report.data import RunData
    from tightfit.report.page import _picks_table
    root = tmp_path / "run"
    picks = [{"device": "d", "budget_ms": 1.0, "key": k, "val_acc": 90.0, "test_acc": 89.0, "predicted_ms": 0.9,
              "measured": {"budget_stat_ms": ms}, "fits": fits, "verified": True, "export_dir": str(root / k)}
             for k, ms, fits in (("a", 0.95, True), ("b", 1.05, False))]
    data = RunData(root, picks=picks, qa={str((root / "a").resolve()): {"pass": False, "measured": {"budget_stat_ms": 1.2}},
                                          str((root / "b").resolve()): {"pass": True, "measured": {"budget_stat_ms": 0.8}}})
    rows = _picks_table(data).split("<tr>")[2:]
    cells = [[c.split("</td>")[0] for c in r.split("<td>")[1:]] for r in rows]
    assert [(c[2], c[7], c[8]) for c in cells] == [("a", "yes", "MISS 1.2 ms"), ("b", "NO", "PASS 0.8 ms")]


def test_a_verdict_at_the_run_root_fills_the_qa_column(tmp_path):
    # The demo writes RUN/verdict.json; the report must read it as it reads RUN/exports/**/verdict.json.
    import os
    from tightfit.report.data import load_run
    run = fake_run(tmp_path / "run")
    folder = str((run / "exports" / "host-0.3ms").resolve())
    (run / "verdict.json").write_text(json.dumps({"models": [{"export_dir": folder, "pass": False,
                                                              "measured": {"budget_stat_ms": 0.31}}]}))
    os.utime(run / "verdict.json", (1, 1))    # older than the exports' verdict: both are read, each row kept
    data = load_run(run)
    assert data.qa[folder]["pass"] is False
    assert data.qa[str((run / "exports" / "pi4-2.4ms").resolve())]["pass"] is True


def test_accuracies_carry_their_count_and_interval_on_the_page_and_in_inspect(tmp_path):
    # Every printed accuracy has its image count and 95 % interval; the bounds are statsmodels'
    # proportion_confint(method="wilson") of the same counts (Wilson 1927). A manifest written before counts
    # were kept (top1 and images only) still gives them; a pick with no manifest shows its bare figure.
    from statsmodels.stats.proportion import proportion_confint
    from tightfit.report.data import RunData
    from tightfit.report.inspect import search_lines, training_lines
    from tightfit.report.page import _picks_table

    def printed(correct: int, images: int) -> str:
        low, high = (100 * v for v in proportion_confint(correct, images, alpha=0.05, method="wilson"))
        return f"{100 * correct / images:.1f} % ({low:.1f}–{high:.1f}, n={images:,})"

    root = tmp_path / "run"
    picks = [{"device": "d", "budget_ms": 1.0, "key": k, "val_acc": 90.0, "test_acc": 89.0, "predicted_ms": 0.9,
              "measured": {"budget_stat_ms": 0.95}, "fits": True, "export_dir": str(root / "exports" / k)}
             for k in ("a", "b")]
    (root / "search").mkdir(parents=True)
    (root / "search" / "picks.json").write_text(json.dumps(picks))
    (root / "exports" / "a").mkdir(parents=True)
    manifest = {"accuracy": {"validation": {"top1": round(100 * 207 / 229, 4), "images": 229, "split": "validation"},
                             "test": {"top1": 89.2593, "correct": 241, "images": 270, "split": "test"}}}
    (root / "exports" / "a" / "manifest.json").write_text(json.dumps(manifest))
    data = RunData(root, picks=picks, manifests={str((root / "exports" / "a").resolve()): manifest})
    cells = [[c.split("</td>")[0] for c in r.split("<td>")[1:]] for r in _picks_table(data).split("<tr>")[2:]]
    assert (cells[0][3], cells[0][4]) == (printed(207, 229), printed(241, 270))
    assert cells[1][3].startswith("90.0 %") and "not recorded" in cells[1][3]
    lines = search_lines(root, front=False)
    assert printed(207, 229) in lines[0] and "90.0 % (image count not recorded)" in lines[1]
    (root / "metrics.jsonl").write_text(json.dumps({"epoch": 2, "val_images": 600, "val_acc_largest": 100 * 521 / 600,
                                                    "val_acc_smallest": 100 * 470 / 600}) + "\n")
    line = training_lines(root, True, 2)[0]
    assert f"largest {printed(521, 600)}, smallest {printed(470, 600)} validation" in line
