"""Data-parallel training across processes: torch.distributed with the gloo backend (CPU).

Launched by ``torchrun``: ``WORLD_SIZE`` > 1 makes :func:`world_info` join the process group.
"""

from __future__ import annotations

import os

import torch


def world_info() -> tuple[int, int]:
    """``(rank, world_size)``; joins the gloo process group when launched by torchrun with > 1 process."""
    import torch.distributed as dist

    world = int(os.environ.get("WORLD_SIZE", "1"))
    if world > 1 and not dist.is_initialized():
        dist.init_process_group("gloo")
    return (dist.get_rank(), dist.get_world_size()) if world > 1 else (0, 1)


def average_gradients(params: list[torch.Tensor], world: int, stop: bool = False) -> bool:
    """All-reduce the gradients of ``params`` (one flat buffer) and divide by ``world``.

    ``stop`` (this process got Ctrl-C / SIGTERM) rides along; returns True when any process got
    one, so that every process stops after the same step.
    """
    import torch.distributed as dist

    flat = torch.cat([p.grad.reshape(-1) for p in params] + [torch.tensor([float(stop)])])
    dist.all_reduce(flat)
    any_stop = bool(flat[-1] > 0)
    flat /= world
    i = 0
    for p in params:
        p.grad.copy_(flat[i:i + p.numel()].view_as(p.grad))
        i += p.numel()
    return any_stop
