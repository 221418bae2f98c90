"""Training under torchrun: rows split over ranks, one gradient all-reduce per step, rank 0 alone writes.

Run as a script, this file is the torchrun worker used by test_two_ranks_match_one_process_and_only_rank0_writes.
"""
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch

from tightfit.data.dataset import load_dataset, steps_per_epoch, train_batches
from tightfit.train.distributed import Ranks, backend_for, local_rows, pack, rank_device, ranks_from_env, unpack
from tightfit.errors import Interrupted, UserError
from tightfit.recipe import build_supernet
from tightfit.train.loop import train
from tightfit.train.sandwich import lr_at, make_optimizer, sandwich, sandwich_backward

sys.path.insert(0, str(Path(__file__).parent))
from helpers import tiny_recipe  # noqa: E402

EPOCHS = 0.5      # 459 training images // 32 = 14 steps per epoch -> 7 steps
STOP_ON_RANK1 = 3  # rank 1 alone asks to stop after step 3; all ranks agree at step 4
# ||w_2ranks - w_reference|| / ||w_reference|| over all parameters after 7 steps. Both sides
# sum the same per-half gradients; with one thread on both sides the result is bit-equal
# (measured 0.0). The margin is for fp32 reduction-order noise: with 2 threads in the
# reference instead of 1 it measured 6e-6. For scale, whole-batch BN instead of per-half
# BN moves the weights by 1.8e-3 and the 7 updates themselves by 4e-3 (same units).
RTOL = 1e-5


def test_global_batch_splits_into_contiguous_blocks_or_is_refused():
    blocks = [local_rows(32, Ranks(r, 4, r, True)) for r in range(4)]
    assert sorted(i for b in blocks for i in range(32)[b]) == list(range(32))  # union = the whole batch
    with pytest.raises(UserError, match="multiple of 3"):
        local_rows(32, Ranks(0, 3, 0, True))


def test_ranks_come_from_torchrun_environment():
    # torchrun sets RANK, WORLD_SIZE, LOCAL_RANK (PyTorch docs, "torchrun (Elastic Launch)", environment variables).
    assert ranks_from_env({}) == Ranks()
    assert ranks_from_env({"RANK": "3", "WORLD_SIZE": "4", "LOCAL_RANK": "1"}) == Ranks(3, 4, 1, True)


def test_documented_torchrun_command_reaches_tightfit_intact():
    # torchrun's own parser (torch.distributed.run.get_args_parser, argparse prefix matching) reads a
    # script's '--run' as an abbreviation of its '--run-path' and stops; '--run-dir' passes through.
    from torch.distributed.run import get_args_parser
    from tightfit.cli import build_parser
    launch = get_args_parser().parse_args(["--nproc_per_node=2", "-m", "tightfit", "train", "r.toml",
                                           "--run-dir", "D", "--device", "cpu", "--resume"])
    args = build_parser().parse_args(launch.training_script_args)
    assert (launch.training_script, args.run, args.device, args.resume) == ("tightfit", "D", "cpu", True)


def test_device_is_cuda_local_rank_when_present_else_cpu(monkeypatch):
    monkeypatch.setattr(torch.cuda, "is_available", lambda: True)
    monkeypatch.setattr(torch.cuda, "device_count", lambda: 2)
    two = Ranks(1, 2, 1, True)
    assert rank_device(None, two) == torch.device("cuda", 1)
    assert rank_device("cuda", two) == torch.device("cuda", 1)
    assert rank_device("cpu", two) == torch.device("cpu")
    assert rank_device(None, Ranks()) == torch.device("cuda")
    with pytest.raises(UserError, match="every rank on one GPU"):
        rank_device("cuda:0", two)
    with pytest.raises(UserError, match="nproc_per_node"):
        rank_device(None, Ranks(2, 3, 2, True))
    # NCCL for CUDA tensors, gloo for CPU (torch.distributed docs, "Which backend to use?").
    assert backend_for(torch.device("cuda", 0)) == "nccl" and backend_for(torch.device("cpu")) == "gloo"
    monkeypatch.setattr(torch.cuda, "is_available", lambda: False)
    assert rank_device(None, two) == torch.device("cpu")
    with pytest.raises(UserError, match="CUDA is not available"):
        rank_device("cuda", two)


def test_missing_gradients_count_as_zero_and_stay_none_where_no_rank_has_one():
    # Two ranks simulated: all_reduce(SUM) of the packed vectors is their sum (torch.distributed.all_reduce docs).
    def params(grads):
        ps = [torch.nn.Parameter(torch.zeros(2, 2)) for _ in grads]
        for p, g in zip(ps, grads):
            p.grad = None if g is None else torch.full((2, 2), float(g))
        return ps
    a, b = params([1.0, None, None]), params([3.0, 4.0, None])
    summed = pack(a, [0.5, 1.0]) + pack(b, [1.5, 0.0])
    extras = unpack(summed, a, world=2)
    assert torch.equal(a[0].grad, torch.full((2, 2), 2.0))   # (1 + 3) / 2
    assert torch.equal(a[1].grad, torch.full((2, 2), 2.0))   # (0 + 4) / 2: None is a zero gradient
    assert a[2].grad is None                                 # no rank used it: the optimizer skips it
    assert extras == [1.0, 0.5]


def _reference(recipe, steps: int, world: int) -> dict[str, torch.Tensor]:
    """One process, same global batches, BN over each rank's block separately, gradients averaged."""
    cfg = recipe.train
    ds = load_dataset(recipe.data, recipe.seed)
    torch.manual_seed(recipe.seed)
    model = build_supernet(recipe, ds.num_classes)
    opt = make_optimizer(model, cfg)
    spe = steps_per_epoch(ds, cfg.batch_size)
    total, warmup, per = max(1, round(cfg.epochs * spe)), int(cfg.warmup_epochs * spe), cfg.batch_size // world
    model.train()
    batches = train_batches(ds, recipe.data, cfg.batch_size, recipe.seed, 0)
    for step, (x, y) in zip(range(steps), batches):
        for g in opt.param_groups:
            g["lr"] = lr_at(step, total, warmup, cfg.lr)
        subnets = sandwich(recipe.space, step, recipe.seed, cfg.random_subnets)
        per_rank = []
        for r in range(world):
            opt.zero_grad(set_to_none=True)
            sandwich_backward(model, x[r * per:(r + 1) * per], y[r * per:(r + 1) * per], subnets, cfg)
            per_rank.append([p.grad for p in model.parameters()])
        for p, gs in zip(model.parameters(), zip(*per_rank)):
            have = [g for g in gs if g is not None]
            p.grad = sum(have) / world if have else None
        opt.step()
    return {k: v.detach() for k, v in model.named_parameters()}


def _relative(a: dict, b: dict) -> float:
    """Over all parameters at once: BN biases that a following BN cancels get only rounding-noise
    gradients, so a per-tensor ratio would measure noise against noise."""
    fa, fb = torch.cat([a[k].reshape(-1) for k in b]), torch.cat([b[k].reshape(-1) for k in b])
    return ((fa - fb).norm() / fb.norm()).item()


@pytest.fixture
def one_thread():
    """The same thread count as each torchrun worker (OMP_NUM_THREADS=1), so kernels reduce alike."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def test_two_ranks_match_one_process_and_only_rank0_writes(tmp_path, one_thread):
    # Launch through torch.distributed.run (torchrun), as users do; each rank gets its own --run
    # folder, as on machines without a shared disk, so anything rank 1 wrote would show.
    env = {**os.environ, "OMP_NUM_THREADS": "1", "PYTHONUNBUFFERED": "1"}
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node=2",
                           __file__, str(tmp_path)], env=env, capture_output=True, text=True, timeout=280)
    launch_s = time.perf_counter() - t0
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    assert "rank 0 stopped at step 4 code 130" in proc.stdout and "rank 1 stopped at step 4 code 130" in proc.stdout
    assert not (tmp_path / "rank1").exists()              # rank 1 wrote nothing, not even its folder
    run = tmp_path / "rank0"
    assert sorted(p.name for p in run.iterdir()) == ["checkpoint.pt", "metrics.jsonl"]
    state = torch.load(run / "checkpoint.pt", weights_only=True)
    assert state["step"] == 7 and state["complete"]
    recipe = tiny_recipe(epochs=EPOCHS)
    ref = _reference(recipe, 7, world=2)
    got = {k: v for k, v in state["model"].items() if k in ref}
    diff = _relative(got, ref)
    print(f"torchrun launch {launch_s:.1f} s, relative weight difference vs reference {diff:.2e}")
    assert diff <= RTOL
    # Per-rank BN really differs from one process on the whole batch (so the reference above is needed).
    assert _relative(_reference(recipe, 2, world=1), _reference(recipe, 2, world=2)) > 10 * RTOL


def _worker(base: Path) -> None:
    """torchrun worker: train until rank 1 asks to stop, then resume to the end."""
    import torch.distributed as dist
    dist.init_process_group("gloo")  # kept over both calls, so train() joins it instead of making its own
    rank = dist.get_rank()
    recipe, run = tiny_recipe(epochs=EPOCHS), base / f"rank{rank}"
    try:
        train(recipe, run, progress=False, device="cpu", stop_at_step=STOP_ON_RANK1 if rank == 1 else None)
    except Interrupted as e:
        step = [-1]
        if rank == 0:
            step = [torch.load(run / "checkpoint.pt", weights_only=True)["step"]]
        dist.broadcast_object_list(step, src=0)
        print(f"rank {rank} stopped at step {step[0]} code {e.code}", flush=True)
    train(recipe, run, resume=True, progress=False, device="cpu")
    dist.destroy_process_group()


if __name__ == "__main__":
    _worker(Path(sys.argv[1]))
