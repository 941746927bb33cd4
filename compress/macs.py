"""Parameter and multiply-accumulate counts, worked out layer by layer.

Convolution MACs = H_out * W_out * C_out * (C_in / groups) * k_h * k_w (bias adds,
norms, activations and resizes are not counted: common practice, no source).
"""
from __future__ import annotations

from torch import nn

from .layers import NearestUp2
from .onnx_writer import execution_order


def count_params(net: nn.Module) -> int:
    return sum(p.numel() for p in net.parameters())


def conv_macs(conv: nn.Conv2d, h_out: int, w_out: int) -> int:
    kh, kw = conv.kernel_size
    return h_out * w_out * conv.out_channels * (conv.in_channels // conv.groups) * kh * kw


def count_macs(net: nn.Module, height: int, width: int) -> int:
    """Conv MACs of one forward pass on a (height, width) input."""
    h, w = height, width
    total = 0
    for m in execution_order(net.net):
        if isinstance(m, nn.Conv2d):
            sh, sw = m.stride
            ph, pw = m.padding
            kh, kw = m.kernel_size
            h = (h + 2 * ph - kh) // sh + 1
            w = (w + 2 * pw - kw) // sw + 1
            total += conv_macs(m, h, w)
        elif isinstance(m, NearestUp2):
            h, w = 2 * h, 2 * w
        elif isinstance(m, nn.PixelShuffle):
            h, w = h * m.upscale_factor, w * m.upscale_factor
        elif isinstance(m, nn.PixelUnshuffle):
            h, w = h // m.downscale_factor, w // m.downscale_factor
    return total
