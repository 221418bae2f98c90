"""`tightfit verify`: manifest and hash checks, re-measured budgets, exit codes, --data accuracy,
and that it runs where torch cannot be imported."""
from __future__ import annotations

import argparse
import ast
import hashlib
import io
import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image
from torch import nn

from helpers import torch_shadowed_env
from tightfit.ondevice import verify
from tightfit.ondevice.files import MANIFEST_FORMAT, MANIFEST_VERSION
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.timing import Protocol

SRC = str(Path(__file__).resolve().parents[1] / "src")
TINY = Protocol(settle_runs=5, settle_window=5, settle_limit=40, time_runs=30, time_seconds=0.05, repeats=1)
CLASSES = ["bolt", "nut", "washer"]
SIZE = 12
MEAN, STD = [0.5, 0.4, 0.3], [0.25, 0.2, 0.3]


def tiny_net(width: int = 4) -> nn.Module:
    torch.manual_seed(width)
    return nn.Sequential(nn.Conv2d(3, width, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1),
                         nn.Flatten(), nn.Linear(width, len(CLASSES))).eval()


def onnx_bytes(net: nn.Module) -> bytes:
    buf = io.BytesIO()
    with warnings.catch_warnings():  # the legacy exporter announces its own deprecation
        warnings.simplefilter("ignore")
        torch.onnx.export(net, (torch.zeros(1, 3, SIZE, SIZE),), buf, input_names=["image"], output_names=["logits"],
                          dynamic_axes={"image": {0: "batch"}, "logits": {0: "batch"}}, opset_version=17,
                          dynamo=False)
    return buf.getvalue()


def manifest(data: bytes, budget_ms: float, protocol: Protocol = TINY) -> dict:
    """Every field of the export manifest contract, with the hash from hashlib (Python stdlib)."""
    return {
        "format": MANIFEST_FORMAT, "version": MANIFEST_VERSION, "model_file": "model.onnx",
        "sha256": hashlib.sha256(data).hexdigest(),
        "architecture": {"key": "1:3", "depths": [1], "params": 100, "macs": 1000, "description": []},
        "input": {"name": "image", "layout": "NCHW", "dtype": "float32", "shape": [None, 3, SIZE, SIZE],
                  "channels": 3, "image_size": SIZE, "color": "RGB", "scale": "divide by 255, then (x-mean)/std",
                  "mean": MEAN, "std": STD, "resize": "shorter side to S, centre crop"},
        "output": {"name": "logits", "classes": CLASSES},
        "accuracy": {"validation": {"top1": 61.0, "images": 100, "split": "validation"},
                     "test": {"top1": 60.0, "images": 150, "split": "test"}},
        "latency": {"hardware": describe_hardware(), "protocol": protocol.to_dict(), "p50_ms": 0.1, "p90_ms": 0.12,
                    "budget_stat_ms": 0.12, "budget_percentile": 90.0, "p99_ms": 0.2, "mean_ms": 0.1, "cv": 0.1,
                    "iqr_over_median": 0.05, "repeat_spread": None,
                    "stable": False, "note": "only one repeat"},
        "budget": {"ms": budget_ms, "percentile": 90.0, "device": "host"},
        "software": {"tightfit": "0.1.0", "torch": torch.__version__, "onnx": "-", "onnxruntime": "-",
                     "numpy": np.__version__, "python": sys.version.split()[0]},
        "recipe": {"name": "test", "hash": "0" * 16}, "created": "2025-01-01T00:00:00+00:00",
    }


def make_export(folder: Path, data: bytes, budget_ms: float = 1000.0, **changes) -> Path:
    folder.mkdir(parents=True)
    (folder / "model.onnx").write_bytes(data)
    m = manifest(data, budget_ms)
    m.update(changes)
    (folder / "manifest.json").write_text(json.dumps(m))
    return folder


@pytest.fixture(scope="module")
def model_bytes() -> bytes:
    return onnx_bytes(tiny_net())


def run_verify(capsys, *args: str) -> tuple[int, str, str]:
    code = verify.main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_generous_budget_passes_and_verdict_goes_beside_exports(tmp_path, model_bytes, capsys):
    a = make_export(tmp_path / "exports" / "cpu-1000ms", model_bytes)
    b = make_export(tmp_path / "exports" / "cpu-500ms", onnx_bytes(tiny_net(8)), budget_ms=500.0)
    code, out, err = run_verify(capsys, a, b)
    assert code == 0, err
    verdict = json.loads((tmp_path / "exports" / "verdict.json").read_text())
    assert verdict["pass"] is True and verdict["format"] == "tightfit-verify-verdict"
    assert [r["name"] for r in verdict["models"]] == ["cpu-1000ms", "cpu-500ms"]
    for row in verdict["models"]:
        m = row["measured"]
        assert row["sha256_ok"] and row["pass"] and row["threads_override"] is None
        assert 0 < m["p50_ms"] <= m["p90_ms"] <= m["p99_ms"]
        # the margin is the share of the budget left, written out by hand: (budget - measured figure) / budget;
        # the figure is the budget's percentile (docs/contract.md, latency protocol: "A budget is met when
        # p90 ≤ budget (percentile configurable)"), p90 here
        assert row["margin"] == pytest.approx((row["budget_ms"] - m["budget_stat_ms"]) / row["budget_ms"])
        assert m["budget_stat_ms"] == pytest.approx(m["p90_ms"])
        assert row["noisy"] is True  # one repeat cannot show drift between processes
    assert out.count("PASS noisy") == 2 and "cpu-500ms" in out


def test_tiny_budget_misses_exit_1(tmp_path, model_bytes, capsys):
    ok = make_export(tmp_path / "ok", model_bytes)
    tight = make_export(tmp_path / "tight", model_bytes, budget_ms=1e-6)
    out_file = tmp_path / "v.json"
    code, out, _ = run_verify(capsys, ok, tight, "--out", out_file)
    assert code == 1
    verdict = json.loads(out_file.read_text())
    assert verdict["pass"] is False
    assert [r["pass"] for r in verdict["models"]] == [True, False]
    assert verdict["models"][1]["margin"] < 0 and "MISS" in out


def _tamper(folder: Path) -> None:
    with open(folder / "model.onnx", "ab") as f:
        f.write(b"\0")


def _drop(key: str):
    def change(folder: Path) -> None:
        m = json.loads((folder / "manifest.json").read_text())
        section, _, field = key.partition(".")
        del (m[section] if field else m)[field or section]
        (folder / "manifest.json").write_text(json.dumps(m))
    return change


def _not_onnx(folder: Path) -> None:
    data = b"this is not an ONNX model"
    (folder / "model.onnx").write_bytes(data)
    m = json.loads((folder / "manifest.json").read_text())
    (folder / "manifest.json").write_text(json.dumps({**m, "sha256": hashlib.sha256(data).hexdigest()}))


BAD = {
    "tampered": (_tamper, "changed after export"),
    "no_manifest": (lambda f: (f / "manifest.json").unlink(), "manifest.json not found"),
    "malformed": (lambda f: (f / "manifest.json").write_text('{"format": '), "not valid JSON"),
    "no_budget": (_drop("budget"), "budget"),
    "no_protocol": (_drop("latency.protocol"), "latency.protocol"),
    "no_image_size": (_drop("input.image_size"), "input.image_size"),
    "no_sha": (_drop("sha256"), "sha256"),
    "no_model": (lambda f: (f / "model.onnx").unlink(), "missing"),
    "not_onnx": (_not_onnx, "cannot load"),
    # a manifest of the first format (version 1: e6k5-style keys, abbreviated layer fields) is refused
    "old_version": (lambda f: (f / "manifest.json").write_text(json.dumps(
        {**json.loads((f / "manifest.json").read_text()), "version": 1})), "manifest version 1"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_input_is_one_error_line_exit_2_nothing_written(tmp_path, model_bytes, capsys, case):
    good = make_export(tmp_path / "good", model_bytes)
    bad = make_export(tmp_path / "bad", model_bytes)
    change, words = BAD[case]
    change(bad)
    out_file = tmp_path / "v.json"
    code, out, err = run_verify(capsys, good, bad, "--out", out_file)
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and err.startswith("error: ") and words in err, err
    assert not out_file.exists() and not (tmp_path / "verdict.json").exists()


def test_threads_override_is_recorded_and_warned(tmp_path, model_bytes, capsys):
    folder = make_export(tmp_path / "e", model_bytes)
    parser = argparse.ArgumentParser()
    verify.add_verify_parser(parser.add_subparsers())  # the way cli.py plugs it in
    args = parser.parse_args(["verify", str(folder), "--threads", "2", "--out", str(tmp_path / "v.json")])
    assert args.func(args) == 0
    err = capsys.readouterr().err
    row = json.loads((tmp_path / "v.json").read_text())["models"][0]
    assert row["threads_override"] == 2 and row["protocol"]["threads"] == 2
    assert any("threads differ" in w for w in row["warnings"])
    assert sum(line.startswith("warning: threads differ") for line in err.splitlines()) == 1


def test_runs_with_torch_unimportable(tmp_path, model_bytes):
    env, marker = torch_shadowed_env(tmp_path, SRC)
    folder = make_export(tmp_path / "e", model_bytes)
    proc = subprocess.run([sys.executable, "-m", "tightfit.ondevice.verify", str(folder), "--repeats", "2",
                           "--out", str(tmp_path / "v.json")], env=env, capture_output=True, text=True,
                          cwd=tmp_path, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert not marker.exists(), "something in the verify path tried to import torch"
    row = json.loads((tmp_path / "v.json").read_text())["models"][0]
    assert len(row["measured"]["repeats"]) == 2


def _labelled_folder(root: Path, net: nn.Module) -> float:
    """Uniform-colour PNGs of varied sizes; returns the reference top-1 (percent) computed with torch.

    Bilinear resampling of a constant image is constant (PIL Image.resize), so each image's
    model input is known exactly: np.full(colour) / 255, normalised, NCHW.
    """
    rng = np.random.default_rng(3)
    correct = 0
    n = 24
    for i in range(n):
        colour = rng.integers(0, 256, 3)
        w, h = (int(v) for v in rng.integers(SIZE, 4 * SIZE, 2))
        x = (np.full((SIZE, SIZE, 3), colour, np.float32) / 255.0 - MEAN) / STD
        with torch.no_grad():  # reference: torch forward of the exported network
            pred = int(net(torch.from_numpy(x.transpose(2, 0, 1)[None].astype(np.float32))).argmax(1))
        label = pred if i % 3 else (pred + 1) % len(CLASSES)  # two thirds right by construction
        correct += label == pred
        (root / CLASSES[label]).mkdir(parents=True, exist_ok=True)
        Image.new("RGB", (w, h), tuple(int(c) for c in colour)).save(root / CLASSES[label] / f"{i}.png")
    return 100.0 * correct / n


def test_data_accuracy_matches_torch_reference(tmp_path, capsys):
    net = tiny_net(6)
    folder = make_export(tmp_path / "e", onnx_bytes(net))
    expected = _labelled_folder(tmp_path / "data", net)
    assert 0 < expected < 100
    code, out, err = run_verify(capsys, folder, "--data", tmp_path / "data", "--out", tmp_path / "v.json")
    assert code == 0, err
    acc = json.loads((tmp_path / "v.json").read_text())["models"][0]["accuracy"]
    assert acc["images"] == 24 and acc["skipped"] == 0 and acc["correct"] == round(expected * 24 / 100)
    assert acc["top1"] == pytest.approx(expected, abs=1e-4)
    # Its interval: statsmodels' proportion_confint(method="wilson") of the same count (Wilson 1927).
    from statsmodels.stats.proportion import proportion_confint
    ref = proportion_confint(acc["correct"], 24, alpha=0.05, method="wilson")
    assert acc["interval_95"] == pytest.approx([100 * ref[0], 100 * ref[1]], abs=1e-4)
    # The manifest here has the fields written before counts were kept (top1 and images): still read,
    # and printed with its interval.
    low, high = (100 * v for v in proportion_confint(61, 100, alpha=0.05, method="wilson"))
    assert acc["manifest_validation_top1"] == 61.0 and f"61.0 % ({low:.1f}–{high:.1f}, n=100)" in out


def test_data_class_not_in_manifest_is_bad_input(tmp_path, model_bytes, capsys):
    folder = make_export(tmp_path / "e", model_bytes)
    (tmp_path / "data" / "gear").mkdir(parents=True)
    Image.new("RGB", (SIZE, SIZE)).save(tmp_path / "data" / "gear" / "a.png")
    code, _, err = run_verify(capsys, folder, "--data", tmp_path / "data", "--out", tmp_path / "v.json")
    assert code == 2 and "'gear'" in err and not (tmp_path / "v.json").exists()


def test_verify_imports_only_stdlib_numpy_onnxruntime_at_module_level():
    allowed = set(sys.stdlib_module_names) | {"numpy", "onnxruntime", "__future__"}
    tree = ast.parse(Path(verify.__file__).read_text())
    for node in tree.body:  # PIL is imported inside the --data functions only
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            names = [node.module]
        else:
            continue
        bad = [n for n in names if n.split(".")[0] not in allowed and not n.startswith("tightfit.ondevice")]
        assert not bad, f"verify.py imports {bad}"


def test_unwritable_out_fails_before_measuring(tmp_path, model_bytes, capsys):
    folder = make_export(tmp_path / "e", model_bytes)
    (tmp_path / "plain-file").write_text("x")
    code, out, err = run_verify(capsys, folder, "--out", tmp_path / "plain-file" / "v.json")
    assert code == 2 and err.startswith("error: cannot write") and out == ""


def test_a_measuring_failure_is_never_a_pass_and_writes_no_verdict(tmp_path, model_bytes, capsys, monkeypatch):
    # Contract (docs/contract.md, verify): exit 0 only when every model was measured and meets its budget.
    folder = make_export(tmp_path / "e", model_bytes)

    def broken(exports, protocols):
        raise RuntimeError("worker process died\n(signal 9)")

    monkeypatch.setattr(verify, "measure", broken)
    code, out, err = run_verify(capsys, folder, "--out", tmp_path / "v.json")
    assert code == 1 and err.strip().splitlines()[-1] == "error: worker process died (signal 9)"
    assert not (tmp_path / "v.json").exists() and "PASS" not in out


@pytest.mark.parametrize("threads", [1, 2])
def test_sessions_run_with_the_protocol_thread_count(tmp_path, model_bytes, threads):
    # onnxruntime reports the options a session was built with (InferenceSession.get_session_options):
    # the thread count recorded in a verdict must be the one the timed session used.
    from dataclasses import replace
    from tightfit.ondevice.timing import make_session
    (tmp_path / "m.onnx").write_bytes(model_bytes)
    opts = make_session(tmp_path / "m.onnx", replace(TINY, threads=threads)).get_session_options()
    assert opts.intra_op_num_threads == threads and opts.inter_op_num_threads == TINY.inter_op_threads


def test_verify_hands_the_override_thread_count_to_the_measurement(tmp_path, model_bytes, capsys, monkeypatch):
    folder = make_export(tmp_path / "e", model_bytes)
    seen = []
    real = verify.measure
    monkeypatch.setattr(verify, "measure", lambda exports, protocols: seen.extend(protocols) or real(exports, protocols))
    assert run_verify(capsys, folder, "--threads", "2", "--repeats", "1", "--out", tmp_path / "v.json")[0] == 0
    assert [p.threads for p in seen] == [2]


def test_reproduce_counts_passes_and_figures_near_the_manifest(tmp_path, model_bytes, capsys):
    # `tightfit reproduce`: N verify runs in fresh processes; "within" counts figures within +/-10 % of the
    # manifest's export-time p90 (by definition, recomputed here from the per-run figures it wrote).
    from tightfit.ondevice import reproduce
    ok = make_export(tmp_path / "x" / "ok", model_bytes)
    tight = make_export(tmp_path / "x" / "tight", model_bytes, budget_ms=1e-6)
    code = reproduce.main([str(ok), "--runs", "2"])
    capsys.readouterr()
    assert code == 0
    data = json.loads((tmp_path / "x" / "reproducibility.json").read_text())
    row = data["models"][0]
    assert data["runs"] == 2 and row["passed"] == 2 and row["measured"] == 2 and row["export_figure_ms"] == 0.12
    assert row["within_tolerance"] == sum(abs(f / 0.12 - 1) <= 0.10 for f in row["figures_ms"])
    assert reproduce.main([str(ok), str(tight), "--runs", "1", "--out", str(tmp_path / "r.json")]) == 1
    rows = json.loads((tmp_path / "r.json").read_text())["models"]
    assert [r["passed"] for r in rows] == [1, 0]
    capsys.readouterr()
    assert reproduce.main([str(tmp_path / "nowhere"), "--out", str(tmp_path / "bad.json")]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and err.startswith("error: ") and not (tmp_path / "bad.json").exists()
