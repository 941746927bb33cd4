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

    def __init__(self, channels: tuple[int, int, int] = (32, 64, 128), blocks: int = 5) -> None:
        super().__init__()
        c1, c2, c3 = channels
        self.model_args = {"channels": [c1, c2, c3], "blocks": blocks}
        layers: list[nn.Module] = [conv(3, c1, 9, reflect=True), *_norm_relu(c1),
                                   conv(c1, c2, 3, 2, reflect=True), *_norm_relu(c2),
                                   conv(c2, c3, 3, 2, reflect=True), *_norm_relu(c3)]
        for _ in range(blocks):
            layers.append(Residual(nn.Sequential(
                conv(c3, c3, 3, reflect=True), *_norm_relu(c3),
                conv(c3, c3, 3, reflect=True), nn.InstanceNorm2d(c3, affine=True))))
        layers += [NearestUp2(), conv(c3, c2, 3, reflect=True), *_norm_relu(c2),
                   NearestUp2(), conv(c2, c1, 3, reflect=True), *_norm_relu(c1),
                   conv(c1, 3, 9, reflect=True), Squash()]
        self.net = nn.Sequential(*layers)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        # x: (N, 3, H, W) RGB in [0, 1], H and W multiples of 4 -> (N, 3, H, W) RGB in [0, 1]
        return self.net(x)
