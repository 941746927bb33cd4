"""Training on several processes with torch.distributed (DistributedDataParallel).

One process runs as before. Under torchrun (which sets WORLD_SIZE, RANK, LOCAL_RANK and
the rendezvous address) every rank draws the very batch one process would draw from the
seeded stream and takes its own equal share; DDP averages the gradients, and the mean of
the ranks' mean gradients over equal shares is the mean over the whole batch, so the run
follows the one-process run up to float reduction order. Rank 0 alone writes files;
the others wait for it where they need what it wrote.

Backends: gloo for CPU ranks (the default), NCCL for CUDA ranks, one GPU per local rank.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from datetime import timedelta

import torch
import torch.distributed as dist
from limner.runtime.errors import InputError
from torch import nn


class DistributedError(InputError):
    pass


@dataclass(frozen=True)
class World:
    rank: int = 0
    size: int = 1
    local_rank: int = 0

    @property
    def main(self) -> bool:
        """The one rank that writes checkpoints, logs, previews and models."""
        return self.rank == 0

    @property
    def active(self) -> bool:
        return self.size > 1

    def share(self, batch: int) -> slice:
        """This rank's part of a global batch of `batch` items (equal shares)."""
        if batch % self.size:
            raise DistributedError(f"batch={batch} does not split into {self.size} equal shares; "
                                   f"use a multiple of the world size")
        n = batch // self.size
        return slice(self.rank * n, (self.rank + 1) * n)

    def barrier(self) -> None:
        if self.active:
            dist.barrier()

    def mean(self, values: dict[str, float]) -> dict[str, float]:
        """The mean of each value over the ranks (every rank gets the same numbers)."""
        if not self.active or not values:
            return dict(values)
        keys = sorted(values)
        t = torch.tensor([float(values[k]) for k in keys], dtype=torch.float64)
        if dist.get_backend() == "nccl":
            t = t.cuda()
        dist.all_reduce(t)
        return {k: float(v) / self.size for k, v in zip(keys, t.cpu().tolist())}

    def wrap(self, model: nn.Module, device: torch.device) -> nn.Module:
        """DDP around `model` when there are several ranks; the model itself otherwise."""
        if not self.active:
            return model
        ids = [device.index] if device.type == "cuda" else None
        return nn.parallel.DistributedDataParallel(model, device_ids=ids)


def world_from_env() -> World:
    """The world torchrun describes in the environment (a single process without it)."""
    size = int(os.environ.get("WORLD_SIZE", "1"))
    return World(int(os.environ.get("RANK", "0")), size, int(os.environ.get("LOCAL_RANK", "0")))


def init(device: str = "cpu") -> World:
    """Join the process group torchrun set up (gloo on CPU, NCCL on CUDA); no-op alone."""
    w = world_from_env()
    if not w.active or dist.is_initialized():
        return w
    backend = "nccl" if device.startswith("cuda") else "gloo"
    if backend == "nccl":
        if not torch.cuda.is_available():
            raise DistributedError(f"device={device!r} under torchrun needs CUDA, which torch does not see")
        torch.cuda.set_device(w.local_rank)
    # long single-rank stages (rank 0 builds the teacher-output cache) must not time the others out
    dist.init_process_group(backend, timeout=timedelta(hours=3))
    return w


def device_for(world: World, device: torch.device) -> torch.device:
    """A CUDA run gives each local rank its own GPU."""
    if world.active and device.type == "cuda":
        return torch.device("cuda", world.local_rank)
    return device


def train_device(name: str) -> torch.device:
    """A stage's `device`: "auto" takes CUDA when torch sees it, else the CPU."""
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if name.startswith("cuda"):
        n = torch.cuda.device_count() if torch.cuda.is_available() else 0
        index = int(name.split(":")[1]) if ":" in name else 0
        if index >= n:
            raise DistributedError(f"device={name!r}: torch {torch.__version__} sees {n} CUDA device(s) "
                                   "here; use device = \"cpu\" or \"auto\"")
    elif name != "cpu":
        raise DistributedError(f"device={name!r}: one of cpu, cuda, cuda:N, auto")
    return torch.device(name)


def shutdown() -> None:
    if dist.is_initialized():
        dist.destroy_process_group()
