"""Parameter and multiply-accumulate counts, worked out layer by layer from the layer
table (compress/layer_table.py: each layer's output size and conv MACs)."""
from __future__ import annotations

from torch import nn

from .layer_table import execution_order, ops


def count_params(net: nn.Module) -> int:
    return sum(p.numel() for p in net.parameters())


def count_macs(net: nn.Module, height: int, width: int) -> int:
    """Conv MACs of one forward pass on a (height, width) input."""
    h, w = height, width
    total = 0
    for m in execution_order(net.net):
        h, w, macs = ops(m).size(m, h, w)
        total += macs
    return total
