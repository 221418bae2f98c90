"""The command line: help texts, exit codes, one-line errors."""
import json
import subprocess
import sys

import pytest

from tightfit.cli import main


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "tightfit", *args], capture_output=True, text=True, cwd=cwd, timeout=300)


def test_help_via_module_and_per_command():
    out = run("--help")
    assert out.returncode == 0 and "latency budget" in out.stdout
    for cmd in ("train", "cut", "demo", "verify", "report"):
        r = run(cmd, "--help")
        assert r.returncode == 0 and "usage:" in r.stdout, cmd


def test_the_cli_module_runs_as_a_script_like_the_package():
    # Python docs (runpy, `python -m`): the module runs as __main__, so only a main guard makes it act
    out = subprocess.run([sys.executable, "-m", "tightfit.cli", "--help"], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0 and "latency budget" in out.stdout
    assert subprocess.run([sys.executable, "-m", "tightfit.cli"], capture_output=True, text=True, timeout=300).returncode == 2


def test_no_command_prints_help_and_exits_2(capsys):
    assert main([]) == 2


@pytest.mark.parametrize("args,fragment", [
    (["train", "missing.toml", "--run", "x"], "recipe file not found"),
    (["cut", "no-such-run", "--subnet", "largest"], "run directory not found"),
])
def test_bad_input_is_one_line_exit_2(tmp_path, args, fragment):
    r = run(*args, cwd=tmp_path)
    assert r.returncode == 2
    assert r.stderr.strip().count("\n") == 0 and fragment in r.stderr and "Traceback" not in r.stderr


def test_train_and_cut_through_the_cli(tmp_path):
    recipe = tmp_path / "tiny.toml"
    recipe.write_text("""
name = "tiny-cli"
[data]
source = "builtin"
image_size = 16
samples = 400
[space]
stem_channels = 8
[[space.stage]]
channels = 8
stride = 2
depths = [1, 2]
expansions = [2, 3]
kernels = [3, 5]
[train]
epochs = 0.5
batch_size = 32
""")
    r = run("train", str(recipe), "--run", str(tmp_path / "run"), "--quiet")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "run" / "checkpoint.pt").is_file() and (tmp_path / "run" / "recipe.toml").is_file()
    r = run("cut", str(tmp_path / "run"), "--subnet", "smallest", "--subnet", "2:5,3:3")
    assert r.returncode == 0, r.stderr
    assert "smallest" in r.stdout and (tmp_path / "run" / "exports" / "smallest" / "model.onnx").is_file()
    # every export gets a manifest (product contract, "Export"): verify reads it; no budget was claimed, so it
    # reports the figures and judges nothing; a cut with --budget is judged like a search pick
    folder = tmp_path / "run" / "exports" / "smallest"
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["budget"]["ms"] is None and manifest["output"]["classes"] and manifest["input"]["mean"]
    assert manifest["latency"]["p90_ms"] > 0 and (folder / "state_dict.pt").is_file()
    r = run("verify", str(folder), "--quick")
    assert r.returncode == 0 and "no budget" in r.stdout, r.stderr
    r = run("cut", str(tmp_path / "run"), "--subnet", "smallest", "--budget", "0.0001ms", "--out", str(tmp_path / "b"))
    assert r.returncode == 0, r.stderr
    assert json.loads((tmp_path / "b" / "smallest" / "manifest.json").read_text())["budget"]["ms"] == 0.0001
    r = run("verify", str(tmp_path / "b" / "smallest"), "--quick")
    assert r.returncode == 1 and "MISS" in r.stdout


def test_every_pipeline_command_is_registered_in_pipeline_order():
    # The product contract (docs/contract.md, "The user's day") names these commands (reproduce: the repeatability check of its QA step).
    import argparse
    from tightfit.cli import build_parser
    subs = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    # inspect is no step of its own: it is read between training and choosing budgets, so it sits after train.
    assert list(subs.choices) == ["train", "inspect", "probe", "profile", "check-latency", "search", "cut", "verify",
                                  "reproduce", "report", "demo"]
