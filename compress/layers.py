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


class FrameFiLM(nn.Module):
    """Frame-level context for a network without normalisation layers.

    The teacher's instance normalisation makes its output for one region depend on the
    whole frame; a student of local convolutions cannot see that. This block pools the
    features over the whole frame, maps the pooled vector through a small MLP to a
    per-channel scale and shift, and applies them: x * (1 + gamma) + beta (feature-wise
    linear modulation). The output convolutions start at zero, so the block starts as
    the identity and a student trained without it can be warm-started.
    In training, `stats` may come from the whole frame while `x` is a crop of it.
    """

    def __init__(self, channels: int, hidden: int) -> None:
        super().__init__()
        self.squeeze = nn.Conv2d(channels, hidden, 1)
        self.gamma = nn.Conv2d(hidden, channels, 1)
        self.beta = nn.Conv2d(hidden, channels, 1)
        for m in (self.gamma, self.beta):
            nn.init.zeros_(m.weight)
            nn.init.zeros_(m.bias)

    def forward(self, x: torch.Tensor, stats: torch.Tensor | None = None) -> torch.Tensor:
        # x: (N, C, H, W); stats: (N, C, 1, 1) frame means of x's features (default: x's own)
        #   -> (N, C, H, W)
        if stats is None:
            stats = x.mean(dim=(2, 3), keepdim=True)
        t = F.relu(self.squeeze(stats))             # (N, hidden, 1, 1)
        return x * (1 + self.gamma(t)) + self.beta(t)
