"""The teacher: the image transformation network of Johnson et al. 2016.

9x9 conv in and out, two stride-2 downsamples (32, 64, 128 channels), five residual
blocks of 128 channels, two 2x upsamples, instance normalisation and reflection
padding. Upsampling is nearest resize followed by a 3x3 conv: the same parameter
count as the published fractionally strided convs, without checkerboard artifacts.
1,679,235 parameters.
"""
from __future__ import annotations

import torch
from torch import nn

from .layers import NearestUp2, Residual, Squash, conv


def _norm_relu(c: int) -> list[nn.Module]:
    return [nn.InstanceNorm2d(c, affine=True), nn.ReLU(inplace=True)]


class Teacher(nn.Module):
    size_multiple = 4

    def __init__(self, channels: tuple[int, int, int] = (32, 64, 128), blocks: int = 5,
                 hidden: list[int] | None = None, up_channels: list[int] | None = None) -> None:
        """`hidden` (each residual block's inner width) and `up_channels` (the two
        upsampling convs' widths) default to the published c3 and (c2, c1); pruning sets them."""
        super().__init__()
        c1, c2, c3 = channels
        self.model_args: dict = {"channels": [c1, c2, c3], "blocks": blocks}
        if hidden is not None or up_channels is not None:
            self.model_args |= {"hidden": list(hidden or [c3] * blocks),
                                "up_channels": list(up_channels or [c2, c1])}
        hidden = list(hidden or [c3] * blocks)
        u1, u2 = up_channels or (c2, c1)
        if len(hidden) != blocks:
            raise ValueError(f"hidden={hidden}: expected {blocks} widths, one per residual block")
        layers: list[nn.Module] = [conv(3, c1, 9, reflect=True), *_norm_relu(c1),
                                   conv(c1, c2, 3, 2, reflect=True), *_norm_relu(c2),
                                   conv(c2, c3, 3, 2, reflect=True), *_norm_relu(c3)]
        for h in hidden:
            layers.append(Residual(nn.Sequential(
                conv(c3, h, 3, reflect=True), *_norm_relu(h),
                conv(h, c3, 3, reflect=True), nn.InstanceNorm2d(c3, affine=True))))
        layers += [NearestUp2(), conv(c3, u1, 3, reflect=True), *_norm_relu(u1),
                   NearestUp2(), conv(u1, u2, 3, reflect=True), *_norm_relu(u2),
                   conv(u2, 3, 9, reflect=True), Squash()]
        self.net = nn.Sequential(*layers)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        # x: (N, 3, H, W) RGB in [0, 1], H and W multiples of 4 -> (N, 3, H, W) RGB in [0, 1]
        return self.net(x)
