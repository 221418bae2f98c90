"""Training survives being killed: SIGKILL at random moments, then `--resume`, ends with weights
bit-identical to an uninterrupted run (CPU, one thread); SIGINT/SIGTERM write a checkpoint, exit
130/143 and say how to resume; a half-written checkpoint file is never trusted.

The `tightfit train` subprocesses run behind a step gate (tests/gated_train.py): the test lets
training go exactly to a chosen step, then lets one more step start and kills it a random moment
later (seeded random.Random). So a kill lands mid-training on a slow host and on a fast one alike;
what it can leave (a checkpoint of an earlier step, a temporary file, at most one step further) no
longer depends on the host's speed.
"""
from __future__ import annotations

import copy
import json
import random
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import torch

from gated_train import read_number, write_number
from helpers import TINY, recipe_toml
from tightfit.checkpoint import load_checkpoint, save_checkpoint

RECIPE = copy.deepcopy(TINY)
RECIPE["data"]["samples"] = 400                                 # 306 training images: 9 steps of 32 per epoch
RECIPE["train"].update(epochs=4, checkpoint_every=3)            # 36 steps, a checkpoint every 3
TOTAL_STEPS = 36
GATED = Path(__file__).with_name("gated_train.py")
LEFTOVER = ".checkpoint.pt.*.tmp"                                # tightfit.ondevice.files's temporary names
PLANTED = ".checkpoint.pt.planted.tmp"                           # a fake half-written one, planted by the test
OPEN = 1 << 30                                                   # a gate that no longer holds anything back


class Training:
    """A gated `tightfit train` subprocess (see tests/gated_train.py); stderr is collected while it runs."""

    def __init__(self, recipe: Path, run: Path, resume: bool, allow: int = OPEN):
        self.gate = run.parent / f".{run.name}.gate"
        write_number(self.gate, allow)
        self.gate.with_name(self.gate.name + ".at").unlink(missing_ok=True)
        args = [sys.executable, str(GATED), str(self.gate), "train", str(recipe), "--run", str(run), "--threads", "1"]
        self.proc = subprocess.Popen(args + (["--resume"] if resume else []), stdin=subprocess.DEVNULL,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        self.err = b""
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        while chunk := self.proc.stderr.read1(4096):
            self.err += chunk

    def allow(self, steps: int) -> None:
        write_number(self.gate, steps)

    def waiting_at(self) -> int:
        """The step the process waits to start (all earlier steps and their checkpoints are done)."""
        return read_number(self.gate.with_name(self.gate.name + ".at"))

    def wait_until_held_at(self, step: int, timeout: float = 300) -> bool:
        """True once the process has done `step` steps and waits at the gate, still running."""
        deadline = time.monotonic() + timeout
        while self.waiting_at() < step and self.proc.poll() is None:
            assert time.monotonic() < deadline, "training made no progress"
            time.sleep(0.01)
        return self.waiting_at() == step and self.proc.poll() is None

    def finish(self, timeout: float = 300) -> tuple[int, str]:
        code = self.proc.wait(timeout)
        self._reader.join(10)
        return code, self.err.decode("utf-8", "replace")


@pytest.fixture(scope="module")
def recipe_file(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("kill") / "tiny.toml"
    path.write_text(recipe_toml(RECIPE))
    return path


@pytest.fixture(scope="module")
def reference(recipe_file) -> Path:
    """The uninterrupted run, trained in this process on one thread like the subprocesses."""
    from tightfit.recipe import load_recipe
    from tightfit.train.loop import train
    run = recipe_file.parent / "reference"
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        train(load_recipe(recipe_file), run, recipe_path=recipe_file, progress=False)
    finally:
        torch.set_num_threads(threads)
    assert load_checkpoint(run / "checkpoint.pt")["step"] == TOTAL_STEPS
    return run


def metrics(run: Path) -> list[dict]:
    """Logged records without the throughput (a wall-clock figure)."""
    rows = [json.loads(line) for line in (run / "metrics.jsonl").read_text().splitlines() if line.strip()]
    return [{k: v for k, v in r.items() if k != "images_per_s"} for r in rows]


def assert_same_training(run: Path, reference: Path) -> None:
    """torch.equal on every weight, buffer and optimizer tensor; the same logged losses and accuracies."""
    a, b = load_checkpoint(run / "checkpoint.pt"), load_checkpoint(reference / "checkpoint.pt")
    assert a["complete"] and a["step"] == b["step"] == TOTAL_STEPS
    assert a["model"].keys() == b["model"].keys()
    different = [k for k in a["model"] if not torch.equal(a["model"][k], b["model"][k])]
    assert different == []
    sa, sb = a["optimizer"]["state"], b["optimizer"]["state"]
    assert sa.keys() == sb.keys()
    for pid in sa:
        for name, value in sa[pid].items():
            assert torch.equal(value, sb[pid][name]) if torch.is_tensor(value) else value == sb[pid][name]
    assert metrics(run) == metrics(reference)


def after_kill(run: Path, last_allowed: int) -> dict:
    """What a SIGKILL left: a checkpoint that loads whole (or none yet), of a step the gate let
    through, maybe a temporary file. A fake half-written temporary is then planted, to show resume
    never reads one."""
    ckpt = run / "checkpoint.pt"
    state = load_checkpoint(ckpt) if ckpt.exists() else None  # raises if half-written
    if state is not None:
        assert 0 < state["step"] <= last_allowed < TOTAL_STEPS and state["complete"] is False
    leftovers = len([p for p in run.glob(LEFTOVER) if p.name != PLANTED])
    (run / PLANTED).write_bytes(b"PK\x03\x04 half a checkpoint")
    return {"checkpoint_step": state["step"] if state else None, "leftover_tmp": leftovers}


def kill_and_resume(recipe: Path, run: Path, kill_steps: list[int], rng: random.Random) -> list[dict]:
    """SIGKILL the run once it has done each of kill_steps, a random moment into the next step
    (which may reach its checkpoint write, or end and wait at the gate), resuming in between;
    then resume to the end. Returns what each kill left."""
    log = []
    for i, target in enumerate(kill_steps):
        t = Training(recipe, run, resume=i > 0, allow=target)
        assert t.wait_until_held_at(target), t.finish()[1][-2000:]
        t.allow(target + 1)
        time.sleep(rng.uniform(0.0, 0.25))
        t.proc.kill()
        code, err = t.finish()
        assert code == -signal.SIGKILL, err[-2000:]
        log.append({"kill_after_step": target, "held_at": t.waiting_at(), **after_kill(run, target + 1)})
    code, err = Training(recipe, run, resume=True).finish()
    assert code == 0, err[-2000:]
    return log


def kill_points(seed: int, n: int) -> list[int]:
    """n distinct steps, away from the very end so the kill lands before training finishes."""
    return sorted(random.Random(seed).sample(range(2, TOTAL_STEPS - 4), n))


def test_sigkill_once_then_resume_is_bit_identical(tmp_path, recipe_file, reference):
    log = kill_and_resume(recipe_file, tmp_path / "run", kill_points(seed=7, n=1), random.Random(7))
    print("kills:", log)
    assert len(log) == 1
    assert_same_training(tmp_path / "run", reference)


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_sigkill_at_random_moments_then_resume_is_bit_identical(tmp_path, recipe_file, reference, seed):
    """Three seeded trials of two kills each: six random kill points in all."""
    log = kill_and_resume(recipe_file, tmp_path / "run", kill_points(seed, n=2), random.Random(seed))
    print("kills:", log)
    assert len(log) == 2
    assert_same_training(tmp_path / "run", reference)


@pytest.mark.parametrize("sig,code", [(signal.SIGINT, 130), (signal.SIGTERM, 143)], ids=["SIGINT", "SIGTERM"])
def test_sigint_sigterm_write_a_checkpoint_and_say_how_to_resume(tmp_path, recipe_file, reference, sig, code):
    """128 + signal number is the shell's exit status for a signal (POSIX shell, 'Exit Status');
    the run stops between steps with a whole checkpoint, and resuming it matches the reference."""
    run = tmp_path / "run"
    t = Training(recipe_file, run, resume=False, allow=4)
    assert t.wait_until_held_at(4), t.finish()[1][-2000:]
    t.proc.send_signal(sig)  # arrives while the process waits before step 5; the gate then opens
    t.allow(OPEN)
    got, err = t.finish()
    assert got == code == 128 + sig, err[-2000:]
    last = [ln for ln in err.replace("\r", "\n").splitlines() if ln.strip()][-1]
    m = re.fullmatch(r"interrupted at step (\d+); checkpoint written\. Resume with: "
                     r"tightfit train \S+ --run (\S+) --resume", last)
    assert m and m[2] == str(run), last
    state = load_checkpoint(run / "checkpoint.pt")
    assert state["step"] == int(m[1]) == 5 and state["complete"] is False  # the step under way finishes first
    assert list(run.glob(LEFTOVER)) == []  # a clean stop leaves no temporary file
    resumed, err = Training(recipe_file, run, resume=True).finish()
    assert resumed == 0, err[-2000:]
    assert_same_training(run, reference)


def test_sigkill_while_writing_keeps_the_previous_checkpoint(tmp_path):
    """A kill in the middle of a checkpoint write (the writer blocks after half the bytes) leaves
    the previous checkpoint.pt whole; the half-written file exists only under a temporary name."""
    from tightfit.checkpoint import save_checkpoint
    path = tmp_path / "checkpoint.pt"
    save_checkpoint(path, {"model": {"w": torch.arange(1000.0)}, "recipe": {}, "step": 3})
    writer = (
        "import sys, time\n"
        "from tightfit.ondevice.files import atomic_write\n"
        "def half(tmp):\n"
        "    with open(tmp, 'wb') as f:\n"
        "        f.write(open(sys.argv[1], 'rb').read()[:500]); f.flush()\n"
        "    print('written', flush=True); time.sleep(60)\n"
        "atomic_write(sys.argv[1], half)\n")
    proc = subprocess.Popen([sys.executable, "-c", writer, str(path)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "written"
    proc.kill()
    proc.wait(30)
    leftovers = list(tmp_path.glob(LEFTOVER))
    assert len(leftovers) == 1 and leftovers[0].stat().st_size == 500
    state = load_checkpoint(path)
    assert state["step"] == 3 and torch.equal(state["model"]["w"], torch.arange(1000.0))


def _resume_in_process(run: Path, recipe_file: Path) -> None:
    from tightfit.recipe import load_recipe
    from tightfit.train.loop import train
    train(load_recipe(recipe_file), run, resume=True, progress=False)


def test_resume_survives_a_metrics_line_cut_by_a_kill(tmp_path, recipe_file, reference):
    run = Path(shutil.copytree(reference, tmp_path / "run"))
    whole = (run / "metrics.jsonl").read_text()
    with open(run / "metrics.jsonl", "a") as f:
        f.write('{"step": 37, "epoch": 4.1, "lr"')  # what a kill in the middle of a write leaves
    _resume_in_process(run, recipe_file)
    assert (run / "metrics.jsonl").read_text() == whole


def test_resume_removes_temporaries_left_by_killed_writes(tmp_path, recipe_file, reference):
    run = Path(shutil.copytree(reference, tmp_path / "run"))
    (run / ".checkpoint.pt.k1ll3d.tmp").write_bytes(b"PK\x03\x04 half a checkpoint")
    _resume_in_process(run, recipe_file)
    assert list(run.glob(LEFTOVER)) == []
    assert load_checkpoint(run / "checkpoint.pt")["complete"]


def test_resume_of_a_run_stopped_between_its_last_checkpoint_and_the_complete_one_finishes_it(
        tmp_path, recipe_file, reference):
    """The state a kill can leave between the last step's checkpoint and the one marked complete
    (or an older checkpoint format that wrote them apart): every step done, `complete` false, the
    final evaluation maybe logged. Resume runs the final evaluation once and marks the run complete,
    ending bit-identical to the uninterrupted run."""
    run = Path(shutil.copytree(reference, tmp_path / "run"))
    state = load_checkpoint(run / "checkpoint.pt")
    assert state["step"] == TOTAL_STEPS and state["complete"]
    save_checkpoint(run / "checkpoint.pt", {**state, "complete": False})
    _resume_in_process(run, recipe_file)
    assert_same_training(run, reference)
    finals = [r for r in metrics(run) if r["step"] == TOTAL_STEPS and "val_acc_largest" in r]
    assert len(finals) == 1
