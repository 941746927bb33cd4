"""A prunable channel space (compress/prune.py): the convolutions that produce a set of
channels and those that consume it. Each network family states its own spaces beside its
constructor (students.py, teacher.py); the registry (registry.py) points to them."""
from __future__ import annotations

from dataclasses import dataclass, field

from torch import nn


@dataclass
class ChannelSpace:
    """One prunable channel space: who produces it (rows) and who consumes it (cols)."""
    size: int
    producers: list[tuple[nn.Conv2d, int]]   # (conv, rows per channel: 1, or 4 before a shuffle)
    consumers: list[nn.Conv2d]                # input channels sliced
    depthwise: list[nn.Conv2d]                # grouped convs whose channels follow the space
    norms: list[nn.InstanceNorm2d] = field(default_factory=list)  # sliced like producers; ranked by |gamma|
