"""Building blocks shared by the teacher and the student family.

Every network is an nn.Sequential of these blocks and plain torch layers
(Conv2d, InstanceNorm2d, ReLU, PixelShuffle, PixelUnshuffle), so the ONNX writer
and the pruner can walk it without tracing.
"""
from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn


class Residual(nn.Module):
    """x + body(x); no activation after the add (Johnson et al. 2016, supplement)."""

    def __init__(self, body: nn.Sequential) -> None:
        super().__init__()
        self.body = body

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        # x: (N, C, H, W) -> (N, C, H, W)
        return x + self.body(x)


class NearestUp2(nn.Module):
    """Nearest-neighbour resize by 2 (ONNX Resize: nearest, asymmetric, floor)."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        # x: (N, C, H, W) -> (N, C, 2H, 2W)
        return F.interpolate(x, scale_factor=2.0, mode="nearest")


class Squash(nn.Module):
    """Squashes the last conv's output into the pixel range [0, 1]."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        # x: (N, 3, H, W) -> (N, 3, H, W) in [0, 1]
        return torch.sigmoid(x)


def conv(cin: int, cout: int, kernel: int, stride: int = 1, *, reflect: bool = False,
         groups: int = 1) -> nn.Conv2d:
    """A same-padded convolution with bias; reflection padding only for the teacher."""
    return nn.Conv2d(cin, cout, kernel, stride=stride, padding=kernel // 2,
                     padding_mode="reflect" if reflect else "zeros", groups=groups, bias=True)
