"""Training on several processes or machines under torchrun (PyTorch's own launcher).

Data parallel: the recipe's batch_size is the GLOBAL batch. Every rank draws the same
global batch (order and augmentation seeded from (seed, epoch, batch)) and the same
sandwich of subnets (seeded from the step), then trains on its own contiguous block of
rows; the blocks of all ranks together are exactly the single-process batch.

Gradient sync — one all-reduce per step, after the whole sandwich, before opt.step.
All gradients (None counted as zero), a did-this-rank-have-a-gradient count per
parameter, the losses and the stop request travel in one flat buffer; a parameter
with no gradient on any rank keeps grad None, so the optimizer skips it exactly as in
a single process (no weight decay, no momentum step). Measured against
DistributedDataParallel(find_unused_parameters=True, broadcast_buffers=False), 2 CPU
ranks with gloo, recipes/demo.toml (global batch 128, 4 subnets per step), one thread
per rank, on a shared 2-core machine (load average ~9, so absolute figures are
contended; median of 15 steps after 3 warm-up steps):
    manual all-reduce after the sandwich       BENCH_MANUAL ms/step
    DDP, reduction after every subnet          BENCH_DDP ms/step
    DDP, no_sync() on all but the last subnet  BENCH_DDP_NOSYNC ms/step
Manual wins or ties on speed; we take it mainly because it is exact: DDP walks the
autograd graph after every forward to find unused parameters, reduces once per
subnet, and hands zero (not None) gradients to parameters no subnet used, so SGD would
apply weight decay and momentum to them where a single process would not.

BatchNorm: per-rank batch statistics. torch.nn.SyncBatchNorm runs on CUDA only, and our
elastic BN slices its channels per subnet anyway. Each rank normalises with the
statistics of its own sub-batch (batch_size / world images), so results depend
slightly on the world size: 2 ranks x 16 is not bit-equal to 1 x 32. Running
statistics do not matter: every subnet is BN-recalibrated before it is evaluated or
exported, and the checkpoint keeps rank 0's. tests/test_distributed.py compares a
2-rank run with one process that computes the same per-half BN.

Only rank 0 touches the run directory (checkpoint, metrics, recipe copy) and shows the
progress bar; it also loads the checkpoint on resume and sends the start state to the
others, so the run directory need exist only on rank 0's machine.
"""
from __future__ import annotations

import os
import signal
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import timedelta
from typing import Any, Callable, Iterator, Mapping

import torch
import torch.distributed as dist
from torch import nn

from tightfit.errors import UserError
from tightfit.rundir import pick_device

# Rank 0 alone evaluates at each epoch end while the others wait at the next collective;
# torch's default (10 min for NCCL) could cut a long evaluation short.
TIMEOUT = timedelta(hours=1)


@dataclass(frozen=True)
class Ranks:
    """Where this process sits; the default is a plain single process."""
    rank: int = 0
    world: int = 1
    local_rank: int = 0
    launched: bool = False  # started by torchrun (a process group exists)

    @property
    def is_main(self) -> bool:
        return self.rank == 0


def ranks_from_env(env: Mapping[str, str] = os.environ) -> Ranks:
    """torchrun sets RANK, WORLD_SIZE and LOCAL_RANK for every process it starts."""
    if "WORLD_SIZE" not in env:
        return Ranks()
    try:
        return Ranks(int(env.get("RANK", "0")), int(env["WORLD_SIZE"]), int(env.get("LOCAL_RANK", "0")), True)
    except ValueError:
        raise UserError("RANK / WORLD_SIZE / LOCAL_RANK are not integers: start with torchrun, or unset them") from None


def rank_device(requested: str | None, ranks: Ranks) -> torch.device:
    """CUDA when present (cuda:LOCAL_RANK under torchrun), else CPU; ``requested`` forces one."""
    dev = pick_device(requested)
    if dev.type != "cuda" or not ranks.launched:
        return dev
    if dev.index is not None and ranks.world > 1:
        raise UserError(f"--device {requested} would put every rank on one GPU: use --device cuda "
                        f"(each rank then takes cuda:LOCAL_RANK)")
    if ranks.local_rank >= torch.cuda.device_count():
        raise UserError(f"local rank {ranks.local_rank} has no GPU (this machine has {torch.cuda.device_count()}): "
                        f"lower --nproc_per_node, or use --device cpu")
    return torch.device("cuda", ranks.local_rank)


def backend_for(dev: torch.device) -> str:
    return "nccl" if dev.type == "cuda" else "gloo"


@contextmanager
def joined(requested_device: str | None) -> Iterator[tuple[Ranks, torch.device]]:
    """Join torchrun's process group (env:// rendezvous) for the duration of the block."""
    ranks = ranks_from_env()
    dev = rank_device(requested_device, ranks)
    if not ranks.launched:
        yield ranks, dev
        return
    if dev.type == "cuda":
        torch.cuda.set_device(dev)
    created = not dist.is_initialized()
    if created:
        dist.init_process_group(backend_for(dev), timeout=TIMEOUT,
                                device_id=dev if dev.type == "cuda" else None)
    try:
        yield ranks, dev
    finally:
        if created:
            dist.destroy_process_group()


def local_rows(batch_size: int, ranks: Ranks) -> slice:
    """This rank's contiguous block of each global batch."""
    if batch_size % ranks.world:
        raise UserError(f"train.batch_size = {batch_size} (the global batch) does not split over {ranks.world} "
                        f"processes: make it a multiple of {ranks.world}")
    per = batch_size // ranks.world
    return slice(ranks.rank * per, (ranks.rank + 1) * per)


def barrier(ranks: Ranks) -> None:
    if ranks.launched:
        dist.barrier()


def decided_on_main(ranks: Ranks, fn: Callable[[], Any], dev: torch.device) -> Any:
    """Run ``fn`` on rank 0 and hand its result (or its UserError) to every rank."""
    if not ranks.launched:
        return fn()
    box: list[Any] = [None]
    if ranks.is_main:
        try:
            box[0] = ("ok", fn())
        except UserError as e:
            box[0] = ("error", str(e))
    dist.broadcast_object_list(box, src=0, device=dev if dev.type == "cuda" else None)
    kind, value = box[0]
    if kind == "error":
        raise UserError(value)
    return value


def pack(params: list[nn.Parameter], extras: list[float]) -> torch.Tensor:
    """[every grad flattened (None → 0) | 1 per param that has a grad | extras], one fp32 vector."""
    dev = params[0].device
    grads = [p.grad.reshape(-1) if p.grad is not None else torch.zeros(p.numel(), device=dev) for p in params]
    tail = [float(p.grad is not None) for p in params] + list(extras)
    return torch.cat(grads + [torch.tensor(tail, dtype=torch.float32, device=dev)])


def unpack(flat: torch.Tensor, params: list[nn.Parameter], world: int) -> list[float]:
    """Write the rank-average of a summed ``pack`` vector back into .grad; returns averaged extras.

    Dividing by ``world`` everywhere (not by the number of ranks that had a gradient) is
    what one process on the whole batch computes: a missing gradient is a zero one."""
    flat.div_(world)
    n = sum(p.numel() for p in params)
    tail = flat[n:].tolist()  # one device-to-host copy
    off = 0
    for p, had in zip(params, tail):
        g = flat[off:off + p.numel()].view(p.shape)
        if had == 0:
            p.grad = None
        elif p.grad is None:
            p.grad = g.clone()
        else:
            p.grad.copy_(g)
        off += p.numel()
    return tail[len(params):]


class GradientSync:
    """Called by train_step after the sandwich: one all-reduce of gradients, losses and
    the stop request. ``local_stop`` reads this rank's signal (None, SIGINT or SIGTERM);
    ``agreed_stop`` is then the same on every rank, so all stop after the same step."""

    def __init__(self, model: nn.Module, ranks: Ranks, local_stop: Callable[[], int | None]):
        self.params = [p for p in model.parameters() if p.requires_grad]
        self.ranks, self.local_stop = ranks, local_stop
        self.agreed_stop: int | None = None

    def __call__(self, losses: dict[str, float]) -> dict[str, float]:
        sig = self.local_stop()
        flat = pack(self.params, [*losses.values(), float(sig == signal.SIGINT), float(sig == signal.SIGTERM)])
        dist.all_reduce(flat)  # SUM (torch.distributed default)
        *avg, sigint, sigterm = unpack(flat, self.params, self.ranks.world)
        self.agreed_stop = signal.SIGTERM if sigterm > 0 else signal.SIGINT if sigint > 0 else None
        return dict(zip(losses, avg))


def step_seed(seed: int, rank: int, step: int) -> int:
    """Seed of the global RNG (dropout) for one rank and step: masks differ between ranks,
    and a resumed run draws the same masks as an uninterrupted one."""
    return (seed * 1_000_003 + step) * 4_099 + rank


def broadcast_weights(model: nn.Module, ranks: Ranks) -> None:
    """Copy rank 0's parameters and buffers to every rank (through contiguous buffers,
    which gloo requires; channels_last weights are not contiguous)."""
    if not ranks.launched:
        return
    with torch.no_grad():
        for t in model.state_dict().values():
            buf = t.contiguous()
            dist.broadcast(buf, src=0)
            if buf.data_ptr() != t.data_ptr():
                t.copy_(buf)
