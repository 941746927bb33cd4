"""The teacher: the image transformation network of Johnson et al. 2016.

9x9 conv in and out, two stride-2 downsamples (32, 64, 128 channels), five residual
blocks of 128 channels, two 2x upsamples, instance normalisation and reflection
padding. Upsampling is nearest resize followed by a 3x3 conv: the same parameter
count as the published fractionally strided convs, without checkerboard artifacts.
1,679,235 parameters.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
from limner.runtime.errors import InputError
from torch import nn

from .channel_space import ChannelSpace
from .layers import NearestUp2, Residual, Squash, conv


@dataclass(frozen=True)
class TeacherKnobs:
    """The published shape (Johnson et al. 2016) by default."""
    channels: tuple[int, int, int] = (32, 64, 128)
    blocks: int = 5

    def __post_init__(self) -> None:
        if len(self.channels) != 3 or min(self.channels) < 1:
            raise InputError(f"channels={self.channels}: three positive widths")
        if not 1 <= self.blocks <= 16:
            raise InputError(f"blocks={self.blocks}: must be between 1 and 16")


def teacher_args(knobs: TeacherKnobs) -> dict:
    return {"channels": tuple(knobs.channels), "blocks": knobs.blocks}


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
            raise InputError(f"hidden={hidden}: expected {blocks} widths, one per residual block")
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


def teacher_spaces(net: Teacher) -> dict[str, ChannelSpace]:
    """The teacher's prunable channel spaces (compress/prune.py), ranked by instance-norm
    scale: each conv's output space with its norm; the residual stream (c3) is one space."""
    mods = list(net.net)
    convs = [m for m in mods if isinstance(m, nn.Conv2d)]
    norms = [m for m in mods if isinstance(m, nn.InstanceNorm2d)]
    blocks = [m.body for m in mods if isinstance(m, Residual)]
    conv_in, d1, d2, up1, up2, conv_out = convs
    n_in, n1, n2, nu1, nu2 = norms
    a = net.model_args
    c1, c2, c3 = a["channels"]
    u1, u2 = a.get("up_channels", [c2, c1])
    sp = {"c1": ChannelSpace(c1, [(conv_in, 1)], [d1], [], [n_in]),
          "c2": ChannelSpace(c2, [(d1, 1)], [d2], [], [n1]),
          "c3": ChannelSpace(c3, [(d2, 1)], [up1], [], [n2]),
          "u1": ChannelSpace(u1, [(up1, 1)], [up2], [], [nu1]),
          "u2": ChannelSpace(u2, [(up2, 1)], [conv_out], [], [nu2])}
    for i, b in enumerate(blocks):
        ca, na, _, cb, nb = b
        sp["c3"].consumers.append(ca)
        sp["c3"].producers.append((cb, 1))
        sp["c3"].norms.append(nb)
        sp[f"h{i}"] = ChannelSpace(ca.out_channels, [(ca, 1)], [cb], [], [na])
    return sp


def teacher_shrunk(net: Teacher, n: dict[str, int]) -> Teacher:
    """A fresh teacher with `n[space]` channels in each of teacher_spaces' spaces."""
    hidden = [n[f"h{i}"] for i in range(sum(1 for k in n if k.startswith("h")))]
    return Teacher(channels=(n["c1"], n["c2"], n["c3"]), blocks=net.model_args["blocks"], hidden=hidden,
                   up_channels=[n["u1"], n["u2"]])
