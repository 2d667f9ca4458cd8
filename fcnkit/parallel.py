"""Data-parallel training on CPUs through torch.distributed (gloo backend).

``torchrun --nproc_per_node=N -m fcnkit train ...`` sets WORLD_SIZE, RANK and the rendezvous address in the
environment; :func:`start` joins that group. Without it, training runs as a group of one.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import torch
from torch import distributed as dist


@dataclass(frozen=True)
class Group:
    """This process's place among the training processes."""

    rank: int = 0
    world: int = 1
    owned: bool = False  # True when start() created the process group (and finish() must end it)

    @property
    def main(self) -> bool:
        """Rank 0 alone writes files and shows progress."""
        return self.rank == 0


def start() -> Group:
    """Join the torchrun process group when launched under torchrun; otherwise a group of one."""
    if dist.is_available() and not dist.is_initialized() and int(os.environ.get("WORLD_SIZE", "1")) > 1:
        dist.init_process_group("gloo")
        return Group(dist.get_rank(), dist.get_world_size(), owned=True)
    if dist.is_available() and dist.is_initialized():
        return Group(dist.get_rank(), dist.get_world_size())
    return Group()


def finish(group: Group) -> None:
    if group.owned and dist.is_initialized():
        dist.destroy_process_group()


def share_buffers(group: Group, module: torch.nn.Module) -> None:
    """Give every process rank 0's buffers (batch-norm running statistics drift apart during an epoch, as
    each process updates them with its own batches), so all validate the model rank 0 saves."""
    if group.world > 1:
        for buf in module.buffers():
            dist.broadcast(buf, src=0)


def gather(group: Group, value: torch.Tensor) -> list[torch.Tensor]:
    """Every process's ``value`` (same shape and dtype everywhere), in rank order."""
    if group.world == 1:
        return [value]
    out = [torch.empty_like(value) for _ in range(group.world)]
    dist.all_gather(out, value.contiguous())
    return out


def all_sum(group: Group, values: torch.Tensor, op: str = "sum") -> torch.Tensor:
    """Element-wise sum (or ``op="max"``: maximum) over all processes (float64 so pixel counts stay exact)."""
    values = values.detach().to(torch.float64).clone()
    if group.world > 1:
        dist.all_reduce(values, op=dist.ReduceOp.MAX if op == "max" else dist.ReduceOp.SUM)
    return values


def any_rank(group: Group, *flags: bool) -> list[bool]:
    """For each flag, whether it is set on any process (keeps every process stopping at the same step)."""
    return [v > 0 for v in all_sum(group, torch.tensor([float(f) for f in flags])).tolist()]
