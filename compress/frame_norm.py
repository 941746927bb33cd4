"""Instance normalisation with whole-frame statistics, for training a teacher-shaped
network (e.g. a pruned teacher) on crops.

The teacher normalises each feature map over the whole frame, and its cached targets
are crops of whole-frame outputs; normalising a crop over itself would teach the
network a different function from the one it computes on a frame. `frame_stats` runs
the network on whole frames without gradient and records every InstanceNorm2d's
per-channel mean and variance; inside `use(stats)` each InstanceNorm2d normalises with
those instead (the statistics are constants for the gradient, as for the students'
frame context).
"""
from __future__ import annotations

from contextlib import contextmanager
from typing import Iterator

import torch
from torch import nn

Stats = dict[nn.InstanceNorm2d, tuple[torch.Tensor, torch.Tensor]]


def _norms(net: nn.Module) -> list[nn.InstanceNorm2d]:
    return [m for m in net.modules() if isinstance(m, nn.InstanceNorm2d)]


def has_norms(net: nn.Module) -> bool:
    return bool(_norms(net))


def frame_stats(net: nn.Module, frames: torch.Tensor) -> Stats:
    """frames: (F, 3, Hf, Wf) in [0, 1] -> per norm: mean and biased variance, (F, C, 1, 1)."""
    stats: Stats = {}
    def record(mod: nn.Module, inp: tuple[torch.Tensor], out: torch.Tensor) -> None:
        x = inp[0]
        stats[mod] = (x.mean((2, 3), keepdim=True), x.var((2, 3), unbiased=False, keepdim=True))
    hooks = [m.register_forward_hook(record) for m in _norms(net)]
    try:
        with torch.no_grad():
            net(frames)
    finally:
        for h in hooks:
            h.remove()
    return stats


@contextmanager
def use(net: nn.Module, stats: Stats) -> Iterator[None]:
    """Within the block every InstanceNorm2d of `net` normalises with `stats` (one row
    per batch item, or one row for a batch cut from one frame)."""
    def replace(mod: nn.InstanceNorm2d, inp: tuple[torch.Tensor], out: torch.Tensor) -> torch.Tensor:
        mu, var = stats[mod]                                       # (B or 1, C, 1, 1)
        y = (inp[0] - mu) / torch.sqrt(var + mod.eps)            # (B, C, H, W)
        return y * mod.weight[None, :, None, None] + mod.bias[None, :, None, None]
    hooks = [m.register_forward_hook(replace) for m in _norms(net)]
    try:
        yield
    finally:
        for h in hooks:
            h.remove()
