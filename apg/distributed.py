"""Data-parallel training across processes launched by ``torchrun``.

Each process (rank) rolls out its share of the minibatch; one all-reduce per iteration turns the per-rank
gradients into the gradient of the whole minibatch, which every rank then applies with the same optimiser step.

* **Sharding.** Every rank draws the *full* minibatch (initial states and, for ensembles, the models) from the
  same seeded generator and keeps its contiguous slice (:meth:`Shard.bounds`). The union of the slices is
  exactly the single-process minibatch, the generator states stay identical on every rank, and so a checkpoint
  written by rank 0 resumes every rank. Drawing the whole batch costs nothing next to the rollout.
* **Reduction.** Rank ``r`` holds the mean gradient ``g_r`` over its ``n_r`` initial states; the all-reduce sums
  ``(n_r / B) g_r``, which is the batch-mean gradient over all ``B`` states however unevenly they were split.
  The sum is taken in float64. Every rank ends with the same gradient, so identical optimiser steps keep the
  replicas identical (rank 0's parameters are copied to the others once, at the start, to begin equal).
* **Backend.** gloo for CPU tensors (the trainer's case today), NCCL for CUDA tensors.
* **Who writes.** Only rank 0 writes checkpoints, ``metrics.json``, ``config.yaml``, TensorBoard and the
  progress bar, and runs the held-out evaluation; the others share its results (:func:`share`).

With a single process every function here is the identity, so the trainer calls them unconditionally.
"""

from __future__ import annotations

import dataclasses
import datetime
import os
from dataclasses import dataclass
from typing import Any, Sequence

import torch
import torch.distributed as dist
from torch import Tensor, nn

from envs.base import System

BACKENDS = ("auto", "gloo", "nccl")


@dataclass(frozen=True)
class Shard:
    """This process's place among ``world_size`` data-parallel processes."""

    rank: int = 0
    world_size: int = 1

    def __post_init__(self) -> None:
        if self.world_size < 1 or not 0 <= self.rank < self.world_size:
            raise ValueError(f"need 0 <= rank < world_size, got rank={self.rank}, world_size={self.world_size}")

    @property
    def main(self) -> bool:
        """Rank 0: the process that evaluates, logs and writes."""
        return self.rank == 0

    @property
    def parallel(self) -> bool:
        return self.world_size > 1

    def bounds(self, n: int) -> tuple[int, int]:
        """This rank's rows ``[lo, hi)`` of ``n``: contiguous, sizes differing by at most one, first ranks larger."""
        base, extra = divmod(n, self.world_size)
        lo = self.rank * base + min(self.rank, extra)
        return lo, lo + base + (self.rank < extra)

    def take(self, x: Tensor) -> Tensor:
        """This rank's rows of a full-minibatch tensor ``(B, ...)``."""
        lo, hi = self.bounds(x.shape[0])
        return x[lo:hi]

    def take_models(self, system: System, n: int) -> System:
        """This rank's models of an ensemble drawn for ``n`` batch elements (``(n,)`` tensor parameters)."""
        if not self.parallel:
            return system
        lo, hi = self.bounds(n)

        def sliced(record: object) -> object:
            changes = {f.name: getattr(record, f.name)[lo:hi] for f in dataclasses.fields(record)
                       if isinstance(getattr(record, f.name), Tensor) and getattr(record, f.name).shape[:1] == (n,)}
            return dataclasses.replace(record, **changes) if changes else record

        params, task = sliced(system.params), sliced(system.task)
        return system if params is system.params and task is system.task else system.replace(params=params, task=task)


SINGLE = Shard()


def backend_for(device: torch.device) -> str:
    """The collective backend for tensors on ``device``: NCCL for CUDA, gloo otherwise."""
    return "nccl" if device.type == "cuda" else "gloo"


def from_environment(backend: str = "auto", device: torch.device = torch.device("cpu"),
                     timeout_s: float = 1800.0) -> Shard:
    """Join the process group that ``torchrun`` describes in the environment.

    ``torchrun`` sets ``RANK``, ``WORLD_SIZE``, ``LOCAL_RANK``, ``MASTER_ADDR`` and ``MASTER_PORT``; without
    ``WORLD_SIZE`` > 1 this returns the single-process :data:`SINGLE` and starts nothing.

    Args:
        backend: ``auto`` (:func:`backend_for` ``device``), ``gloo`` or ``nccl``.
        device: where the reduced tensors live; the trainer keeps everything on the CPU.

    Raises:
        ValueError: an unknown backend, or NCCL without a CUDA device.
    """
    world = int(os.environ.get("WORLD_SIZE", "1"))
    if world <= 1:
        return SINGLE
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {', '.join(BACKENDS)}; got {backend!r}")
    chosen = backend_for(device) if backend == "auto" else backend
    if chosen == "nccl":
        if not torch.cuda.is_available():
            raise ValueError("backend nccl needs CUDA devices; use gloo on CPU")
        torch.cuda.set_device(int(os.environ.get("LOCAL_RANK", "0")))
    if not dist.is_initialized():
        dist.init_process_group(chosen, init_method="env://", timeout=datetime.timedelta(seconds=timeout_s))
    return Shard(dist.get_rank(), dist.get_world_size())


def shutdown(shard: Shard, wait: bool = True) -> None:
    """Leave the process group after the last collective.

    ``wait``: first meet the other ranks, so that none tears its connections down while another still uses
    them; pass ``False`` when leaving on an error, where the others may never arrive.
    """
    if shard.parallel and dist.is_initialized():
        if wait:
            dist.barrier()
        dist.destroy_process_group()


def reduce_gradient(grads: Sequence[Tensor], loss: Tensor, sim_steps: int, n_local: int, n_total: int,
                    shard: Shard) -> tuple[tuple[Tensor, ...], Tensor, int]:
    """Batch-mean gradient and cost over all ranks from this rank's means over its ``n_local`` states.

    Returns ``(grads, loss, sim_steps)`` with ``sim_steps`` summed over ranks; one all-reduce in float64.
    """
    if not shard.parallel:
        return tuple(grads), loss, sim_steps
    w = n_local / n_total
    flat = torch.cat([g.reshape(-1).to(torch.float64) * w for g in grads]
                     + [(loss.detach().to(torch.float64) * w).reshape(1),
                        torch.tensor([float(sim_steps)], dtype=torch.float64, device=loss.device)])  # (P + 2,)
    dist.all_reduce(flat, op=dist.ReduceOp.SUM)
    out, at = [], 0
    for g in grads:
        out.append(flat[at:at + g.numel()].reshape(g.shape).to(g.dtype))
        at += g.numel()
    return tuple(out), flat[at].to(loss.dtype), int(round(float(flat[at + 1])))


def gather_batch(x: Tensor, dim: int, shard: Shard) -> Tensor:
    """Every rank's ``x`` concatenated along ``dim`` in rank order (sizes along ``dim`` may differ)."""
    if not shard.parallel:
        return x
    sizes = [torch.zeros(1, dtype=torch.int64, device=x.device) for _ in range(shard.world_size)]
    dist.all_gather(sizes, torch.tensor([x.shape[dim]], dtype=torch.int64, device=x.device))
    counts = [int(s) for s in sizes]
    pad = list(x.shape)
    pad[dim] = max(counts) - x.shape[dim]
    padded = torch.cat([x, x.new_zeros(pad)], dim=dim).contiguous()  # gloo gathers equal shapes only
    parts = [torch.empty_like(padded) for _ in range(shard.world_size)]
    dist.all_gather(parts, padded)
    return torch.cat([p.narrow(dim, 0, c) for p, c in zip(parts, counts)], dim=dim)


def share(obj: Any, shard: Shard) -> Any:
    """Rank 0's ``obj`` (any picklable value) on every rank."""
    if not shard.parallel:
        return obj
    box = [obj if shard.main else None]
    dist.broadcast_object_list(box, src=0)
    return box[0]


def any_rank(flag: bool, shard: Shard) -> bool:
    """True on every rank if ``flag`` is true on any rank (for decisions that must agree, such as stopping)."""
    if not shard.parallel:
        return flag
    device = torch.device("cuda") if dist.get_backend() == "nccl" else torch.device("cpu")
    t = torch.tensor([1.0 if flag else 0.0], device=device)
    dist.all_reduce(t, op=dist.ReduceOp.MAX)
    return bool(t.item())


@torch.no_grad()
def sync_module(module: nn.Module, shard: Shard) -> None:
    """Copy rank 0's parameters and buffers to every rank."""
    if not shard.parallel:
        return
    for t in [*module.parameters(), *module.buffers()]:
        dist.broadcast(t.data, src=0)


__all__ = ["Shard", "SINGLE", "backend_for", "from_environment", "shutdown", "reduce_gradient", "gather_batch",
           "share", "any_rank", "sync_module"]
