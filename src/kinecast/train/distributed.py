"""Data-parallel training with torch.distributed, when launched by ``torchrun``.

``torchrun --nproc_per_node=N -m kinecast fit ...`` sets WORLD_SIZE/RANK; each process draws its own
windows, DistributedDataParallel averages the gradients, and only rank 0 validates and writes files.
Decisions taken on rank 0 (stop, window length) are broadcast every step so all ranks stay in step.
Gloo on the CPU, NCCL on a GPU.
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass

import torch
import torch.distributed as dist


@dataclass
class Context:
    rank: int = 0
    world: int = 1
    device: torch.device = torch.device("cpu")

    @property
    def main(self) -> bool:
        return self.rank == 0

    @property
    def active(self) -> bool:
        return self.world > 1


def pick_device(pref: str) -> torch.device:
    """``auto`` → CUDA when present, else CPU."""
    if pref == "cuda" or (pref == "auto" and torch.cuda.is_available()):
        if not torch.cuda.is_available():
            from ..errors import KinecastError

            raise KinecastError("--device cuda", "no CUDA device is available on this machine")
        return torch.device("cuda")
    return torch.device("cpu")


def setup(device_pref: str) -> Context:
    world = int(os.environ.get("WORLD_SIZE", "1"))
    device = pick_device(device_pref)
    if world <= 1:
        return Context(device=device)
    rank = int(os.environ["RANK"])
    if device.type == "cuda":
        local = int(os.environ.get("LOCAL_RANK", "0"))
        torch.cuda.set_device(local)
        device = torch.device("cuda", local)
    if not dist.is_initialized():
        dist.init_process_group("nccl" if device.type == "cuda" else "gloo")
    return Context(rank=rank, world=world, device=device)


def sync_decision(ctx: Context, stop: bool, window: int) -> tuple[bool, int]:
    """Rank 0's (stop, window) for every rank."""
    if not ctx.active:
        return stop, window
    t = torch.tensor([int(stop), window], dtype=torch.int64, device=ctx.device)
    dist.broadcast(t, src=0)
    return bool(t[0].item()), int(t[1].item())


def broadcast_parameters(ctx: Context, model: torch.nn.Module) -> None:
    """Rank 0's parameters on every rank (after rank 0 alone changed them, e.g. from a file)."""
    if not ctx.active:
        return
    with torch.no_grad():
        for p in model.parameters():
            dist.broadcast(p.data, src=0)


def any_rank(ctx: Context, flag: bool) -> bool:
    """True when ``flag`` is set on any rank (e.g. a non-finite loss)."""
    if not ctx.active:
        return flag
    t = torch.tensor([int(flag)], dtype=torch.int64, device=ctx.device)
    dist.all_reduce(t, op=dist.ReduceOp.MAX)
    return bool(t.item())


def mean_over_ranks(ctx: Context, values: list[float]) -> list[float]:
    """Each value averaged over the ranks (so decisions made from them agree everywhere)."""
    if not ctx.active:
        return values
    t = torch.tensor(values, dtype=torch.float64, device=ctx.device)
    dist.all_reduce(t, op=dist.ReduceOp.SUM)
    return (t / ctx.world).tolist()


def average_gradients(ctx: Context, model: torch.nn.Module) -> None:
    """Average the gradients over the ranks, for steps taken outside DistributedDataParallel's
    forward (the staged recipe's positions and dynamics stages)."""
    if not ctx.active:
        return
    for p in model.parameters():
        if p.grad is not None:
            dist.all_reduce(p.grad, op=dist.ReduceOp.SUM)
            p.grad.div_(ctx.world)


def replica_spread(ctx: Context, model: torch.nn.Module) -> float:
    """Largest difference of any parameter between ranks (0.0 when the replicas agree exactly)."""
    with torch.no_grad():
        vec = torch.cat([p.detach().reshape(-1) for p in model.parameters()])
    if not ctx.active:
        return 0.0
    hi, lo = vec.clone(), vec.clone()
    dist.all_reduce(hi, op=dist.ReduceOp.MAX)
    dist.all_reduce(lo, op=dist.ReduceOp.MIN)
    return float((hi - lo).max())


def teardown(ctx: Context) -> None:
    if ctx.active and dist.is_initialized():
        dist.barrier()
        dist.destroy_process_group()


def leave_helper(code: int) -> None:
    """End a helper process (rank > 0) of a ``torchrun`` launch at once, skipping the interpreter's
    shutdown; returns only in the main process or outside ``torchrun``.

    Gloo's worker threads release a finished collective's tensors on their own schedule: the final
    barrier keeps the collectives still in flight when it was posted, and a worker freeing them after
    the interpreter began shutting down needs the GIL, cannot get it, and aborts the process
    ("terminate called without an active exception"; seen in 3 of about 125 two-process fits on a
    loaded 2-core machine; the core dump showed ``ProcessGroupGloo::runLoop`` freeing a barrier's
    earlier all-reduce during ``Py_FinalizeEx``). A helper has written nothing and holds nothing to
    clean up (only rank 0 writes the run), so it flushes its output and leaves without that shutdown.
    """
    if int(os.environ.get("WORLD_SIZE", "1")) <= 1 or int(os.environ.get("RANK", "0")) == 0:
        return
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)
