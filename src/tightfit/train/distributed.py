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
DistributedDataParallel(find_unused_parameters=True, broadcast_buffers=False): 2 CPU
ranks, gloo, recipes/demo.toml (global batch 128, 4 subnets per step, channels_last),
1 thread per rank, a shared 2-core machine at load average ~8; median (quartiles) of 16
steps, modes interleaved:
    manual all-reduce after the sandwich        868 ms/step (820-995)
    DDP, one reduction per subnet              1097 ms/step (718-1442)
    DDP, no_sync() on all but the last subnet  1007 ms/step (888-1162)
The all-reduce alone (178k parameters) takes 7 ms, so speed does not decide at this
size; first-step gradients of all three agree to 2e-7. We take the manual one because
it is one collective per step by construction (DDP reduces once per subnet unless told
otherwise) and carries the losses and the stop request in the same message; it keeps
None gradients None where DDP would hand zeros to the optimizer; it needs no wrapper
around a model whose set_subnet changes the graph every forward (DDP re-walks the
autograd graph after each one); and DDP warns that channels_last gradients do not
match its bucket strides.

BatchNorm: per-rank batch statistics. torch.nn.SyncBatchNorm runs on CUDA only, and our
elastic BN slices its channels per subnet anyway. Each rank normalises with the
statistics of its own sub-batch (batch_size / world images), so results depend
slightly on the world size: 2 ranks x 16 is not bit-equal to 1 x 32 (tiny test recipe,
7 steps: the weights differ by 1.8e-3 of their norm, while the 7 updates move them by
4e-3). Running statistics do not matter: every subnet is BN-recalibrated before it is
evaluated or exported, and the checkpoint keeps rank 0's. tests/test_distributed.py
therefore compares a 2-rank run with one process that computes the same per-half BN.
Dropout masks come from a global RNG reseeded per (seed, rank, step).

Only rank 0 touches the run directory (checkpoint, metrics, recipe copy), evaluates at
epoch ends and shows the progress bar; it also loads the checkpoint on resume and sends
the start state to the others, so the run directory need exist only on rank 0's
machine (the data must exist on every machine; the built-in set is generated there).
A signal (Ctrl-C, SIGTERM from torchrun or a scheduler) is agreed on in the next
step's all-reduce, so all ranks stop after the same step: rank 0 writes the
checkpoint, everyone waits at a barrier, everyone exits 130/143.
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
    """Run ``fn`` on rank 0 and hand its result (or its UserError) to every rank; the result
    must be tensors and plain data (received with weights_only=True, like checkpoints)."""
    if not ranks.launched:
        return fn()
    box: list[Any] = [None]
    if ranks.is_main:
        try:
            box[0] = ("ok", fn())
        except UserError as e:
            box[0] = ("error", str(e))
    dist.broadcast_object_list(box, src=0, device=dev if dev.type == "cuda" else None, weights_only=True)
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


def mean_over_ranks(value: float, ranks: Ranks, dev: torch.device) -> float:
    """A batch loss over the global batch: the mean of the ranks' equal shares (the value itself in one
    process), so choices made from it are the same on every rank."""
    if not ranks.launched:
        return value
    t = torch.tensor([value], dtype=torch.float64, device=dev)
    dist.all_reduce(t)  # SUM
    return t.item() / ranks.world


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
