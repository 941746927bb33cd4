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
    With `spread`, the block also pools each channel's standard deviation over the frame,
    the other statistic an instance normalisation divides by; its own 1x1 conv (`spread`,
    no bias, starting at zero) adds into the squeeze, so a block without it warm-starts one
    with it unchanged, and pruning the residual stream slices it as it does `squeeze`.
    In training, `stats` may come from the whole frame while `x` is a crop of it.
    """

    # sqrt(var + EPS) - sqrt(EPS): a finite gradient at zero variance, and exactly 0 for a
    # constant channel, so a pruned (all-zero) channel adds nothing; the ONNX writer uses the same
    EPS = 1e-5

    def __init__(self, channels: int, hidden: int, spread: bool = False) -> None:
        super().__init__()
        self.squeeze = nn.Conv2d(channels, hidden, 1)
        self.spread = nn.Conv2d(channels, hidden, 1, bias=False) if spread else None
        self.gamma = nn.Conv2d(hidden, channels, 1)
        self.beta = nn.Conv2d(hidden, channels, 1)
        for m in (self.gamma, self.beta, self.spread):
            if m is not None:
                nn.init.zeros_(m.weight)
                if m.bias is not None:
                    nn.init.zeros_(m.bias)

    def pool(self, x: torch.Tensor) -> torch.Tensor:
        # x: (N, C, H, W) -> (N, C, 1, 1) means, or with spread (N, 2C, 1, 1): means, then
        #   standard deviations sqrt(max(E[x^2] - E[x]^2, 0) + EPS) - sqrt(EPS), as the ONNX graph
        mean = x.mean(dim=(2, 3), keepdim=True)
        if self.spread is None:
            return mean
        var = ((x * x).mean(dim=(2, 3), keepdim=True) - mean * mean).clamp_min(0)
        return torch.cat([mean, torch.sqrt(var + self.EPS) - self.EPS ** 0.5], dim=1)

    def forward(self, x: torch.Tensor, stats: torch.Tensor | None = None) -> torch.Tensor:
        # x: (N, C, H, W); stats: pool() of the frame x comes from (default: of x itself)
        #   -> (N, C, H, W)
        if stats is None:
            stats = self.pool(x)
        c = x.shape[1]
        t = self.squeeze(stats[:, :c])              # (N, hidden, 1, 1)
        if self.spread is not None:
            t = t + self.spread(stats[:, c:])
        t = F.relu(t)
        return x * (1 + self.gamma(t)) + self.beta(t)
